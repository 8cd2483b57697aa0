#include "server/auth.h"

#include <fcntl.h>
#include <sys/file.h>
#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <sstream>

#include <openssl/crypto.h>
#include <openssl/evp.h>
#include <openssl/rand.h>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "configs/reader/config_tree.h"
#include "proto/sha256.h"

namespace graft::server {
namespace {

namespace fs = std::filesystem;

bool ToDigest(const std::string& hex, std::array<unsigned char, 32>* out) {
  if (hex.size() != 64) return false;
  auto nibble = [](char c) -> int {
    if (c >= '0' && c <= '9') return c - '0';
    if (c >= 'a' && c <= 'f') return c - 'a' + 10;
    return -1;
  };
  for (size_t i = 0; i < 32; ++i) {
    const int hi = nibble(hex[2 * i]), lo = nibble(hex[2 * i + 1]);
    if (hi < 0 || lo < 0) return false;
    (*out)[i] = static_cast<unsigned char>(hi * 16 + lo);
  }
  return true;
}

// A scalar as YAML text in a flow map: plain when it is a safe word, else double-quoted.
std::string YamlWord(const std::string& s) {
  const bool plain = !s.empty() && std::isalnum(static_cast<unsigned char>(s[0])) &&
                     std::all_of(s.begin(), s.end(), [](char c) {
                       return std::isalnum(static_cast<unsigned char>(c)) || c == '.' || c == '_' || c == '-' || c == '@';
                     });
  if (plain && s != "null" && s != "true" && s != "false") return s;
  std::string out = "\"";
  for (unsigned char c : s) {
    if (c == '"' || c == '\\') {
      out += '\\';
      out += static_cast<char>(c);
    } else if (c < 0x20 || c == 0x7f) {
      char buf[8];
      std::snprintf(buf, sizeof(buf), "\\x%02x", c);
      out += buf;
    } else {
      out += static_cast<char>(c);
    }
  }
  return out + "\"";
}

// An exclusive lock on the tokens file's directory, held while the object lives.
class ScopedDirLock {
 public:
  explicit ScopedDirLock(const std::string& dir) {
    fd_ = ::open(dir.c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC);
    if (fd_ < 0) {
      status_ = absl::NotFoundError(absl::StrCat(dir, ": cannot open the directory: ", std::strerror(errno)));
      return;
    }
    if (::flock(fd_, LOCK_EX) != 0) {
      status_ = absl::UnavailableError(absl::StrCat(dir, ": cannot lock: ", std::strerror(errno)));
    }
  }
  ~ScopedDirLock() {
    if (fd_ >= 0) ::close(fd_);  // closing releases the lock
  }
  ScopedDirLock(const ScopedDirLock&) = delete;
  ScopedDirLock& operator=(const ScopedDirLock&) = delete;
  const absl::Status& status() const { return status_; }
  int fd() const { return fd_; }

 private:
  int fd_ = -1;
  absl::Status status_;
};

std::string DirOf(const std::string& path) {
  const fs::path parent = fs::path(path).parent_path();
  return parent.empty() ? "." : parent.string();
}

// Writes `text` to a 0600 temporary beside `path`, flushes it and renames it over `path`.
absl::Status ReplaceFile(const std::string& path, const std::string& text, int dir_fd) {
  const std::string tmp = absl::StrCat(path, ".tmp.", ::getpid());
  const int fd = ::open(tmp.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0600);
  if (fd < 0) return absl::UnavailableError(absl::StrCat(tmp, ": cannot create: ", std::strerror(errno)));
  ::fchmod(fd, 0600);  // also when the temporary existed with another mode
  size_t done = 0;
  while (done < text.size()) {
    const ssize_t n = ::write(fd, text.data() + done, text.size() - done);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) {
      const int e = errno;
      ::close(fd);
      ::unlink(tmp.c_str());
      return absl::UnavailableError(absl::StrCat(tmp, ": write failed: ", std::strerror(e)));
    }
    done += static_cast<size_t>(n);
  }
  if (::fsync(fd) != 0 || ::close(fd) != 0) {
    ::unlink(tmp.c_str());
    return absl::UnavailableError(absl::StrCat(tmp, ": cannot flush: ", std::strerror(errno)));
  }
  if (::rename(tmp.c_str(), path.c_str()) != 0) {
    const int e = errno;
    ::unlink(tmp.c_str());
    return absl::UnavailableError(absl::StrCat(path, ": cannot replace: ", std::strerror(e)));
  }
  ::fsync(dir_fd);
  return absl::OkStatus();
}

// Loads the file for an edit: a missing file is an empty table.
absl::StatusOr<TokenTable> LoadForEdit(const std::string& path) {
  std::error_code ec;
  if (!fs::exists(path, ec)) return TokenTable();
  return TokenTable::Load(path);
}

}  // namespace

