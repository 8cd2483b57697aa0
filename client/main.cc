// graft: the command-line client of graftd. Parses flags, resolves the server and token, and
// calls one command of client/commands.h.
#include <sys/ioctl.h>
#include <unistd.h>

#include <chrono>
#include <cstdlib>
#include <iostream>
#include <memory>

#include "CLI/CLI.hpp"
#include "client/commands.h"
#include "client/settings.h"
#include "configs/reader/suggest.h"

namespace {

using graft::client::kExitUsage;

int64_t NowMs() {
  return std::chrono::duration_cast<std::chrono::milliseconds>(std::chrono::system_clock::now().time_since_epoch())
      .count();
}

// The first word that is not a global flag or its value: the command the user meant.
std::string CommandWord(int argc, char** argv) {
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    if (a == "--server" || a == "--token" || a == "--token-file" || a == "--ca-file" || a == "--cert" || a == "--key" ||
        a == "--tls-server-name") {
      ++i;
      continue;
    }
    if (!a.empty() && a[0] == '-') continue;
    return a;
  }
  return "";
}

}  // namespace

int main(int argc, char** argv) {
  using namespace graft::client;  // NOLINT: main only
  const std::string word = CommandWord(argc, argv);
  const auto& names = CommandNames();
  if (!word.empty() && std::find(names.begin(), names.end(), word) == names.end()) {
    const std::string near = graft::config::Nearest(word, names);
    std::cerr << "graft: unknown command '" << word << "'" << (near.empty() ? "" : "; did you mean '" + near + "'?")
              << "\n  `graft --help` lists the commands\n";
    return kExitUsage;
  }

  CLI::App app{"graft: submit, follow and compare IIT training jobs on a graftd coordinator"};
  app.require_subcommand(1);
  app.fallthrough();  // --server, --token and --token-file also after the command
  std::string server, token, token_file;
  app.add_option("--server", server, "graftd address host:port (else GRAFT_SERVER, the client config, 127.0.0.1:7070)");
  app.add_option("--token", token, "bearer token (else GRAFT_TOKEN or the client config)");
  app.add_option("--token-file", token_file, "file holding the bearer token");
  std::string ca_file, cert_file, key_file, tls_server_name;
  app.add_option("--ca-file", ca_file, "TLS: the PEM CA that signed graftd's certificate (else GRAFT_CA_FILE, ca_file)");
  app.add_option("--cert", cert_file, "mutual TLS: your PEM client certificate (else GRAFT_CERT_FILE, cert_file)");
  app.add_option("--key", key_file, "mutual TLS: its unencrypted PEM key (else GRAFT_KEY_FILE, key_file)");
  app.add_option("--tls-server-name", tls_server_name,
                 "TLS: the name graftd's certificate carries, when not the --server host (else GRAFT_TLS_SERVER_NAME)");
  app.footer(
      "Exit codes (shared with graft-worker and graftd; README \"Exit codes\"): 0 ok; 1 request refused or "
      "failed; 2 invalid config or settings (also: no token); 3 usage error; 4 a job failed; 5 a job was "
      "cancelled; 6 graftd unreachable or token refused; 7 --timeout passed.\n"
      "Client config: ~/.config/graft/client.yaml (or $GRAFT_CONFIG) with server: and token: or token_file:, and "
      "for TLS ca_file: (cert_file:, key_file:, tls_server_name:).\n");

  CheckArgs check;
  auto* c_check = app.add_subcommand("check", "validate a config offline (a sweep: every combination)");
  c_check->add_option("CONFIG", check.file, "YAML config file (a job or a sweep)")->required();
  c_check->add_option("--set", check.overrides, "override key.path=value (repeatable)");
  c_check->add_option("--max-sweep-jobs", check.max_sweep_jobs, "largest sweep to accept (graftd's default: 1000)");

  SubmitArgs submit;
  auto* c_submit = app.add_subcommand("submit", "submit a job or a sweep");
  c_submit->add_option("CONFIG", submit.file, "YAML config file (a job or a sweep)")->required();
  c_submit->add_option("--set", submit.overrides, "override key.path=value (repeatable)");
  c_submit->add_option("--priority", submit.priority, "higher is leased first (default 0)");
  c_submit->add_option("--label", submit.labels, "label key=value (repeatable)");
  c_submit->add_flag("--watch", submit.watch, "then watch it until it ends (exit codes as wait)");
  c_submit->add_flag("--json", submit.json, "print the ids as JSON (with --watch: events as JSON lines)");

  WorkersArgs workers;
  auto* c_workers = app.add_subcommand("workers", "the worker fleet: idle, training, pending in Slurm (and gone)");
  c_workers->add_flag("--all", workers.all, "also list workers that are gone");
  c_workers->add_flag("--json", workers.json, "print a JSON array of workers");
  ListArgs list;
  auto* c_list = app.add_subcommand("list", "list your jobs, newest first");
  c_list->add_option("--state", list.state, "queued | running | succeeded | failed | cancelled");
  c_list->add_option("--sweep", list.sweep, "only the jobs of this sweep (s-N)");
  c_list->add_option("--label", list.labels, "only jobs with label key=value (repeatable, all must match)");
  c_list->add_flag("--json", list.json, "print a JSON array of jobs");

  ShowArgs show;
  auto* c_show = app.add_subcommand("show", "show one job");
  c_show->add_option("JOB", show.id, "job id j-N")->required();
  c_show->add_flag("--json", show.json, "print the job as JSON");
  c_show->add_flag("--spec", show.spec, "print only its resolved spec (YAML)");

  WatchArgs watch;
  double watch_timeout_s = 0;
  auto* c_watch = app.add_subcommand("watch", "follow a job (live curves) or a sweep (a line per job) to its end");
  c_watch->add_option("ID", watch.id, "job j-N or sweep s-N")->required();
  c_watch->add_option("--from-step", watch.from_step, "start from the stored points at this step (default 0)");
  c_watch->add_option("--timeout", watch_timeout_s, "give up after this many seconds (exit 7)");
  c_watch->add_flag("--json", watch.json, "print every event as a JSON line");

  WatchArgs wait;
  double wait_timeout_s = 0;
  auto* c_wait = app.add_subcommand("wait", "wait for a job or sweep to end; exit 0 if all succeeded");
  c_wait->add_option("ID", wait.id, "job j-N or sweep s-N")->required();
  c_wait->add_option("--timeout", wait_timeout_s, "give up after this many seconds (exit 7)");
  c_wait->add_flag("--json", wait.json, "print the outcome as JSON");

  CancelArgs cancel;
  auto* c_cancel = app.add_subcommand("cancel", "cancel a job or every unfinished job of a sweep");
  c_cancel->add_option("ID", cancel.id, "job j-N or sweep s-N")->required();
  c_cancel->add_option("--reason", cancel.reason, "stored with the job");
  c_cancel->add_flag("--json", cancel.json, "print the cancelled jobs as JSON");

  MetricsArgs metrics;
  bool metrics_json = false;
  auto* c_metrics = app.add_subcommand("metrics", "print a job's evaluations");
  c_metrics->add_option("JOB", metrics.id, "job id j-N")->required();
  c_metrics->add_option("--format", metrics.format, "csv (default), jsonl (a JSON object per line) or json");
  c_metrics->add_flag("--json", metrics_json, "the same as --format json: one JSON array of the points");

  FetchArgs fetch;
  auto* c_fetch = app.add_subcommand("fetch", "download a job's artifacts, checking size and SHA-256");
  c_fetch->add_option("JOB", fetch.id, "job id j-N")->required();
  c_fetch->add_option("--out", fetch.out_dir, "directory to write them to")->required();

  ReportArgs report;
  auto* c_report = app.add_subcommand("report", "write a self-contained HTML page of a job or a sweep (DIR/index.html)");
  c_report->add_option("ID", report.id, "job id j-N or sweep id s-N")->required();
  c_report->add_option("--out", report.out_dir, "directory for index.html (a sweep's job pages go beside it)")->required();

  CompareArgs compare;
  bool compare_json = false;
  auto* c_compare = app.add_subcommand("compare", "per setting of a sweep: mean and 95% interval over seeds");
  c_compare->add_option("SWEEP", compare.id, "sweep id s-N")->required();
  c_compare->add_option("--format", compare.format, "table (default), csv or json");
  c_compare->add_flag("--json", compare_json, "the same as --format json");

  ResubmitArgs resubmit;
  auto* c_resubmit = app.add_subcommand("resubmit", "submit a failed or cancelled job again, same resolved spec");
  c_resubmit->add_option("JOB", resubmit.id, "job id j-N")->required();
  c_resubmit->add_flag("--json", resubmit.json, "print the new id as JSON");

  try {
    app.parse(argc, argv);
  } catch (const CLI::CallForHelp& e) {
    return app.exit(e);
  } catch (const CLI::CallForAllHelp& e) {
    return app.exit(e);
  } catch (const CLI::ParseError& e) {
    std::cerr << "graft: " << e.what() << "\n  `graft --help` or `graft COMMAND --help` shows the usage\n";
    return kExitUsage;
  }

  Io io(std::cout, std::cerr);
  io.out_is_terminal = isatty(STDOUT_FILENO) == 1;
  if (io.out_is_terminal) {
    winsize ws{};
    if (ioctl(STDOUT_FILENO, TIOCGWINSZ, &ws) == 0 && ws.ws_col > 0) {
      io.width = ws.ws_col;
      io.height = ws.ws_row;
    }
  }
  io.now_ms = NowMs;

  if (c_check->parsed()) return CheckCommand(check, io);

  SettingsSources sources;
  sources.flag_server = server;
  sources.flag_token = token;
  sources.flag_token_file = token_file;
  sources.flag_ca_file = ca_file;
  sources.flag_cert_file = cert_file;
  sources.flag_key_file = key_file;
  sources.flag_tls_server_name = tls_server_name;
  sources.getenv = [](const char* name) -> const char* { return std::getenv(name); };
  auto settings = ResolveSettings(sources);
  if (!settings.ok()) {
    std::cerr << "graft: " << settings.status().message() << "\n";
    return kExitInvalidConfig;  // the settings, like a config, are input
  }
  if (settings->token.empty()) {
    std::cerr << "graft: no token: pass --token or --token-file, set GRAFT_TOKEN, or put token: (or token_file:) in "
              << (ConfigFilePath(sources.getenv).empty() ? "~/.config/graft/client.yaml" : ConfigFilePath(sources.getenv))
              << "\n";
    return kExitInvalidConfig;  // a required setting given nowhere
  }
  io.server = settings->server;
  Connection connection;
  connection.server = settings->server;
  connection.token = settings->token;
  auto tls = graft::tls::LoadClientCredentials(
      {settings->ca_file, settings->cert_file, settings->key_file, settings->tls_server_name});
  if (!tls.ok()) {
    std::cerr << "graft: " << tls.status().message() << "\n";
    return kExitInvalidConfig;  // TLS files, like the other settings, are input
  }
  connection.tls = std::move(*tls);
  std::unique_ptr<Api> api = CreateGrpcApi(connection);

  if (c_submit->parsed()) return SubmitCommand(*api, submit, io);
  if (c_list->parsed()) return ListCommand(*api, list, io);
  if (c_show->parsed()) return ShowCommand(*api, show, io);
  if (c_watch->parsed()) {
    watch.timeout_ms = static_cast<int64_t>(watch_timeout_s * 1000);
    return WatchCommand(*api, watch, io);
  }
  if (c_wait->parsed()) {
    wait.timeout_ms = static_cast<int64_t>(wait_timeout_s * 1000);
    return WaitCommand(*api, wait, io);
  }
  if (c_cancel->parsed()) return CancelCommand(*api, cancel, io);
  if (c_metrics->parsed()) {
    if (metrics_json) metrics.format = "json";
    return MetricsCommand(*api, metrics, io);
  }
  if (c_fetch->parsed()) return FetchCommand(*api, fetch, io);
  if (c_report->parsed()) return ReportCommand(*api, report, io);
  if (c_compare->parsed()) {
    if (compare_json) compare.format = "json";
    return CompareCommand(*api, compare, io);
  }
  if (c_resubmit->parsed()) return ResubmitCommand(*api, resubmit, io);
  if (c_workers->parsed()) return WorkersCommand(*api, workers, io);
  return kExitUsage;
}
