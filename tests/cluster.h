// A coordinator (graftd) started as a real process on a loopback port it picks, with its own
// data dir and tokens, plus helpers to start workers and call the API. For integration tests.
// Plaintext by default; with a ClusterTls it serves TLS (and optionally mutual TLS) with the
// certificates of scripts/make-certs.sh, and its stubs and workers dial with them.
// Not thread-safe: use from one test thread (stubs may be used from several).
#ifndef GRAFT_TESTS_CLUSTER_H_
#define GRAFT_TESTS_CLUSTER_H_

#include <chrono>
#include <fstream>
#include <memory>
#include <sstream>
#include <string>
#include <tuple>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "proto/sha256.h"
#include "tests/test_util.h"

namespace graft::testing {

// Tokens of the test cluster: two users, an admin, two worker tokens (node1, node2), and a user
// token that was revoked (carol).
inline constexpr char kAlice[] = "alice-token-3f9c";
inline constexpr char kBob[] = "bob-token-77a1";
inline constexpr char kRoot[] = "root-token-c0de";
inline constexpr char kWorker[] = "worker-token-5e5e";
inline constexpr char kWorker2[] = "worker-token-2b2b";
inline constexpr char kRevoked[] = "carol-token-dead";

// TLS for a test cluster. The directory holds scripts/make-certs.sh's files: ca.pem,
// server.pem, server.key (for localhost, 127.0.0.1 and ::1), client.pem, client.key.
struct ClusterTls {
  std::string certs_dir;  // empty: plaintext (the default)
  bool mutual = false;    // graftd also requires client certificates signed by ca.pem (--client-ca)

  bool enabled() const { return !certs_dir.empty(); }
  std::string ca() const { return certs_dir + "/ca.pem"; }
  std::string client_cert() const { return certs_dir + "/client.pem"; }
  std::string client_key() const { return certs_dir + "/client.key"; }
};

// Runs scripts/make-certs.sh into `dir` (which must not hold certificates yet) with the extra
// host names given; fails the current test when it fails. Returns `dir`.
inline std::string MakeCerts(const std::string& dir, const std::string& hostnames = "") {
  CommandResult r = RunCommand(SourceDir() + "/scripts/make-certs.sh " + dir + " " + hostnames);
  EXPECT_EQ(r.exit_code, 0) << r.output;
  return dir;
}

// A coordinator with its own data dir and tokens, on a port it picks.
class Cluster {
 public:
  explicit Cluster(int lease_seconds = 30, std::vector<std::string> extra_flags = {}, ClusterTls tls = {})
      : lease_seconds_(lease_seconds), extra_flags_(std::move(extra_flags)), tls_(std::move(tls)) {
    std::ostringstream tokens;
    for (auto [token, name, role] : {std::tuple{kAlice, "alice", "user"}, std::tuple{kBob, "bob", "user"},
                                     std::tuple{kRoot, "root", "admin"}, std::tuple{kWorker, "node1", "worker"},
                                     std::tuple{kWorker2, "node2", "worker"}}) {
      tokens << "- {name: " << name << ", role: " << role << ", sha256: " << graft::Sha256Hex(token) << "}\n";
    }
    tokens << "- {name: carol, role: user, sha256: " << graft::Sha256Hex(kRevoked)
           << ", created: \"2026-01-01T00:00:00Z\", revoked: \"2026-01-02T00:00:00Z\"}\n";
    WriteFile(dir_.path() + "/tokens.yaml", tokens.str());
    WriteFile(dir_.path() + "/worker.token", std::string(kWorker) + "\n");
    StartCoordinator();
  }

  // Starts graftd on the cluster's address, data dir and tokens. `run_as` goes before graftd's
  // own command line (e.g. setpriv dropping to another user); empty: as this process.
  void StartCoordinator(const std::vector<std::string>& run_as = {}) {
    std::remove((dir_.path() + "/port").c_str());
    std::vector<std::string> argv = run_as;
    argv.insert(argv.end(), {BinaryDir() + "/bin/graftd", "--listen", "127.0.0.1:" + std::to_string(port_), "--data-dir",
                             dir_.path() + "/data", "--tokens-file", dir_.path() + "/tokens.yaml", "--lease-seconds",
                             std::to_string(lease_seconds_), "--port-file", dir_.path() + "/port"});
    if (tls_.enabled()) {
      argv.insert(argv.end(), {"--tls-cert", tls_.certs_dir + "/server.pem", "--tls-key", tls_.certs_dir + "/server.key"});
      if (tls_.mutual) argv.insert(argv.end(), {"--client-ca", tls_.ca()});
    }
    argv.insert(argv.end(), extra_flags_.begin(), extra_flags_.end());
    graftd_ = std::make_unique<ScopedProcess>(argv, dir_.path() + "/graftd.log");
    ASSERT_TRUE(WaitFor([&] { return !ReadPort().empty(); }, 20000)) << ReadFile(dir_.path() + "/graftd.log");
    port_ = std::stoi(ReadPort());
    std::shared_ptr<grpc::ChannelCredentials> creds = grpc::InsecureChannelCredentials();
    if (tls_.enabled()) {
      // The test's own stubs use gRPC's credentials directly, not graft's TLS code under test.
      grpc::SslCredentialsOptions ssl;
      ssl.pem_root_certs = ReadFile(tls_.ca());
      if (tls_.mutual) {
        ssl.pem_cert_chain = ReadFile(tls_.client_cert());
        ssl.pem_private_key = ReadFile(tls_.client_key());
      }
      creds = grpc::SslCredentials(ssl);
    }
    channel_ = grpc::CreateChannel("127.0.0.1:" + std::to_string(port_), creds);
    jobs_ = v1::Jobs::NewStub(channel_);
    workers_ = v1::Workers::NewStub(channel_);
  }
  // Sends `signal` to graftd (e.g. SIGHUP: reread the tokens file); false if it is gone.
  bool SignalCoordinator(int signal) { return graftd_->Signal(signal); }
  // SIGTERM, then waits for graftd to exit; its exit code (-1 if it did not within 30 s).
  int StopCoordinator() {
    graftd_->Signal(SIGTERM);
    return graftd_->Wait(30000);
  }
  void KillCoordinator() {
    graftd_->Signal(SIGKILL);
    graftd_->Wait(10000);
  }