const char* ToString(Role r) {
  switch (r) {
    case Role::kUser: return "user";
    case Role::kWorker: return "worker";
    case Role::kAdmin: return "admin";
  }
  return "?";
}

absl::StatusOr<Role> ParseRole(const std::string& text) {
  if (text == "user") return Role::kUser;
  if (text == "worker") return Role::kWorker;
  if (text == "admin") return Role::kAdmin;
  return absl::InvalidArgumentError(absl::StrCat("role: expected user | worker | admin, got '", text, "'"));
}

absl::Status CheckTokenName(const std::string& name) {
  const bool ok = !name.empty() && name.size() <= kMaxTokenNameBytes && std::isalnum(static_cast<unsigned char>(name[0])) &&
                  std::all_of(name.begin(), name.end(), [](char c) {
                    return std::isalnum(static_cast<unsigned char>(c)) || c == '.' || c == '_' || c == '-' || c == '@';
                  });
  if (ok) return absl::OkStatus();
  return absl::InvalidArgumentError(absl::StrCat(
      "token name '", name.substr(0, kMaxTokenNameBytes), name.size() > kMaxTokenNameBytes ? "...'" : "'",
      ": expected 1 to ", kMaxTokenNameBytes, " letters, digits, '.', '_', '-' or '@', starting with a letter or digit"));
}

std::string UtcTime(int64_t unix_s) {
  const std::time_t t = static_cast<std::time_t>(unix_s);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof(buf), "%Y-%m-%dT%H:%M:%SZ", &tm);
  return buf;
}

