// Who may do what, against graftd as a real process on loopback: tokens managed with
// `graftd tokens add|list|revoke` and picked up without a restart (also ending open watch
// streams), the modes of graftd's files, artifact names from a fixed list, and the limits of
// configs/graftd.yaml, each refused with its name and value. The every-RPC-every-caller table is
// Service.EveryCallNeedsATokenAndTheRightRole (service_test.cc).
#include <signal.h>
#include <sys/stat.h>

#include <atomic>
#include <chrono>
#include <filesystem>
#include <future>
#include <memory>
#include <string>
#include <thread>
#include <tuple>
#include <vector>

#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_split.h"
#include "graft/v1/graft.grpc.pb.h"
#include "gtest/gtest.h"
#include "proto/sha256.h"
#include "server/graftd_config.h"
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
  const std::string worker_id = c.RegisterFakeWorker("fake");
  ASSERT_FALSE(worker_id.empty());
  const v1::LeaseJobResponse lease = c.LeaseFor(worker_id, 10000);
  ASSERT_EQ(lease.job_id(), id);
  const std::string bytes = "not for you";
  for (const std::string name : {"../x", "/etc/passwd", "a/b", "../../graft.db", "", "weights.pt/", "."}) {
    v1::UploadArtifactResponse o;
    auto ctx = c.Ctx(kWorker);
    auto wr = c.workers().UploadArtifact(ctx.get(), &o);
    v1::UploadArtifactRequest r;
    auto* h = r.mutable_header();
    h->set_worker_id(worker_id);
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

// A cluster whose graftd reads `settings` (a graftd.yaml) as --config.
struct LimitedCluster {
  explicit LimitedCluster(const std::string& settings) {
    WriteFile(dir.path() + "/graftd.yaml", settings);
    cluster = std::make_unique<Cluster>(30, std::vector<std::string>{"--config", dir.path() + "/graftd.yaml"});
  }
  ScopedTempDir dir;
  std::unique_ptr<Cluster> cluster;
};

grpc::Status SubmitText(Cluster& c, const std::string& token, const std::string& text,
                        const std::vector<std::string>& sets = {},
                        const std::vector<std::pair<std::string, std::string>>& labels = {},
                        const std::string& source = "parcel.yaml") {
  v1::SubmitJobRequest r;
  r.set_config_yaml(text);
  r.set_source_name(source);
  for (const auto& s : sets) r.add_overrides(s);
  for (const auto& [k, v] : labels) (*r.mutable_labels())[k] = v;
  v1::SubmitJobResponse o;
  return c.jobs().SubmitJob(c.Ctx(token).get(), r, &o);
}

#define EXPECT_REFUSED(status, code, text)                                              \
  do {                                                                                  \
    const grpc::Status _s = (status);                                                   \
    EXPECT_EQ(_s.error_code(), grpc::StatusCode::code) << _s.error_message();           \
    EXPECT_NE(_s.error_message().find(text), std::string::npos) << _s.error_message();  \
  } while (0)

// The limits of configs/graftd.yaml, each set low in a graftd.yaml and exceeded once: every
// refusal is INVALID_ARGUMENT or RESOURCE_EXHAUSTED and names the setting and its value, and
// nothing is stored. Catches a setting that is read but not passed on, or not checked.
TEST(Limits, EachSettingIsRefusedWithItsNameAndValue) {
  LimitedCluster lc(
      "max_config_bytes: 2048\nmax_sweep_jobs: 2\nmax_variables: 6\nmax_domain_values: 5\nmax_input_space: 100\n"
      "max_steps: 1000\nmax_labels_per_job: 2\nmax_label_bytes: 16\nmax_name_bytes: 16\nmax_reason_bytes: 64\n"
      "max_points_per_report: 2\nmax_artifact_bytes: 1024\n");
  Cluster& c = *lc.cluster;
  const std::string parcel = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel + "#" + std::string(1000, 'x') + "\n"), RESOURCE_EXHAUSTED,
                 "bytes; this coordinator accepts at most max_config_bytes = 2048");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {"name=" + std::string(1000, 'n')}), RESOURCE_EXHAUSTED,
                 "the config (with its overrides) is");
  EXPECT_REFUSED(SubmitText(c, kAlice, ReadFile(SourceDir() + "/configs/parcel-routing-sweep.yaml")), RESOURCE_EXHAUSTED,
                 "the sweep makes more than 2 jobs, the most this coordinator accepts in one sweep (max_sweep_jobs)");
  // The job limits all at once: every one that is passed is a line of its own.
  grpc::Status spec = SubmitText(c, kAlice, parcel);
  EXPECT_EQ(spec.error_code(), grpc::StatusCode::INVALID_ARGUMENT);
  for (const char* line : {"parcel.yaml:7:3: algorithm: 7 variables; this coordinator accepts at most "
                           "max_variables = 6",
                           "parcel.yaml:8:14: the domain of 'origin' has 6 values; this coordinator accepts at "
                           "most max_domain_values = 5",
                           "at 'weight'; this coordinator accepts at most max_input_space = 100",
                           "parcel.yaml:26:10: training.steps: 2000 steps; this coordinator accepts at most "
                           "max_steps = 1000"}) {
    EXPECT_NE(spec.error_message().find(line), std::string::npos) << line << "\n" << spec.error_message();
  }
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {}, {{"a", "1"}, {"b", "2"}, {"c", "3"}}), INVALID_ARGUMENT,
                 "3 labels; this coordinator accepts at most max_labels_per_job = 2 per job");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {}, {{"team", std::string(17, 'v')}}), INVALID_ARGUMENT,
                 "the value of label 'team' is 17 bytes; this coordinator accepts at most max_label_bytes = 16");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {}, {{std::string(17, 'k'), "v"}}), INVALID_ARGUMENT,
                 "a label key is 17 bytes; this coordinator accepts at most max_label_bytes = 16");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {}, {}, "a-very-long-name.yaml"), INVALID_ARGUMENT,
                 "source_name is 21 bytes; this coordinator accepts at most max_name_bytes = 16");
  {
    v1::CancelJobRequest r;
    r.set_job_id("j-1");
    r.set_reason(std::string(65, 'r'));
    v1::Job o;
    EXPECT_REFUSED(c.jobs().CancelJob(c.Ctx(kAlice).get(), r, &o), INVALID_ARGUMENT,
                   "the reason is 65 bytes; this coordinator accepts at most max_reason_bytes = 64");
  }
  // The worker side.
  {
    v1::RegisterWorkerRequest r;
    r.set_host(std::string(17, 'h'));
    v1::RegisterWorkerResponse o;
    EXPECT_REFUSED(c.workers().RegisterWorker(c.Ctx(kWorker).get(), r, &o), INVALID_ARGUMENT,
                   "host is 17 bytes; this coordinator accepts at most max_name_bytes = 16");
  }
  const std::string worker_id = c.RegisterFakeWorker("w");
  ASSERT_FALSE(worker_id.empty());
  {
    v1::ReportRequest r;
    r.set_worker_id(worker_id);
    r.set_job_id("j-1");
    for (int i = 0; i < 3; ++i) r.add_points()->set_step(i);
    v1::ReportResponse o;
    EXPECT_REFUSED(c.workers().Report(c.Ctx(kWorker).get(), r, &o), INVALID_ARGUMENT,
                   "3 points in one report; this coordinator accepts at most max_points_per_report = 2");
  }
  {
    v1::UploadArtifactResponse o;
    auto ctx = c.Ctx(kWorker);
    auto wr = c.workers().UploadArtifact(ctx.get(), &o);
    v1::UploadArtifactRequest r;
    auto* h = r.mutable_header();
    h->set_worker_id(worker_id);
    h->set_job_id("j-1");
    h->set_name("weights.pt");
    h->set_total_bytes(1025);
    h->set_sha256(std::string(64, '0'));
    wr->Write(r);
    wr->WritesDone();
    EXPECT_REFUSED(wr->Finish(), INVALID_ARGUMENT,
                   "the artifact weights.pt is 1025 bytes; this coordinator accepts at most max_artifact_bytes = 1024");
  }
  {
    v1::FinishJobRequest r;
    r.set_worker_id(worker_id);
    r.set_job_id("j-1");
    r.set_failed_reason(std::string(100, 'f'));
    v1::FinishJobResponse o;
    EXPECT_REFUSED(c.workers().FinishJob(c.Ctx(kWorker).get(), r, &o), INVALID_ARGUMENT,
                   "the reason is 100 bytes; this coordinator accepts at most max_reason_bytes = 64");
  }
  {
    v1::DeregisterWorkerRequest r;
    r.set_worker_id(worker_id);
    r.set_reason(std::string(65, 'd'));
    v1::DeregisterWorkerResponse o;
    EXPECT_REFUSED(c.workers().DeregisterWorker(c.Ctx(kWorker).get(), r, &o), INVALID_ARGUMENT,
                   "max_reason_bytes = 64");
  }
  // Nothing was stored.
  v1::ListJobsRequest lr;
  v1::ListJobsResponse listed;
  ASSERT_TRUE(c.jobs().ListJobs(c.Ctx(testing::kRoot).get(), lr, &listed).ok());
  EXPECT_EQ(listed.jobs_size(), 0);
  // A bad value of a setting stops graftd with its place (exit 2).
  WriteFile(lc.dir.path() + "/bad.yaml", "max_watches_per_user: 0\n");
  auto bad = RunCommand(BinaryDir() + "/bin/graftd --config " + lc.dir.path() + "/bad.yaml --tokens-file " + c.dir() +
                        "/tokens.yaml --listen 127.0.0.1:0 --data-dir " + lc.dir.path() + "/data");
  EXPECT_EQ(bad.exit_code, 2) << bad.output;
  EXPECT_NE(bad.output.find("bad.yaml:1:23: max_watches_per_user: expected a whole number in [1, 100000], got '0'"),
            std::string::npos)
      << bad.output;
}

