// Who may do what, against graftd as a real process on loopback: tokens managed with
// `graftd tokens add|list|revoke` and picked up without a restart (also ending open watch
// streams), the modes of graftd's files, artifact names from a fixed list, and the limits of
// configs/graftd.yaml, each refused with its name and value. The every-RPC-every-caller table is
// Service.EveryCallNeedsATokenAndTheRightRole (service_test.cc).
#include <signal.h>
#include <sys/stat.h>

#include <chrono>
#include <filesystem>
#include <string>
#include <thread>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_split.h"
#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "proto/sha256.h"
#include "tests/cluster.h"
#include "tests/test_util.h"

namespace graft {
namespace {

using ::graft::testing::BinaryDir;
using ::graft::testing::Cluster;
using ::graft::testing::kAlice;
using ::graft::testing::kWorker;
using ::graft::testing::ReadFile;
using ::graft::testing::RunCommand;
using ::graft::testing::ScopedTempDir;
using ::graft::testing::SourceDir;
using ::graft::testing::WaitFor;
using ::graft::testing::WriteFile;

const std::vector<std::string> kSmall = {"training.steps=120", "training.batch_size=64", "evaluation.every=40",
                                         "evaluation.triples=256", "network.hidden=[32,32,32]"};

int Mode(const std::string& path) {
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) return -1;
  return static_cast<int>(st.st_mode & 07777);
}

// `graftd tokens ARGS`; the token is the one line on stdout of `add`.
testing::CommandResult Tokens(const std::string& args) {
  return RunCommand(BinaryDir() + "/bin/graftd tokens " + args);
}
std::string AddToken(const std::string& file, const std::string& name, const std::string& role) {
  auto r = RunCommand(BinaryDir() + "/bin/graftd tokens add " + name + " " + role + " --tokens-file " + file);
  EXPECT_EQ(r.exit_code, 0) << r.output;
  // stdout (the token) comes first; graftd's note follows on stderr.
  return r.output.substr(0, r.output.find('\n'));
}

grpc::StatusCode GetInfo(Cluster& c, const std::string& token) {
  v1::GetServerInfoRequest r;
  v1::ServerInfo o;
  return c.jobs().GetServerInfo(c.Ctx(token, 10000).get(), r, &o).error_code();
}

// graftd tokens on a file of its own: the token is printed once and only its SHA-256 stored;
// the file is 0600; a second valid token for a name, a bad role or name and revoking an unknown
// name are refused with their codes (README "Exit codes"). Catches a token written to the file, a
// file left readable by others, and a revoke that deletes instead of marking.
TEST(Tokens, AddListRevokeKeepOnlyHashes) {
  ScopedTempDir dir;
  const std::string file = dir.path() + "/sub/tokens.yaml";  // the directory is made too
  const std::string token = AddToken(file, "dana", "user");
  ASSERT_EQ(token.size(), 43u) << token;  // 32 random bytes, base64url without padding
  for (char ch : token) EXPECT_TRUE(std::isalnum(static_cast<unsigned char>(ch)) || ch == '-' || ch == '_') << token;
  const std::string text = ReadFile(file);
  EXPECT_EQ(text.find(token), std::string::npos) << "the token itself is in the file";
  EXPECT_NE(text.find(graft::Sha256Hex(token)), std::string::npos) << text;
  EXPECT_EQ(Mode(file), 0600);
  EXPECT_NE(AddToken(file, "erin", "admin"), token);

  auto again = Tokens("add dana user --tokens-file " + file);
  EXPECT_EQ(again.exit_code, 1) << again.output;
  EXPECT_NE(again.output.find("'dana' already has a valid user token; revoke it first"), std::string::npos)
      << again.output;
  auto role = Tokens("add fay boss --tokens-file " + file);
  EXPECT_EQ(role.exit_code, 3) << role.output;
  EXPECT_NE(role.output.find("expected user | worker | admin, got 'boss'"), std::string::npos) << role.output;
  auto name = Tokens("add 'fay/../x' user --tokens-file " + file);
  EXPECT_EQ(name.exit_code, 3) << name.output;
  EXPECT_NE(name.output.find("token name 'fay/../x'"), std::string::npos) << name.output;
  auto nobody = Tokens("revoke zed --tokens-file " + file);
  EXPECT_EQ(nobody.exit_code, 1) << nobody.output;
  EXPECT_NE(nobody.output.find("'zed' has no valid token to revoke"), std::string::npos) << nobody.output;
  auto nofile = Tokens("list");
  EXPECT_EQ(nofile.exit_code, 2) << nofile.output;
  EXPECT_NE(nofile.output.find("--tokens-file"), std::string::npos) << nofile.output;

  auto revoked = Tokens("revoke dana --tokens-file " + file);
  EXPECT_EQ(revoked.exit_code, 0) << revoked.output;
  auto list = Tokens("list --tokens-file " + file);
  ASSERT_EQ(list.exit_code, 0) << list.output;
  EXPECT_NE(list.output.find("dana  user   revoked "), std::string::npos) << list.output;
  EXPECT_NE(list.output.find("erin  admin  valid"), std::string::npos) << list.output;
  EXPECT_NE(list.output.find(graft::Sha256Hex(token).substr(0, 12)), std::string::npos) << list.output;
  EXPECT_NE(list.output.find("2 tokens: 1 valid, 1 revoked"), std::string::npos) << list.output;
  EXPECT_EQ(list.output.find(token), std::string::npos);
  // A revoked name may get a new token.
  EXPECT_FALSE(AddToken(file, "dana", "user").empty());
  EXPECT_EQ(Mode(file), 0600);
}

// A token added while graftd runs is accepted without a restart; revoking it is refused from then
// on, and ends a watch stream opened with it (UNAUTHENTICATED), with no SIGHUP (the file's change
// time). Catches a token table loaded only at start, and watch streams that outlive their token.
TEST(Tokens, ChangesTakeEffectWithoutARestartAndEndOpenWatches) {
  Cluster c;
  const std::string file = c.dir() + "/tokens.yaml";
  const std::string dana = AddToken(file, "dana", "user");
  ASSERT_TRUE(WaitFor([&] { return GetInfo(c, dana) == grpc::StatusCode::OK; }, 20000)) << c.Log();
  // Dana's job stays queued (no worker), so her watch stays open.
  const std::string id = c.Submit(dana, "parcel-routing", kSmall);
  grpc::ClientContext ctx;
  ctx.AddMetadata("authorization", "Bearer " + dana);
  ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30));
  v1::WatchJobRequest wr;
  wr.set_job_id(id);
  auto reader = c.jobs().WatchJob(&ctx, wr);
  v1::JobEvent e;
  ASSERT_TRUE(reader->Read(&e));  // the job's state: the stream is open
  EXPECT_EQ(e.state_change().state(), v1::JOB_STATE_QUEUED);

  auto revoked = Tokens("revoke dana --tokens-file " + file);
  ASSERT_EQ(revoked.exit_code, 0) << revoked.output;
  int more = 0;
  while (reader->Read(&e)) ++more;  // ends when graftd notices, within the 30 s deadline
  grpc::Status ended = reader->Finish();
  EXPECT_EQ(ended.error_code(), grpc::StatusCode::UNAUTHENTICATED) << ended.error_message() << "\n" << c.Log();
  EXPECT_NE(ended.error_message().find("revoked"), std::string::npos) << ended.error_message();
  EXPECT_EQ(more, 0);
  EXPECT_EQ(GetInfo(c, dana), grpc::StatusCode::UNAUTHENTICATED);
  EXPECT_EQ(GetInfo(c, kAlice), grpc::StatusCode::OK);
  EXPECT_NE(c.Log().find("tokens file " + file + " reloaded: 7 tokens, 5 valid, 2 revoked"), std::string::npos)
      << c.Log();
}