absl::StatusOr<std::string> NewToken() {
  unsigned char bytes[32];
  if (RAND_bytes(bytes, sizeof(bytes)) != 1) return absl::InternalError("OpenSSL's RAND_bytes failed: no token made");
  static constexpr char kAlphabet[] = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-_";
  std::string out;
  uint32_t acc = 0;
  int bits = 0;
  for (unsigned char b : bytes) {
    acc = (acc << 8) | b;
    bits += 8;
    while (bits >= 6) {
      bits -= 6;
      out += kAlphabet[(acc >> bits) & 63];
    }
  }
  if (bits > 0) out += kAlphabet[(acc << (6 - bits)) & 63];
  OPENSSL_cleanse(bytes, sizeof(bytes));
  return out;
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
    TokenEntry e;
    for (const auto& [k, v] : entry.entries) {
      if (k.scalar == "name" || k.scalar == "role" || k.scalar == "sha256") continue;
      if (k.scalar != "created" && k.scalar != "revoked") {
        return absl::InvalidArgumentError(absl::StrCat(k.loc.ToString(), ": unknown key '", k.scalar,
                                                       "' in a token entry; valid keys: name, role, sha256, created, revoked"));
      }
      if (!v.IsScalar() || v.scalar.empty()) {
        return absl::InvalidArgumentError(
            absl::StrCat(v.loc.ToString(), ": ", k.scalar, ": expected a UTC time such as 2026-01-31T12:00:00Z"));
      }
      (k.scalar == "created" ? e.created : e.revoked) = v.scalar;
    }
    e.name = name->scalar;
    if (e.name.empty() || e.name.size() > kMaxTokenNameBytes ||
        std::any_of(e.name.begin(), e.name.end(), [](char c) { return static_cast<unsigned char>(c) < 0x20; })) {
      return absl::InvalidArgumentError(absl::StrCat(name->loc.ToString(), ": name: expected 1 to ", kMaxTokenNameBytes,
                                                     " characters without control characters"));
    }
    auto r = ParseRole(role->scalar);
    if (!r.ok()) return absl::InvalidArgumentError(absl::StrCat(role->loc.ToString(), ": ", r.status().message()));
    e.role = *r;
    e.sha256 = hash->scalar;
    for (char& c : e.sha256) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
    std::array<unsigned char, 32> digest{};
    if (!ToDigest(e.sha256, &digest)) {
      return absl::InvalidArgumentError(absl::StrCat(
          hash->loc.ToString(), ": sha256: expected 64 hex digits (the SHA-256 of the token, e.g. from "
                                "`printf %s TOKEN | sha256sum`)"));
    }
    for (const TokenEntry& other : table.entries_) {
      if (other.sha256 == e.sha256) {
        return absl::InvalidArgumentError(absl::StrCat(hash->loc.ToString(), ": this token hash is listed twice"));
      }
      if (other.name == e.name && other.active() && e.active()) {
        return absl::InvalidArgumentError(absl::StrCat(
            name->loc.ToString(), ": '", e.name,
            "' has two valid tokens; a name has one (revoke the old one with graftd tokens revoke NAME)"));
      }
    }
    table.entries_.push_back(std::move(e));
    table.digests_.push_back(digest);
  }
  return table;
}

absl::StatusOr<TokenTable> TokenTable::Load(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in.good()) return absl::NotFoundError(absl::StrCat(path, ": cannot open the tokens file"));
  std::stringstream text;
  text << in.rdbuf();
  return Parse(text.str(), path);  // locations are the file's own lines and columns
}

TokenTable::Found TokenTable::Lookup(const std::string& token) const {
  unsigned char digest[32];
  unsigned int n = 0;
  if (EVP_Digest(token.data(), token.size(), digest, &n, EVP_sha256(), nullptr) != 1 || n != 32) return {};
  // Every entry is compared, whatever matched before: no early exit.
  size_t found = entries_.size();
  for (size_t i = 0; i < digests_.size(); ++i) {
    const bool same = CRYPTO_memcmp(digest, digests_[i].data(), 32) == 0;
    found = same ? i : found;
  }
  if (found == entries_.size()) return {};
  const TokenEntry& e = entries_[found];
  return Found{e.active() ? Match::kValid : Match::kRevoked, &e};
}

size_t TokenTable::active_count() const {
  return static_cast<size_t>(std::count_if(entries_.begin(), entries_.end(), [](const TokenEntry& e) { return e.active(); }));
}

std::string TokenTable::ToText() const {
  std::ostringstream out;
  out << "# graft tokens: SHA-256 hashes only. Edit with graftd tokens add | list | revoke; graftd rereads this "
         "file when it changes.\n";
  if (entries_.empty()) out << "[]\n";
  for (const TokenEntry& e : entries_) {
    out << "- {name: " << YamlWord(e.name) << ", role: " << ToString(e.role) << ", sha256: " << e.sha256;
    if (!e.created.empty()) out << ", created: " << YamlWord(e.created);
    if (!e.revoked.empty()) out << ", revoked: " << YamlWord(e.revoked);
    out << "}\n";
  }
  return out.str();
}