// max_table_entries reaches the mechanism compiler: parcel routing's tables hold 36 + 8 + 4 entries.
TEST(Limits, MechanismTablesAreBoundedInAll) {
  LimitedCluster lc("max_table_entries: 40\n");
  EXPECT_REFUSED(SubmitText(*lc.cluster, kAlice, ReadFile(SourceDir() + "/configs/parcel-routing.yaml")),
                 INVALID_ARGUMENT,
                 "the mechanisms' lookup tables reach 44 entries at 'careful' (8 combinations of its parents' values); "
                 "this coordinator accepts at most max_table_entries = 40 entries in all");
}

// max_listed_input_space bounds listed spaces only and max_parent_space each mechanism's table; a
// 10^9-input space (split by a hash, nothing listed) passes both. Catches either setting read but
// not passed on, and a listed-space bound that also refuses hashed spaces.
TEST(Limits, ListedSpacesAndEachMechanismTableAreBounded) {
  LimitedCluster lc("max_listed_input_space: 100\nmax_parent_space: 20\n");
  const std::string parcel = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  EXPECT_REFUSED(SubmitText(*lc.cluster, kAlice, parcel), INVALID_ARGUMENT,
                 "parcel.yaml:10:14: the input space passes 100 combinations of input values at 'weight'; a space of "
                 "at most 16777216 inputs is listed, and this coordinator lists at most max_listed_input_space = 100");
  // 5 x 5 x 2 x 2 = 100 inputs; 'local' reads origin x dest, 25 values.
  const std::vector<std::string> small = {"algorithm.inputs.origin=[north, south, east, west, central]",
                                          "algorithm.inputs.dest=[north, south, east, west, central]",
                                          "algorithm.inputs.weight=[heavy, oversize]"};
  EXPECT_REFUSED(SubmitText(*lc.cluster, kAlice, parcel, small), INVALID_ARGUMENT,
                 "parcel.yaml:13:14: mechanism 'local': its lookup table would hold 25 entries, one per combination of "
                 "its parents' values (origin 5 x dest 5); this coordinator accepts at most max_parent_space = 20 "
                 "entries per mechanism");
  std::string nine = "name: nine\nalgorithm:\n  inputs:\n";
  for (int i = 1; i <= 9; ++i) nine += "    d" + std::to_string(i) + ": {range: [0, 9]}\n";
  // Tables of 10 and 2 x 10 entries, within max_parent_space = 20.
  nine += "  mechanisms:\n    left: d1 < 5\n  output:\n    tally: left + (d2 < 5)\n"
          "network: {hidden: [16]}\nalignment:\n  left: {layer: 0, units: 0-3}\ntraining: {steps: 2}\n";
  const grpc::Status accepted = SubmitText(*lc.cluster, kAlice, nine);
  EXPECT_TRUE(accepted.ok()) << accepted.error_message();
}

