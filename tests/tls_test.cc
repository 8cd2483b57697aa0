// TLS and mutual TLS on the wire: graftd, `graft` and `graft-worker serve` as real processes on
// loopback with certificates made at test time by the openssl command (Debian's openssl
// package): scripts/make-certs.sh's set, another CA, an expired certificate and one issued to
// another host name. A job runs end to end over TLS and over mutual TLS; every misconfiguration
// gets its own sentence, exit code 6 from `graft`, and a worker that stops instead of retrying.
// Settings: graftd's flags and settings file, the client's flags, variables and config file.
#include <arpa/inet.h>
#include <netinet/in.h>
#include <sys/socket.h>
#include <sys/stat.h>
#include <unistd.h>

#include <map>
#include <sstream>
#include <string>
#include <vector>

#include "client/api.h"
#include "client/commands.h"
#include "client/settings.h"
#include "gtest/gtest.h"
#include "nlohmann/json.hpp"
#include "proto/tls.h"
#include "server/graftd_config.h"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft {
namespace {

using json = nlohmann::json;
using ::graft::testing::BinaryDir;
using ::graft::testing::Cluster;
using ::graft::testing::ClusterTls;
using ::graft::testing::kAlice;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedProcess;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::WriteFile;

// A job of well under a second of training.
const char kTinySets[] =
    " --set training.steps=40 --set training.batch_size=64 --set evaluation.every=20 --set evaluation.triples=256"
    " --set network.hidden=[16,16,16] --set alignment.local.units=0-3 --set alignment.careful.units=4-7";

// The certificates of one test, in a temporary directory: good/ is scripts/make-certs.sh's set
// (ca.pem, ca.key, server.pem, server.key, client.pem, client.key, for localhost, 127.0.0.1 and
// ::1); beside it, made with the openssl command:
//   other-ca.pem          another CA
//   other.pem             signed by the other CA, for localhost and 127.0.0.1, server and client use
//   expired.pem           signed by the good CA, same names and uses, valid only in January 2020
//                         (`openssl ca -startdate/-enddate`: OpenSSL 3.0's `x509 -req` cannot set a
//                         start date in the past)
//   misnamed.pem          signed by the good CA for graft-elsewhere.example only
//   leaf.key              the key of the last three
class TestCerts {
 public:
  TestCerts() {
    ::graft::testing::MakeCerts(good());
    const std::string d = dir_.path();
    WriteFile(d + "/past.cnf",
              "[ca]\ndefault_ca = past\n[past]\ndatabase = " + d + "/index.txt\nnew_certs_dir = " + d +
                  "\nserial = " + d + "/serial\ndefault_md = sha256\npolicy = anything\ncopy_extensions = copy\n"
                  "unique_subject = no\n[anything]\ncommonName = supplied\n");
    WriteFile(d + "/index.txt", "");
    WriteFile(d + "/serial", "10\n");
    WriteFile(d + "/both.ext",
              "subjectAltName=DNS:localhost,IP:127.0.0.1\nextendedKeyUsage=serverAuth,clientAuth\n");
    WriteFile(d + "/misnamed.ext", "subjectAltName=DNS:graft-elsewhere.example\nextendedKeyUsage=serverAuth\n");
    const std::string script =
        "(set -e; cd " + d +
        "; key() { openssl genpkey -algorithm EC -pkeyopt ec_paramgen_curve:P-256 -out $1; }"
        "; key other-ca.key; key leaf.key"
        "; openssl req -x509 -new -key other-ca.key -subj '/CN=other lab CA' -days 30 -out other-ca.pem"
        "; openssl req -new -key leaf.key -subj /CN=localhost -out leaf.csr"
        "; openssl x509 -req -in leaf.csr -CA other-ca.pem -CAkey other-ca.key -set_serial 7 -days 30"
        " -extfile both.ext -out other.pem"
        "; openssl x509 -req -in leaf.csr -CA good/ca.pem -CAkey good/ca.key -set_serial 8 -days 30"
        " -extfile misnamed.ext -out misnamed.pem"
        "; openssl req -new -key leaf.key -subj /CN=localhost -addext subjectAltName=DNS:localhost,IP:127.0.0.1"
        " -addext extendedKeyUsage=serverAuth,clientAuth -out expired.csr"
        "; openssl ca -batch -notext -config past.cnf -cert good/ca.pem -keyfile good/ca.key -in expired.csr"
        " -out expired.pem -startdate 20200101000000Z -enddate 20200201000000Z) 2>&1";
    const auto r = RunCommand(script);
    EXPECT_EQ(r.exit_code, 0) << r.output;
  }
  std::string good() const { return dir_.path() + "/good"; }
  std::string Path(const std::string& name) const { return dir_.path() + "/" + name; }
  std::string ca() const { return good() + "/ca.pem"; }