absl::Status TokenTable::Add(TokenEntry entry) {
  std::array<unsigned char, 32> digest{};
  if (!ToDigest(entry.sha256, &digest)) return absl::InvalidArgumentError("sha256: expected 64 lower-case hex digits");
  for (const TokenEntry& e : entries_) {
    if (e.name == entry.name && e.active()) {
      return absl::FailedPreconditionError(absl::StrCat("'", entry.name, "' already has a valid ", ToString(e.role),
                                                        " token; revoke it first (graftd tokens revoke ", entry.name,
                                                        ") to replace it"));
    }
    if (e.sha256 == entry.sha256) return absl::InternalError("a new token's hash equals a stored one");
  }
  entries_.push_back(std::move(entry));
  digests_.push_back(digest);
  return absl::OkStatus();
}

absl::Status TokenTable::Revoke(const std::string& name, const std::string& when) {
  bool any = false;
  for (TokenEntry& e : entries_) {
    if (e.name == name && e.active()) {
      e.revoked = when;
      any = true;
    }
  }
  if (!any) return absl::NotFoundError(absl::StrCat("'", name, "' has no valid token to revoke"));
  return absl::OkStatus();
}

absl::StatusOr<Principal> Authorize(const TokenTable& tokens, const std::string* authorization, Service service) {
  if (authorization == nullptr || authorization->empty()) {
    return absl::UnauthenticatedError("missing 'authorization: Bearer <token>' call metadata");
  }
  const std::string prefix = "Bearer ";
  if (authorization->rfind(prefix, 0) != 0 || authorization->size() == prefix.size()) {
    return absl::UnauthenticatedError("the authorization metadata must be 'Bearer <token>'");
  }
  const TokenTable::Found found = tokens.Lookup(authorization->substr(prefix.size()));
  if (found.match == TokenTable::Match::kUnknown) return absl::UnauthenticatedError("unknown token");
  if (found.match == TokenTable::Match::kRevoked) {
    return absl::UnauthenticatedError(absl::StrCat("this token was revoked (", found.entry->revoked,
                                                   "); ask the coordinator's admin for a new one"));
  }
  Principal who{found.entry->name, found.entry->role};
  const bool worker_service = service == Service::kWorkers;
  if (worker_service != (who.role == Role::kWorker)) {
    return absl::PermissionDeniedError(absl::StrCat("'", who.name, "' has role ", ToString(who.role), ", which may not call the ",
                                                    worker_service ? "Workers" : "Jobs", " service"));
  }
  return who;
}

absl::StatusOr<std::string> AddToken(const std::string& path, const std::string& name, Role role, int64_t now_s) {
  if (absl::Status st = CheckTokenName(name); !st.ok()) return st;
  const std::string dir = DirOf(path);
  std::error_code ec;
  if (!fs::exists(dir, ec)) {
    fs::create_directories(dir, ec);
    if (ec) return absl::UnavailableError(absl::StrCat(dir, ": cannot create the directory: ", ec.message()));
    fs::permissions(dir, fs::perms::owner_all, ec);
  }
  ScopedDirLock lock(dir);
  if (!lock.status().ok()) return lock.status();
  auto table = LoadForEdit(path);
  if (!table.ok()) return table.status();
  auto token = NewToken();
  if (!token.ok()) return token.status();
  TokenEntry e;
  e.name = name;
  e.role = role;
  e.sha256 = Sha256Hex(*token);
  e.created = UtcTime(now_s);
  if (absl::Status st = table->Add(std::move(e)); !st.ok()) return st;
  if (absl::Status st = ReplaceFile(path, table->ToText(), lock.fd()); !st.ok()) return st;
  return token;
}

absl::Status RevokeToken(const std::string& path, const std::string& name, int64_t now_s) {
  ScopedDirLock lock(DirOf(path));
  if (!lock.status().ok()) return lock.status();
  std::error_code ec;
  if (!fs::exists(path, ec)) return absl::NotFoundError(absl::StrCat(path, ": no tokens file"));
  auto table = TokenTable::Load(path);
  if (!table.ok()) return table.status();
  if (absl::Status st = table->Revoke(name, UtcTime(now_s)); !st.ok()) return st;
  return ReplaceFile(path, table->ToText(), lock.fd());
}

