#!/usr/bin/python3
"""Benchmarks of the service (graftd + graft-worker serve) on this machine, each as the median
and range of RUNS runs, with the command lines printed:

  overhead   200 jobs of 10 steps on 2 workers; per-job overhead =
             (makespan - sum of in-worker training seconds / 2) / 200        target < 20 ms
             (plaintext and TLS, alternating in each run)
  sweep      8 demo-sized jobs on 2 workers, against two parallel chains of
             `graft-worker run` on the same jobs; efficiency = chains / service  target >= 0.95
  ingest     16 concurrent reporting clients (fake workers over the Workers API), batches of
             50 points, durability normal; points stored per second            target >= 20000
             (plaintext and TLS, alternating in each run)
  rss        graftd's resident memory (VmHWM) with 10,000 queued jobs          target < 150 MB

Usage: scripts/bench/service_bench.py [--runs 3] [--only overhead,sweep,ingest,rss]
Uses Debian's python3-grpcio with stubs generated at start by python3-grpc-tools. TLS runs use
certificates made by scripts/make-certs.sh (the openssl command) in the run's directory: graftd
with --tls-cert/--tls-key, workers with --ca-file, the benchmark's own clients over
grpc.ssl_channel_credentials with the same CA. For overhead and ingest the two transports are
measured in the same run, in alternating order, and the TLS/plaintext ratio of each pair is
reported beside both medians.
"""
import argparse
import concurrent.futures
import hashlib
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time

import grpc  # Debian: python3-grpcio

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
BIN = os.path.join(ROOT, "build", "bin")
USER, WORKER = "bench-user-token", "bench-worker-token"


def stubs(tmp):
    subprocess.run([sys.executable, "-m", "grpc_tools.protoc", "-I" + os.path.join(ROOT, "proto"),
                    "--python_out=" + tmp, "--grpc_python_out=" + tmp,
                    os.path.join(ROOT, "proto", "graft", "v1", "graft.proto")], check=True)
    sys.path.insert(0, tmp)
    from graft.v1 import graft_pb2, graft_pb2_grpc  # noqa: E402
    return graft_pb2, graft_pb2_grpc


class Cluster:
    def __init__(self, pb, pb_grpc, workdir, workers=0, lease_seconds=30, tls=False):
        self.pb, self.dir = pb, workdir
        os.makedirs(workdir, exist_ok=True)
        certs = os.path.join(workdir, "certs")
        if tls:
            subprocess.run([os.path.join(ROOT, "scripts", "make-certs.sh"), certs], check=True,
                           stdout=subprocess.DEVNULL)
        with open(os.path.join(workdir, "tokens.yaml"), "w") as f:
            for tok, name, role in ((USER, "bench", "user"), (WORKER, "node", "worker")):
                f.write("- {name: %s, role: %s, sha256: %s}\n" % (name, role, hashlib.sha256(tok.encode()).hexdigest()))
        with open(os.path.join(workdir, "worker.token"), "w") as f:
            f.write(WORKER)
        port_file = os.path.join(workdir, "port")
        self.graftd_cmd = [os.path.join(BIN, "graftd"), "--listen", "127.0.0.1:0", "--port-file", port_file,
                           "--data-dir", os.path.join(workdir, "data"), "--tokens-file", os.path.join(workdir, "tokens.yaml"),
                           "--lease-seconds", str(lease_seconds), "--max-sweep-jobs", "10000"]
        if tls:
            self.graftd_cmd += ["--tls-cert", os.path.join(certs, "server.pem"), "--tls-key",
                                os.path.join(certs, "server.key")]
        self.graftd = subprocess.Popen(self.graftd_cmd, stdout=subprocess.DEVNULL, stderr=open(os.path.join(workdir, "graftd.log"), "w"))
        for _ in range(200):
            if os.path.exists(port_file) and open(port_file).read().strip():
                break
            time.sleep(0.05)
        self.address = "127.0.0.1:" + open(port_file).read().strip()
        if tls:
            with open(os.path.join(certs, "ca.pem"), "rb") as f:
                self.channel = grpc.secure_channel(self.address, grpc.ssl_channel_credentials(root_certificates=f.read()))
        else:
            self.channel = grpc.insecure_channel(self.address)
        self.jobs = pb_grpc.JobsStub(self.channel)
        self.workers_api = pb_grpc.WorkersStub(self.channel)
        self.md = (("authorization", "Bearer " + USER),)
        self.wmd = (("authorization", "Bearer " + WORKER),)
        self.workers = []
        env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
        for n in range(workers):
            self.worker_cmd = [os.path.join(BIN, "graft-worker"), "serve", "--server", self.address, "--token-file",
                               os.path.join(workdir, "worker.token"), "--work-dir", os.path.join(workdir, "w%d" % n)]
            if tls:
                self.worker_cmd += ["--ca-file", os.path.join(certs, "ca.pem")]
            self.workers.append(subprocess.Popen(self.worker_cmd, env=env, stdout=subprocess.DEVNULL,
                                                 stderr=open(os.path.join(workdir, "w%d.log" % n), "w")))

    def submit(self, text, overrides=()):
        return self.jobs.SubmitJob(self.pb.SubmitJobRequest(config_yaml=text, overrides=list(overrides)),
                                   metadata=self.md, timeout=120)

    def all_jobs(self):
        out, token = [], ""
        while True:
            r = self.jobs.ListJobs(self.pb.ListJobsRequest(page_size=500, page_token=token), metadata=self.md, timeout=60)
            out.extend(r.jobs)
            token = r.next_page_token
            if not token:
                return out

    def wait_all(self, ids, timeout):
        final = {self.pb.JOB_STATE_SUCCEEDED, self.pb.JOB_STATE_FAILED, self.pb.JOB_STATE_CANCELLED}
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            jobs = {j.id: j for j in self.all_jobs()}
            if all(jobs[i].state in final for i in ids):
                return [self.jobs.GetJob(self.pb.GetJobRequest(job_id=i), metadata=self.md, timeout=60) for i in ids]
            time.sleep(0.05)
        raise RuntimeError("jobs did not finish in time")

    def rss_mb(self):
        with open("/proc/%d/status" % self.graftd.pid) as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
        return float("nan")

    def stop(self):
        for p in self.workers + [self.graftd]:
            p.terminate()
        for p in self.workers + [self.graftd]:
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                p.kill()
        self.channel.close()


