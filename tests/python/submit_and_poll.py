#!/usr/bin/python3
"""Submits a job to graftd from Python and polls it to its end, using only Debian's
python3-grpcio and stubs generated here by python3-grpc-tools: proof that scripts in other
languages can drive graft through its documented API.

usage: submit_and_poll.py --address HOST:PORT --token TOKEN --proto-dir DIR --config FILE
                          [--set key=value ...] [--timeout SECONDS]

Prints one JSON object (job id, final state, number of points, last step) and exits 0 when the
job succeeded with a point at its last step, 1 otherwise. A missing module is an error.
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

import grpc  # Debian: python3-grpcio


def generate_stubs(proto_dir, out_dir):
    # python3-grpc-tools ships grpc_tools.protoc; run it as a module of this interpreter.
    cmd = [sys.executable, "-m", "grpc_tools.protoc", "-I" + proto_dir, "--python_out=" + out_dir,
           "--grpc_python_out=" + out_dir, os.path.join(proto_dir, "graft", "v1", "graft.proto")]
    subprocess.run(cmd, check=True)
    sys.path.insert(0, out_dir)
    from graft.v1 import graft_pb2, graft_pb2_grpc  # noqa: E402 (generated just now)
    return graft_pb2, graft_pb2_grpc


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--address", required=True)
    ap.add_argument("--token", required=True)
    ap.add_argument("--proto-dir", required=True)
    ap.add_argument("--config", required=True)
    ap.add_argument("--set", action="append", default=[])
    ap.add_argument("--timeout", type=float, default=120.0)
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        pb, pb_grpc = generate_stubs(args.proto_dir, tmp)
        metadata = (("authorization", "Bearer " + args.token),)
        with grpc.insecure_channel(args.address) as channel:
            jobs = pb_grpc.JobsStub(channel)
            with open(args.config) as f:
                text = f.read()
            reply = jobs.SubmitJob(pb.SubmitJobRequest(config_yaml=text, overrides=args.set,
                                                       source_name=os.path.basename(args.config)),
                                   metadata=metadata, timeout=30)
            job_id = reply.job_id
            final = {pb.JOB_STATE_SUCCEEDED, pb.JOB_STATE_FAILED, pb.JOB_STATE_CANCELLED}
            deadline = time.monotonic() + args.timeout
            polls = 0
            while True:  # bounded by the deadline
                job = jobs.GetJob(pb.GetJobRequest(job_id=job_id), metadata=metadata, timeout=30)
                polls += 1
                if job.state in final or time.monotonic() > deadline:
                    break
                time.sleep(0.2)
            points = jobs.GetMetrics(pb.GetMetricsRequest(job_id=job_id), metadata=metadata, timeout=30).points
            out = {
                "job_id": job_id,
                "state": pb.JobState.Name(job.state),
                "polls": polls,
                "points": len(points),
                "last_step": points[-1].step if points else None,
                "total_steps": job.total_steps,
                "iia_held_out": json.loads(points[-1].metrics_json)["iia_held_out"]["value"] if points else None,
            }
            print(json.dumps(out))
            ok = (job.state == pb.JOB_STATE_SUCCEEDED and points and points[-1].step == job.total_steps)
            return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
