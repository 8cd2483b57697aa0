#include "server/launcher.h"

#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <spawn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cstring>
#include <set>
#include <sstream>

#include "absl/strings/ascii.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "server/coordinator.h"

extern char** environ;

namespace graft::server {
namespace {

int64_t SteadyMs() {
  return std::chrono::duration_cast<std::chrono::milliseconds>(std::chrono::steady_clock::now().time_since_epoch())
      .count();
}

class ProcessRunner : public CommandRunner {
 public:
  CommandOutcome Run(const std::vector<std::string>& argv, const std::map<std::string, std::string>& env,
                     int64_t timeout_ms) override {
    CommandOutcome out;
    if (argv.empty()) {
      out.output = "empty command";
      return out;
    }
    // The environment: the process's own, with `env` replacing or adding variables.
    std::vector<std::string> vars;
    for (char** e = environ; *e != nullptr; ++e) {
      const std::string kv = *e;
      const std::string name = kv.substr(0, kv.find('='));
      if (env.count(name) == 0) vars.push_back(kv);
    }
    for (const auto& [k, v] : env) vars.push_back(k + "=" + v);
    std::vector<char*> envp, args;
    for (auto& v : vars) envp.push_back(v.data());
    envp.push_back(nullptr);
    std::vector<std::string> argv_copy = argv;
    for (auto& a : argv_copy) args.push_back(a.data());
    args.push_back(nullptr);

    int fds[2];
    if (pipe2(fds, O_CLOEXEC) != 0) {
      out.output = absl::StrCat("pipe: ", std::strerror(errno));
      return out;
    }
    posix_spawn_file_actions_t actions;
    posix_spawn_file_actions_init(&actions);
    posix_spawn_file_actions_addopen(&actions, 0, "/dev/null", O_RDONLY, 0);
    posix_spawn_file_actions_adddup2(&actions, fds[1], 1);
    posix_spawn_file_actions_adddup2(&actions, fds[1], 2);
    pid_t pid = -1;
    const int rc = posix_spawnp(&pid, args[0], &actions, nullptr, args.data(), envp.data());
    posix_spawn_file_actions_destroy(&actions);
    close(fds[1]);
    if (rc != 0) {
      close(fds[0]);
      out.output = absl::StrCat("cannot start '", argv[0], "': ", std::strerror(rc));
      return out;
    }
    const int64_t deadline = SteadyMs() + timeout_ms;
    bool timed_out = false;
    char buf[4096];
    for (;;) {
      const int64_t left = deadline - SteadyMs();
      if (left <= 0) {
        timed_out = true;
        break;
      }
      pollfd p{fds[0], POLLIN, 0};
      const int n = poll(&p, 1, static_cast<int>(std::min<int64_t>(left, 1000)));
      if (n < 0 && errno != EINTR) break;
      if (n <= 0) continue;
      const ssize_t got = read(fds[0], buf, sizeof(buf));
      if (got <= 0) break;  // EOF: the command closed its output
      if (out.output.size() < (1 << 20)) out.output.append(buf, static_cast<size_t>(got));
    }
    close(fds[0]);
    if (timed_out) kill(pid, SIGKILL);
    int status = 0;
    while (waitpid(pid, &status, 0) < 0 && errno == EINTR) {
    }
    if (timed_out) {
      out.output += absl::StrCat("\n(killed after ", timeout_ms, " ms)");
      return out;
    }
    out.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : 128 + WTERMSIG(status);
    return out;
  }
};

std::vector<std::string> Words(const std::string& text) {
  return absl::StrSplit(text, ' ', absl::SkipWhitespace());
}

// The first line of `output` with surrounding whitespace removed, for log messages.
std::string Trimmed(const std::string& output) {
  std::string t = output;
  while (!t.empty() && (t.back() == '\n' || t.back() == ' ' || t.back() == '\r')) t.pop_back();
  return t.empty() ? "(no output)" : t;
}

}  // namespace

std::unique_ptr<CommandRunner> CreateProcessRunner() { return std::make_unique<ProcessRunner>(); }

Launcher::Launcher(Coordinator* coordinator, LauncherOptions options, CommandRunner* runner, Clock* clock,
                   std::shared_ptr<spdlog::logger> log)
    : coordinator_(coordinator), options_(std::move(options)), runner_(runner), clock_(clock), log_(std::move(log)) {}

Launcher::~Launcher() { Stop(); }

void Launcher::Start() {
  log_->info("launcher: up to {} workers of {} CPUs through '{} ... {}'", options_.max_workers,
             options_.cpus_per_worker, options_.command, options_.script);
  thread_ = std::thread([this] { Loop(); });
}

void Launcher::Stop() {
  {
    std::lock_guard<std::mutex> lock(mu_);
    stopping_ = true;
  }
  wake_.notify_all();
  if (thread_.joinable()) thread_.join();
}

void Launcher::Loop() {
  std::unique_lock<std::mutex> lock(mu_);
  while (!stopping_) {
    lock.unlock();
    Tick();
    lock.lock();
    wake_.wait_for(lock, std::chrono::milliseconds(options_.interval_ms), [this] { return stopping_; });
  }
}

void Launcher::RefreshPending() {
  const std::vector<std::string> pending = coordinator_->PendingTasks();
  if (pending.empty() || options_.status_command.empty()) return;
  std::set<std::string> arrays;
  for (const auto& t : pending) arrays.insert(t.substr(0, t.find('_')));
  std::vector<std::string> argv = Words(options_.status_command);
  argv.push_back(absl::StrJoin(arrays, ","));
  CommandOutcome r = runner_->Run(argv, options_.env, options_.command_timeout_ms);
  // squeue refuses a list of ids that have all left its memory ("Invalid job id specified"):
  // then nothing is pending any more. Any other failure keeps the pending tasks as they are.
  const bool all_gone = r.exit_code != 0 && r.output.find("Invalid job id") != std::string::npos;
  if (r.exit_code != 0 && !all_gone) {
    log_->warn("launcher: '{}' failed (exit {}): {}", absl::StrJoin(argv, " "), r.exit_code, Trimmed(r.output));
    return;
  }
  std::set<std::string> known;
  if (!all_gone) {
    for (absl::string_view line : absl::StrSplit(r.output, '\n', absl::SkipWhitespace())) {
      known.insert(std::string(absl::StripAsciiWhitespace(line)));
    }
  }
  std::vector<std::string> gone;
  for (const auto& t : pending) {
    if (known.count(t) == 0) gone.push_back(t);
  }
  if (!gone.empty()) coordinator_->ForgetPending(gone);
}

int Launcher::Tick() {
  RefreshPending();
  const Coordinator::FleetDemand d = coordinator_->Demand();
  const int64_t need = d.queued_jobs - d.idle_workers - d.pending_tasks;
  const int64_t room = options_.max_workers - d.live_workers - d.pending_tasks;
  const int64_t n = std::min(need, room);
  if (n <= 0) return 0;
  const int64_t now = clock_->NowMs();
  if (now < next_try_ms_) return 0;

  std::vector<std::string> argv = Words(options_.command);
  argv.push_back(absl::StrCat("--array=0-", n - 1));
  argv.push_back(absl::StrCat("--cpus-per-task=", options_.cpus_per_worker));
  if (!options_.partition.empty()) argv.push_back("--partition=" + options_.partition);
  if (!options_.time_limit.empty()) argv.push_back("--time=" + options_.time_limit);
  argv.push_back(options_.script);
  std::map<std::string, std::string> env = options_.env;
  env["GRAFT_SERVER"] = options_.server;
  env["GRAFT_WORKER_TOKEN_FILE"] = options_.worker_token_file;
  if (!options_.ca_file.empty()) env["GRAFT_CA_FILE"] = options_.ca_file;
  env["GRAFT_IDLE_EXIT"] = absl::StrCat(options_.idle_exit_seconds);
  if (!options_.worker_bin.empty()) env["GRAFT_WORKER_BIN"] = options_.worker_bin;

  CommandOutcome r = runner_->Run(argv, env, options_.command_timeout_ms);
  std::string id;
  if (r.exit_code == 0) {
    const std::string first = r.output.substr(0, r.output.find_first_of(";\n"));
    const std::string trimmed(absl::StripAsciiWhitespace(first));
    if (!trimmed.empty() && std::all_of(trimmed.begin(), trimmed.end(), [](char c) { return c >= '0' && c <= '9'; })) {
      id = trimmed;
    }
  }
  if (id.empty()) {
    backoff_ms_ = backoff_ms_ == 0 ? options_.retry_ms : std::min<int64_t>(backoff_ms_ * 2, 300000);
    next_try_ms_ = now + backoff_ms_;
    log_->error("launcher: '{}' failed (exit {}{}): {}; retrying in {} s", absl::StrJoin(argv, " "), r.exit_code,
                r.exit_code == 0 ? ", no job id on its first line" : "", Trimmed(r.output), backoff_ms_ / 1000);
    return 0;
  }
  backoff_ms_ = 0;
  next_try_ms_ = 0;
  std::vector<std::string> tasks;
  for (int64_t i = 0; i < n; ++i) tasks.push_back(absl::StrCat(i));
  coordinator_->AddPending(id, tasks, now);
  log_->info("launcher: submitted Slurm array job {} with {} worker task(s) for {} queued job(s) ({} idle, {} live)",
             id, n, d.queued_jobs, d.idle_workers, d.live_workers);
  return static_cast<int>(n);
}

}  // namespace graft::server
