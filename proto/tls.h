// TLS on graft's gRPC connections, in one place for graftd, the client and the worker: PEM files
// read and checked once (errors name the file and what it should hold), client channels and
// server credentials built from them, and a diagnostic handshake over OpenSSL that names, in the
// user's words, why a connection failed (wrong CA, expired certificate, host name mismatch,
// plaintext on one side and TLS on the other, a missing or refused client certificate).
// No torch. Thread-safety: plain values and functions without shared state.
#ifndef GRAFT_PROTO_TLS_H_
#define GRAFT_PROTO_TLS_H_

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "absl/status/statusor.h"

namespace graft::tls {

// What one PEM certificate says, for logs and messages.
struct CertificateFacts {
  std::string subject;             // "CN=localhost"
  std::string issuer;              // "CN=graft lab CA (vm)"
  std::vector<std::string> names;  // subjectAltName DNS and IP entries, in order
  int64_t not_before_s = 0;        // validity, seconds since the epoch (UTC)
  int64_t not_after_s = 0;
};

// "2029-03-06 07:09:32 UTC".
std::string FormatUtc(int64_t epoch_s);

// The files a client (`graft`, `graft-worker serve`) dials graftd with. TLS is on when ca_file
// is set; cert_file and key_file (together) add a client certificate for mutual TLS.
struct ClientFiles {
  std::string ca_file;      // PEM certificate(s) of the CA that signed graftd's certificate
  std::string cert_file;    // PEM client certificate (chain), for graftd's --client-ca
  std::string key_file;     // its unencrypted PEM private key
  std::string server_name;  // the name graftd's certificate must carry instead of the address's
                            // host (a certificate issued to another name); empty: the host
};

// ClientFiles read and checked; what channels and diagnoses are built from.
struct ClientCredentials {
  ClientFiles files;
  std::string ca_pem, cert_pem, key_pem;  // the files' contents
  bool enabled() const { return !files.ca_file.empty(); }
};

// Reads and checks the files. Errors: NotFound for a file that cannot be read, InvalidArgument
// for one that is not PEM of the right kind, a key that does not belong to the certificate, a
// certificate without a key (or the reverse), and a certificate, key or server name without a
// CA file. Each message names the file and the flag that sets it. No files: plaintext, OK.
absl::StatusOr<ClientCredentials> LoadClientCredentials(const ClientFiles& files);

// A channel to `address` (host:port): TLS with `credentials` when enabled, with the server-name
// override (GRPC_SSL_TARGET_NAME_OVERRIDE_ARG) when set, else plaintext. Certificates are always
// verified; there is no way to turn that off.
std::shared_ptr<grpc::Channel> CreateChannel(const std::string& address, const ClientCredentials& credentials);

// Why a connection to graftd failed, found by connecting again with OpenSSL, the same files and
// the same name check, and an HTTP/2 greeting after the handshake.
struct Diagnosis {
  // The message names a setting that is wrong (a CA, a certificate, plaintext against TLS):
  // retrying cannot help. False for outages (nothing listening) and when nothing was found.
  bool misconfigured = false;
  std::string message;  // one sentence in the user's words; empty when nothing was found
};

// Runs the diagnosis. Each network step is bounded by `timeout_ms`; the whole call by about
// four times that. Sends no token and nothing but a TLS handshake and an HTTP/2 greeting.
Diagnosis Diagnose(const std::string& address, const ClientCredentials& credentials, int timeout_ms = 3000);

// graftd's TLS files: its certificate and key, and for mutual TLS the CA that signs clients.
struct ServerFiles {
  std::string cert_file;       // --tls-cert / tls_cert
  std::string key_file;        // --tls-key / tls_key
  std::string client_ca_file;  // --client-ca / client_ca; empty: no client certificates
};

struct ServerCredentialsPem {
  ServerFiles files;
  std::string cert_pem, key_pem, client_ca_pem;
  CertificateFacts certificate;  // of cert_file's first certificate
};

// Reads and checks graftd's files like LoadClientCredentials (same errors); REQUIRES
// cert_file and key_file non-empty.
absl::StatusOr<ServerCredentialsPem> LoadServerCredentials(const ServerFiles& files);

// gRPC server credentials: TLS, and with a client CA also requiring and verifying client
// certificates (GRPC_SSL_REQUEST_AND_REQUIRE_CLIENT_CERTIFICATE_AND_VERIFY).
std::shared_ptr<grpc::ServerCredentials> CreateServerCredentials(const ServerCredentialsPem& pem);

}  // namespace graft::tls

#endif  // GRAFT_PROTO_TLS_H_
