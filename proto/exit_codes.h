// The exit codes of graft, graft-worker and graftd: one table for the three programs, so a script
// reads a code the same way whichever of them it ran. README's "Exit codes" section explains each
// code per program for users; keep the two in step. It sits in proto/ beside the API because, like
// the API, it is a contract between the programs and the scripts that drive them, and every
// program already includes from here; header-only, no dependencies. Thread-safety: constants.
#ifndef GRAFT_PROTO_EXIT_CODES_H_
#define GRAFT_PROTO_EXIT_CODES_H_

namespace graft {

enum ExitCode : int {
  // Done. graft wait/watch/submit --watch: every job succeeded. graft-worker serve and graftd:
  // stopped by SIGINT or SIGTERM, cleanly.
  kExitOk = 0,
  // A failure that is not the input's fault: a request graftd refused or that failed (no such
  // job, a job that may not be cancelled), a file that cannot be read or written, a damaged
  // download, a run-time training failure (a NaN loss), graftd unable to open its store or listen.
  kExitFailure = 1,
  // The input is invalid: a job config, a --set value, a sweep, weights that do not fit the
  // config, a --resume checkpoint of another spec; or a program's settings: a settings, tokens
  // or client config file with a mistake or that cannot be read, a required setting given
  // nowhere (graft's token, graftd's tokens file), settings that contradict each other.
  kExitInvalidConfig = 2,
  // The command line itself is wrong: an unknown command or flag, a missing or extra argument, a
  // value of the wrong form or outside its choices, a malformed job or sweep id.
  kExitUsage = 3,
  // graft wait/watch/submit --watch: at least one job failed.
  kExitJobFailed = 4,
  // graft wait/watch/submit --watch: none failed, at least one was cancelled.
  kExitJobCancelled = 5,
  // graft: graftd cannot be reached, or refused the token.
  kExitUnreachable = 6,
  // graft wait/watch --timeout passed before the jobs ended.
  kExitTimeout = 7,
  // graft-worker run: stopped early by SIGINT/SIGTERM or --stop-after-step, with a checkpoint
  // written; continue with --resume.
  kExitInterrupted = 8,
};

}  // namespace graft

#endif  // GRAFT_PROTO_EXIT_CODES_H_