// With the default settings: a network of about 4e9 parameters, a 1 MB label and an alias bomb
// were all accepted (the bomb grew graftd past 15 GB); now each is refused and graftd still serves.
TEST(Limits, DefaultsRefuseTheIssuesExamples) {
  Cluster c;
  const std::string parcel = ReadFile(SourceDir() + "/configs/parcel-routing.yaml");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel,
                            {"network.hidden=[65536,65536]", "alignment.local.layer=0", "alignment.careful.layer=0"}),
                 INVALID_ARGUMENT,
                 "network: 4297457812 parameters; this coordinator accepts at most max_network_parameters = 100000000");
  EXPECT_REFUSED(SubmitText(c, kAlice, parcel, {}, {{"note", std::string(1 << 20, 'x')}}), INVALID_ARGUMENT,
                 "the value of label 'note' is 1048576 bytes; this coordinator accepts at most max_label_bytes = 256");
  std::string bomb = "a0: &a0 [x, x, x, x, x, x, x, x, x]\n";
  for (int level = 1; level <= 8; ++level) {
    absl::StrAppend(&bomb, "a", level, ": &a", level, " [");
    for (int k = 0; k < 9; ++k) absl::StrAppend(&bomb, k ? ", " : "", "*a", level - 1);
    absl::StrAppend(&bomb, "]\n");
  }
  EXPECT_REFUSED(SubmitText(c, kAlice, bomb), INVALID_ARGUMENT, "more than 200000 nodes");
  EXPECT_EQ(GetInfo(c, kAlice), grpc::StatusCode::OK);
  EXPECT_FALSE(c.Submit(kAlice, "parcel-routing", kSmall).empty());
}

