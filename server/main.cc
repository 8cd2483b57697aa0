// graftd: the coordinator. Flag parsing, then one call into the server library.
#include <csignal>
#include <iostream>

#include "CLI/CLI.hpp"
#include "proto/exit_codes.h"
#include "server/graftd.h"

namespace {
std::atomic<bool> stop_requested{false};
extern "C" void OnStopSignal(int) { stop_requested.store(true); }
}  // namespace

int main(int argc, char** argv) {
  CLI::App app{"graftd: the graft coordinator (jobs, leases, metrics, artifacts over gRPC)"};
  app.footer("Exit codes (shared with graft and graft-worker; README \"Exit codes\"): 0 stopped cleanly by "
             "SIGINT/SIGTERM; 1 failure (data dir, store, cannot listen); 2 invalid settings; 3 usage error.\n");
  graft::server::GraftdConfig config;
  std::string config_file, listen, data_dir, tokens, durability;
  int64_t lease_seconds = 0, max_config_bytes = 0, max_sweep_jobs = 0;
  int max_attempts = 0;
  bool allow_plaintext = false;
  app.add_option("--config", config_file, "YAML settings file (e.g. configs/graftd.yaml)");
  app.add_option("--listen", listen, "host:port to listen on (default 127.0.0.1:7070; port 0 picks one)");
  app.add_option("--data-dir", data_dir, "database and artifacts (default ./var/graft; a local disk)");
  app.add_option("--tokens-file", tokens, "tokens file: YAML list of {name, role, sha256}");
  app.add_option("--lease-seconds", lease_seconds, "a worker must report within this many seconds (default 30)");
  app.add_option("--max-attempts", max_attempts, "leases per job before it fails (default 3)");
  app.add_option("--max-config-bytes", max_config_bytes, "largest config accepted (default 1048576)");
  app.add_option("--max-sweep-jobs", max_sweep_jobs, "largest sweep accepted (default 1000)");
  app.add_option("--durability", durability, "normal (survives a killed process) | full (also power loss)");
  app.add_flag("--allow-plaintext", allow_plaintext, "allow a non-loopback listen address without TLS");
  app.add_option("--port-file", config.port_file, "write the bound port to this file once listening");
  std::string tls_cert, tls_key, client_ca;
  app.add_option("--tls-cert", tls_cert, "serve TLS with this PEM certificate (with --tls-key)");
  app.add_option("--tls-key", tls_key, "the certificate's unencrypted PEM private key");
  app.add_option("--client-ca", client_ca, "mutual TLS: require client certificates signed by this PEM CA");
  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    return app.exit(e) == 0 ? graft::kExitOk : graft::kExitUsage;  // --help, or a usage error
  }

  if (!config_file.empty()) {
    absl::Status st = graft::server::LoadGraftdConfig(config_file, &config);
    if (!st.ok()) {
      std::cerr << st.message() << "\n";
      return graft::kExitInvalidConfig;
    }
  }
  if (!listen.empty()) config.listen = listen;
  if (!data_dir.empty()) config.data_dir = data_dir;
  if (!tokens.empty()) config.tokens_file = tokens;
  if (lease_seconds > 0) config.lease_seconds = lease_seconds;
  if (max_attempts > 0) config.max_attempts = max_attempts;
  if (max_config_bytes > 0) config.max_config_bytes = max_config_bytes;
  if (max_sweep_jobs > 0) config.max_sweep_jobs = max_sweep_jobs;
  if (allow_plaintext) config.allow_plaintext = true;
  if (!tls_cert.empty()) config.tls_cert = tls_cert;
  if (!tls_key.empty()) config.tls_key = tls_key;
  if (!client_ca.empty()) config.client_ca = client_ca;
  if (!durability.empty()) {
    if (durability != "normal" && durability != "full") {
      std::cerr << "graftd: --durability: expected normal | full, got '" << durability << "'\n";
      return graft::kExitUsage;
    }
    config.durability =
        durability == "full" ? graft::server::Durability::kFull : graft::server::Durability::kNormal;
  }
  std::signal(SIGINT, OnStopSignal);
  std::signal(SIGTERM, OnStopSignal);
  return graft::server::RunGraftd(config, &stop_requested);
}
