// Bearer tokens: a tokens file maps SHA-256 hashes of tokens to a name and a role, and one
// function decides whether a caller may use a service. Tokens themselves are never stored or
// logged. Thread-safety: a loaded TokenTable is immutable and safe to share.
#ifndef GRAFT_SERVER_AUTH_H_
#define GRAFT_SERVER_AUTH_H_

#include <map>
#include <optional>
#include <string>

#include "absl/status/statusor.h"

namespace graft::server {

enum class Role { kUser, kWorker, kAdmin };
const char* ToString(Role r);

struct Principal {
  std::string name;
  Role role = Role::kUser;
};

class TokenTable {
 public:
  // Reads a YAML list of {name, role: user|worker|admin, sha256: <64 hex>}. Errors name the
  // file, line and column.
  static absl::StatusOr<TokenTable> Load(const std::string& path);
  static absl::StatusOr<TokenTable> Parse(const std::string& yaml, const std::string& source);

  // The principal of `token`, or nullopt.
  std::optional<Principal> Lookup(const std::string& token) const;
  size_t size() const { return by_hash_.size(); }

 private:
  std::map<std::string, Principal> by_hash_;
};

// The services of graft.v1.
enum class Service { kJobs, kWorkers };

// The one place that decides access: the `authorization` metadata value (nullptr when absent)
// checked against `tokens` for `service`. UNAUTHENTICATED for a missing, malformed or unknown
// token; PERMISSION_DENIED for a role the service does not admit (workers may call only
// kWorkers; users and admins only kJobs). Messages never contain the token.
absl::StatusOr<Principal> Authorize(const TokenTable& tokens, const std::string* authorization, Service service);

}  // namespace graft::server

#endif  // GRAFT_SERVER_AUTH_H_