// Open watches per user and calls in flight per token: past the setting a call is
// RESOURCE_EXHAUSTED naming it, another user is not affected, and the unit comes back when the
// watch or call ends. Catches no limit, a limit shared by all users, and a unit never given back.
TEST(Limits, WatchesPerUserAndCallsInFlightPerToken) {
  LimitedCluster lc("max_watches_per_user: 2\nmax_requests_in_flight_per_token: 3\n");
  Cluster& c = *lc.cluster;
  // Three long polls of node1 hold its three calls; a fourth call is refused until they end.
  // The polls ask to wait 60 s, longer than any wait below: their units come back only because
  // cancelling a poll makes graftd drop its waiter at once (as when a worker's process dies).
  v1::RegisterWorkerRequest reg;
  reg.set_host("w");
  v1::RegisterWorkerResponse me;
  ASSERT_TRUE(c.workers().RegisterWorker(c.Ctx(kWorker).get(), reg, &me).ok());
  const std::string worker_id = me.worker_id();
  struct Poll {
    grpc::ClientContext ctx;
    v1::LeaseJobResponse resp;
    std::promise<void> answered;  // set by the call's callback
    std::future<void> done = answered.get_future();
    bool Done() const { return done.wait_for(std::chrono::seconds(0)) == std::future_status::ready; }
  };
  v1::LeaseJobRequest lr;
  lr.set_worker_id(worker_id);
  lr.set_wait_ms(60000);
  auto start_poll = [&] {
    auto p = std::make_unique<Poll>();
    Poll* raw = p.get();
    p->ctx.AddMetadata("authorization", std::string("Bearer ") + kWorker);
    p->ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(90));
    c.workers().async()->LeaseJob(&p->ctx, &lr, &p->resp, [raw](grpc::Status) { raw->answered.set_value(); });
    return p;
  };
  std::vector<std::unique_ptr<Poll>> polls;
  for (int i = 0; i < 3; ++i) polls.push_back(start_poll());
  auto register_code = [&](const char* token, std::string* message) {
    v1::RegisterWorkerResponse o;
    grpc::Status s = c.workers().RegisterWorker(c.Ctx(token).get(), reg, &o);
    if (message) *message = s.error_message();
    return s.error_code();
  };
  // A probe that reaches graftd before a poll takes a unit, and that poll is refused: it is sent
  // again, until all three polls are in and the probe is the one refused.
  std::string message;
  ASSERT_TRUE(WaitFor(
      [&] {
        for (auto& p : polls) {
          if (p->Done()) p = start_poll();
        }
        return register_code(kWorker, &message) == grpc::StatusCode::RESOURCE_EXHAUSTED;
      },
      20000))
      << message;
  EXPECT_NE(message.find("'node1' has 3 requests in flight; graftd allows at most max_requests_in_flight_per_token = 3"),
            std::string::npos)
      << message;
  EXPECT_EQ(register_code(testing::kWorker2, nullptr), grpc::StatusCode::OK);  // another token
  for (auto& p : polls) {
    p->ctx.TryCancel();
    p->done.wait();
  }
  ASSERT_TRUE(WaitFor([&] { return register_code(kWorker, nullptr) == grpc::StatusCode::OK; }, 20000))
      << "the cancelled long polls still hold node1's calls";
  const std::string log = ReadFile(c.dir() + "/graftd.log");
  EXPECT_NE(log.find("long poll of " + worker_id + " dropped: its caller went away"), std::string::npos) << log;

  // Watches: alice's job stays queued (no worker).
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  struct Watch {
    grpc::ClientContext ctx;
    std::unique_ptr<grpc::ClientReader<v1::JobEvent>> reader;
  };
  auto open = [&](const char* token) {
    auto w = std::make_unique<Watch>();
    w->ctx.AddMetadata("authorization", std::string("Bearer ") + token);
    w->ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30));
    v1::WatchJobRequest r;
    r.set_job_id(id);
    w->reader = c.jobs().WatchJob(&w->ctx, r);
    return w;
  };
  std::vector<std::unique_ptr<Watch>> open_watches;
  for (int i = 0; i < 2; ++i) {
    open_watches.push_back(open(kAlice));
    v1::JobEvent e;
    ASSERT_TRUE(open_watches.back()->reader->Read(&e));  // open: its first event came
  }
  auto third = open(kAlice);
  v1::JobEvent e;
  EXPECT_FALSE(third->reader->Read(&e));
  EXPECT_REFUSED(third->reader->Finish(), RESOURCE_EXHAUSTED,
                 "'alice' has 2 watch streams open; graftd allows at most max_watches_per_user = 2");
  auto admin = open(testing::kRoot);  // another user may still watch
  EXPECT_TRUE(admin->reader->Read(&e));
  // Closing one gives its unit back.
  open_watches[0]->ctx.TryCancel();
  while (open_watches[0]->reader->Read(&e)) {
  }
  open_watches[0]->reader->Finish();
  ASSERT_TRUE(WaitFor(
      [&] {
        auto again = open(kAlice);
        v1::JobEvent first;
        const bool ok = again->reader->Read(&first);
        again->ctx.TryCancel();
        while (again->reader->Read(&first)) {
        }
        again->reader->Finish();
        return ok;
      },
      20000));
  for (auto* w : {open_watches[1].get(), admin.get()}) {
    w->ctx.TryCancel();
    while (w->reader->Read(&e)) {
    }
    w->reader->Finish();
  }
}

