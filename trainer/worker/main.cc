// graft-worker: trains and checks jobs. Flag parsing plus one call into the worker library.
#include <unistd.h>

#include <atomic>
#include <csignal>
#include <iostream>
#include <string>
#include <vector>

#include "CLI/CLI.hpp"
#include "trainer/worker/commands.h"
#include "trainer/worker/serve.h"

namespace {
// Set by SIGINT/SIGTERM; the trainer checkpoints and stops at the next step boundary.
std::atomic<bool> stop_requested{false};
extern "C" void OnStopSignal(int) { stop_requested.store(true); }
}  // namespace

int main(int argc, char** argv) {
  CLI::App app{"graft-worker: trains networks to implement an algorithm (IIT) and measures IIA"};
  app.require_subcommand(1);
  app.footer("Exit codes (shared with graft and graftd; README \"Exit codes\"): 0 done; 1 run-time failure; "
             "2 invalid config, weights or token file; 3 usage error; 8 run stopped early with a checkpoint "
             "(continue with --resume).\n");

  std::string check_config;
  std::vector<std::string> check_sets;
  CLI::App* check = app.add_subcommand("check", "Validate a config and print a summary of the job");
  check->add_option("CONFIG", check_config, "YAML config file")->required();
  check->add_option("--set", check_sets, "Override a key: key.path=value (repeatable)")->take_all();
  int64_t check_max_sweep_jobs = 1000;
  check->add_option("--max-sweep-jobs", check_max_sweep_jobs, "largest sweep to accept (graftd's default: 1000)");

  graft::worker::RunArgs run_args;
  CLI::App* run = app.add_subcommand("run", "Train a job in this process and write its run directory");
  run->add_option("CONFIG", run_args.config, "YAML config file")->required();
  run->add_option("--out", run_args.out_dir, "Run directory for spec.yaml, metrics.jsonl, result.json, "
                                             "checkpoint.pt, weights.pt")->required();
  run->add_option("--set", run_args.overrides, "Override a key: key.path=value (repeatable)")->take_all();
  run->add_option("--resume", run_args.resume_dir, "Continue from the checkpoint in this run directory");
  run->add_option("--stop-after-step", run_args.stop_after_step,
                  "Stop as if interrupted after this step, with a checkpoint (for resume drills)");
  run->add_option("--dump-logits", run_args.logits_dump_path,
                  "Also write the first evaluation triples with base and intervened logits to this JSON file");

  // evaluate, scan and das share their arguments.
  graft::worker::AnalyseArgs analyse_args;
  auto add_analysis = [&](const char* name, const char* help) {
    CLI::App* cmd = app.add_subcommand(name, help);
    cmd->add_option("CONFIG", analyse_args.config, "YAML config file")->required();
    cmd->add_option("--weights", analyse_args.weights_path,
                    "weights.pt from graft, or a dict of tensors saved by Python's torch.save")->required();
    cmd->add_option("--out", analyse_args.out_dir, "Directory for the command's files")->required();
    cmd->add_option("--set", analyse_args.overrides, "Override a key: key.path=value (repeatable)")->take_all();
    return cmd;
  };
  CLI::App* evaluate = add_analysis("evaluate", "Evaluate a stored network (IIA with intervals and controls) "
                                                "without training");
  CLI::App* scan = add_analysis("scan", "Search candidate unit sites of each aligned variable in a stored network");
  CLI::App* das = add_analysis("das", "Distributed alignment search: learn a rotation of one layer of a stored "
                                      "network, with an untrained network as the control");

  std::string report_run_dir, report_out_dir;
  CLI::App* report = app.add_subcommand("report", "Write a self-contained HTML page (DIR/index.html) of a run directory");
  report->add_option("RUN_DIR", report_run_dir, "run directory written by `run` or `graft fetch`")->required();
  report->add_option("--out", report_out_dir, "directory for index.html")->required();

  graft::worker::ServeArgs serve_args;
  CLI::App* serve = app.add_subcommand("serve", "Lease jobs from a coordinator and train them, one at a time");
  serve->add_option("--server", serve_args.server, "coordinator host:port (default 127.0.0.1:7070)");
  serve->add_option("--token-file", serve_args.token_file, "file holding this worker's token")->required();
  serve->add_option("--threads", serve_args.threads, "at most this many threads per job (default 1)");
  serve->add_option("--work-dir", serve_args.work_dir, "scratch directory for run directories");
  serve->add_option("--ca-file", serve_args.ca_file, "TLS: the PEM CA that signed the coordinator's certificate");
  serve->add_option("--cert", serve_args.cert_file, "mutual TLS: this worker's PEM certificate (with --key)");
  serve->add_option("--key", serve_args.key_file, "mutual TLS: the certificate's unencrypted PEM key");
  serve->add_option("--tls-server-name", serve_args.tls_server_name,
                    "TLS: the name the coordinator's certificate carries, when it is not the --server host");
  serve->add_option("--idle-exit", serve_args.idle_exit_s,
                    "leave (exit 0) after this many seconds with nothing to lease (default 0: never)")
      ->check(CLI::NonNegativeNumber);

  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    return app.exit(e) == 0 ? graft::kExitOk : graft::kExitUsage;  // --help, or a usage error
  }
  if (check->parsed()) {
    return graft::worker::CheckCommand(check_config, check_sets, std::cout, std::cerr, check_max_sweep_jobs);
  }
  if (run->parsed()) {
    std::signal(SIGINT, OnStopSignal);
    std::signal(SIGTERM, OnStopSignal);
    return graft::worker::RunCommand(run_args, &stop_requested, std::cout, std::cerr, isatty(STDERR_FILENO) == 1);
  }
  if (evaluate->parsed()) return graft::worker::EvaluateCommand(analyse_args, std::cout, std::cerr);
  if (scan->parsed()) return graft::worker::ScanCommand(analyse_args, std::cout, std::cerr);
  if (das->parsed()) return graft::worker::DasCommand(analyse_args, std::cout, std::cerr);
  if (report->parsed()) return graft::worker::ReportCommand(report_run_dir, report_out_dir, std::cout, std::cerr);
  if (serve->parsed()) {
    std::signal(SIGINT, OnStopSignal);
    std::signal(SIGTERM, OnStopSignal);
    return graft::worker::ServeCommand(serve_args, &stop_requested, std::cerr);
  }
  return graft::worker::kExitFailure;
}
