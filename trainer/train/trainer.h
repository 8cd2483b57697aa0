// Runs one job in-process: IIT (or standard training when the interchange weight is 0) of the
// job's MLP, evaluation with intervals at the configured cadence, checkpoints, and the
// artifacts of a run directory (spec.yaml, metrics.jsonl, result.json with the controls,
// failures.jsonl, checkpoint.pt, weights.pt). Torch-free header: the worker's commands include it without LibTorch.
// Thread-safety: one Train() call per process at a time (it sets process-wide thread counts).
#ifndef GRAFT_TRAINER_TRAIN_TRAINER_H_
#define GRAFT_TRAINER_TRAIN_TRAINER_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <ostream>
#include <string>
#include <vector>

#include "absl/status/statusor.h"
#include "configs/reader/spec.h"

namespace graft::train {

struct RunOptions {
  std::string out_dir;     // created if missing; its artifacts are replaced
  std::string resume_dir;  // non-empty: continue from this directory's checkpoint.pt
  // Stop as if interrupted right after this step (checkpoint written, outcome kInterrupted);
  // -1: never. For drills and tests of resume.
  int64_t stop_after_step = -1;
  // Set (for example by a signal handler) to stop at the next step boundary with a checkpoint.
  const std::atomic<bool>* stop_requested = nullptr;
  // Where the live progress line goes (nullptr: nowhere). A terminal gets one line redrawn in
  // place; anything else gets one line per evaluation.
  std::ostream* progress = nullptr;
  bool progress_is_terminal = false;
  // Non-empty: after training, write this JSON file with the first `logits_dump_triples` evaluation
  // triples (input value indices of base and source, set name) and the network's base and
  // intervened logits, so an independent implementation can recompute them.
  std::string logits_dump_path;
  int logits_dump_triples = 64;
  // Called after each evaluation with its metrics.jsonl line (no newline), after the line is
  // written. The worker's serve loop reports it to the coordinator.
  std::function<void(int64_t step, const std::string& metrics_line)> on_evaluation;
  // Called after each checkpoint.pt is written (atomically) into out_dir.
  std::function<void(int64_t step)> on_checkpoint;
  // Called after every step (cheap; for progress reports).
  std::function<void(int64_t step)> on_step;
  // Called with the input numbers each step trains on (the batch's base inputs, then, with
  // `sources: independent`, its source inputs), before the step uses them. For tests that check
  // what training sees; unset in production.
  std::function<void(const std::vector<int64_t>& inputs)> on_training_inputs;
  // > 0: use at most this many threads (torch and BLAS), even if training.threads asks for more.
  // Does not change the spec (a checkpoint made with fewer threads still resumes).
  int max_threads = 0;
};

struct RunOutcome {
  enum class Kind { kFinished, kInterrupted };
  Kind kind = Kind::kFinished;
  int64_t step = 0;  // the last completed step
};

// Trains `job`. Failures: InvalidArgument for a checkpoint that does not belong to this spec,
// Internal for a non-finite loss (the message names the step; the last good checkpoint is
// kept), other codes for I/O errors naming the file.
absl::StatusOr<RunOutcome> Train(const config::ResolvedJob& job, const RunOptions& options);

}  // namespace graft::train

#endif  // GRAFT_TRAINER_TRAIN_TRAINER_H_
