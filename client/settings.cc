#include "client/settings.h"

#include <filesystem>
#include <fstream>
#include <sstream>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "configs/reader/config_tree.h"
#include "configs/reader/suggest.h"

namespace graft::client {
namespace {

namespace fs = std::filesystem;

std::string Trimmed(std::string s) {
  while (!s.empty() && (s.back() == '\n' || s.back() == '\r' || s.back() == ' ' || s.back() == '\t')) s.pop_back();
  size_t i = 0;
  while (i < s.size() && (s[i] == ' ' || s[i] == '\t')) ++i;
  return s.substr(i);
}

absl::StatusOr<std::string> ReadTokenFile(const std::string& path, const std::string& named_by) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError(absl::StrCat(named_by, ": cannot read the token file '", path, "'"));
  std::ostringstream s;
  s << in.rdbuf();
  std::string token = Trimmed(s.str());
  if (token.empty()) return absl::InvalidArgumentError(absl::StrCat(named_by, ": the token file '", path, "' is empty"));
  return token;
}

struct FileSettings {
  std::string server, server_at;
  std::string token, token_at;
  std::string ca_file, cert_file, key_file, tls_server_name;
};

absl::StatusOr<FileSettings> ReadConfigFile(const std::string& path, bool must_exist) {
  FileSettings out;
  std::error_code ec;
  if (!fs::exists(path, ec)) {
    if (must_exist) return absl::NotFoundError(absl::StrCat("GRAFT_CONFIG names '", path, "', which does not exist"));
    return out;
  }
  auto tree = config::ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  if (tree->IsNull()) return out;
  if (!tree->IsMap()) {
    return absl::InvalidArgumentError(
        absl::StrCat(tree->loc.ToString(), ": expected a map with server, token or token_file, got ", tree->Describe()));
  }
  const std::vector<std::string> keys = {"server",    "token",    "token_file",     "ca_file",
                                         "cert_file", "key_file", "tls_server_name"};
  // A relative path is relative to the config file.
  auto beside = [&](const std::string& p) {
    fs::path f(p);
    return (f.is_relative() ? fs::path(path).parent_path() / f : f).string();
  };
  const config::ConfigNode* token_node = nullptr;
  const config::ConfigNode* token_file_node = nullptr;
  for (const auto& [k, v] : tree->entries) {
    if (std::find(keys.begin(), keys.end(), k.scalar) == keys.end()) {
      const std::string near = config::Nearest(k.scalar, keys);
      return absl::InvalidArgumentError(absl::StrCat(k.loc.ToString(), ": unknown key '", k.scalar,
                                                     "' in the client config",
                                                     near.empty() ? absl::StrCat("; valid keys: ", absl::StrJoin(keys, ", "))
                                                                  : absl::StrCat("; did you mean '", near, "'?")));
    }
    if (!v.IsScalar() || v.scalar.empty()) {
      return absl::InvalidArgumentError(
          absl::StrCat(v.loc.ToString(), ": ", k.scalar, ": expected a non-empty string, got ", v.Describe()));
    }
    if (k.scalar == "server") {
      out.server = v.scalar;
      out.server_at = v.loc.ToString();
    } else if (k.scalar == "ca_file") {
      out.ca_file = beside(v.scalar);
    } else if (k.scalar == "cert_file") {
      out.cert_file = beside(v.scalar);
    } else if (k.scalar == "key_file") {
      out.key_file = beside(v.scalar);
    } else if (k.scalar == "tls_server_name") {
      out.tls_server_name = v.scalar;
    } else if (k.scalar == "token") {
      token_node = &v;
    } else {
      token_file_node = &v;
    }
  }
  if (token_node != nullptr && token_file_node != nullptr) {
    return absl::InvalidArgumentError(
        absl::StrCat(token_file_node->loc.ToString(), ": token_file: give either token or token_file, not both"));
  }
  if (token_node != nullptr) {
    out.token = token_node->scalar;
    out.token_at = token_node->loc.ToString();
  } else if (token_file_node != nullptr) {
    fs::path p(token_file_node->scalar);
    if (p.is_relative()) p = fs::path(path).parent_path() / p;  // relative to the config file
    auto token = ReadTokenFile(p.string(), token_file_node->loc.ToString() + ": token_file");
    if (!token.ok()) return token.status();
    out.token = *token;
    out.token_at = token_file_node->loc.ToString();
  }
  return out;
}

}  // namespace

