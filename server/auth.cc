#include "server/auth.h"

#include <cctype>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "proto/sha256.h"
#include "configs/reader/config_tree.h"

namespace graft::server {

const char* ToString(Role r) {
  switch (r) {
    case Role::kUser: return "user";
    case Role::kWorker: return "worker";
    case Role::kAdmin: return "admin";
  }
  return "?";
}

absl::StatusOr<TokenTable> TokenTable::Parse(const std::string& yaml, const std::string& source) {
  auto tree = config::ParseYaml(yaml, source);
  if (!tree.ok()) return tree.status();
  TokenTable table;
  if (tree->IsNull()) return table;
  if (!tree->IsSequence()) {
    return absl::InvalidArgumentError(
        absl::StrCat(tree->loc.ToString(), ": expected a list of {name, role, sha256} entries"));
  }
  for (const auto& entry : tree->items) {
    const config::ConfigNode* name = entry.IsMap() ? entry.Find("name") : nullptr;
    const config::ConfigNode* role = entry.IsMap() ? entry.Find("role") : nullptr;
    const config::ConfigNode* hash = entry.IsMap() ? entry.Find("sha256") : nullptr;
    if (!name || !role || !hash || !name->IsScalar() || !role->IsScalar() || !hash->IsScalar()) {
      return absl::InvalidArgumentError(
          absl::StrCat(entry.loc.ToString(), ": each entry needs name, role and sha256"));
    }
    Principal p;
    p.name = name->scalar;
    if (role->scalar == "user") {
      p.role = Role::kUser;
    } else if (role->scalar == "worker") {
      p.role = Role::kWorker;
    } else if (role->scalar == "admin") {
      p.role = Role::kAdmin;
    } else {
      return absl::InvalidArgumentError(absl::StrCat(role->loc.ToString(), ": role: expected user | worker | admin, got '",
                                                     role->scalar, "'"));
    }
    std::string h = hash->scalar;
    bool hex = h.size() == 64;
    for (char& c : h) {
      c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
      if (!std::isxdigit(static_cast<unsigned char>(c))) hex = false;
    }
    if (!hex) {
      return absl::InvalidArgumentError(absl::StrCat(
          hash->loc.ToString(), ": sha256: expected 64 hex digits (the SHA-256 of the token, e.g. from "
                                "`printf %s TOKEN | sha256sum`)"));
    }
    if (!table.by_hash_.emplace(h, p).second) {
      return absl::InvalidArgumentError(absl::StrCat(hash->loc.ToString(), ": this token hash is listed twice"));
    }
  }
  return table;
}

absl::StatusOr<TokenTable> TokenTable::Load(const std::string& path) {
  auto tree = config::ParseYamlFile(path);
  if (!tree.ok()) return tree.status();
  return Parse(config::ToYaml(*tree), path);
}

std::optional<Principal> TokenTable::Lookup(const std::string& token) const {
  auto it = by_hash_.find(Sha256Hex(token));
  if (it == by_hash_.end()) return std::nullopt;
  return it->second;
}

absl::StatusOr<Principal> Authorize(const TokenTable& tokens, const std::string* authorization, Service service) {
  if (authorization == nullptr || authorization->empty()) {
    return absl::UnauthenticatedError("missing 'authorization: Bearer <token>' call metadata");
  }
  const std::string prefix = "Bearer ";
  if (authorization->rfind(prefix, 0) != 0 || authorization->size() == prefix.size()) {
    return absl::UnauthenticatedError("the authorization metadata must be 'Bearer <token>'");
  }
  auto who = tokens.Lookup(authorization->substr(prefix.size()));
  if (!who) return absl::UnauthenticatedError("unknown token");
  const bool worker_service = service == Service::kWorkers;
  if (worker_service != (who->role == Role::kWorker)) {
    return absl::PermissionDeniedError(absl::StrCat("'", who->name, "' has role ", ToString(who->role), ", which may not call the ",
                                                    worker_service ? "Workers" : "Jobs", " service"));
  }
  return *who;
}

}  // namespace graft::server
