// Analysis of a stored network without training it: `evaluate` (every figure a training run
// reports at its last step, plus the controls), `scan` (IIA of candidate unit sites per aligned
// variable, with a table and an SVG heat map) and `das` (distributed alignment search: a learned
// rotation of one layer, beside the same search on the untrained network as a control).
// Torch-free header: the worker's commands include it without LibTorch.
// Thread-safety: one call per process at a time (each sets process-wide thread counts).
#ifndef GRAFT_TRAINER_TRAIN_ANALYSIS_H_
#define GRAFT_TRAINER_TRAIN_ANALYSIS_H_

#include <ostream>
#include <string>

#include "absl/status/statusor.h"
#include "configs/reader/spec.h"

namespace graft::train {

struct AnalysisOptions {
  // The network: a graft weights.pt, or a dict of tensors saved by Python's torch.save under the
  // same names (embed.<input>, hidden.<k>.weight/.bias, out.weight/.bias). Required.
  std::string weights_path;
  std::string out_dir;              // created if missing; the command's files are replaced
  std::ostream* progress = nullptr;  // progress lines (scan, das); nullptr: none
};

// Each returns a short human summary on success, after writing its files into out_dir:
//   EvaluateStored: evaluation.json, failures.jsonl
//   ScanStored:     scan.json, scan.tsv, scan.svg
//   DasStored:      das.json, rotation.pt
// Failures: NotFound for a weights file that cannot be opened; InvalidArgument for weights that do
// not fit the config (the message names the file, the tensor and both shapes, or the missing and
// extra names) and for a config without what the command needs (an alignment); Unavailable for
// files that cannot be written (naming them).
absl::StatusOr<std::string> EvaluateStored(const config::ResolvedJob& job, const AnalysisOptions& options);
absl::StatusOr<std::string> ScanStored(const config::ResolvedJob& job, const AnalysisOptions& options);
absl::StatusOr<std::string> DasStored(const config::ResolvedJob& job, const AnalysisOptions& options);

}  // namespace graft::train

#endif  // GRAFT_TRAINER_TRAIN_ANALYSIS_H_