std::string ConfigFilePath(const std::function<const char*(const char*)>& getenv) {
  if (const char* p = getenv("GRAFT_CONFIG"); p != nullptr && *p != '\0') return p;
  if (const char* home = getenv("HOME"); home != nullptr && *home != '\0') {
    return std::string(home) + "/.config/graft/client.yaml";
  }
  return "";
}

absl::StatusOr<ClientSettings> ResolveSettings(const SettingsSources& sources) {
  ClientSettings s;
  auto env = [&](const char* name) -> std::string {
    const char* v = sources.getenv ? sources.getenv(name) : nullptr;
    return v == nullptr ? "" : v;
  };
  if (!sources.flag_token.empty() && !sources.flag_token_file.empty()) {
    return absl::InvalidArgumentError("give either --token or --token-file, not both");
  }
  if (!sources.flag_server.empty()) {
    s.server = sources.flag_server;
    s.server_from = "--server";
  } else if (!env("GRAFT_SERVER").empty()) {
    s.server = env("GRAFT_SERVER");
    s.server_from = "GRAFT_SERVER";
  }
  if (!sources.flag_token.empty()) {
    s.token = sources.flag_token;
    s.token_from = "--token";
  } else if (!sources.flag_token_file.empty()) {
    auto token = ReadTokenFile(sources.flag_token_file, "--token-file");
    if (!token.ok()) return token.status();
    s.token = *token;
    s.token_from = "--token-file";
  } else if (!env("GRAFT_TOKEN").empty()) {
    s.token = env("GRAFT_TOKEN");
    s.token_from = "GRAFT_TOKEN";
  }
  // TLS files: each from its flag, else its variable, else the config file (below).
  auto first = [&](const std::string& flag, const char* variable) { return !flag.empty() ? flag : env(variable); };
  s.ca_file = first(sources.flag_ca_file, "GRAFT_CA_FILE");
  s.cert_file = first(sources.flag_cert_file, "GRAFT_CERT_FILE");
  s.key_file = first(sources.flag_key_file, "GRAFT_KEY_FILE");
  s.tls_server_name = first(sources.flag_tls_server_name, "GRAFT_TLS_SERVER_NAME");
  if (s.server.empty() || s.token.empty() || s.ca_file.empty() || s.cert_file.empty() || s.key_file.empty() ||
      s.tls_server_name.empty()) {
    const std::string path = ConfigFilePath(sources.getenv ? sources.getenv : [](const char*) -> const char* {
      return nullptr;
    });
    if (!path.empty()) {
      auto file = ReadConfigFile(path, !env("GRAFT_CONFIG").empty());
      if (!file.ok()) return file.status();
      if (s.server.empty() && !file->server.empty()) {
        s.server = file->server;
        s.server_from = file->server_at;
      }
      if (s.token.empty() && !file->token.empty()) {
        s.token = file->token;
        s.token_from = file->token_at;
      }
      if (s.ca_file.empty()) s.ca_file = file->ca_file;
      if (s.cert_file.empty()) s.cert_file = file->cert_file;
      if (s.key_file.empty()) s.key_file = file->key_file;
      if (s.tls_server_name.empty()) s.tls_server_name = file->tls_server_name;
    }
  }
  if (s.server.empty()) {
    s.server = kDefaultServer;
    s.server_from = "default";
  }
  return s;
}

}  // namespace graft::client