def config_text():
    with open(os.path.join(ROOT, "configs", "parcel-routing.yaml")) as f:
        return f.read()


def bench_overhead(pb, pb_grpc, tmp, run, tls=False):
    c = Cluster(pb, pb_grpc, os.path.join(tmp, "overhead%d%s" % (run, "-tls" if tls else "")), workers=2, tls=tls)
    try:
        text = config_text() + "sweep:\n  seeds: [%s]\n" % ", ".join(str(i) for i in range(1, 201))
        t0 = time.time()
        reply = c.submit(text, ["training.steps=10", "evaluation.every=10", "evaluation.triples=256"])
        jobs = c.wait_all(list(reply.job_ids), 600)
        t1 = time.time()
        assert all(j.state == pb.JOB_STATE_SUCCEEDED for j in jobs), [j.error for j in jobs if j.error][:3]
        start = min(j.submitted_ms for j in jobs) / 1000.0
        end = max(j.finished_ms for j in jobs) / 1000.0
        train = sum(json.loads(j.result_json)["wall_s"] for j in jobs)
        makespan = end - start
        overhead = (makespan - train / 2) / len(jobs)
        if run < 2:
            print("  $", " ".join(c.graftd_cmd), "\n  $", " ".join(c.worker_cmd), "(x2)")
        print("  run %d %-9s: %d jobs, makespan %.2f s (client saw %.2f s), training %.2f s in all, overhead %.1f ms/job"
              % (run + 1, "tls" if tls else "plaintext", len(jobs), makespan, t1 - t0, train, overhead * 1000))
        return overhead * 1000
    finally:
        c.stop()


def bench_sweep(pb, pb_grpc, tmp, run):
    seeds = list(range(1, 9))
    sets = ["training.steps=2000"]  # the shipped demo size
    # Two parallel chains of graft-worker run on the same 8 jobs.
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1")
    chains_dir = os.path.join(tmp, "chains%d" % run)
    t0 = time.time()
    procs = []
    for chain in range(2):
        script = " && ".join(
            "%s run %s --out %s/s%d --set seed=%d --set %s > /dev/null 2>&1" %
            (os.path.join(BIN, "graft-worker"), os.path.join(ROOT, "configs", "parcel-routing.yaml"), chains_dir, s, s, sets[0])
            for s in seeds[chain::2])
        procs.append(subprocess.Popen(["/bin/sh", "-c", script], env=env))
    for p in procs:
        assert p.wait() == 0
    chains = time.time() - t0
    c = Cluster(pb, pb_grpc, os.path.join(tmp, "sweep%d" % run), workers=2)
    try:
        text = config_text() + "sweep:\n  seeds: [%s]\n" % ", ".join(map(str, seeds))
        t0 = time.time()
        reply = c.submit(text, sets)
        jobs = c.wait_all(list(reply.job_ids), 600)
        service = time.time() - t0
        assert all(j.state == pb.JOB_STATE_SUCCEEDED for j in jobs)
    finally:
        c.stop()
    eff = chains / service
    print("  run %d: 8 jobs of 2000 steps: two chains of graft-worker run %.2f s, service %.2f s (submit to last "
          "finish), efficiency %.3f" % (run + 1, chains, service, eff))
    return eff