 private:
  ScopedTempDir dir_;
};

// `graft` with the cluster's address, alice's token and `flags` before the command.
testing::CommandResult Graft(Cluster& c, const std::string& flags, const std::string& command) {
  return RunCommand(BinaryDir() + "/bin/graft --server " + c.address() + " --token " + kAlice + " " + flags + " " +
                    command);
}

std::string Joined(const std::vector<std::string>& flags) {
  std::string out;
  for (const auto& f : flags) out += " " + f;
  return out;
}

// A worker of the cluster with exactly `flags` for TLS (not the cluster's own).
std::unique_ptr<ScopedProcess> WorkerWith(Cluster& c, const std::string& name, const std::vector<std::string>& flags) {
  std::vector<std::string> argv = {BinaryDir() + "/bin/graft-worker", "serve", "--server", c.address(),
                                   "--token-file", c.dir() + "/worker.token", "--work-dir", c.dir() + "/" + name};
  argv.insert(argv.end(), flags.begin(), flags.end());
  return std::make_unique<ScopedProcess>(argv, c.dir() + "/" + name + ".log");
}

// The graft client's API over the cluster's TLS, with these files.
std::unique_ptr<client::Api> TlsApi(Cluster& c, const tls::ClientFiles& files) {
  auto credentials = tls::LoadClientCredentials(files);
  EXPECT_TRUE(credentials.ok()) << credentials.status();
  client::Connection conn;
  conn.server = c.address();
  conn.token = kAlice;
  if (credentials.ok()) conn.tls = *credentials;
  return client::CreateGrpcApi(conn);
}

// Expects `graft ... list` to fail with exit code 6 and `sentence` in its message.
void ExpectRefused(Cluster& c, const std::string& flags, const std::string& sentence) {
  const auto r = Graft(c, flags, "list");
  EXPECT_EQ(r.exit_code, 6) << r.output;
  EXPECT_NE(r.output.find("graft: cannot connect to graftd at " + c.address() + ": " + sentence), std::string::npos)
      << "expected: " << sentence << "\ngot: " << r.output;
}

// A worker with these flags stops by itself (exit 1) with `sentence` in its log, where a worker
// that took the failure for an outage would retry until the bound.
void ExpectWorkerStops(Cluster& c, const std::string& name, const std::vector<std::string>& flags,
                       const std::string& sentence) {
  auto w = WorkerWith(c, name, flags);
  EXPECT_EQ(w->Wait(60000), 1) << ReadFile(w->log_path());
  const std::string log = ReadFile(w->log_path());
  EXPECT_NE(log.find("cannot connect to the coordinator at " + c.address() + ": " + sentence), std::string::npos)
      << "expected: " << sentence << "\ngot: " << log;
  EXPECT_NE(log.find("not retrying"), std::string::npos) << log;
}

// ---------------------------------------------------------------------------------------------
// Working connections.

// Catches: graftd not serving TLS, the worker or the client dialing in plaintext (or without
// the CA), and a job that cannot be submitted, trained, watched or fetched over TLS.
TEST(Tls, AJobRunsEndToEndOverTls) {
  TestCerts certs;
  Cluster c(30, {}, ClusterTls{certs.good(), false});
  EXPECT_NE(c.Log().find("TLS on: certificate " + certs.good() + "/server.pem (CN=localhost; names localhost, "
                         "127.0.0.1, ::1"),
            std::string::npos)
      << c.Log();
  EXPECT_NE(c.Log().find("no client certificates asked for"), std::string::npos) << c.Log();
  auto worker = c.StartWorker("w1");
  const std::string flags = Joined(c.TlsFlags());
  const auto submitted =
      Graft(c, flags, "submit " + SourceDir() + "/configs/parcel-routing.yaml" + kTinySets + " --json");
  ASSERT_EQ(submitted.exit_code, 0) << submitted.output;
  const std::string id = json::parse(submitted.output)["job_id"];
  const auto watched = Graft(c, flags, "watch " + id + " --json --timeout 120");
  ASSERT_EQ(watched.exit_code, 0) << watched.output << ReadFile(worker->log_path());
  int points = 0;
  std::string last_state;
  std::istringstream lines(watched.output);
  for (std::string line; std::getline(lines, line);) {
    if (line.empty() || line[0] != '{') continue;
    const json e = json::parse(line);
    if (e["type"] == "point") ++points;
    if (e["type"] == "state") last_state = e["job"]["state"];
  }
  EXPECT_EQ(points, 3) << watched.output;  // steps 0, 20 and 40
  EXPECT_EQ(last_state, "succeeded") << watched.output;
  EXPECT_NE(ReadFile(worker->log_path()).find("registered as"), std::string::npos);

  // The client library over TLS: fetch every artifact, each checked against its SHA-256.
  auto api = TlsApi(c, {certs.ca(), "", "", ""});
  ScopedTempDir out;
  std::ostringstream o, e;
  client::Io io(o, e);
  io.server = c.address();
  client::FetchArgs fetch;
  fetch.id = id;
  fetch.out_dir = out.path();
  ASSERT_EQ(client::FetchCommand(*api, fetch, io), 0) << e.str();
  EXPECT_NE(o.str().find("weights.pt"), std::string::npos) << o.str();
  EXPECT_NE(o.str().find("verified"), std::string::npos) << o.str();

  // The wire really is TLS: a plaintext channel to the same port gets nowhere.
  auto plain = v1::Jobs::NewStub(grpc::CreateChannel(c.address(), grpc::InsecureChannelCredentials()));
  v1::GetServerInfoRequest req;
  v1::ServerInfo info;
  EXPECT_EQ(plain->GetServerInfo(c.Ctx(kAlice, 5000).get(), req, &info).error_code(), grpc::StatusCode::UNAVAILABLE);
}

// Catches: --client-ca not requiring client certificates, and the worker or the client not
// presenting theirs (--cert, --key).
TEST(Tls, MutualTlsRunsAJobAndRefusesAClientWithoutACertificate) {
  TestCerts certs;
  Cluster c(30, {}, ClusterTls{certs.good(), true});
  EXPECT_NE(c.Log().find("mutual TLS: client certificates required, signed by " + certs.ca()), std::string::npos)
      << c.Log();
  auto worker = c.StartWorker("w1");
  const std::string flags = Joined(c.TlsFlags());
  const auto submitted =
      Graft(c, flags, "submit " + SourceDir() + "/configs/parcel-routing.yaml" + kTinySets + " --json");
  ASSERT_EQ(submitted.exit_code, 0) << submitted.output;
  const std::string id = json::parse(submitted.output)["job_id"];
  const auto waited = Graft(c, flags, "wait " + id + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 0) << waited.output << ReadFile(worker->log_path());
  EXPECT_NE(waited.output.find(id + " succeeded"), std::string::npos) << waited.output;

  const std::string sentence = "graftd requires a client certificate (mutual TLS): give one with --cert FILE --key FILE";
  ExpectRefused(c, "--ca-file " + certs.ca(), sentence);
  ExpectWorkerStops(c, "w2", {"--ca-file", certs.ca()}, sentence);
}

// ---------------------------------------------------------------------------------------------
// Each misconfiguration in the user's words.

// Catches: a wrong CA reported as gRPC's generic handshake failure, or a worker that retries it.
TEST(Tls, AServerCertificateFromAnotherCaIsNamed) {
  TestCerts certs;
  Cluster c(30, {}, ClusterTls{certs.good(), false});
  const std::string sentence = "the server's certificate is not signed by " + certs.Path("other-ca.pem") +
                               " (it was issued by 'CN=graft lab CA";
  ExpectRefused(c, "--ca-file " + certs.Path("other-ca.pem"), sentence);
  ExpectWorkerStops(c, "w1", {"--ca-file", certs.Path("other-ca.pem")}, sentence);
}

// Catches: either side of a TLS/plaintext mismatch reported as an outage or retried.
TEST(Tls, PlaintextOnOneSideAndTlsOnTheOtherIsNamed) {
  TestCerts certs;
  {
    Cluster c(30, {}, ClusterTls{certs.good(), false});
    const std::string sentence =
        "graftd serves TLS there, but this connection is plaintext: give the CA file that signed graftd's "
        "certificate with --ca-file";
    ExpectRefused(c, "", sentence);
    ExpectWorkerStops(c, "w1", {}, sentence);
  }
  Cluster plain;
  const std::string sentence =
      "graftd serves plaintext there, but this connection expects TLS (--ca-file is given): drop --ca-file (and "
      "--cert, --key), or start graftd with --tls-cert and --tls-key";
  ExpectRefused(plain, "--ca-file " + certs.ca(), sentence);
  ExpectWorkerStops(plain, "w1", {"--ca-file", certs.ca()}, sentence);
}

// Catches: an expired certificate not named with its date; graftd not warning at start.
TEST(Tls, AnExpiredServerCertificateIsNamedWithItsDate) {
  TestCerts certs;
  Cluster c(30, {"--tls-cert", certs.Path("expired.pem"), "--tls-key", certs.Path("leaf.key")});
  EXPECT_NE(c.Log().find("the TLS certificate " + certs.Path("expired.pem") +
                         " expired on 2020-02-01 00:00:00 UTC: clients will refuse it"),
            std::string::npos)
      << c.Log();
  const std::string sentence =
      "the server's certificate (CN=localhost) expired on 2020-02-01 00:00:00 UTC; graftd needs a new one (--tls-cert)";
  ExpectRefused(c, "--ca-file " + certs.ca(), sentence);
  ExpectWorkerStops(c, "w1", {"--ca-file", certs.ca()}, sentence);
}

// Catches: a host name mismatch not naming the certificate's names, and --tls-server-name not
// reaching gRPC (GRPC_SSL_TARGET_NAME_OVERRIDE_ARG) in the client or the worker.
TEST(Tls, AHostNameMismatchIsNamedAndTlsServerNameConnects) {
  TestCerts certs;
  Cluster c(30, {"--tls-cert", certs.Path("misnamed.pem"), "--tls-key", certs.Path("leaf.key")});
  ExpectRefused(c, "--ca-file " + certs.ca(),
                "the server's certificate is for graft-elsewhere.example, not '127.0.0.1': connect by one of those "
                "names, or give the name it carries with --tls-server-name NAME");
  ExpectRefused(c, "--ca-file " + certs.ca() + " --tls-server-name graft-other.example",
                "the server's certificate is for graft-elsewhere.example, not 'graft-other.example' "
                "(--tls-server-name)");
  const std::string right = " --ca-file " + certs.ca() + " --tls-server-name graft-elsewhere.example";
  const auto listed = Graft(c, right, "list --json");
  EXPECT_EQ(listed.exit_code, 0) << listed.output;
  EXPECT_EQ(listed.output, "[]\n");
  // The worker with the override registers and trains.
  auto worker = WorkerWith(c, "w1", {"--ca-file", certs.ca(), "--tls-server-name", "graft-elsewhere.example"});
  const auto submitted =
      Graft(c, right, "submit " + SourceDir() + "/configs/parcel-routing.yaml" + kTinySets + " --json");
  ASSERT_EQ(submitted.exit_code, 0) << submitted.output;
  const std::string id = json::parse(submitted.output)["job_id"];
  const auto waited = Graft(c, right, "wait " + id + " --timeout 120");
  EXPECT_EQ(waited.exit_code, 0) << waited.output << ReadFile(worker->log_path());
}

// Catches: a refused client certificate (another CA, expired) reported as an outage.
TEST(Tls, AClientCertificateFromAnotherCaOrExpiredIsNamed) {
  TestCerts certs;
  Cluster c(30, {}, ClusterTls{certs.good(), true});
  const std::string ca = " --ca-file " + certs.ca();
  const std::string other = certs.Path("other.pem"), expired = certs.Path("expired.pem");
  const std::string key = certs.Path("leaf.key");
  const std::string issued = "graftd refused the client certificate " + other +
                             ": it was issued by 'CN=other lab CA', and graftd accepts client certificates issued by "
                             "'CN=graft lab CA";
  ExpectRefused(c, ca + " --cert " + other + " --key " + key, issued);
  ExpectWorkerStops(c, "w1", {"--ca-file", certs.ca(), "--cert", other, "--key", key}, issued);
  const std::string old = "graftd refused the client certificate " + expired + ": it expired on 2020-02-01 00:00:00 UTC";
  ExpectRefused(c, ca + " --cert " + expired + " --key " + key, old);
  ExpectWorkerStops(c, "w2", {"--ca-file", certs.ca(), "--cert", expired, "--key", key}, old);
}

// Catches: a connection refused (nothing listening) taken for a TLS misconfiguration, which
// would stop a worker that should wait for its coordinator.
TEST(Tls, NothingListeningIsAnOutageNotAMisconfiguration) {
  TestCerts certs;
  auto creds = tls::LoadClientCredentials({certs.ca(), "", "", ""});
  ASSERT_TRUE(creds.ok()) << creds.status();
  // Port 1 on loopback: privileged, and nothing of ours listens there.
  const tls::Diagnosis d = tls::Diagnose("127.0.0.1:1", *creds, 2000);
  EXPECT_FALSE(d.misconfigured);
  EXPECT_NE(d.message.find("nothing accepts connections there"), std::string::npos) << d.message;
  // A listener that accepts and never answers (a server too busy to) gives no verdict either.
  const int fd = socket(AF_INET, SOCK_STREAM, 0);
  ASSERT_GE(fd, 0);
  sockaddr_in addr{};
  addr.sin_family = AF_INET;
  addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
  ASSERT_EQ(bind(fd, reinterpret_cast<sockaddr*>(&addr), sizeof(addr)), 0);
  ASSERT_EQ(listen(fd, 4), 0);
  socklen_t len = sizeof(addr);
  ASSERT_EQ(getsockname(fd, reinterpret_cast<sockaddr*>(&addr), &len), 0);
  const std::string silent = "127.0.0.1:" + std::to_string(ntohs(addr.sin_port));
  EXPECT_FALSE(tls::Diagnose(silent, *creds, 300).misconfigured);
  EXPECT_FALSE(tls::Diagnose(silent, tls::ClientCredentials{}, 300).misconfigured);
  close(fd);
  // And a healthy TLS server gives no diagnosis at all.
  Cluster c(30, {}, ClusterTls{certs.good(), false});
  const tls::Diagnosis fine = tls::Diagnose(c.address(), *creds, 2000);
  EXPECT_FALSE(fine.misconfigured);
  EXPECT_EQ(fine.message, "");
}

// ---------------------------------------------------------------------------------------------
// Settings and files.

// Catches: unreadable or non-PEM TLS files, a key of another certificate, or a half-given pair
// accepted (or crashing graftd) instead of exit code 2 with the file named.
TEST(TlsSettings, GraftdRefusesBadTlsFilesWithExitCode2) {
  TestCerts certs;
  ScopedTempDir dir;
  WriteFile(dir.path() + "/tokens.yaml", "[]\n");
  WriteFile(dir.path() + "/notes.txt", "not a certificate\n");
  const std::string g = certs.good();
  const std::string base =
      BinaryDir() + "/bin/graftd --listen 127.0.0.1:0 --tokens-file " + dir.path() + "/tokens.yaml --data-dir " +
      dir.path() + "/data ";
  const std::vector<std::pair<std::string, std::string>> cases = {
      {"--tls-cert " + dir.path() + "/missing.pem --tls-key " + g + "/server.key",
       "graftd's certificate " + dir.path() + "/missing.pem (--tls-cert, tls_cert): cannot read it: No such file or "
       "directory"},
      {"--tls-cert " + dir.path() + "/notes.txt --tls-key " + g + "/server.key",
       "graftd's certificate " + dir.path() + "/notes.txt (--tls-cert, tls_cert): not a PEM certificate"},
      {"--tls-cert " + g + "/server.key --tls-key " + g + "/server.key",
       "graftd's certificate " + g + "/server.key (--tls-cert, tls_cert): holds a private key, not a certificate"},
      {"--tls-cert " + g + "/server.pem --tls-key " + g + "/server.pem",
       "graftd's key " + g + "/server.pem (--tls-key, tls_key): holds a certificate, not a private key"},
      {"--tls-cert " + g + "/server.pem --tls-key " + g + "/client.key",
       "graftd's key " + g + "/client.key (--tls-key, tls_key): does not belong to the certificate " + g +
           "/server.pem"},
      {"--tls-cert " + g + "/server.pem", "--tls-cert (tls_cert) needs --tls-key (tls_key)"},
      {"--client-ca " + g + "/ca.pem", "--client-ca (client_ca) needs --tls-cert and --tls-key"},
      {"--tls-cert " + g + "/server.pem --tls-key " + g + "/server.key --client-ca " + dir.path() + "/notes.txt",
       "the client CA file " + dir.path() + "/notes.txt (--client-ca, client_ca): not a PEM certificate"},
  };
  for (const auto& [flags, message] : cases) {
    const auto r = RunCommand(base + flags);
    EXPECT_EQ(r.exit_code, 2) << flags << "\n" << r.output;
    EXPECT_NE(r.output.find(message), std::string::npos) << flags << "\nexpected: " << message << "\ngot: " << r.output;
  }
  // An encrypted key is named as such (openssl pkey -aes256 -passout).
  const auto enc = RunCommand("openssl pkey -in " + g + "/server.key -aes256 -passout pass:secret -out " +
                              dir.path() + "/encrypted.key 2>&1");
  ASSERT_EQ(enc.exit_code, 0) << enc.output;
  const auto r = RunCommand(base + "--tls-cert " + g + "/server.pem --tls-key " + dir.path() + "/encrypted.key");
  EXPECT_EQ(r.exit_code, 2) << r.output;
  EXPECT_NE(r.output.find("the private key is encrypted; graft needs it unencrypted"), std::string::npos) << r.output;
}

// Catches: the settings file's tls_cert, tls_key, client_ca not read, and the plaintext rule
// applied to TLS (or dropped for plaintext).
TEST(TlsSettings, SettingsFileKeysAndTheNonLoopbackRule) {
  ScopedTempDir dir;
  const std::string file = dir.path() + "/graftd.yaml";
  WriteFile(file, "listen: 0.0.0.0:7070\ntls_cert: certs/server.pem\ntls_key: certs/server.key\nclient_ca: ca.pem\n");
  server::GraftdConfig config;
  ASSERT_OK(server::LoadGraftdConfig(file, &config));
  EXPECT_EQ(config.tls_cert, "certs/server.pem");  // relative to graftd's directory, like tokens_file
  EXPECT_EQ(config.tls_key, "certs/server.key");
  EXPECT_EQ(config.client_ca, "ca.pem");
  EXPECT_OK(server::CheckTransport(config));  // TLS: a non-loopback address needs no --allow-plaintext
  server::GraftdConfig plain;
  plain.listen = "0.0.0.0:7070";
  const absl::Status refused = server::CheckTransport(plain);
  EXPECT_TRUE(absl::IsInvalidArgument(refused));
  EXPECT_NE(refused.message().find("refusing to listen on 0.0.0.0:7070 in plaintext"), std::string::npos) << refused;
  plain.allow_plaintext = true;
  EXPECT_OK(server::CheckTransport(plain));
  plain.allow_plaintext = false;
  plain.listen = "[::1]:7070";
  EXPECT_OK(server::CheckTransport(plain));
  WriteFile(file, "tls_cert: [a, b]\n");
  const absl::Status bad = server::LoadGraftdConfig(file, &config);
  EXPECT_EQ(bad.message(), file + ":1:11: tls_cert: expected a file path, got a list");
  // The shipped settings file documents TLS and no longer says there is none.
  const std::string shipped = ReadFile(SourceDir() + "/configs/graftd.yaml");
  EXPECT_EQ(shipped.find("no TLS yet"), std::string::npos);
  EXPECT_NE(shipped.find("# tls_cert:"), std::string::npos);
}

// Catches: TLS files taken from the wrong source, a relative path in the client config not
// resolved against the file, and bad files accepted by `graft` and `graft-worker serve`.
TEST(TlsSettings, ClientFilesComeFromFlagsThenVariablesThenTheConfigFile) {
  TestCerts certs;
  ScopedTempDir dir;
  const std::string cfg = dir.path() + "/client.yaml";
  WriteFile(cfg, "server: 127.0.0.1:7070\ntoken: t\nca_file: certs/ca.pem\ncert_file: certs/me.pem\n"
                 "key_file: /abs/me.key\ntls_server_name: graft.lab\n");
  std::map<std::string, std::string> env = {{"GRAFT_CONFIG", cfg}};
  client::SettingsSources src;
  src.getenv = [&](const char* n) -> const char* {
    auto it = env.find(n);
    return it == env.end() ? nullptr : it->second.c_str();
  };
  auto s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok()) << s.status();
  EXPECT_EQ(s->ca_file, dir.path() + "/certs/ca.pem");  // relative to the config file
  EXPECT_EQ(s->cert_file, dir.path() + "/certs/me.pem");
  EXPECT_EQ(s->key_file, "/abs/me.key");
  EXPECT_EQ(s->tls_server_name, "graft.lab");
  env["GRAFT_CA_FILE"] = "/env/ca.pem";
  env["GRAFT_CERT_FILE"] = "/env/me.pem";
  env["GRAFT_KEY_FILE"] = "/env/me.key";
  env["GRAFT_TLS_SERVER_NAME"] = "env.lab";
  s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok()) << s.status();
  EXPECT_EQ(s->ca_file, "/env/ca.pem");
  EXPECT_EQ(s->cert_file, "/env/me.pem");
  EXPECT_EQ(s->key_file, "/env/me.key");
  EXPECT_EQ(s->tls_server_name, "env.lab");
  src.flag_ca_file = "flag-ca.pem";
  src.flag_cert_file = "flag.pem";
  src.flag_key_file = "flag.key";
  src.flag_tls_server_name = "flag.lab";
  s = client::ResolveSettings(src);
  ASSERT_TRUE(s.ok()) << s.status();
  EXPECT_EQ(s->ca_file, "flag-ca.pem");  // flags as given, relative to the working directory
  EXPECT_EQ(s->cert_file, "flag.pem");
  EXPECT_EQ(s->key_file, "flag.key");
  EXPECT_EQ(s->tls_server_name, "flag.lab");
  WriteFile(cfg, "ca_fil: x\n");
  src = client::SettingsSources();
  src.getenv = [&](const char* n) -> const char* {
    auto it = env.find(n);
    return it == env.end() ? nullptr : it->second.c_str();
  };
  EXPECT_EQ(client::ResolveSettings(src).status().message(),
            cfg + ":1:1: unknown key 'ca_fil' in the client config; did you mean 'ca_file'?");

  // The files are checked before any connection, each error naming the file.
  const std::string g = certs.good();
  struct Case {
    tls::ClientFiles files;
    std::string message;
  };
  const std::vector<Case> cases = {
      {{dir.path() + "/none.pem", "", "", ""},
       "the CA file " + dir.path() + "/none.pem (--ca-file): cannot read it: No such file or directory"},
      {{cfg, "", "", ""}, "the CA file " + cfg + " (--ca-file): not a PEM certificate"},
      {{g + "/ca.pem", g + "/client.pem", "", ""}, "--cert needs --key"},
      {{g + "/ca.pem", "", g + "/client.key", ""}, "--key needs --cert"},
      {{"", g + "/client.pem", g + "/client.key", ""}, "--cert, --key and --tls-server-name need --ca-file"},
      {{"", "", "", "graft.lab"}, "--cert, --key and --tls-server-name need --ca-file"},
      {{g + "/ca.pem", g + "/client.pem", g + "/server.key", ""},
       "the client key " + g + "/server.key (--key): does not belong to the client certificate " + g + "/client.pem"},
      {{g + "/ca.pem", g + "/client.key", g + "/client.key", ""},
       "the client certificate " + g + "/client.key (--cert): holds a private key, not a certificate"},
  };
  for (const auto& c : cases) {
    auto loaded = tls::LoadClientCredentials(c.files);
    ASSERT_FALSE(loaded.ok()) << c.message;
    EXPECT_NE(loaded.status().message().find(c.message), std::string::npos)
        << "expected: " << c.message << "\ngot: " << loaded.status().message();
  }
  EXPECT_TRUE(absl::IsNotFound(tls::LoadClientCredentials(cases[0].files).status()));
  auto good = tls::LoadClientCredentials({g + "/ca.pem", g + "/client.pem", g + "/client.key", ""});
  ASSERT_TRUE(good.ok()) << good.status();
  EXPECT_TRUE(good->enabled());
  EXPECT_FALSE(tls::LoadClientCredentials({}).value().enabled());

  // The binaries: exit code 2 (settings), the file named; the worker before any connection.
  const auto graft = RunCommand(BinaryDir() + "/bin/graft --server 127.0.0.1:1 --token t --ca-file " + dir.path() +
                                "/none.pem list");
  EXPECT_EQ(graft.exit_code, 2) << graft.output;
  EXPECT_NE(graft.output.find("graft: the CA file " + dir.path() + "/none.pem (--ca-file): cannot read it"),
            std::string::npos)
      << graft.output;
  const auto via_env = RunCommand("GRAFT_CA_FILE=" + dir.path() + "/none.pem " + BinaryDir() +
                                  "/bin/graft --server 127.0.0.1:1 --token t list");
  EXPECT_EQ(via_env.exit_code, 2) << via_env.output;
  WriteFile(dir.path() + "/w.token", "w\n");
  const auto worker = RunCommand(BinaryDir() + "/bin/graft-worker serve --server 127.0.0.1:1 --token-file " +
                                 dir.path() + "/w.token --ca-file " + g + "/ca.pem --cert " + g + "/client.pem");
  EXPECT_EQ(worker.exit_code, 2) << worker.output;
  EXPECT_NE(worker.output.find("graft-worker: --cert needs --key"), std::string::npos) << worker.output;
}

