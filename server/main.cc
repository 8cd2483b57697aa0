// graftd: the coordinator. Flag parsing, then one call into the server library: RunGraftd, or
// for `graftd tokens add|list|revoke` the token file edits of server/auth.h.
#include <csignal>
#include <ctime>
#include <iostream>

#include "CLI/CLI.hpp"
#include "proto/exit_codes.h"
#include "server/auth.h"
#include "server/graftd.h"

namespace {
std::atomic<bool> stop_requested{false};
std::atomic<bool> reload_requested{false};
extern "C" void OnStopSignal(int) { stop_requested.store(true); }
extern "C" void OnHangupSignal(int) { reload_requested.store(true); }

// `graftd tokens ...`: the tokens file from --tokens-file, else from --config's tokens_file.
int TokensCommand(const std::string& verb, const std::string& name, const std::string& role,
                  const std::string& tokens_file, const std::string& config_file) {
  std::string path = tokens_file;
  if (path.empty() && !config_file.empty()) {
    graft::server::GraftdConfig config;
    absl::Status st = graft::server::LoadGraftdConfig(config_file, &config);
    if (!st.ok()) {
      std::cerr << st.message() << "\n";
      return graft::kExitInvalidConfig;
    }
    path = config.tokens_file;
  }
  if (path.empty()) {
    std::cerr << "graftd tokens: which tokens file? give --tokens-file FILE (or --config FILE with tokens_file)\n";
    return graft::kExitInvalidConfig;
  }
  const int64_t now = static_cast<int64_t>(std::time(nullptr));
  auto exit_code = [](const absl::Status& st) {
    return absl::IsInvalidArgument(st) ? graft::kExitInvalidConfig : graft::kExitFailure;
  };
  if (verb == "add") {
    auto r = graft::server::ParseRole(role);
    if (!r.ok()) {
      std::cerr << "graftd tokens add: " << r.status().message() << "\n";
      return graft::kExitUsage;
    }
    if (absl::Status st = graft::server::CheckTokenName(name); !st.ok()) {
      std::cerr << "graftd tokens add: " << st.message() << "\n";
      return graft::kExitUsage;
    }
    auto token = graft::server::AddToken(path, name, *r, now);
    if (!token.ok()) {
      std::cerr << "graftd tokens add: " << token.status().message() << "\n";
      return exit_code(token.status());
    }
    std::cout << *token << "\n";
    std::cerr << "graftd: added " << (role == "admin" ? "an " : "a ") << role << " token for '" << name << "' to " << path
              << ". It is printed above once and kept nowhere (the file holds its SHA-256 only); a running graftd "
                 "accepts it within a second.\n";
    return graft::kExitOk;
  }
  if (verb == "revoke") {
    absl::Status st = graft::server::RevokeToken(path, name, now);
    if (!st.ok()) {
      std::cerr << "graftd tokens revoke: " << st.message() << "\n";
      return exit_code(st);
    }
    std::cerr << "graftd: revoked the token of '" << name << "' in " << path
              << "; a running graftd refuses it within a second (at once on SIGHUP), open watch streams included.\n";
    return graft::kExitOk;
  }
  auto table = graft::server::ListTokens(path);
  if (!table.ok()) {
    std::cerr << "graftd tokens list: " << table.status().message() << "\n";
    return absl::IsNotFound(table.status()) ? graft::kExitFailure : exit_code(table.status());
  }
  std::cout << *table;
  return graft::kExitOk;
}
}  // namespace

int main(int argc, char** argv) {
  CLI::App app{"graftd: the graft coordinator (jobs, leases, metrics, artifacts over gRPC)"};
  app.footer("Exit codes (shared with graft and graft-worker; README \"Exit codes\"): 0 stopped cleanly by "
             "SIGINT/SIGTERM (graftd tokens: done); 1 failure (data dir, store, cannot listen; graftd tokens: the name "
             "already has a token, no token to revoke, the file cannot be written); 2 invalid settings or tokens file; "
             "3 usage error (graftd tokens: a bad name or role).\n");
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
  // graftd tokens add NAME ROLE | list | revoke NAME: edits of the tokens file (server/auth.h).
  CLI::App* tokens_cmd = app.add_subcommand("tokens", "manage the tokens file: add, list, revoke");
  tokens_cmd->require_subcommand(1);
  std::string token_name, token_role, token_file, token_config;
  auto file_options = [&](CLI::App* sub) {
    sub->add_option("--tokens-file", token_file, "the tokens file (default: tokens_file of --config)");
    sub->add_option("--config", token_config, "graftd's settings file, for its tokens_file");
  };
  CLI::App* add = tokens_cmd->add_subcommand("add", "make a token for NAME with ROLE; print it once, store its SHA-256");
  add->add_option("NAME", token_name, "who: a user, a worker token's name, an admin")->required();
  add->add_option("ROLE", token_role, "user | worker | admin")->required();
  file_options(add);
  CLI::App* list = tokens_cmd->add_subcommand("list", "list the tokens: name, role, state, created, hash prefix");
  file_options(list);
  CLI::App* revoke = tokens_cmd->add_subcommand("revoke", "revoke NAME's token (kept in the file as revoked)");
  revoke->add_option("NAME", token_name, "whose token")->required();
  file_options(revoke);
  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    return app.exit(e) == 0 ? graft::kExitOk : graft::kExitUsage;  // --help, or a usage error
  }
  if (tokens_cmd->parsed()) {
    const std::string verb = add->parsed() ? "add" : revoke->parsed() ? "revoke" : "list";
    return TokensCommand(verb, token_name, token_role, token_file.empty() ? tokens : token_file,
                         token_config.empty() ? config_file : token_config);
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
  std::signal(SIGHUP, OnHangupSignal);  // reread the tokens file
  return graft::server::RunGraftd(config, &stop_requested, &reload_requested);
}