  // A `graft-worker serve` process with the cluster's address, worker token and TLS files, plus
  // `extra_flags`; its output goes to DIR/NAME.log.
  std::unique_ptr<ScopedProcess> StartWorker(const std::string& name, const std::vector<std::string>& extra_flags = {}) {
    std::vector<std::string> argv = {WorkerBinary(), "serve", "--server",
                                     "127.0.0.1:" + std::to_string(port_), "--token-file", dir_.path() + "/worker.token",
                                     "--work-dir", dir_.path() + "/" + name};
    const std::vector<std::string> tls = TlsFlags();
    argv.insert(argv.end(), tls.begin(), tls.end());
    argv.insert(argv.end(), extra_flags.begin(), extra_flags.end());
    return std::make_unique<ScopedProcess>(argv, dir_.path() + "/" + name + ".log");
  }

  // The flags with which `graft` and `graft-worker serve` dial this cluster: none in plaintext;
  // --ca-file, and for mutual TLS --cert and --key.
  std::vector<std::string> TlsFlags() const {
    if (!tls_.enabled()) return {};
    std::vector<std::string> flags = {"--ca-file", tls_.ca()};
    if (tls_.mutual) flags.insert(flags.end(), {"--cert", tls_.client_cert(), "--key", tls_.client_key()});
    return flags;
  }

  std::unique_ptr<grpc::ClientContext> Ctx(const std::string& token, int timeout_ms = 20000) {
    auto ctx = std::make_unique<grpc::ClientContext>();
    if (!token.empty()) ctx->AddMetadata("authorization", "Bearer " + token);
    ctx->set_deadline(std::chrono::system_clock::now() + std::chrono::milliseconds(timeout_ms));
    return ctx;
  }

  std::string Submit(const std::string& token, const std::string& config, const std::vector<std::string>& sets) {
    v1::SubmitJobRequest req;
    req.set_config_yaml(ReadFile(SourceDir() + "/configs/" + config + ".yaml"));
    req.set_source_name(config + ".yaml");
    for (const auto& s : sets) req.add_overrides(s);
    v1::SubmitJobResponse resp;
    grpc::Status s = jobs_->SubmitJob(Ctx(token).get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return resp.job_id();
  }
  v1::Job Get(const std::string& id, const std::string& token = kAlice) {
    v1::GetJobRequest req;
    req.set_job_id(id);
    v1::Job job;
    grpc::Status s = jobs_->GetJob(Ctx(token).get(), req, &job);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return job;
  }
  std::vector<v1::Point> Metrics(const std::string& id, const std::string& token = kAlice) {
    v1::GetMetricsRequest req;
    req.set_job_id(id);
    v1::GetMetricsResponse resp;
    grpc::Status s = jobs_->GetMetrics(Ctx(token).get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return {resp.points().begin(), resp.points().end()};
  }
  // A worker of the test's own, with no process behind it: registers it with `token` and returns
  // its id ("" after failing the current test).
  std::string RegisterFakeWorker(const std::string& host, const std::string& token = kWorker) {
    v1::RegisterWorkerRequest req;
    req.set_host(host);
    v1::RegisterWorkerResponse resp;
    grpc::Status s = workers_->RegisterWorker(Ctx(token).get(), req, &resp);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return resp.worker_id();
  }
  // Long-polls a lease for that worker for at most `wait_ms`; the reply (has_job false when
  // nothing came, after failing the current test if the call itself failed).
  v1::LeaseJobResponse LeaseFor(const std::string& worker_id, int wait_ms, const std::string& token = kWorker) {
    v1::LeaseJobRequest req;
    req.set_worker_id(worker_id);
    req.set_wait_ms(wait_ms);
    v1::LeaseJobResponse lease;
    grpc::Status s = workers_->LeaseJob(Ctx(token, wait_ms + 20000).get(), req, &lease);
    EXPECT_TRUE(s.ok()) << s.error_message();
    return lease;
  }
  bool WaitState(const std::string& id, v1::JobState state, int timeout_ms) {
    return WaitFor([&] { return Get(id).state() == state; }, timeout_ms);
  }

  const std::string& dir() const { return dir_.path(); }
  int port() const { return port_; }
  std::string address() const { return "127.0.0.1:" + std::to_string(port_); }
  std::shared_ptr<grpc::Channel> channel() { return channel_; }
  v1::Jobs::Stub& jobs() { return *jobs_; }
  v1::Workers::Stub& workers() { return *workers_; }
  std::string Log() const { return ReadFile(dir_.path() + "/graftd.log"); }
  const ClusterTls& tls() const { return tls_; }

 private:
  std::string ReadPort() {
    std::ifstream in(dir_.path() + "/port");
    std::string p;
    in >> p;
    return p;
  }

  ScopedTempDir dir_;
  int lease_seconds_;
  std::vector<std::string> extra_flags_;
  ClusterTls tls_;
  int port_ = 0;
  std::unique_ptr<ScopedProcess> graftd_;
  std::shared_ptr<grpc::Channel> channel_;
  std::unique_ptr<v1::Jobs::Stub> jobs_;
  std::unique_ptr<v1::Workers::Stub> workers_;
};

}  // namespace graft::testing

#endif  // GRAFT_TESTS_CLUSTER_H_
