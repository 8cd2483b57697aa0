#include "server/graftd.h"

#include <sys/stat.h>
#include <unistd.h>

#include <chrono>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <thread>

#include <grpcpp/ext/proto_server_reflection_plugin.h>
#include <grpcpp/grpcpp.h>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "proto/tls.h"
#include "absl/strings/str_cat.h"
#include "server/launcher.h"
#include "server/services.h"
#include "spdlog/sinks/stdout_color_sinks.h"
#include "spdlog/spdlog.h"

namespace graft::server {

std::string WorkerAddress(const std::string& listen, int port) {
  std::string host = listen.substr(0, listen.rfind(':'));
  if (host.empty() || host == "0.0.0.0" || host == "[::]" || host == "::") {
    char name[256] = {0};
    gethostname(name, sizeof(name) - 1);
    host = name;
  }
  return absl::StrCat(host, ":", port);
}

namespace {

// Warns when the tokens file may be read or written by anyone but its owner: hashes of tokens
// are not the tokens, but a writable file lets its writer mint any role.
void CheckTokensFileMode(const std::string& path, spdlog::logger& log) {
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) return;
  if ((st.st_mode & 0077) != 0) {
    log.warn("the tokens file {} has mode {:04o}: others can read or change it (tokens can be minted by anyone who "
             "can write it); chmod 600 {}",
             path, static_cast<unsigned>(st.st_mode & 07777), path);
  }
}

}  // namespace

