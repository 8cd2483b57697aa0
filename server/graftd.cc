#include "server/graftd.h"

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

int RunGraftd(const GraftdConfig& config, const std::atomic<bool>* stop) {
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
  auto tokens = TokenTable::Load(config.tokens_file);
  if (!tokens.ok()) {
    log->error("{}", std::string(tokens.status().message()));
    return 2;
  }
  std::error_code ec;
  std::filesystem::create_directories(config.data_dir, ec);
  if (ec) {
    log->error("{}: cannot create the data dir: {}", config.data_dir, ec.message());
    return 1;
  }
  auto store = OpenSqliteJobStore((std::filesystem::path(config.data_dir) / "graft.db").string(), config.durability);
  if (!store.ok()) {
    log->error("{}", store.status().ToString());
    return 1;
  }
  CoordinatorOptions options;
  options.data_dir = config.data_dir;
  options.lease_ms = config.lease_seconds * 1000;
  options.max_attempts = config.max_attempts;
  options.max_config_bytes = config.max_config_bytes;
  options.max_sweep_jobs = config.max_sweep_jobs;
  auto clock = CreateSystemClock();
  Coordinator coordinator(std::move(*store), options, clock.get(), log);
  absl::Status st = coordinator.Start();
  if (!st.ok()) {
    log->error("recovery failed: {}", st.ToString());
    return 1;
  }
  auto jobs = CreateJobsService(&coordinator, &*tokens);
  auto workers = CreateWorkersService(&coordinator, &*tokens);
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
  log->info("graftd {} listening on {} (port {}), data dir {}, {} tokens, lease {} s, {} attempts",
            GRAFT_VERSION_STRING, config.listen, port, config.data_dir, tokens->size(), config.lease_seconds,
            config.max_attempts);
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
  while (!stop->load()) std::this_thread::sleep_for(std::chrono::milliseconds(100));
  log->info("stopping");
  if (launcher) launcher->Stop();
  coordinator.Shutdown();
  server->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(2));
  return 0;
}

}  // namespace graft::server
