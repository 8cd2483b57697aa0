"""graftd's gRPC API for scripts: submit, get, list, watch, metrics, fetch (and cancel).

Uses Debian's python3-grpcio and the stubs the build generates from proto/graft/v1/graft.proto
(graft.v1.graft_pb2 and graft_pb2_grpc, assembled into build/python/graft/v1 by the cmake
target graft_python). Every call sends the token as `authorization: Bearer TOKEN`. A failed
call raises GraftError with the gRPC status code's name and graftd's message.
"""

import hashlib
import json
import os


class GraftError(Exception):
    """A call graftd refused or could not answer: `code` is the gRPC status name
    ("NOT_FOUND", "UNAUTHENTICATED", "UNAVAILABLE", ...), `message` graftd's text."""

    def __init__(self, code, message):
        super().__init__(f"{code}: {message}")
        self.code = code
        self.message = message


_STATES = {1: "queued", 2: "running", 3: "succeeded", 4: "failed", 5: "cancelled"}


def _stubs():
    try:
        from graft.v1 import graft_pb2, graft_pb2_grpc
    except ImportError as e:
        raise ImportError(
            "graft.Client needs the gRPC stubs generated at build time: build the cmake target graft_python "
            "and put build/python on sys.path (" + str(e) + ")") from None
    return graft_pb2, graft_pb2_grpc


def _job_dict(job):
    out = {
        "id": job.id, "name": job.name, "owner": job.owner, "state": _STATES.get(job.state, "unspecified"),
        "priority": job.priority, "labels": dict(job.labels), "attempt": job.attempt,
        "max_attempts": job.max_attempts, "submitted_ms": job.submitted_ms, "started_ms": job.started_ms,
        "finished_ms": job.finished_ms, "total_steps": job.total_steps, "step": job.step,
        "worker_id": job.worker_id, "checkpoint_step": job.checkpoint_step, "sweep_id": job.sweep_id,
        "error": job.error, "cancel_reason": job.cancel_reason,
    }
    if job.spec_yaml:
        out["spec_yaml"] = job.spec_yaml
    if job.result_json:
        out["result"] = json.loads(job.result_json)
    if job.HasField("latest"):
        out["latest"] = _point_dict(job.latest)
    return out


def _point_dict(point):
    return {"step": point.step, "attempt": point.attempt, "metrics": json.loads(point.metrics_json or "{}")}


def _event_dict(job_id, event):
    kind = event.WhichOneof("event")
    if kind == "state_change":
        return {"job_id": job_id, "type": "state", "job": _job_dict(event.state_change)}
    if kind == "point":
        d = _point_dict(event.point)
        d.update({"job_id": job_id, "type": "point"})
        return d
    if kind == "rewind":
        return {"job_id": job_id, "type": "rewind", "from_step": event.rewind.from_step,
                "attempt": event.rewind.attempt}
    return {"job_id": job_id, "type": "unknown"}


