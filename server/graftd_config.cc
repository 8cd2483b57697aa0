#include "server/graftd_config.h"

#include <cstdlib>
#include <vector>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "configs/reader/config_tree.h"

namespace graft::server {

absl::Status LoadGraftdConfig(const std::string& path, GraftdConfig* config) {
  auto tree = config::ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  if (tree->IsNull()) return absl::OkStatus();
  if (!tree->IsMap()) return absl::InvalidArgumentError(absl::StrCat(tree->loc.ToString(), ": expected a map of settings"));
  const std::vector<std::string> keys = {"listen",       "data_dir",         "tokens_file", "lease_seconds",
                                         "max_attempts", "max_config_bytes", "durability",  "allow_plaintext",
                                         "max_sweep_jobs"};
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
    if (key == "listen" || key == "data_dir" || key == "tokens_file") {
      if (!v.IsScalar()) {
        errors.push_back(absl::StrCat(v.loc.ToString(), ": ", key, ": expected text, got ", v.Describe()));
        continue;
      }
      (key == "listen" ? config->listen : key == "data_dir" ? config->data_dir : config->tokens_file) = v.scalar;
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
