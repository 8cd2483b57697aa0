#!/usr/bin/env bash
# A private single-node Slurm for graft's tests and for trying the sbatch template on one
# machine: its own munged, slurmctld and slurmd, started by hand (no systemd), listening on
# 127.0.0.1 only, with every file under DIR.
#
#   scripts/slurm/test-cluster.sh up DIR       start; prints "ready" when sbatch works, and
#                                              writes DIR/env.sh (source it: SLURM_CONF)
#   scripts/slurm/test-cluster.sh down DIR     cancel every job, stop the daemons by PID, sweep
#                                              stray job steps; exit 0 only if nothing is left
#   scripts/slurm/test-cluster.sh status DIR   which daemons of DIR are running
#
# DIR: an absolute or relative path without whitespace, short enough that
# DIR/munge/run/munge.socket.2 stays under 100 characters. Ports: GRAFT_SLURM_PORT (slurmctld;
# slurmd uses the next one) or two free ports picked at random. Jobs run as the caller (root
# on the test machines). Needs Debian's slurmctld, slurmd, slurm-client and munge
# (scripts/setup.sh). Exit codes: 0 done, 1 a daemon failed or something was left running,
# 2 usage, 3 Slurm is not installed (the test reports that as the reason it cannot run).
set -euo pipefail
umask 022