// configs/graftd.yaml writes every limit with its default: loading it changes none of them.
// Catches a default changed in the code but not in the file (or the reverse), and a limit
// missing from the file (its key would not be there to compare).
TEST(Limits, ShippedSettingsFileShowsTheDefaults) {
  const std::string text = ReadFile(SourceDir() + "/configs/graftd.yaml");
  server::GraftdConfig loaded;
  ASSERT_TRUE(server::LoadGraftdConfig(SourceDir() + "/configs/graftd.yaml", &loaded).ok());
  const server::GraftdConfig d;
  const std::vector<std::tuple<std::string, int64_t, int64_t>> limits = {
      {"max_config_bytes", loaded.max_config_bytes, d.max_config_bytes},
      {"max_sweep_jobs", loaded.max_sweep_jobs, d.max_sweep_jobs},
      {"max_variables", loaded.spec_limits.max_variables, d.spec_limits.max_variables},
      {"max_domain_values", loaded.spec_limits.max_domain_values, d.spec_limits.max_domain_values},
      {"max_table_entries", loaded.spec_limits.max_table_entries, d.spec_limits.max_table_entries},
      {"max_input_space", loaded.spec_limits.max_input_space, d.spec_limits.max_input_space},
      {"max_listed_input_space", loaded.spec_limits.max_listed_input_space, d.spec_limits.max_listed_input_space},
      {"max_parent_space", loaded.spec_limits.max_parent_space, d.spec_limits.max_parent_space},
      {"max_network_parameters", loaded.spec_limits.max_network_parameters, d.spec_limits.max_network_parameters},
      {"max_steps", loaded.spec_limits.max_steps, d.spec_limits.max_steps},
      {"max_artifact_bytes", loaded.max_artifact_bytes, d.max_artifact_bytes},
      {"max_points_per_report", loaded.max_points_per_report, d.max_points_per_report},
      {"max_name_bytes", loaded.max_name_bytes, d.max_name_bytes},
      {"max_label_bytes", loaded.max_label_bytes, d.max_label_bytes},
      {"max_labels_per_job", loaded.max_labels_per_job, d.max_labels_per_job},
      {"max_reason_bytes", loaded.max_reason_bytes, d.max_reason_bytes},
      {"max_watches_per_user", loaded.max_watches_per_user, d.max_watches_per_user},
      {"max_requests_in_flight_per_token", loaded.max_requests_in_flight_per_token,
       d.max_requests_in_flight_per_token},
  };
  for (const auto& [key, value, fallback] : limits) {
    EXPECT_NE(text.find("\n" + key + ": " + std::to_string(fallback)), std::string::npos) << key << " not in the file";
    EXPECT_EQ(value, fallback) << key;
  }
}