// SIGHUP rereads the tokens file at once, and warns about a file others can read; a file broken
// by an edit keeps the tokens in force (logged), and the fixed file is taken up again. Catches a
// missing SIGHUP handler, a broken edit that locks everyone out, and no warning on mode 0644.
TEST(Tokens, SighupRereadsAndABrokenFileKeepsThePreviousTokens) {
  Cluster c;
  const std::string file = c.dir() + "/tokens.yaml";
  const std::string good = ReadFile(file);
  ASSERT_EQ(::chmod(file.c_str(), 0644), 0);
  ASSERT_TRUE(c.SignalCoordinator(SIGHUP));
  ASSERT_TRUE(WaitFor([&] { return c.Log().find("reloaded (SIGHUP)") != std::string::npos; }, 20000)) << c.Log();
  EXPECT_NE(c.Log().find("the tokens file " + file + " has mode 0644: others can read or change it"),
            std::string::npos)
      << c.Log();

  WriteFile(file, "- {name: alice, role: user, sha256: 1234}\n");
  ASSERT_TRUE(c.SignalCoordinator(SIGHUP));
  ASSERT_TRUE(WaitFor([&] { return c.Log().find("tokens file not reloaded") != std::string::npos; }, 20000)) << c.Log();
  EXPECT_NE(c.Log().find(file + ":1:37: sha256: expected 64 hex digits"), std::string::npos) << c.Log();
  EXPECT_EQ(GetInfo(c, kAlice), grpc::StatusCode::OK);

  // Mended without alice: she is refused once it is read.
  std::string without_alice;
  for (absl::string_view line : absl::StrSplit(good, '\n')) {
    if (!line.empty() && line.find("name: alice") == std::string::npos) absl::StrAppend(&without_alice, line, "\n");
  }
  WriteFile(file, without_alice);
  ASSERT_TRUE(WaitFor([&] { return GetInfo(c, kAlice) == grpc::StatusCode::UNAUTHENTICATED; }, 20000)) << c.Log();
  EXPECT_EQ(GetInfo(c, testing::kBob), grpc::StatusCode::OK);
}