absl::StatusOr<std::string> ListTokens(const std::string& path) {
  auto table = TokenTable::Load(path);
  if (!table.ok()) return table.status();
  std::vector<std::vector<std::string>> rows = {{"NAME", "ROLE", "STATE", "CREATED", "SHA-256 (first 12)"}};
  for (const TokenEntry& e : table->entries()) {
    rows.push_back({e.name, ToString(e.role), e.active() ? "valid" : "revoked " + e.revoked,
                    e.created.empty() ? "-" : e.created, e.sha256.substr(0, 12)});
  }
  std::vector<size_t> width(rows[0].size(), 0);
  for (const auto& r : rows) {
    for (size_t i = 0; i < r.size(); ++i) width[i] = std::max(width[i], r[i].size());
  }
  std::string out;
  for (const auto& r : rows) {
    std::string line;
    for (size_t i = 0; i < r.size(); ++i) {
      absl::StrAppend(&line, r[i], i + 1 < r.size() ? std::string(width[i] - r[i].size() + 2, ' ') : "");
    }
    absl::StrAppend(&out, line, "\n");
  }
  const size_t active = table->active_count();
  absl::StrAppend(&out, table->size(), table->size() == 1 ? " token: " : " tokens: ", active, " valid, ",
                  table->size() - active, " revoked\n");
  return out;
}

LiveTokens::LiveTokens(TokenTable table) : table_(std::make_shared<const TokenTable>(std::move(table))) {}

LiveTokens::FileStamp LiveTokens::Stamp(const std::string& path) {
  struct stat st {};
  FileStamp s;
  if (::stat(path.c_str(), &st) != 0) return s;
  s.mtime_ns = static_cast<int64_t>(st.st_mtim.tv_sec) * 1000000000 + st.st_mtim.tv_nsec;
  s.ctime_ns = static_cast<int64_t>(st.st_ctim.tv_sec) * 1000000000 + st.st_ctim.tv_nsec;
  s.size = static_cast<int64_t>(st.st_size);
  s.inode = st.st_ino;
  return s;
}

absl::StatusOr<std::unique_ptr<LiveTokens>> LiveTokens::Open(const std::string& path) {
  const FileStamp stamp = Stamp(path);
  auto table = TokenTable::Load(path);
  if (!table.ok()) return table.status();
  auto live = std::make_unique<LiveTokens>(std::move(*table));
  live->path_ = path;
  live->stamp_ = stamp;
  return live;
}

std::shared_ptr<const TokenTable> LiveTokens::Current() const {
  std::lock_guard<std::mutex> lock(mu_);
  return table_;
}

absl::StatusOr<bool> LiveTokens::Reload(bool force) {
  if (path_.empty()) return false;
  const FileStamp stamp = Stamp(path_);
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (!force && stamp == stamp_) return false;
    stamp_ = stamp;  // a bad file is reported once per change, not at every check
  }
  auto table = TokenTable::Load(path_);
  if (!table.ok()) return table.status();
  auto fresh = std::make_shared<const TokenTable>(std::move(*table));
  {
    std::lock_guard<std::mutex> lock(mu_);
    table_ = fresh;
  }
  std::lock_guard<std::mutex> lock(listeners_mu_);
  for (const auto& [id, listener] : listeners_) listener(*fresh);
  return true;
}

int64_t LiveTokens::AddListener(std::function<void(const TokenTable&)> listener) {
  std::lock_guard<std::mutex> lock(listeners_mu_);
  const int64_t id = next_listener_++;
  listeners_[id] = std::move(listener);
  return id;
}

void LiveTokens::RemoveListener(int64_t id) {
  std::lock_guard<std::mutex> lock(listeners_mu_);
  listeners_.erase(id);
}

}  // namespace graft::server
