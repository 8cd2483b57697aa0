// Bearer tokens: a tokens file maps SHA-256 hashes of tokens to a name and a role, and one
// function decides whether a caller may use a service. Tokens themselves are never stored or
// logged; `graftd tokens add` prints a new one once. graftd holds the file in a LiveTokens,
// which reloads it when it changes (SIGHUP, or its change time), so a revoked token is refused
// without a restart. Thread-safety: a loaded TokenTable is immutable and safe to share;
// LiveTokens is safe to call from any thread.
#ifndef GRAFT_SERVER_AUTH_H_
#define GRAFT_SERVER_AUTH_H_

#include <sys/types.h>

#include <array>
#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <vector>

#include "absl/status/statusor.h"

namespace graft::server {

enum class Role { kUser, kWorker, kAdmin };
const char* ToString(Role r);
// "user" | "worker" | "admin"; InvalidArgument naming the three otherwise.
absl::StatusOr<Role> ParseRole(const std::string& text);

struct Principal {
  std::string name;
  Role role = Role::kUser;
};

// One entry of the tokens file.
struct TokenEntry {
  std::string name;     // who: the owner of the jobs it submits, or the worker token's name
  Role role = Role::kUser;
  std::string sha256;   // SHA-256 of the token, 64 lower-case hex digits
  std::string created;  // UTC "YYYY-MM-DDTHH:MM:SSZ" when `graftd tokens add` made it; "" if not known
  std::string revoked;  // UTC time of `graftd tokens revoke`; "" while the token is valid
  bool active() const { return revoked.empty(); }
};

// Longest token name (names are job owners, log words and parts of worker ids).
inline constexpr size_t kMaxTokenNameBytes = 64;
// A name graftd tokens add accepts: 1-64 of [A-Za-z0-9._@-], starting with a letter or digit.
// InvalidArgument saying so otherwise.
absl::Status CheckTokenName(const std::string& name);

class TokenTable {
 public:
  // Reads a YAML list of {name, role: user|worker|admin, sha256: <64 hex>[, created: TIME]
  // [, revoked: TIME]}. Errors name the file, line and column. Two entries with the same hash,
  // or two valid (not revoked) entries with the same name, are refused.
  static absl::StatusOr<TokenTable> Load(const std::string& path);
  static absl::StatusOr<TokenTable> Parse(const std::string& yaml, const std::string& source);

  enum class Match { kUnknown, kRevoked, kValid };
  struct Found {
    Match match = Match::kUnknown;
    const TokenEntry* entry = nullptr;  // kRevoked and kValid: the entry (owned by the table)
  };
  // Finds `token` by the SHA-256 of it, comparing the digest with every entry in constant time
  // (CRYPTO_memcmp, no early exit), so the time taken says nothing about how close a guess was.
  Found Lookup(const std::string& token) const;

  const std::vector<TokenEntry>& entries() const { return entries_; }
  size_t active_count() const;
  size_t size() const { return entries_.size(); }

  // The file's text: a comment line, then one flow map per entry, in order.
  std::string ToText() const;

  // Adds a new entry. FailedPrecondition when `name` already has a valid token.
  absl::Status Add(TokenEntry entry);
  // Marks every valid token of `name` revoked at `when`. NotFound when it has none.
  absl::Status Revoke(const std::string& name, const std::string& when);

 private:
  std::vector<TokenEntry> entries_;
  std::vector<std::array<unsigned char, 32>> digests_;  // entries_[i]'s hash as bytes
};

// The services of graft.v1.
enum class Service { kJobs, kWorkers };

// The one place that decides access: the `authorization` metadata value (nullptr when absent)
// checked against `tokens` for `service`. UNAUTHENTICATED for a missing, malformed, unknown or
// revoked token; PERMISSION_DENIED for a role the service does not admit (workers may call only
// kWorkers; users and admins only kJobs). Messages never contain the token.
absl::StatusOr<Principal> Authorize(const TokenTable& tokens, const std::string* authorization, Service service);

// A new token: 32 bytes from OpenSSL's RAND_bytes, base64url without padding (43 characters).
// Internal if the random generator fails.
absl::StatusOr<std::string> NewToken();

// "YYYY-MM-DDTHH:MM:SSZ" of a Unix time in seconds.
std::string UtcTime(int64_t unix_s);

// --- `graftd tokens`: edits of the tokens file. Each takes an exclusive lock on the file's
// directory (flock), reads the file, and replaces it atomically (a 0600 temporary renamed over it),
// so concurrent edits are serialised and graftd never reads half a file.

// Makes a token for `name` with `role`, stores its hash (the file is created 0600 when missing),
// and returns the token, which is not kept anywhere. InvalidArgument for a bad name,
// FailedPrecondition when the name already has a valid token.
absl::StatusOr<std::string> AddToken(const std::string& path, const std::string& name, Role role, int64_t now_s);
// Revokes the valid token of `name`. NotFound when it has none (or the file is missing).
absl::Status RevokeToken(const std::string& path, const std::string& name, int64_t now_s);
// The table printed by `graftd tokens list`: name, role, state, created, and the first 12 hex
// digits of the hash (to tell entries apart; never the token).
absl::StatusOr<std::string> ListTokens(const std::string& path);

// The tokens file as graftd serves it: the table loaded last, replaced when the file changes.
// A file that fails to load on a reload keeps the previous table (and the error is returned, for
// the log), so a typo in an edit never locks everyone out.
class LiveTokens {
 public:
  // Loads `path`; the errors of TokenTable::Load.
  static absl::StatusOr<std::unique_ptr<LiveTokens>> Open(const std::string& path);
  // For tests and fuzzers: a fixed table that never reloads.
  explicit LiveTokens(TokenTable table);

  std::shared_ptr<const TokenTable> Current() const;
  // Reloads when the file's change time, size or inode differ from the last load (or always,
  // with `force`: SIGHUP). Returns true when the table was replaced; an error when the file could
  // not be read or parsed (the previous table stays). After a replacement every listener is called
  // with the new table, on this thread, outside the table's lock (Current() may be called).
  absl::StatusOr<bool> Reload(bool force);

  // `listener` is called after each replacement. Returns an id for RemoveListener, which waits for
  // a call in progress, so no call follows it. The listener must not call AddListener or
  // RemoveListener.
  int64_t AddListener(std::function<void(const TokenTable&)> listener);
  void RemoveListener(int64_t id);

  const std::string& path() const { return path_; }

 private:
  struct FileStamp {
    int64_t mtime_ns = -1, ctime_ns = -1, size = -1;
    ino_t inode = 0;
    bool operator==(const FileStamp& o) const {
      return mtime_ns == o.mtime_ns && ctime_ns == o.ctime_ns && size == o.size && inode == o.inode;
    }
  };
  static FileStamp Stamp(const std::string& path);

  std::string path_;
  mutable std::mutex mu_;
  std::shared_ptr<const TokenTable> table_;  // guarded by mu_
  FileStamp stamp_;                          // guarded by mu_
  std::map<int64_t, std::function<void(const TokenTable&)>> listeners_;  // guarded by listeners_mu_
  int64_t next_listener_ = 1;                                            // guarded by listeners_mu_
  std::mutex listeners_mu_;
};

}  // namespace graft::server

#endif  // GRAFT_SERVER_AUTH_H_