// graftd's data dir is 0700 and its database 0600 (umask 077), so other users of a shared machine
// read no specs, metrics or artifacts. Catches the default 0755 / 0644.
TEST(Tokens, DataDirAndDatabaseArePrivate) {
  Cluster c;
  EXPECT_EQ(Mode(c.dir() + "/data"), 0700);
  EXPECT_EQ(Mode(c.dir() + "/data/graft.db"), 0600);
  // An artifact directory made later is private too.
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  auto worker = c.StartWorker("w1");
  ASSERT_TRUE(c.WaitState(id, v1::JOB_STATE_SUCCEEDED, 60000)) << c.Log();
  EXPECT_EQ(Mode(c.dir() + "/data/artifacts/" + id), 0700);
  EXPECT_EQ(Mode(c.dir() + "/data/artifacts/" + id + "/weights.pt"), 0600);
}

// A fake worker holding a lease (this test) and alice try artifact names with paths: each upload
// and download is refused with INVALID_ARGUMENT naming the allowed list, and nothing is written
// outside the job's artifact directory. Catches a name used as a path.
TEST(Artifacts, NamesWithPathsAreRefused) {
  Cluster c;
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  v1::RegisterWorkerRequest reg;
  reg.set_host("fake");
  v1::RegisterWorkerResponse me;
  ASSERT_TRUE(c.workers().RegisterWorker(c.Ctx(kWorker).get(), reg, &me).ok());
  v1::LeaseJobRequest lreq;
  lreq.set_worker_id(me.worker_id());
  lreq.set_wait_ms(10000);
  v1::LeaseJobResponse lease;
  ASSERT_TRUE(c.workers().LeaseJob(c.Ctx(kWorker).get(), lreq, &lease).ok());
  ASSERT_EQ(lease.job_id(), id);
  const std::string bytes = "not for you";
  for (const std::string name : {"../x", "/etc/passwd", "a/b", "../../graft.db", "", "weights.pt/", "."}) {
    v1::UploadArtifactResponse o;
    auto ctx = c.Ctx(kWorker);
    auto wr = c.workers().UploadArtifact(ctx.get(), &o);
    v1::UploadArtifactRequest r;
    auto* h = r.mutable_header();
    h->set_worker_id(me.worker_id());
    h->set_job_id(id);
    h->set_attempt(lease.attempt());
    h->set_name(name);
    h->set_total_bytes(static_cast<int64_t>(bytes.size()));
    h->set_sha256(graft::Sha256Hex(bytes));
    wr->Write(r);
    v1::UploadArtifactRequest data;
    data.set_data(bytes);
    wr->Write(data);
    wr->WritesDone();
    grpc::Status up = wr->Finish();
    EXPECT_EQ(up.error_code(), grpc::StatusCode::INVALID_ARGUMENT) << "upload " << name << ": " << up.error_message();
    EXPECT_NE(up.error_message().find("is not an artifact name; expected one of checkpoint.pt, weights.pt"),
              std::string::npos)
        << up.error_message();

    v1::DownloadArtifactRequest dr;
    dr.set_job_id(id);
    dr.set_name(name);
    auto dctx = c.Ctx(kAlice);
    auto rd = c.jobs().DownloadArtifact(dctx.get(), dr);
    v1::ArtifactChunk ch;
    std::string got;
    while (rd->Read(&ch)) got += ch.data();
    grpc::Status down = rd->Finish();
    EXPECT_EQ(down.error_code(), grpc::StatusCode::INVALID_ARGUMENT) << "download " << name;
    EXPECT_TRUE(got.empty()) << name;
  }
  // Nothing was written anywhere under the cluster's directory but the job's own folder.
  for (const auto& entry : std::filesystem::recursive_directory_iterator(c.dir())) {
    if (!entry.is_regular_file()) continue;
    EXPECT_NE(ReadFile(entry.path().string()), bytes) << entry.path();
  }
  EXPECT_FALSE(std::filesystem::exists(c.dir() + "/data/artifacts/x"));
  EXPECT_FALSE(std::filesystem::exists(c.dir() + "/data/x"));
}

}  // namespace
}  // namespace graft