// A watcher that stops reading does not hold up another watcher, and graftd does not queue its
// events without end: past 10000 queued events its stream ends with RESOURCE_EXHAUSTED saying to
// watch again. A fake worker reports 15000 points of about 2 KB each (30 MB, more than the
// transport's flow-control windows hold). Catches an unbounded per-watcher queue (the slow stream
// would only end at its deadline) and a slow watcher blocking the fan-out.
TEST(Watch, AWatcherThatStopsReadingIsEndedAndHoldsUpNoOne) {
  Cluster c;
  const std::string id = c.Submit(kAlice, "parcel-routing", kSmall);
  const std::string worker_id = c.RegisterFakeWorker("fake");
  ASSERT_FALSE(worker_id.empty());
  const v1::LeaseJobResponse lease = c.LeaseFor(worker_id, 10000);
  ASSERT_EQ(lease.job_id(), id);

  // The slow watcher has a connection of its own (a distinct channel argument), reads the first
  // event and then nothing.
  grpc::ChannelArguments args;
  args.SetInt("graft.test.slow_watcher", 1);
  auto slow_channel = grpc::CreateCustomChannel(c.address(), grpc::InsecureChannelCredentials(), args);
  auto slow_stub = v1::Jobs::NewStub(slow_channel);
  grpc::ClientContext slow_ctx;
  slow_ctx.AddMetadata("authorization", std::string("Bearer ") + kAlice);
  slow_ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(120));
  v1::WatchJobRequest wr;
  wr.set_job_id(id);
  auto slow = slow_stub->WatchJob(&slow_ctx, wr);
  v1::JobEvent first;
  ASSERT_TRUE(slow->Read(&first));

  std::atomic<int64_t> fast_points{0};
  std::atomic<bool> fast_open{false};
  std::thread fast([&] {
    grpc::ClientContext ctx;
    ctx.AddMetadata("authorization", std::string("Bearer ") + kAlice);
    ctx.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(120));
    auto rd = c.jobs().WatchJob(&ctx, wr);
    v1::JobEvent e;
    while (rd->Read(&e)) {
      fast_open = true;
      if (e.has_point()) ++fast_points;
      if (fast_points.load() >= 15000) ctx.TryCancel();
    }
    rd->Finish();
  });
  ASSERT_TRUE(WaitFor([&] { return fast_open.load(); }, 20000));
  const std::string metrics = "{\"pad\": \"" + std::string(2000, 'p') + "\"}";
  for (int batch = 0; batch < 15; ++batch) {
    v1::ReportRequest r;
    r.set_worker_id(worker_id);
    r.set_job_id(id);
    r.set_attempt(lease.attempt());
    for (int k = 1; k <= 1000; ++k) {
      v1::Point* p = r.add_points();
      p->set_step(batch * 1000 + k);
      p->set_metrics_json(metrics);
    }
    r.set_step(batch * 1000 + 1000);
    v1::ReportResponse o;
    grpc::Status s = c.workers().Report(c.Ctx(kWorker, 60000).get(), r, &o);
    ASSERT_TRUE(s.ok()) << s.error_message();
  }
  // The reading watcher got every point.
  EXPECT_TRUE(WaitFor([&] { return fast_points.load() >= 15000; }, 60000)) << fast_points.load();
  fast.join();
  // The slow one, reading at last, gets what was buffered and then the reason.
  v1::JobEvent e;
  int64_t got = 0;
  while (slow->Read(&e)) got += e.has_point() ? 1 : 0;
  grpc::Status ended = slow->Finish();
  EXPECT_EQ(ended.error_code(), grpc::StatusCode::RESOURCE_EXHAUSTED) << ended.error_message();
  EXPECT_NE(ended.error_message().find("this watch fell 10000 events behind"), std::string::npos)
      << ended.error_message();
  EXPECT_LT(got, 15000);
}

}  // namespace
}  // namespace graft