class Client:
    """A connection to graftd at `server` ("host:port").

    token:    the bearer token (default: $GRAFT_TOKEN)
    ca_file:  TLS: the PEM CA that signed graftd's certificate (default: $GRAFT_CA_FILE; none:
              plaintext, which graftd allows on loopback or with --allow-plaintext)
    cert_file, key_file: mutual TLS: this client's PEM certificate and key
    server_name: the name graftd's certificate carries, when it is not the host of `server`
    timeout:  seconds per unary call and per download
    """

    def __init__(self, server, token=None, ca_file=None, cert_file=None, key_file=None, server_name=None,
                 timeout=30.0):
        import grpc
        self._grpc = grpc
        self._pb, pb_grpc = _stubs()
        token = token if token is not None else os.environ.get("GRAFT_TOKEN", "")
        if not token:
            raise ValueError("graft.Client: no token (pass token= or set GRAFT_TOKEN)")
        self._metadata = (("authorization", "Bearer " + token),)
        self._timeout = timeout
        ca_file = ca_file if ca_file is not None else os.environ.get("GRAFT_CA_FILE")  # "": plaintext
        if ca_file:
            def read(path):
                with open(path, "rb") as f:
                    return f.read()
            creds = grpc.ssl_channel_credentials(
                root_certificates=read(ca_file),
                private_key=read(key_file) if key_file else None,
                certificate_chain=read(cert_file) if cert_file else None)
            options = [("grpc.ssl_target_name_override", server_name)] if server_name else []
            self._channel = grpc.secure_channel(server, creds, options=options)
        else:
            self._channel = grpc.insecure_channel(server)
        self._jobs = pb_grpc.JobsStub(self._channel)

    def close(self):
        self._channel.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def _call(self, method, request, timeout=None):
        try:
            return method(request, metadata=self._metadata, timeout=timeout or self._timeout)
        except self._grpc.RpcError as e:
            raise GraftError(e.code().name, e.details()) from None

    def submit(self, config, overrides=(), priority=0, labels=None, text=None):
        """Submits the config file `config` (or YAML `text` when config is None) with `--set`
        style overrides ("key.path=value"). Returns {"job_id", "sweep_id", "job_ids"}.
        A bad config raises GraftError("INVALID_ARGUMENT", "FILE:LINE:COL: ...")."""
        if text is None:
            with open(config) as f:
                text = f.read()
            source = os.path.basename(config)
        else:
            source = "config.yaml"
        reply = self._call(self._jobs.SubmitJob, self._pb.SubmitJobRequest(
            config_yaml=text, overrides=list(overrides), priority=priority, labels=labels or {}, source_name=source))
        return {"job_id": reply.job_id, "sweep_id": reply.sweep_id, "job_ids": list(reply.job_ids)}

    def get(self, job_id):
        """The job as a dict (state as its name, `result` parsed, `latest` point)."""
        return _job_dict(self._call(self._jobs.GetJob, self._pb.GetJobRequest(job_id=job_id)))

    def list(self, state=None, sweep=None, labels=None):
        """Every job you may see (newest first), following pages; filters as `graft list`."""
        state_value = 0
        if state:
            names = {v: k for k, v in _STATES.items()}
            if state not in names:
                raise ValueError(f"state '{state}': expected one of {sorted(names)}")
            state_value = names[state]
        jobs, token = [], ""
        for _ in range(100000):  # bounded
            reply = self._call(self._jobs.ListJobs, self._pb.ListJobsRequest(
                state=state_value, sweep_id=sweep or "", labels=labels or {}, page_size=500, page_token=token))
            jobs.extend(_job_dict(j) for j in reply.jobs)
            token = reply.next_page_token
            if not token:
                break
        return jobs

    def cancel(self, job_id, reason=""):
        return _job_dict(self._call(self._jobs.CancelJob, self._pb.CancelJobRequest(job_id=job_id, reason=reason)))

    def watch(self, target, from_step=0, timeout=None):
        """Iterates over the events of a job ("j-N") or a sweep ("s-N") until it ends, as
        `graft watch --json` prints them: {"job_id", "type": "state", "job"}, {"job_id",
        "type": "point", "step", "attempt", "metrics"} or {"job_id", "type": "rewind",
        "from_step", "attempt"}. `timeout` (seconds) bounds the whole stream
        (GraftError("DEADLINE_EXCEEDED")). Breaking out of the loop cancels the stream."""
        if target.startswith("s-"):
            call = self._jobs.WatchSweep(self._pb.WatchSweepRequest(sweep_id=target, from_step=from_step),
                                         metadata=self._metadata, timeout=timeout)
            unwrap = lambda e: _event_dict(e.job_id, e.event)  # noqa: E731
        else:
            call = self._jobs.WatchJob(self._pb.WatchJobRequest(job_id=target, from_step=from_step),
                                       metadata=self._metadata, timeout=timeout)
            unwrap = lambda e: _event_dict(target, e)  # noqa: E731
        try:
            for event in call:
                yield unwrap(event)
        except self._grpc.RpcError as e:
            raise GraftError(e.code().name, e.details()) from None
        finally:
            call.cancel()

    def metrics(self, job_id, frame=False):
        """The stored points: one dict per evaluation (the metrics object with "step" and
        "attempt"), or with frame=True a pandas DataFrame with dotted columns."""
        reply = self._call(self._jobs.GetMetrics, self._pb.GetMetricsRequest(job_id=job_id))
        rows = []
        for p in reply.points:
            m = json.loads(p.metrics_json or "{}")
            m["step"], m["attempt"] = p.step, p.attempt
            rows.append(m)
        if frame:
            from graft.run import metrics_frame
            return metrics_frame(rows)
        return rows

    ARTIFACTS = ("weights.pt", "metrics.jsonl", "result.json", "spec.yaml", "failures.jsonl", "checkpoint.pt",
                 "scan.json", "scan.tsv", "scan.svg", "das.json", "rotation.pt")

    def fetch(self, job_id, out_dir, names=None):
        """Downloads the job's artifacts into `out_dir`, each checked against its SHA-256 (a
        damaged one is deleted and raises GraftError("DATA_LOSS")); artifacts graftd does not
        hold are skipped. Returns {name: path} of those written; graft.load_run(out_dir) reads them."""
        os.makedirs(out_dir, exist_ok=True)
        written = {}
        for name in names or self.ARTIFACTS:
            path = os.path.join(out_dir, name)
            part = path + ".part"
            sha, total, want, got = hashlib.sha256(), -1, "", 0
            try:
                with open(part, "wb") as f:
                    for chunk in self._jobs.DownloadArtifact(
                            self._pb.DownloadArtifactRequest(job_id=job_id, name=name), metadata=self._metadata,
                            timeout=self._timeout):
                        if chunk.sha256:
                            want, total = chunk.sha256, chunk.total_bytes
                        sha.update(chunk.data)
                        got += len(chunk.data)
                        f.write(chunk.data)
            except self._grpc.RpcError as e:
                os.remove(part)
                if e.code() == self._grpc.StatusCode.NOT_FOUND:
                    continue
                raise GraftError(e.code().name, e.details()) from None
            if got != total or sha.hexdigest() != want:
                os.remove(part)
                raise GraftError("DATA_LOSS", f"{name} of {job_id} arrived damaged: {got} bytes with SHA-256 "
                                              f"{sha.hexdigest()}, expected {total} bytes with {want}")
            os.replace(part, path)
            written[name] = path
        return written
