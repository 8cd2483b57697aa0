// SHA-256 as the API uses it: lower-case hex digests of artifacts (ArtifactHeader.sha256,
// ArtifactChunk.sha256) and of bearer tokens (the tokens file). One implementation, over
// OpenSSL's EVP interface (which gRPC already links), for the coordinator, the worker and the
// client. Thread-safety: a Sha256 object is used from one thread; the functions are pure.
#ifndef GRAFT_PROTO_SHA256_H_
#define GRAFT_PROTO_SHA256_H_

#include <cstddef>
#include <cstdint>
#include <string>

struct evp_md_ctx_st;  // OpenSSL's EVP_MD_CTX; its header stays out of this one

namespace graft {

// Incremental hashing: Update() any number of times, then HexDigest() once.
class Sha256 {
 public:
  Sha256();
  ~Sha256();
  Sha256(const Sha256&) = delete;
  Sha256& operator=(const Sha256&) = delete;

  void Update(const char* data, size_t n);
  void Update(const std::string& bytes) { Update(bytes.data(), bytes.size()); }
  // The digest as 64 lower-case hex digits. Ends the computation: REQUIRES no Update() after it.
  std::string HexDigest();

 private:
  ::evp_md_ctx_st* ctx_;  // owned
};

// The hex digest of `bytes`.
std::string Sha256Hex(const std::string& bytes);

// The hex digest of the file at `path` and its size in *bytes (a file that cannot be read
// reads as empty: the callers compare sizes and digests with what they expect).
std::string Sha256File(const std::string& path, int64_t* bytes);

}  // namespace graft

#endif  // GRAFT_PROTO_SHA256_H_
