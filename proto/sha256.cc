#include "proto/sha256.h"

#include <openssl/evp.h>

#include <fstream>

namespace graft {

Sha256::Sha256() : ctx_(EVP_MD_CTX_new()) { EVP_DigestInit_ex(ctx_, EVP_sha256(), nullptr); }

Sha256::~Sha256() { EVP_MD_CTX_free(ctx_); }

void Sha256::Update(const char* data, size_t n) { EVP_DigestUpdate(ctx_, data, n); }

std::string Sha256::HexDigest() {
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  EVP_DigestFinal_ex(ctx_, digest, &len);
  static const char kHex[] = "0123456789abcdef";
  std::string out;
  for (unsigned int i = 0; i < len; ++i) {
    out.push_back(kHex[digest[i] >> 4]);
    out.push_back(kHex[digest[i] & 15]);
  }
  return out;
}

std::string Sha256Hex(const std::string& bytes) {
  Sha256 sha;
  sha.Update(bytes);
  return sha.HexDigest();
}

std::string Sha256File(const std::string& path, int64_t* bytes) {
  *bytes = 0;
  std::ifstream in(path, std::ios::binary);
  Sha256 sha;
  std::string buf(1 << 20, '\0');
  while (in) {
    in.read(buf.data(), static_cast<std::streamsize>(buf.size()));
    const std::streamsize n = in.gcount();
    if (n <= 0) break;
    sha.Update(buf.data(), static_cast<size_t>(n));
    *bytes += n;
  }
  return sha.HexDigest();
}

}  // namespace graft
