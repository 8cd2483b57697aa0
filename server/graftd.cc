#include "server/graftd.h"

#include <chrono>
#include <filesystem>
#include <fstream>
#include <thread>

#include <grpcpp/ext/proto_server_reflection_plugin.h>
#include <grpcpp/grpcpp.h>

#include "server/services.h"
#include "spdlog/sinks/stdout_color_sinks.h"
#include "spdlog/spdlog.h"

namespace graft::server {

int RunGraftd(const GraftdConfig& config, const std::atomic<bool>* stop) {
  auto log = spdlog::stderr_color_mt("graftd");
  log->set_pattern("%Y-%m-%dT%H:%M:%S.%e %^%l%$ %v");
  if (!IsLoopbackAddress(config.listen) && !config.allow_plaintext) {
    log->error("refusing to listen on {} without TLS: graftd has no TLS yet, so tokens would cross the network "
               "in the clear; listen on 127.0.0.1 / [::1], or pass --allow-plaintext on a trusted network",
               config.listen);
    return 2;
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
  builder.AddListeningPort(config.listen, grpc::InsecureServerCredentials(), &port);
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
  if (!config.port_file.empty()) {
    const std::string tmp = config.port_file + ".tmp";
    std::ofstream(tmp) << port << "\n";
    std::filesystem::rename(tmp, config.port_file, ec);
  }
  while (!stop->load()) std::this_thread::sleep_for(std::chrono::milliseconds(100));
  log->info("stopping");
  coordinator.Shutdown();
  server->Shutdown(std::chrono::system_clock::now() + std::chrono::seconds(2));
  return 0;
}

}  // namespace graft::server
