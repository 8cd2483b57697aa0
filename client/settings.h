// Where the client finds its coordinator, token and TLS files: for each setting, command-line
// flags first, then the environment (GRAFT_SERVER, GRAFT_TOKEN, GRAFT_CA_FILE, GRAFT_CERT_FILE,
// GRAFT_KEY_FILE, GRAFT_TLS_SERVER_NAME), then the user's config file
// (~/.config/graft/client.yaml, or the path in GRAFT_CONFIG) with keys `server`, `token` or
// `token_file`, `ca_file`, `cert_file`, `key_file` and `tls_server_name`; relative paths in the
// file are relative to it. Thread-safety: pure functions over their inputs.
#ifndef GRAFT_CLIENT_SETTINGS_H_
#define GRAFT_CLIENT_SETTINGS_H_

#include <functional>
#include <string>

#include "absl/status/statusor.h"

namespace graft::client {

// graftd's own default listen address.
inline constexpr char kDefaultServer[] = "127.0.0.1:7070";

struct SettingsSources {
  std::string flag_server;      // --server; empty: not given
  std::string flag_token;       // --token
  std::string flag_token_file;  // --token-file
  std::string flag_ca_file;     // --ca-file
  std::string flag_cert_file;   // --cert
  std::string flag_key_file;    // --key
  std::string flag_tls_server_name;  // --tls-server-name
  // Environment lookup (a seam for tests); returns nullptr for an unset variable.
  std::function<const char*(const char*)> getenv;
};

struct ClientSettings {
  std::string server;       // host:port; kDefaultServer when no source names one
  std::string token;        // empty when no source gives one
  std::string server_from;  // where each came from, for messages: "--server", "GRAFT_SERVER",
  std::string token_from;   // "FILE:LINE:COL", or "default"
  // TLS (proto/tls.h): on when ca_file is set; paths as given, or resolved against the config
  // file. Empty when no source gives them.
  std::string ca_file;
  std::string cert_file;
  std::string key_file;
  std::string tls_server_name;
};

// The default config file path: $GRAFT_CONFIG, else $HOME/.config/graft/client.yaml, else "".
std::string ConfigFilePath(const std::function<const char*(const char*)>& getenv);

// Resolves the settings. The config file is read only when a flag or variable leaves something
// open; a missing file at the default path is no error, a missing file named by GRAFT_CONFIG
// is NotFound. A malformed file is InvalidArgument "FILE:LINE:COL: message" naming the key.
// A token file that cannot be read is NotFound naming it. The TLS files are only located here;
// tls::LoadClientCredentials reads and checks them.
absl::StatusOr<ClientSettings> ResolveSettings(const SettingsSources& sources);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_SETTINGS_H_
