// SHA-256 (FIPS 180-4), for checking downloaded artifacts without linking a crypto library.
// Thread-safety: a Sha256 object is used from one thread; the function is pure.
#ifndef GRAFT_CLIENT_SHA256_H_
#define GRAFT_CLIENT_SHA256_H_

#include <array>
#include <cstdint>
#include <string>

namespace graft::client {

// Incremental hashing: Update() any number of times, then HexDigest() once.
class Sha256 {
 public:
  Sha256();
  void Update(const std::string& bytes) { Update(bytes.data(), bytes.size()); }
  void Update(const char* data, size_t n);
  // The digest as 64 lower-case hex digits. Ends the computation: REQUIRES no Update() after it.
  std::string HexDigest();

 private:
  void Block(const unsigned char* p);
  std::array<uint32_t, 8> h_;
  unsigned char buf_[64];
  size_t buffered_ = 0;
  uint64_t total_bytes_ = 0;
};

// The hex digest of `bytes`.
std::string Sha256Hex(const std::string& bytes);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_SHA256_H_