def bench_ingest(pb, pb_grpc, tmp, run, tls=False):
    c = Cluster(pb, pb_grpc, os.path.join(tmp, "ingest%d%s" % (run, "-tls" if tls else "")), workers=0,
                lease_seconds=120, tls=tls)
    try:
        n_clients, batches, batch = 16, 60, 50
        text = config_text() + "sweep:\n  seeds: [%s]\n" % ", ".join(str(i) for i in range(1, n_clients + 1))
        c.submit(text, ["training.steps=1000000"])
        leases = []
        for i in range(n_clients):
            w = c.workers_api.RegisterWorker(pb.RegisterWorkerRequest(host="fake%d" % i), metadata=c.wmd, timeout=30)
            lease = c.workers_api.LeaseJob(pb.LeaseJobRequest(worker_id=w.worker_id, wait_ms=1000), metadata=c.wmd, timeout=30)
            assert lease.has_job
            leases.append((w.worker_id, lease))

        def client(k):
            worker_id, lease = leases[k]
            stub = c.workers_api
            for b in range(batches):
                pts = [pb.Point(step=b * batch + i + 1, metrics_json='{"step": %d, "iia_held_out": {"value": 0.5}}' % (b * batch + i + 1))
                       for i in range(batch)]
                r = stub.Report(pb.ReportRequest(worker_id=worker_id, job_id=lease.job_id, attempt=lease.attempt,
                                                 points=pts, step=(b + 1) * batch), metadata=c.wmd, timeout=60)
                assert r.acknowledged_step == (b + 1) * batch
            return batches * batch

        t0 = time.time()
        with concurrent.futures.ThreadPoolExecutor(n_clients) as ex:
            total = sum(ex.map(client, range(n_clients)))
        dt = time.time() - t0
        # Every point stored.
        stored = sum(len(c.jobs.GetMetrics(pb.GetMetricsRequest(job_id=l.job_id), metadata=c.md, timeout=60).points)
                     for _, l in leases)
        assert stored == total, (stored, total)
        rate = total / dt
        print("  run %d %-9s: %d clients x %d batches x %d points = %d points in %.2f s: %.0f points/s; all %d stored"
              % (run + 1, "tls" if tls else "plaintext", n_clients, batches, batch, total, dt, rate, stored))
        return rate
    finally:
        c.stop()


def bench_rss(pb, pb_grpc, tmp, run):
    c = Cluster(pb, pb_grpc, os.path.join(tmp, "rss%d" % run), workers=0)
    try:
        base = c.rss_mb()
        text = config_text() + "sweep:\n  seeds: [%s]\n" % ", ".join(str(i) for i in range(1, 1001))
        for _ in range(10):
            c.submit(text)
        info = c.jobs.GetServerInfo(pb.GetServerInfoRequest(), metadata=c.md, timeout=30)
        assert info.queued_jobs == 10000, info.queued_jobs
        rss = c.rss_mb()
        print("  run %d: %d queued jobs; graftd peak RSS %.1f MB (%.1f MB at start)" % (run + 1, info.queued_jobs, rss, base))
        return rss
    finally:
        c.stop()


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--runs", type=int, default=3)
    ap.add_argument("--only", default="overhead,sweep,ingest,rss")
    a = ap.parse_args()
    tmp = tempfile.mkdtemp(prefix="graft-bench-")
    try:
        pb, pb_grpc = stubs(tmp)
        benches = {"overhead": (bench_overhead, "ms/job", "< 20"), "sweep": (bench_sweep, "efficiency", ">= 0.95"),
                   "ingest": (bench_ingest, "points/s", ">= 20000"), "rss": (bench_rss, "MB", "< 150")}
        both = {"overhead", "ingest"}  # measured over plaintext and TLS
        for name in a.only.split(","):
            fn, unit, target = benches[name]
            print("== %s (target %s %s)" % (name, target, unit))
            if name not in both:
                values = [fn(pb, pb_grpc, tmp, r) for r in range(a.runs)]
                print("   %s: median %.3f %s, range %.3f-%.3f over %d runs" % (name, statistics.median(values), unit,
                                                                          min(values), max(values), a.runs))
                continue
            values = {False: [], True: []}
            for r in range(a.runs):
                for tls in ((False, True) if r % 2 == 0 else (True, False)):  # alternate which goes first
                    values[tls].append(fn(pb, pb_grpc, tmp, r, tls=tls))
            for tls in (False, True):
                v = values[tls]
                print("   %s %s: median %.3f %s, range %.3f-%.3f over %d runs" % (
                    name, "tls" if tls else "plaintext", statistics.median(v), unit, min(v), max(v), a.runs))
            ratios = [t / p for t, p in zip(values[True], values[False])]
            print("   %s tls / plaintext per run: median %.3f, range %.3f-%.3f" % (
                name, statistics.median(ratios), min(ratios), max(ratios)))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