int RunGraftd(const GraftdConfig& config, const std::atomic<bool>* stop, std::atomic<bool>* reload) {
  // Everything graftd creates (data dir, database, artifacts) is for its own user only.
  ::umask(077);
  auto log = spdlog::stderr_color_mt("graftd");
  log->set_pattern("%Y-%m-%dT%H:%M:%S.%e %^%l%$ %v");
  if (absl::Status st = CheckTransport(config); !st.ok()) {
    log->error("{}", std::string(st.message()));
    return 2;
  }
  std::shared_ptr<grpc::ServerCredentials> credentials = grpc::InsecureServerCredentials();
  std::string transport;
  if (config.tls()) {
    auto pem = tls::LoadServerCredentials({config.tls_cert, config.tls_key, config.client_ca});
    if (!pem.ok()) {
      log->error("{}", std::string(pem.status().message()));
      return 2;
    }
    const tls::CertificateFacts& cert = pem->certificate;
    if (cert.not_after_s < static_cast<int64_t>(std::time(nullptr))) {
      log->warn("the TLS certificate {} expired on {}: clients will refuse it", config.tls_cert,
                tls::FormatUtc(cert.not_after_s));
    }
    transport = absl::StrCat("TLS on: certificate ", config.tls_cert, " (", cert.subject, "; names ",
                             cert.names.empty() ? "none" : absl::StrJoin(cert.names, ", "), "; valid until ",
                             tls::FormatUtc(cert.not_after_s), "); ",
                             config.client_ca.empty()
                                 ? "no client certificates asked for"
                                 : absl::StrCat("mutual TLS: client certificates required, signed by ", config.client_ca));
    credentials = tls::CreateServerCredentials(*pem);
  } else {
    transport = IsLoopbackAddress(config.listen)
                    ? "TLS off: plaintext on loopback"
                    : "TLS off: plaintext on a non-loopback address (--allow-plaintext): tokens cross the network in the clear";
  }
  if (config.tokens_file.empty()) {
    log->error("no tokens file: pass --tokens-file FILE (a YAML list of {{name, role, sha256}})");
    return 2;
  }
  auto tokens = LiveTokens::Open(config.tokens_file);
  if (!tokens.ok()) {
    log->error("{}", std::string(tokens.status().message()));
    return 2;
  }
  CheckTokensFileMode(config.tokens_file, *log);
  std::error_code ec;
  if (!std::filesystem::exists(config.data_dir, ec)) {
    std::filesystem::create_directories(config.data_dir, ec);
    if (ec) {
      log->error("{}: cannot create the data dir: {}", config.data_dir, ec.message());
      return 1;
    }
    std::filesystem::permissions(config.data_dir, std::filesystem::perms::owner_all, ec);
  } else {
    struct stat st {};
    if (::stat(config.data_dir.c_str(), &st) == 0 && (st.st_mode & 0077) != 0) {
      log->warn("the data dir {} has mode {:04o}: others can reach the database and artifacts; chmod 700 {}",
                config.data_dir, static_cast<unsigned>(st.st_mode & 07777), config.data_dir);
    }
  }
  const std::string db_path = (std::filesystem::path(config.data_dir) / "graft.db").string();
  auto store = OpenSqliteJobStore(db_path, config.durability);
  if (!store.ok()) {
    log->error("{}", store.status().ToString());
    return 1;
  }
  // A database made by an older graftd (before the umask above) becomes private too.
  for (const char* suffix : {"", "-wal", "-shm"}) ::chmod((db_path + suffix).c_str(), 0600);
  CoordinatorOptions options;
  options.data_dir = config.data_dir;
  options.lease_ms = config.lease_seconds * 1000;
  options.max_attempts = config.max_attempts;
  options.max_config_bytes = config.max_config_bytes;
  options.max_sweep_jobs = config.max_sweep_jobs;
  options.spec = config.spec_limits;
  options.max_artifact_bytes = config.max_artifact_bytes;
  options.max_points_per_report = config.max_points_per_report;
  options.max_name_bytes = config.max_name_bytes;
  options.max_label_bytes = config.max_label_bytes;
  options.max_labels_per_job = config.max_labels_per_job;
  options.max_reason_bytes = config.max_reason_bytes;
  options.max_watches_per_user = config.max_watches_per_user;
  options.max_requests_in_flight_per_token = config.max_requests_in_flight_per_token;
  auto clock = CreateSystemClock();
  Coordinator coordinator(std::move(*store), options, clock.get(), log);
  absl::Status st = coordinator.Start();
  if (!st.ok()) {
    log->error("recovery failed: {}", st.ToString());
    return 1;
  }
  auto jobs = CreateJobsService(&coordinator, tokens->get());
  auto workers = CreateWorkersService(&coordinator, tokens->get());
  grpc::reflection::InitProtoReflectionServerBuilderPlugin();
  grpc::ServerBuilder builder;
  int port = 0;
  builder.AddListeningPort(config.listen, credentials, &port);
  builder.RegisterService(jobs.get());
  builder.RegisterService(workers.get());
  builder.SetMaxReceiveMessageSize(8 << 20);
  std::unique_ptr<grpc::Server> server = builder.BuildAndStart();
  if (!server || port == 0) {
    log->error("cannot listen on {}", config.listen);
    return 1;
  }
  log->info("graftd {} listening on {} (port {}), data dir {}, {} tokens ({} valid), lease {} s, {} attempts",
            GRAFT_VERSION_STRING, config.listen, port, config.data_dir, (*tokens)->Current()->size(),
            (*tokens)->Current()->active_count(), config.lease_seconds, config.max_attempts);
  if (config.tls() || IsLoopbackAddress(config.listen)) {
    log->info("{}", transport);
  } else {
    log->warn("{}", transport);
  }
  if (!config.port_file.empty()) {
    const std::string tmp = config.port_file + ".tmp";
    std::ofstream(tmp) << port << "\n";
    std::filesystem::rename(tmp, config.port_file, ec);
  }
  std::unique_ptr<CommandRunner> runner;
  std::unique_ptr<Launcher> launcher;
  if (config.launcher.enabled) {
    LauncherOptions l = config.launcher;
    if (l.server.empty()) l.server = WorkerAddress(config.listen, port);
    if (l.script.empty()) l.script = GRAFT_SLURM_TEMPLATE;
    if (l.worker_bin.empty()) {
      std::filesystem::path self = std::filesystem::read_symlink("/proc/self/exe", ec);
      if (!ec) l.worker_bin = (self.parent_path() / "graft-worker").string();
    }
    runner = CreateProcessRunner();
    launcher = std::make_unique<Launcher>(&coordinator, l, runner.get(), clock.get(), log);
    launcher->Start();
  }
  // The tokens file is reread on SIGHUP at once, and whenever its change time, size or inode
  // moves (checked every second); a file that fails to load keeps the previous tokens.
  auto last_check = std::chrono::steady_clock::now();
  while (!stop->load()) {
    std::this_thread::sleep_for(std::chrono::milliseconds(100));
    const bool hup = reload != nullptr && reload->exchange(false);
    const auto now = std::chrono::steady_clock::now();
    if (!hup && now - last_check < std::chrono::seconds(1)) continue;
    last_check = now;
    auto changed = (*tokens)->Reload(/*force=*/hup);
    if (!changed.ok()) {
      log->error("tokens file not reloaded, the previous tokens stay in force: {}", std::string(changed.status().message()));
    } else if (*changed) {
      auto table = (*tokens)->Current();
      log->info("tokens file {} reloaded{}: {} tokens, {} valid, {} revoked", config.tokens_file, hup ? " (SIGHUP)" : "",
                table->size(), table->active_count(), table->size() - table->active_count());
      CheckTokensFileMode(config.tokens_file, *log);
    }
  }
  log->info("stopping");
  if (launcher) launcher->Stop();
  coordinator.Shutdown();
  server->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(2));
  return 0;
}

}  // namespace graft::server
