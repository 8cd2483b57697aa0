#include "server/graftd_config.h"

#include <algorithm>
#include <cstdlib>
#include <vector>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "configs/reader/config_tree.h"

namespace graft::server {

namespace {

// The `launcher:` block; every problem is appended to `errors` as "FILE:LINE:COL: message".
void ReadLauncher(const config::ConfigNode& block, LauncherOptions* l, std::vector<std::string>* errors) {
  auto error = [&](const config::ConfigNode& n, const std::string& message) {
    errors->push_back(absl::StrCat(n.loc.ToString(), ": ", message));
  };
  if (!block.IsMap()) {
    error(block, absl::StrCat("launcher: expected a map of settings, got ", block.Describe()));
    return;
  }
  l->enabled = true;
  const std::vector<std::string> keys = {"command",  "script",         "max_workers",       "cpus_per_worker",
                                         "partition", "time_limit",     "server",            "worker_token_file",
                                         "ca_file",   "idle_exit_seconds", "worker_bin",     "env",
                                         "status_command", "interval_seconds"};
  auto text = [&](const config::ConfigNode& v, const std::string& key, std::string* out) {
    if (!v.IsScalar()) return error(v, absl::StrCat("launcher.", key, ": expected text, got ", v.Describe()));
    *out = v.scalar;
  };
  auto whole = [&](const config::ConfigNode& v, const std::string& key, int64_t lo, int64_t hi, int64_t* out) {
    char* end = nullptr;
    long long x = v.IsScalar() ? std::strtoll(v.scalar.c_str(), &end, 10) : 0;
    if (!v.IsScalar() || v.scalar.empty() || *end != '\0' || x < lo || x > hi) {
      return error(v, absl::StrCat("launcher.", key, ": expected a whole number in [", lo, ", ", hi, "], got ",
                                   v.Describe()));
    }
    *out = x;
  };
  for (const auto& [k, v] : block.entries) {
    const std::string& key = k.scalar;
    int64_t x = 0;
    if (key == "command") {
      text(v, key, &l->command);
      if (l->command.find_first_not_of(' ') == std::string::npos) error(v, "launcher.command: must not be empty");
    } else if (key == "script") {
      text(v, key, &l->script);
    } else if (key == "max_workers") {
      x = l->max_workers;
      whole(v, key, 1, 100000, &x);
      l->max_workers = static_cast<int>(x);
    } else if (key == "cpus_per_worker") {
      x = l->cpus_per_worker;
      whole(v, key, 1, 256, &x);
      l->cpus_per_worker = static_cast<int>(x);
    } else if (key == "partition") {
      text(v, key, &l->partition);
    } else if (key == "time_limit") {
      text(v, key, &l->time_limit);
    } else if (key == "server") {
      text(v, key, &l->server);
    } else if (key == "worker_token_file") {
      text(v, key, &l->worker_token_file);
    } else if (key == "ca_file") {
      text(v, key, &l->ca_file);
    } else if (key == "idle_exit_seconds") {
      whole(v, key, 1, 7 * 86400, &l->idle_exit_seconds);
    } else if (key == "worker_bin") {
      text(v, key, &l->worker_bin);
    } else if (key == "status_command") {
      text(v, key, &l->status_command);
    } else if (key == "interval_seconds") {
      x = l->interval_ms / 1000;
      whole(v, key, 1, 3600, &x);
      l->interval_ms = x * 1000;
    } else if (key == "env") {
      if (!v.IsMap()) {
        error(v, absl::StrCat("launcher.env: expected a map of variable names to values, got ", v.Describe()));
        continue;
      }
      for (const auto& [name, value] : v.entries) {
        if (!value.IsScalar()) {
          error(value, absl::StrCat("launcher.env.", name.scalar, ": expected text, got ", value.Describe()));
          continue;
        }
        l->env[name.scalar] = value.scalar;
      }
    } else {
      error(k, absl::StrCat("unknown key '", key, "' in 'launcher'; valid keys: ", absl::StrJoin(keys, ", ")));
    }
  }
  if (l->worker_token_file.empty()) {
    error(block, "launcher: needs worker_token_file (the token the workers it starts present to graftd)");
  }
}

}  // namespace

absl::Status LoadGraftdConfig(const std::string& path, GraftdConfig* config) {
  auto tree = config::ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  if (tree->IsNull()) return absl::OkStatus();
  if (!tree->IsMap()) return absl::InvalidArgumentError(absl::StrCat(tree->loc.ToString(), ": expected a map of settings"));
  // The limits: key, smallest and largest value accepted, and the setting.
  struct LimitKey {
    const char* key;
    int64_t lo, hi;
    int64_t* value;
  };
  config::SpecLimits& spec = config->spec_limits;
  const std::vector<LimitKey> limit_keys = {
      {"max_variables", 2, 100000, &spec.max_variables},
      {"max_domain_values", 2, int64_t{1} << 22, &spec.max_domain_values},
      {"max_table_entries", 1, int64_t{1} << 30, &spec.max_table_entries},
      {"max_input_space", 1, causal::kMaxInputSpace, &spec.max_input_space},
      {"max_listed_input_space", 1, causal::kMaxListedInputSpace, &spec.max_listed_input_space},
      {"max_parent_space", 1, causal::kMaxParentSpace, &spec.max_parent_space},
      {"max_network_parameters", 1, int64_t{1} << 40, &spec.max_network_parameters},
      {"max_steps", 1, int64_t{1} << 40, &spec.max_steps},
      {"max_artifact_bytes", 1024, int64_t{1} << 40, &config->max_artifact_bytes},
      {"max_points_per_report", 1, 1000000, &config->max_points_per_report},
      {"max_name_bytes", 16, 65536, &config->max_name_bytes},
      {"max_label_bytes", 1, 65536, &config->max_label_bytes},
      {"max_labels_per_job", 0, 10000, &config->max_labels_per_job},
      {"max_reason_bytes", 64, int64_t{1} << 20, &config->max_reason_bytes},
      {"max_watches_per_user", 1, 100000, &config->max_watches_per_user},
      {"max_requests_in_flight_per_token", 1, 1000000, &config->max_requests_in_flight_per_token},
  };
  std::vector<std::string> keys = {"listen",         "data_dir",         "tokens_file", "lease_seconds",
                                   "max_attempts",   "max_config_bytes", "durability",  "allow_plaintext",
                                   "max_sweep_jobs", "tls_cert",         "tls_key",     "client_ca",
                                   "launcher"};
  for (const LimitKey& l : limit_keys) keys.push_back(l.key);
  std::vector<std::string> errors;
  auto whole = [&](const config::ConfigNode& v, const std::string& key, int64_t lo, int64_t hi, int64_t* out) {
    char* end = nullptr;
    long long x = v.IsScalar() ? std::strtoll(v.scalar.c_str(), &end, 10) : 0;
    if (!v.IsScalar() || v.scalar.empty() || *end != '\0' || x < lo || x > hi) {
      errors.push_back(absl::StrCat(v.loc.ToString(), ": ", key, ": expected a whole number in [", lo, ", ", hi,
                                    "], got ", v.Describe()));
      return;
    }
    *out = x;
  };
  for (const auto& [k, v] : tree->entries) {
    const std::string& key = k.scalar;
    auto limit = std::find_if(limit_keys.begin(), limit_keys.end(), [&](const LimitKey& l) { return key == l.key; });
    if (limit != limit_keys.end()) {
      whole(v, key, limit->lo, limit->hi, limit->value);
    } else if (key == "listen" || key == "data_dir" || key == "tokens_file") {
      if (!v.IsScalar()) {
        errors.push_back(absl::StrCat(v.loc.ToString(), ": ", key, ": expected text, got ", v.Describe()));
        continue;
      }
      (key == "listen" ? config->listen : key == "data_dir" ? config->data_dir : config->tokens_file) = v.scalar;
    } else if (key == "tls_cert" || key == "tls_key" || key == "client_ca") {
      if (!v.IsScalar() || v.scalar.empty()) {
        errors.push_back(absl::StrCat(v.loc.ToString(), ": ", key, ": expected a file path, got ", v.Describe()));
        continue;
      }
      // Relative to graftd's working directory, like tokens_file and data_dir.
      (key == "tls_cert" ? config->tls_cert : key == "tls_key" ? config->tls_key : config->client_ca) = v.scalar;
    } else if (key == "launcher") {
      ReadLauncher(v, &config->launcher, &errors);
    } else if (key == "lease_seconds") {
      whole(v, key, 1, 86400, &config->lease_seconds);
    } else if (key == "max_attempts") {
      int64_t x = config->max_attempts;
      whole(v, key, 1, 1000, &x);
      config->max_attempts = static_cast<int>(x);
    } else if (key == "max_config_bytes") {
      whole(v, key, 1024, int64_t{1} << 30, &config->max_config_bytes);
    } else if (key == "max_sweep_jobs") {
      whole(v, key, 1, 1000000, &config->max_sweep_jobs);
    } else if (key == "durability") {
      if (v.IsScalar() && v.scalar == "normal") {
        config->durability = Durability::kNormal;
      } else if (v.IsScalar() && v.scalar == "full") {
        config->durability = Durability::kFull;
      } else {
        errors.push_back(absl::StrCat(v.loc.ToString(), ": durability: expected normal | full, got ", v.Describe()));
      }
    } else if (key == "allow_plaintext") {
      if (v.IsScalar() && (v.scalar == "true" || v.scalar == "false")) {
        config->allow_plaintext = v.scalar == "true";
      } else {
        errors.push_back(absl::StrCat(v.loc.ToString(), ": allow_plaintext: expected true or false"));
      }
    } else {
      errors.push_back(absl::StrCat(k.loc.ToString(), ": unknown key '", key, "'; valid keys: ", absl::StrJoin(keys, ", ")));
    }
  }
  if (!errors.empty()) return absl::InvalidArgumentError(absl::StrJoin(errors, "\n"));
  return absl::OkStatus();
}

absl::Status CheckTransport(const GraftdConfig& config) {
  if (config.tls_cert.empty() != config.tls_key.empty()) {
    return absl::InvalidArgumentError(config.tls_cert.empty()
                                          ? "--tls-key (tls_key) needs --tls-cert (tls_cert): TLS takes a certificate and its key"
                                          : "--tls-cert (tls_cert) needs --tls-key (tls_key): TLS takes a certificate and its key");
  }
  if (!config.client_ca.empty() && !config.tls()) {
    return absl::InvalidArgumentError(
        "--client-ca (client_ca) needs --tls-cert and --tls-key: client certificates are checked only over TLS");
  }
  if (!config.tls() && !IsLoopbackAddress(config.listen) && !config.allow_plaintext) {
    return absl::InvalidArgumentError(absl::StrCat(
        "refusing to listen on ", config.listen,
        " in plaintext: tokens would cross the network in the clear; give --tls-cert and --tls-key (TLS), listen on "
        "127.0.0.1 / [::1], or pass --allow-plaintext on a trusted network"));
  }
  return absl::OkStatus();
}

bool IsLoopbackAddress(const std::string& listen) {
  std::string host = listen;
  if (!host.empty() && host[0] == '[') {
    const size_t close = host.find(']');
    host = host.substr(1, close == std::string::npos ? std::string::npos : close - 1);
    return host == "::1";
  }
  const size_t colon = host.rfind(':');
  if (colon != std::string::npos) host = host.substr(0, colon);
  return host == "localhost" || host.rfind("127.", 0) == 0;
}

}  // namespace graft::server