usage() {
  echo "usage: $0 up|down|status DIR" >&2
  exit 2
}
(($# == 2)) || usage
command=$1
if [[ $2 =~ [[:space:]] ]]; then
  echo "test-cluster: DIR may not contain whitespace (slurm.conf paths): '$2'" >&2
  exit 2
fi
mkdir -p "$2"
DIR=$(cd "$2" && pwd -P)
SOCKET=$DIR/munge/run/munge.socket.2
SLURM_CONF_FILE=$DIR/etc/slurm.conf
DAEMONS=(slurmd slurmctld munged)  # stop order: compute daemon and controller, then munge

log() { echo "test-cluster: $*" >&2; }

# --- processes ------------------------------------------------------------------------------

# True when PID exists and is not a zombie (a zombie has exited; only its parent's wait is
# missing, and PID 1 here reaps late, so kill -0 would call it alive).
alive() {
  local stat
  stat=$(cat "/proc/$1/stat" 2>/dev/null) || return 1
  stat=${stat##*) }  # the state field follows the parenthesised command name
  [[ ${stat%% *} != Z ]]
}

# True when PID's command line names a path under DIR, so a PID recycled by an unrelated
# process is never signalled.
ours() {
  local cmdline
  cmdline=$(tr '\0' ' ' <"/proc/$1/cmdline" 2>/dev/null) || return 1
  [[ $cmdline == *"$DIR/"* ]]
}

recorded_pid() {  # the PID this script recorded for daemon $1, or nothing
  local f=$DIR/pids/$1
  [[ -s $f ]] && cat "$f"
  return 0
}

# Sends signal $1 to each daemon named in the remaining arguments that is still alive and ours.
signal_daemons() {
  local sig=$1 name pid
  shift
  for name in "$@"; do
    pid=$(recorded_pid "$name")
    if [[ -n $pid ]] && alive "$pid" && ours "$pid"; then kill "-$sig" "$pid" 2>/dev/null || true; fi
  done
}

# Waits at most $1 seconds for every daemon named in the remaining arguments to be gone.
wait_daemons_gone() {
  local deadline=$((SECONDS + $1)) name pid left
  shift
  while :; do
    left=0
    for name in "$@"; do
      pid=$(recorded_pid "$name")
      if [[ -n $pid ]] && alive "$pid" && ours "$pid"; then left=1; fi
    done
    ((left == 0)) && return 0
    ((SECONDS >= deadline)) && return 1
    sleep 0.1
  done
}

# PIDs of live Slurm or munge processes that hold a file under DIR open: job step daemons
# (slurmstepd keeps DIR/log/slurmd.log open) and any daemon whose PID file was lost.
stray_pids() {
  local p comm fd target
  for p in /proc/[0-9]*; do
    p=${p#/proc/}
    comm=$(cat "/proc/$p/comm" 2>/dev/null) || continue
    case $comm in slurmstepd | slurmd | slurmctld | munged) ;; *) continue ;; esac
    alive "$p" || continue
    for fd in "/proc/$p/fd/"*; do
      target=$(readlink "$fd" 2>/dev/null) || continue
      if [[ $target == "$DIR/"* ]]; then
        echo "$p"
        break
      fi
    done
  done
}

# PIDs of live processes of this cluster's jobs that escaped Slurm's tracking: a batch script
# that forks a worker and dies leaves the worker reparented, and proctrack/linuxproc, which
# follows the parent chain, no longer sees it. Every job process carries SLURM_CONF=our conf.
escaped_job_pids() {
  local p env
  for p in /proc/[0-9]*; do
    p=${p#/proc/}
    ((p == $$)) && continue
    alive "$p" || continue
    env=$(tr '\0' '\n' 2>/dev/null <"/proc/$p/environ") || continue
    if grep -qxF "SLURM_CONF=$SLURM_CONF_FILE" <<<"$env" && grep -q '^SLURM_JOB_ID=' <<<"$env"; then echo "$p"; fi
  done
}

# PID $1 and all its live descendants, parents first.
with_descendants() {
  local queue=("$1") pid child
  while ((${#queue[@]})); do
    pid=${queue[0]}
    queue=("${queue[@]:1}")
    echo "$pid"
    for child in $(ps -o pid= --ppid "$pid" 2>/dev/null); do queue+=("$child"); done
  done
}

slurm() { SLURM_CONF=$SLURM_CONF_FILE "$@"; }

# --- up -------------------------------------------------------------------------------------

port_in_use() {  # true when TCP port $1 is listening on any address (IPv4 or IPv6)
  local hex
  hex=$(printf '%04X' "$1")
  awk -v h=":$hex" 'NR > 1 && $4 == "0A" && substr($2, length($2) - 4) == h { found = 1 } END { exit !found }' \
    /proc/net/tcp /proc/net/tcp6 2>/dev/null
}

pick_port() {
  if [[ -n ${GRAFT_SLURM_PORT:-} ]]; then
    echo "$GRAFT_SLURM_PORT"
    return
  fi
  local i p
  for ((i = 0; i < 50; i++)); do
    p=$((20000 + RANDOM % 30000))
    if ! port_in_use "$p" && ! port_in_use $((p + 1)); then
      echo "$p"
      return
    fi
  done
  log "no two free adjacent ports found in 50 tries"
  return 1
}

# Waits at most $2 seconds for the command in the remaining arguments to succeed, failing early
# when daemon $1 has exited (its log is printed by the caller).
wait_ready() {
  local name=$1 timeout=$2 deadline pid
  shift 2
  deadline=$((SECONDS + timeout))
  pid=$(recorded_pid "$name")
  until "$@" >/dev/null 2>&1; do
    if ! alive "$pid"; then
      log "$name exited during start-up"
      return 1
    fi
    if ((SECONDS >= deadline)); then
      log "$name not ready after ${timeout}s"
      return 1
    fi
    sleep 0.1
  done
}

munge_ready() { munge -n -S "$SOCKET" | unmunge -S "$SOCKET"; }
controller_ready() { slurm scontrol ping | grep -q 'is UP'; }
node_ready() { [[ $(slurm sinfo -h -n "$NODE" -o %T) == idle ]]; }

start_daemon() {  # name, then the command; output to DIR/log/NAME.out
  local name=$1
  shift
  "$@" >"$DIR/log/$name.out" 2>&1 </dev/null &
  echo $! >"$DIR/pids/$name"
}

write_config() {
  local host=$1 ctld_port=$2 node_line mem
  # The node as slurmd detects it; RealMemory lowered to 90% so the node never drains for
  # having "less" memory than configured.
  node_line=$(slurmd -C | head -n 1)
  mem=$(sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' <<<"$node_line")
  node_line=$(sed "s/RealMemory=[0-9]*/RealMemory=$((mem * 9 / 10))/; s/^NodeName=[^ ]*/NodeName=$host/" <<<"$node_line")
  : >"$DIR/etc/plugstack.conf"
  cat >"$SLURM_CONF_FILE" <<EOF
# Written by scripts/slurm/test-cluster.sh: a private single-node cluster on 127.0.0.1.
ClusterName=grafttest
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=$ctld_port
SlurmdPort=$((ctld_port + 1))
CommunicationParameters=NoCtldInAddrAny,NoInAddrAny
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
AuthInfo=socket=$SOCKET
StateSaveLocation=$DIR/state
SlurmdSpoolDir=$DIR/spool/slurmd
SlurmctldPidFile=$DIR/run/slurmctld.pid
SlurmdPidFile=$DIR/run/slurmd.pid
SlurmctldLogFile=$DIR/log/slurmctld.log
SlurmdLogFile=$DIR/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
PlugStackConfig=$DIR/etc/plugstack.conf
MailProg=/bin/true
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/filetxt
JobCompLoc=$DIR/log/jobcomp.log
MpiDefault=none
SwitchType=switch/none
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/backfill
SchedulerParameters=sched_min_interval=0,batch_sched_delay=0
ReturnToService=2
InactiveLimit=0
KillWait=5
Waittime=0
MinJobAge=300
$node_line NodeAddr=127.0.0.1 NodeHostname=$host State=UNKNOWN
PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP
EOF
}

up() {
  local missing=() b
  for b in munged munge unmunge slurmctld slurmd sbatch squeue scontrol sinfo scancel; do
    command -v "$b" >/dev/null 2>&1 || missing+=("$b")
  done
  if ((${#missing[@]})); then
    log "Slurm is not installed (missing: ${missing[*]}); scripts/setup.sh installs it"
    exit 3
  fi
  if ((${#SOCKET} >= 100)); then
    log "DIR is too long: the munge socket path $SOCKET must stay under 100 characters"
    exit 2
  fi
  local name pid
  for name in "${DAEMONS[@]}"; do
    pid=$(recorded_pid "$name")
    if [[ -n $pid ]] && alive "$pid" && ours "$pid"; then
      log "$name of $DIR is already running (PID $pid); run '$0 down $DIR' first"
      exit 1
    fi
  done
  if [[ $(id -u) -ne 0 ]]; then
    log "slurmd must run as root to start jobs; this is uid $(id -u)"
    exit 3
  fi

  mkdir -p "$DIR/munge/key" "$DIR/munge/lib" "$DIR/munge/run" "$DIR/state" "$DIR/spool/slurmd" \
    "$DIR/run" "$DIR/etc" "$DIR/log" "$DIR/pids"
  chmod 0700 "$DIR/munge/key" "$DIR/munge/lib"
  chmod 0755 "$DIR/munge" "$DIR/munge/run"  # munged wants its socket dir a+x, not g/o-writable
  if [[ ! -s $DIR/munge/key/munge.key ]]; then
    dd if=/dev/urandom of="$DIR/munge/key/munge.key" bs=1024 count=1 status=none
  fi
  chmod 0600 "$DIR/munge/key/munge.key"

  NODE=$(hostname -s)  # slurmctld accepts only the real short host name as its own
  local port
  port=$(pick_port)
  write_config "$NODE" "$port"
  cat >"$DIR/env.sh" <<EOF
# Source this to use the private Slurm of $DIR (sinfo, squeue, sbatch, scontrol, scancel).
export SLURM_CONF=$SLURM_CONF_FILE
EOF

  # Stops whatever started, and shows why, if any step below fails.
  trap 'rc=$?; if ((rc != 0)); then show_logs; down >/dev/null || true; fi' EXIT

  # --force: munged checks every ancestor of its socket; a 0700 home folder above DIR is only
  # a warning then, and root clients still work.
  start_daemon munged munged -F --force --socket="$SOCKET" --key-file="$DIR/munge/key/munge.key" \
    --log-file="$DIR/log/munged.log" --pid-file="$DIR/munge/run/munged.pid" \
    --seed-file="$DIR/munge/lib/munged.seed" --num-threads=2
  wait_ready munged 15 munge_ready
  start_daemon slurmctld slurmctld -D -f "$SLURM_CONF_FILE"
  wait_ready slurmctld 30 controller_ready
  start_daemon slurmd slurmd -D -f "$SLURM_CONF_FILE" -N "$NODE"
  wait_ready slurmd 30 node_ready
  trap - EXIT
  echo "ready: node $NODE, slurmctld 127.0.0.1:$port, SLURM_CONF=$SLURM_CONF_FILE"
}

show_logs() {
  local f
  for f in "$DIR"/log/*.out "$DIR"/log/*.log; do
    [[ -s $f ]] || continue
    echo "--- $f (last 20 lines)" >&2
    tail -n 20 "$f" >&2
  done
}

# --- down -----------------------------------------------------------------------------------

down() {
  if [[ ! -d $DIR/pids ]]; then
    echo "nothing to stop in $DIR"
    return 0
  fi
  local ctld pid jobs deadline
  ctld=$(recorded_pid slurmctld)
  if [[ -n $ctld ]] && alive "$ctld" && ours "$ctld"; then
    # 1. Cancel every job and wait (bounded) for the queue to drain.
    jobs=$(slurm squeue -h -o %F 2>/dev/null | sort -u || true)
    if [[ -n $jobs ]]; then
      # shellcheck disable=SC2086
      slurm scancel $jobs 2>/dev/null || true
      deadline=$((SECONDS + 30))
      while [[ -n $(slurm squeue -h -o %i 2>/dev/null || true) ]] && ((SECONDS < deadline)); do sleep 0.2; done
    fi
  fi
  # 2. Job processes slurmd still knows about (PID is the first column).
  local slurmd_pid
  slurmd_pid=$(recorded_pid slurmd)
  if [[ -n $slurmd_pid ]] && alive "$slurmd_pid" && ours "$slurmd_pid"; then
    for pid in $(slurm scontrol listpids 2>/dev/null | awk 'NR > 1 && $1 ~ /^[0-9]+$/ { print $1 }'); do
      kill -KILL "$pid" 2>/dev/null || true
    done
  fi
  # 3. The daemons: slurmd and slurmctld together, then munged; KILL after 15 s.
  signal_daemons TERM slurmd slurmctld
  if ! wait_daemons_gone 15 slurmd slurmctld; then signal_daemons KILL slurmd slurmctld; fi
  wait_daemons_gone 5 slurmd slurmctld || true
  signal_daemons TERM munged
  if ! wait_daemons_gone 15 munged; then signal_daemons KILL munged; fi
  wait_daemons_gone 5 munged || true
  # 4. Stray step daemons (left when slurmd died with a job running; they ignore TERM).
  local stray
  for pid in $(stray_pids); do
    for stray in $(with_descendants "$pid"); do kill -KILL "$stray" 2>/dev/null || true; done
  done
  # 5. Job processes that escaped tracking (see escaped_job_pids); reported, since a job that
  #    leaves processes behind is a bug of that job.
  local escaped
  escaped=$(escaped_job_pids)
  if [[ -n $escaped ]]; then
    log "job processes had escaped Slurm's tracking; killing them:"
    for pid in $escaped; do
      ps -o pid=,args= -p "$pid" >&2 || true
      kill -KILL "$pid" 2>/dev/null || true
    done
  fi
  # 6. Verify, allowing the kernel a moment to deliver the KILLs.
  deadline=$((SECONDS + 10))
  local left
  while :; do
    left=""
    for name in "${DAEMONS[@]}"; do
      pid=$(recorded_pid "$name")
      if [[ -n $pid ]] && alive "$pid" && ours "$pid"; then left+=" $name($pid)"; fi
    done
    for pid in $(stray_pids); do left+=" stray($pid)"; done
    for pid in $(escaped_job_pids); do left+=" job($pid)"; done
    [[ -z $left ]] && break
    if ((SECONDS >= deadline)); then
      log "still running after stop:$left"
      return 1
    fi
    sleep 0.1
  done
  if [[ -n $escaped ]]; then
    log "stopped, but job processes had escaped Slurm's tracking (killed above)"
    return 1
  fi
  echo "stopped: nothing of $DIR is running"
}

status() {
  local name pid any=1
  for name in "${DAEMONS[@]}"; do
    pid=$(recorded_pid "$name")
    if [[ -n $pid ]] && alive "$pid" && ours "$pid"; then
      echo "$name: running (PID $pid)"
      any=0
    else
      echo "$name: not running"
    fi
  done
  return $any
}

case $command in
  up) up ;;
  down) down ;;
  status) status ;;
  *) usage ;;
esac
