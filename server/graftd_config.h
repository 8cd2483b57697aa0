// graftd's settings: defaults, overridden by a YAML file (configs/graftd.yaml), overridden by
// flags. Thread-safety: a plain value.
#ifndef GRAFT_SERVER_GRAFTD_CONFIG_H_
#define GRAFT_SERVER_GRAFTD_CONFIG_H_

#include <cstdint>
#include <string>

#include "absl/status/statusor.h"
#include "configs/reader/spec.h"
#include "server/job_store.h"
#include "server/launcher.h"

namespace graft::server {

struct GraftdConfig {
  std::string listen = "127.0.0.1:7070";  // host:port; port 0 picks a free port
  std::string data_dir = "./var/graft";    // database (local disk only: WAL) and artifacts
  std::string tokens_file;                 // YAML list of {name, role, sha256}; required
  int64_t lease_seconds = 30;              // a worker must report within this
  int max_attempts = 3;                    // leases per job before it fails
  int64_t max_config_bytes = 1 << 20;      // larger submissions are refused
  int64_t max_sweep_jobs = 1000;           // larger sweeps are refused before anything is stored
  // The other limits (CoordinatorOptions documents each; configs/graftd.yaml lists them with
  // their defaults): what one job may ask for, and what one request or one token may take.
  config::SpecLimits spec_limits;
  int64_t max_artifact_bytes = int64_t{4} << 30;
  int64_t max_points_per_report = 1000;
  int64_t max_name_bytes = 256;
  int64_t max_label_bytes = 256;
  int64_t max_labels_per_job = 32;
  int64_t max_reason_bytes = 16384;
  int64_t max_watches_per_user = 64;
  int64_t max_requests_in_flight_per_token = 512;
  Durability durability = Durability::kNormal;  // normal: survives a killed process; full: power loss
  bool allow_plaintext = false;            // needed for a non-loopback listen address without TLS
  std::string port_file;                   // if set, the bound port is written here once listening
  // TLS: graftd's certificate (PEM, may carry its chain) and unencrypted key, both or neither;
  // empty: plaintext. With TLS a non-loopback listen address needs no allow_plaintext.
  std::string tls_cert;
  std::string tls_key;
  // Mutual TLS: the PEM CA certificate(s) client certificates must be signed by; clients
  // without one are refused at the handshake. REQUIRES tls_cert. Empty: no client certificates.
  std::string client_ca;

  // The `launcher:` block: graftd submits Slurm array tasks of workers when the queue needs
  // them (server/launcher.h). Absent: graftd starts no workers.
  LauncherOptions launcher;

  bool tls() const { return !tls_cert.empty() || !tls_key.empty(); }
};

// Applies the keys of a graftd YAML file to `config`; errors name file:line:col and the key.
absl::Status LoadGraftdConfig(const std::string& path, GraftdConfig* config);

// True for 127.0.0.0/8, [::1], localhost.
bool IsLoopbackAddress(const std::string& listen);

// The transport rules, before any file is read: tls_cert and tls_key come together, client_ca
// needs them, and without TLS a non-loopback listen address needs allow_plaintext.
// InvalidArgument with a message saying what to do.
absl::Status CheckTransport(const GraftdConfig& config);

}  // namespace graft::server

#endif  // GRAFT_SERVER_GRAFTD_CONFIG_H_