// Catches: make-certs.sh leaving keys readable by others, missing a requested host name, a
// server certificate that its CA does not verify, or overwriting an existing CA.
TEST(TlsSettings, MakeCertsWritesPrivateKeysNamesTheHostsAndNeverOverwrites) {
  ScopedTempDir dir;
  const std::string d = dir.path() + "/certs";
  const auto made = RunCommand(SourceDir() + "/scripts/make-certs.sh " + d + " node7.lab 10.1.2.3 2>&1");
  ASSERT_EQ(made.exit_code, 0) << made.output;
  for (const char* key : {"ca.key", "server.key", "client.key"}) {
    struct stat st {};
    ASSERT_EQ(stat((d + "/" + key).c_str(), &st), 0) << key;
    EXPECT_EQ(st.st_mode & 0777, 0600u) << key;
  }
  // The openssl command (outside reference) reads the names and verifies the chain.
  const auto names = RunCommand("openssl x509 -in " + d + "/server.pem -noout -ext subjectAltName 2>&1");
  ASSERT_EQ(names.exit_code, 0) << names.output;
  for (const char* n : {"DNS:node7.lab", "IP Address:10.1.2.3", "DNS:localhost", "IP Address:127.0.0.1",
                        "IP Address:0:0:0:0:0:0:0:1"}) {
    EXPECT_NE(names.output.find(n), std::string::npos) << n << "\n" << names.output;
  }
  const auto verified = RunCommand("openssl verify -CAfile " + d + "/ca.pem -purpose sslserver " + d +
                                   "/server.pem && openssl verify -CAfile " + d + "/ca.pem -purpose sslclient " + d +
                                   "/client.pem 2>&1");
  EXPECT_EQ(verified.exit_code, 0) << verified.output;
  const std::string ca_before = ReadFile(d + "/ca.pem");
  const auto again = RunCommand(SourceDir() + "/scripts/make-certs.sh " + d + " 2>&1");
  EXPECT_EQ(again.exit_code, 1) << again.output;
  EXPECT_NE(again.output.find("exists; certificates are never overwritten"), std::string::npos) << again.output;
  EXPECT_EQ(ReadFile(d + "/ca.pem"), ca_before);
}

}  // namespace
}  // namespace graft
