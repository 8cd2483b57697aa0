#include "trainer/train/trainer.h"

#include <dlfcn.h>
#include <link.h>
#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iomanip>
#include <map>
#include <set>
#include <sstream>

#include <torch/torch.h>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"
#include "nlohmann/json.hpp"
#include "trainer/causal/rng.h"
#include "trainer/causal/split.h"
#include "trainer/eval/wilson.h"
#include "trainer/net/mlp.h"
#include "trainer/train/flat_optimizer.h"
#include "trainer/train/kernel_step.h"
#include "trainer/train/evaluation.h"

#ifndef GRAFT_VERSION
#define GRAFT_VERSION "unknown"
#endif
#ifndef GRAFT_COMMIT
#define GRAFT_COMMIT "unknown"
#endif

namespace graft::train {
namespace {

namespace fs = std::filesystem;
using json = nlohmann::ordered_json;  // keys in the order written
using torch::Tensor;

// ---------------------------------------------------------------------------------------------
// Process facts for provenance.

using BlasSetThreads = void (*)(int);
using BlasGetThreads = int (*)();

std::string BlasLibrary() {
  std::string found;
  dl_iterate_phdr(
      [](struct dl_phdr_info* info, size_t, void* data) -> int {
        std::string name = info->dlpi_name ? info->dlpi_name : "";
        if (name.find("blas") != std::string::npos) {
          std::error_code ec;
          fs::path real = fs::canonical(name, ec);
          auto* out = static_cast<std::string*>(data);
          if (!out->empty()) *out += ", ";
          *out += ec ? name : real.string();
        }
        return 0;
      },
      &found);
  return found.empty() ? "none found (torch's built-in kernels)" : found;
}

// Sets OpenBLAS's own pool (which torch::set_num_threads does not touch); returns the count it
// reports afterwards, or -1 when the BLAS in the process is not OpenBLAS.
int SetBlasThreads(int threads) {
  auto set = reinterpret_cast<BlasSetThreads>(dlsym(RTLD_DEFAULT, "openblas_set_num_threads"));
  auto get = reinterpret_cast<BlasGetThreads>(dlsym(RTLD_DEFAULT, "openblas_get_num_threads"));
  if (set == nullptr || get == nullptr) return -1;
  set(threads);
  return get();
}

std::string CpuModel() {
  std::ifstream in("/proc/cpuinfo");
  std::string line;
  while (std::getline(in, line)) {
    if (line.rfind("model name", 0) == 0) {
      const size_t colon = line.find(':');
      if (colon != std::string::npos) return line.substr(colon + 2);
    }
  }
  return "unknown";
}

// Seconds since this process started (from /proc: start time in clock ticks after boot, and
// the system uptime), resolution one clock tick (10 ms).
double ProcessAgeSeconds() {
  std::ifstream stat("/proc/self/stat");
  std::string text((std::istreambuf_iterator<char>(stat)), std::istreambuf_iterator<char>());
  const size_t close = text.rfind(')');
  if (close == std::string::npos) return -1;
  std::istringstream fields(text.substr(close + 2));
  std::string field;
  // Fields after the command name start at field 3 (state); starttime is field 22.
  for (int i = 3; i < 22 && fields >> field; ++i) {
  }
  unsigned long long start_ticks = 0;
  if (!(fields >> start_ticks)) return -1;
  std::ifstream up("/proc/uptime");
  double uptime = 0;
  if (!(up >> uptime)) return -1;
  return uptime - static_cast<double>(start_ticks) / static_cast<double>(sysconf(_SC_CLK_TCK));
}

double PeakRssMb() {
  struct rusage ru;
  getrusage(RUSAGE_SELF, &ru);
  return static_cast<double>(ru.ru_maxrss) / 1024.0;  // Linux reports KiB
}

Tensor ToTensor(const std::vector<int64_t>& v) { return torch::tensor(v, torch::kInt64); }

Tensor RngState(const causal::Rng& rng) {
  auto s = rng.State();
  std::vector<int64_t> v(s.begin(), s.end());
  return ToTensor(v);
}
std::array<uint64_t, 4> ReadRngState(const Tensor& t) {
  std::array<uint64_t, 4> s{};
  auto a = t.accessor<int64_t, 1>();
  for (int i = 0; i < 4; ++i) s[i] = static_cast<uint64_t>(a[i]);
  return s;
}

absl::Status WriteText(const fs::path& path, const std::string& text) {
  const fs::path tmp = path.string() + ".tmp";
  {
    std::ofstream out(tmp, std::ios::binary | std::ios::trunc);
    if (!out) return absl::UnavailableError(absl::StrCat(tmp.string(), ": cannot write"));
    out << text;
    out.flush();
    if (!out) return absl::UnavailableError(absl::StrCat(tmp.string(), ": write failed"));
  }
  std::error_code ec;
  fs::rename(tmp, path, ec);
  if (ec) return absl::UnavailableError(absl::StrCat(path.string(), ": ", ec.message()));
  return absl::OkStatus();
}

// ---------------------------------------------------------------------------------------------
// The job's training state.

class Run {
 public:
  Run(const config::ResolvedJob& job, const RunOptions& options)
      : job_(job),
        spec_(job.spec),
        options_(options),
        labels_(*job.model, job.sets),
        stream_(job.split, job.spec.seed),
        rng_(job.spec.seed, 0x1117),
        masks_(job.sets, AlignmentSites(job), LayerColumns(job)),
        eval_(CreateEvalInputs(job)) {}

  absl::StatusOr<RunOutcome> Execute();

 private:
  void BuildNetwork();
  // One optimiser step; returns the two loss values.
  std::pair<double, double> Step();
  // The same step by the hand-written kernel (kernel_step.h), from the same draws.
  std::pair<double, double> StepByKernel();
  json Evaluate(int64_t step);
  absl::Status SaveCheckpoint(int64_t step);
  absl::Status LoadCheckpoint(const fs::path& path, int64_t* step);
  absl::Status WriteWeights(const fs::path& path);
  absl::Status WriteLogitsDump();
  json Provenance() const;
  void Progress(int64_t step, bool final_line);

  const config::ResolvedJob& job_;
  const config::JobSpec& spec_;
  const RunOptions& options_;
  LabelTables labels_;
  causal::TrainingStream stream_;  // the training inputs: listed epochs or hashed draws
  causal::Rng rng_;  // sets, sources

  net::SiteNetwork net_;  // the network of network.type
  std::unique_ptr<FlatOptimizer> optimizer_;
  std::unique_ptr<KernelStep> kernel_;  // null: the LibTorch step (the reference) runs
  std::vector<int64_t> kernel_sets_, kernel_perm_, kernel_sources_;
  // Pre-allocated per-step index tensors (filled in place each step) and, for a small input
  // space, every input's embedding rows [N, num_inputs] (value index + row offset).
  Tensor step_base_, step_sets_, step_perm_, step_sources_;
  Tensor all_rows_;
  const UnitMasks masks_;   // the alignment's units per intervention set and layer
  const EvalInputs eval_;   // evaluation data, fixed for the whole run

  // Loss sums since the last evaluation.
  double loss_task_sum_ = 0, loss_iit_sum_ = 0;
  int64_t loss_count_ = 0;
  double wall_before_ = 0;  // wall seconds of earlier attempts (resume)
  std::chrono::steady_clock::time_point start_;
  json last_eval_;
  json step0_eval_;  // the evaluation at step 0 (before training), for result.json's controls
  // Every metrics.jsonl line so far, kept and new, in order. Checkpoints carry them, so a resume
  // from a checkpoint alone (a worker that fetched it) keeps the same lines byte for byte.
  std::vector<std::string> metric_lines_;
  bool checkpoint_had_lines_ = false;  // the loaded checkpoint carried metric_lines_
  int64_t resumed_from_step_ = 0;      // the checkpoint's step; 0 for a fresh run
  std::chrono::steady_clock::time_point last_progress_;
  int64_t progress_step0_ = 0;
  double first_step_s_ = -1;  // process age when the first step of this process began
  double step_seconds_ = 0;   // time inside training steps in this process (no evaluation)
  int threads_ = 1;           // effective threads of this process
};

void Run::BuildNetwork() {
  net_ = CreateNetwork(job_);
  std::vector<Tensor> params;
  for (auto& p : net_->parameters()) {
    if (p.requires_grad()) params.push_back(p);
  }
  const auto& opt = spec_.training.optimizer;
  FlatOptimizerOptions fo;
  fo.adam = opt.type == config::OptimizerType::kAdam;
  fo.lr = opt.lr;
  fo.weight_decay = opt.weight_decay;
  fo.momentum = opt.momentum;
  optimizer_ = std::make_unique<FlatOptimizer>(params, fo);
  const int64_t n = job_.model->input_space_size();
  if (n <= (int64_t{1} << 20)) {
    all_rows_ = labels_.Inputs(torch::arange(n, torch::kInt64)) + net_->offsets();
  }
  // The hand-written step wherever it covers the network; GRAFT_REFERENCE_STEP=1 keeps LibTorch's.
  const char* reference = std::getenv("GRAFT_REFERENCE_STEP");
  if (reference == nullptr || std::string(reference) != "1") {
    kernel_ = KernelStep::Create(job_, *net_, labels_, *optimizer_);
  }
}

std::pair<double, double> Run::Step() {
  if (kernel_ != nullptr) return StepByKernel();
  const config::TrainingSpec& t = spec_.training;
  const int B = t.batch_size;
  auto fill = [](Tensor& dst, int n, const auto& produce) {
    if (!dst.defined() || dst.size(0) != n) dst = torch::empty({n}, torch::kInt64);
    int64_t* p = dst.data_ptr<int64_t>();
    for (int i = 0; i < n; ++i) p[i] = produce(i);
  };
  const std::vector<int64_t> batch = stream_.Next(B);
  if (options_.on_training_inputs) options_.on_training_inputs(batch);
  fill(step_base_, B, [&](int i) { return batch[i]; });
  const Tensor& base_num = step_base_;
  Tensor base_in = labels_.Inputs(base_num);
  Tensor labels = labels_.OutputLabels(base_num, base_in);
  Tensor embedded = all_rows_.defined() ? net_->EmbedRows(all_rows_.index_select(0, base_num).reshape({-1}), B)
                                        : net_->Embed(base_in);
  Tensor loss_task, loss_iit;
  if (t.interchange_weight > 0 && masks_.lowest_layer() >= 0) {
    const int num_sets = static_cast<int>(job_.sets.size());
    fill(step_sets_, B, [&](int) { return static_cast<int64_t>(rng_.Uniform(num_sets)); });
    const Tensor& set_index = step_sets_;
    std::vector<Tensor> source_acts;
    Tensor source_num, source_in, perm;
    if (t.sources == config::SourceMode::kInBatch) {
      // The sources are a permutation of the batch: their activations are the base's own.
      std::vector<int64_t> order(B);
      for (int i = 0; i < B; ++i) order[i] = i;
      rng_.Shuffle(order);
      fill(step_perm_, B, [&](int i) { return order[i]; });
      perm = step_perm_;
      source_num = base_num.index_select(0, perm);
      source_in = base_in.index_select(0, perm);
    } else {
      const causal::InputSplit& split = job_.split;
      fill(step_sources_, B, [&](int) { return split.DrawTraining(rng_); });
      if (options_.on_training_inputs) {
        const int64_t* p = step_sources_.data_ptr<int64_t>();
        options_.on_training_inputs(std::vector<int64_t>(p, p + B));
      }
      source_num = step_sources_;
      source_in = labels_.Inputs(source_num);
      if (t.source_gradients) {
        source_acts = net_->Hidden(net_->Embed(source_in), masks_.highest_layer());
      } else {
        torch::NoGradGuard no_grad;
        source_acts = net_->Hidden(net_->Embed(source_in), masks_.highest_layer());
      }
    }
    Tensor cf = labels_.Counterfactual(base_num, source_num, set_index, base_in, source_in);
    // Base and intervened rows in one pass; the layers below the lowest site run once.
    Tensor logits = net_->StackedForward(embedded, masks_.ForSets(set_index), source_acts, perm, t.source_gradients);
    loss_task = torch::nn::functional::cross_entropy(logits.narrow(0, 0, B), labels);
    loss_iit = torch::nn::functional::cross_entropy(logits.narrow(0, B, B), cf);
  } else {
    Tensor logits = net_->Logits(embedded);
    loss_task = torch::nn::functional::cross_entropy(logits, labels);
  }
  Tensor loss = t.task_weight == 1.0 ? loss_task : loss_task * t.task_weight;
  if (loss_iit.defined()) {
    loss = t.interchange_weight == 1.0 ? loss + loss_iit : loss + loss_iit * t.interchange_weight;
  }
  const double task_value = loss_task.item<double>();
  const double iit_value = loss_iit.defined() ? loss_iit.item<double>() : 0.0;
  if (!std::isfinite(task_value) || !std::isfinite(iit_value)) {
    return {task_value, iit_value};  // the caller stops; no update with a bad loss
  }
  optimizer_->ZeroGrad();
  loss.backward();
  optimizer_->Step();
  return {task_value, iit_value};
}

// The draws of Step(), in the same order, so both paths train on the same batches and pairs.
std::pair<double, double> Run::StepByKernel() {
  const config::TrainingSpec& t = spec_.training;
  const int B = t.batch_size;
  const std::vector<int64_t> batch = stream_.Next(B);
  if (options_.on_training_inputs) options_.on_training_inputs(batch);
  kernel_sets_.clear();
  kernel_perm_.clear();
  kernel_sources_.clear();
  if (t.interchange_weight > 0 && masks_.lowest_layer() >= 0) {
    const int num_sets = static_cast<int>(job_.sets.size());
    for (int i = 0; i < B; ++i) kernel_sets_.push_back(static_cast<int64_t>(rng_.Uniform(num_sets)));
    if (t.sources == config::SourceMode::kInBatch) {
      for (int i = 0; i < B; ++i) kernel_perm_.push_back(i);
      rng_.Shuffle(kernel_perm_);
    } else {
      for (int i = 0; i < B; ++i) kernel_sources_.push_back(job_.split.DrawTraining(rng_));
      if (options_.on_training_inputs) options_.on_training_inputs(kernel_sources_);
    }
  }
  return kernel_->Step(batch, kernel_sets_, kernel_perm_, kernel_sources_);
}

json Run::Evaluate(int64_t step) {
  c10::InferenceMode guard;
  json m;
  m["step"] = step;
  m["examples"] = step * spec_.training.batch_size;
  const double wall = wall_before_ +
                      std::chrono::duration<double>(std::chrono::steady_clock::now() - start_).count();
  m["wall_s"] = wall;
  if (loss_count_ > 0) {
    m["loss_task"] = loss_task_sum_ / loss_count_;
    m["loss_interchange"] = spec_.training.interchange_weight > 0 ? json(loss_iit_sum_ / loss_count_) : json(nullptr);
  } else {
    m["loss_task"] = nullptr;
    m["loss_interchange"] = nullptr;
  }
  // The same function as `graft-worker evaluate`, so both report identical figures.
  json net_metrics = EvaluateNetwork(job_, *net_, labels_, eval_,
                                     [&](const Tensor& b, const Tensor& s, const Tensor& z) {
                                       return masks_.Logits(*net_, b, s, z, nullptr);
                                     });
  for (auto& [k, v] : net_metrics.items()) m[k] = v;
  loss_task_sum_ = loss_iit_sum_ = 0;
  loss_count_ = 0;
  return m;
}

absl::Status Run::SaveCheckpoint(int64_t step) {
  torch::serialize::OutputArchive archive;
  for (const auto& item : net_->named_parameters(/*recurse=*/true)) archive.write("param." + item.key(), item.value());
  for (const auto& item : net_->named_buffers(/*recurse=*/true)) archive.write("buffer." + item.key(), item.value());
  torch::serialize::OutputArchive opt;
  optimizer_->Save(opt);
  archive.write("optimizer", opt);
  archive.write("step", torch::tensor(step, torch::kInt64));
  archive.write("stream.order", ToTensor(stream_.order()));
  archive.write("stream.pos", torch::tensor(static_cast<int64_t>(stream_.pos()), torch::kInt64));
  archive.write("stream.rng", RngState(stream_.rng()));
  archive.write("rng", RngState(rng_));
  archive.write("loss.sums", torch::tensor({loss_task_sum_, loss_iit_sum_}, torch::kFloat64));
  archive.write("loss.count", torch::tensor(loss_count_, torch::kInt64));
  const double wall = wall_before_ +
                      std::chrono::duration<double>(std::chrono::steady_clock::now() - start_).count();
  archive.write("wall_s", torch::tensor(wall, torch::kFloat64));
  const std::string hash = config::SpecHash(spec_);
  archive.write("spec_hash", c10::IValue(hash));
  // The step-0 evaluation feeds result.json's controls; a resumed attempt cannot recompute it.
  archive.write("step0_eval", c10::IValue(step0_eval_.is_null() ? std::string() : step0_eval_.dump()));
  std::string lines;
  for (const auto& l : metric_lines_) lines += l + "\n";
  archive.write("metric_lines", c10::IValue(lines));
  const fs::path path = fs::path(options_.out_dir) / "checkpoint.pt";
  // Serialised in memory and written by WriteText (checked, then renamed): LibTorch's file writer
  // throws from its destructor when the disk is full, which ends the process.
  std::ostringstream bytes;
  try {
    archive.save_to(bytes);
  } catch (const c10::Error& e) {
    return absl::InternalError(absl::StrCat("cannot serialise the checkpoint: ", e.what_without_backtrace()));
  }
  absl::Status st = WriteText(path, bytes.str());
  if (!st.ok()) return absl::UnavailableError(absl::StrCat("cannot write the checkpoint: ", st.message()));
  return absl::OkStatus();
}

absl::Status Run::LoadCheckpoint(const fs::path& path, int64_t* step) {
  torch::serialize::InputArchive archive;
  try {
    archive.load_from(path.string());
    c10::IValue hash;
    archive.read("spec_hash", hash);
    if (hash.toStringRef() != config::SpecHash(spec_)) {
      return absl::InvalidArgumentError(absl::StrCat(
          path.string(), ": this checkpoint belongs to a different spec (hash ", hash.toStringRef(),
          ", this config resolves to ", config::SpecHash(spec_), "); resume with the same config and --set values"));
    }
    c10::IValue step0;
    if (archive.try_read("step0_eval", step0) && !step0.toStringRef().empty()) {
      step0_eval_ = json::parse(step0.toStringRef(), nullptr, /*allow_exceptions=*/false);
      if (step0_eval_.is_discarded()) step0_eval_ = json();
    }
    // Checkpoints written before metric_lines existed have none; the run directory's
    // metrics.jsonl is used for them.
    c10::IValue lines;
    if (archive.try_read("metric_lines", lines)) {
      checkpoint_had_lines_ = true;
      std::istringstream in(lines.toStringRef());
      std::string line;
      while (std::getline(in, line)) {
        if (!line.empty()) metric_lines_.push_back(line);
      }
    }
    torch::NoGradGuard no_grad;
    for (auto& item : net_->named_parameters(true)) {
      Tensor t;
      archive.read("param." + item.key(), t);
      item.value().copy_(t);
    }
    for (auto& item : net_->named_buffers(true)) {
      Tensor t;
      archive.read("buffer." + item.key(), t);
      item.value().copy_(t);
    }
    torch::serialize::InputArchive opt;
    archive.read("optimizer", opt);
    optimizer_->Load(opt);
    Tensor t;
    archive.read("step", t);
    *step = t.item<int64_t>();
    Tensor order, pos, srng, rng;
    archive.read("stream.order", order);
    archive.read("stream.pos", pos);
    archive.read("stream.rng", srng);
    archive.read("rng", rng);
    std::vector<int64_t> ord(order.data_ptr<int64_t>(), order.data_ptr<int64_t>() + order.numel());
    stream_.Restore(std::move(ord), static_cast<size_t>(pos.item<int64_t>()));
    stream_.rng().SetState(ReadRngState(srng));
    rng_.SetState(ReadRngState(rng));
    Tensor sums, count, wall;
    archive.read("loss.sums", sums);
    archive.read("loss.count", count);
    archive.read("wall_s", wall);
    loss_task_sum_ = sums[0].item<double>();
    loss_iit_sum_ = sums[1].item<double>();
    loss_count_ = count.item<int64_t>();
    wall_before_ = wall.item<double>();
  } catch (const c10::Error& e) {
    return absl::DataLossError(absl::StrCat(path.string(), ": cannot read checkpoint: ", e.what_without_backtrace()));
  }
  return absl::OkStatus();
}

absl::Status Run::WriteWeights(const fs::path& path) {
  c10::Dict<std::string, Tensor> dict;
  for (const auto& [name, tensor] : net_->NamedExport()) dict.insert(name, tensor.detach().clone().contiguous());
  std::vector<char> bytes = torch::pickle_save(c10::IValue(dict));
  return WriteText(path, std::string(bytes.begin(), bytes.end()));
}

absl::Status Run::WriteLogitsDump() {
  c10::InferenceMode guard;
  const int64_t n = std::min<int64_t>(options_.logits_dump_triples, eval_.base.size(0));
  Tensor b_in = labels_.Decode(eval_.base.narrow(0, 0, n));
  Tensor s_in = labels_.Decode(eval_.source.narrow(0, 0, n));
  Tensor z = eval_.set.narrow(0, 0, n);
  Tensor base_logits;
  Tensor iit = masks_.Logits(*net_, b_in, s_in, z, &base_logits);
  json j;
  const auto& model = *job_.model;
  j["inputs"] = json::array();
  for (int i : model.inputs()) j["inputs"].push_back(model.variable(i).name);
  j["sets"] = json::array();
  for (const auto& s : job_.sets) {
    json vars = json::array();
    for (int v : s.variables) vars.push_back(model.variable(v).name);
    j["sets"].push_back(json{{"name", s.name}, {"variables", vars}});
  }
  auto rows = [](const Tensor& t) {
    json out = json::array();
    auto a = t.accessor<int64_t, 2>();
    for (int64_t r = 0; r < t.size(0); ++r) {
      json row = json::array();
      for (int64_t c = 0; c < t.size(1); ++c) row.push_back(a[r][c]);
      out.push_back(row);
    }
    return out;
  };
  auto frows = [](const Tensor& t) {
    json out = json::array();
    Tensor d = t.to(torch::kFloat64).contiguous();
    auto a = d.accessor<double, 2>();
    for (int64_t r = 0; r < d.size(0); ++r) {
      json row = json::array();
      for (int64_t c = 0; c < d.size(1); ++c) row.push_back(a[r][c]);
      out.push_back(row);
    }
    return out;
  };
  json bases = rows(b_in), sources = rows(s_in);
  j["triples"] = json::array();
  for (int64_t r = 0; r < n; ++r) {
    j["triples"].push_back(json{{"base", bases[r]}, {"source", sources[r]}, {"set", job_.sets[z[r].item<int64_t>()].name}});
  }
  j["base_logits"] = frows(base_logits);
  j["intervened_logits"] = frows(iit);
  return WriteText(options_.logits_dump_path, j.dump(1) + "\n");
}

json Run::Provenance() const {
  json p;
  p["graft_version"] = GRAFT_VERSION;
  p["graft_commit"] = GRAFT_COMMIT;
  p["libtorch_version"] = absl::StrCat(TORCH_VERSION_MAJOR, ".", TORCH_VERSION_MINOR, ".", TORCH_VERSION_PATCH);
  p["blas_library"] = BlasLibrary();
  auto get = reinterpret_cast<BlasGetThreads>(dlsym(RTLD_DEFAULT, "openblas_get_num_threads"));
  p["blas_threads"] = get ? get() : -1;
  p["torch_threads"] = torch::get_num_threads();
  p["threads"] = threads_;
  p["training_step"] = kernel_ != nullptr ? "kernel" : "reference";
  p["cpu_model"] = CpuModel();
  p["spec_hash"] = config::SpecHash(spec_);
  return p;
}

void Run::Progress(int64_t step, bool final_line) {
  if (options_.progress == nullptr) return;
  const auto now = std::chrono::steady_clock::now();
  const double elapsed = std::chrono::duration<double>(now - start_).count();
  const double rate = elapsed > 0 ? static_cast<double>(step - progress_step0_) * spec_.training.batch_size / elapsed : 0;
  const double steps_per_s = elapsed > 0 ? static_cast<double>(step - progress_step0_) / elapsed : 0;
  const double eta = steps_per_s > 0 ? static_cast<double>(spec_.training.steps - step) / steps_per_s : 0;
  std::ostringstream line;
  line << "step " << step << "/" << spec_.training.steps << "  " << std::fixed << std::setprecision(0) << rate
       << " ex/s";
  if (!last_eval_.is_null()) {
    line << std::setprecision(3) << "  acc_held_out " << last_eval_["acc_held_out"]["value"].get<double>() << "  iia_held_out "
         << last_eval_["iia_held_out"]["value"].get<double>() << " (changed "
         << last_eval_["iia_changed_held_out"]["value"].get<double>() << ")";
  }
  line << std::setprecision(0) << "  eta " << eta << "s";
  if (options_.progress_is_terminal) {
    *options_.progress << "\r\033[K" << line.str() << (final_line ? "\n" : "") << std::flush;
  } else {
    *options_.progress << line.str() << "\n" << std::flush;
  }
  last_progress_ = now;
}

absl::StatusOr<RunOutcome> Run::Execute() {
  const config::TrainingSpec& t = spec_.training;
  threads_ = options_.max_threads > 0 ? std::min(t.threads, options_.max_threads) : t.threads;
  torch::set_num_threads(threads_);
  SetBlasThreads(threads_);
  const fs::path out(options_.out_dir);
  std::error_code ec;
  fs::create_directories(out, ec);
  if (ec) return absl::UnavailableError(absl::StrCat(out.string(), ": cannot create: ", ec.message()));

  BuildNetwork();
  start_ = std::chrono::steady_clock::now();
  last_progress_ = start_;

  int64_t step = 0;
  std::vector<std::string> metric_lines;
  if (!options_.resume_dir.empty()) {
    const fs::path from(options_.resume_dir);
    absl::Status st = LoadCheckpoint(from / "checkpoint.pt", &step);
    if (!st.ok()) return st;
    // Keep the evaluations up to the checkpoint, byte for byte; later ones are recomputed. The
    // checkpoint's own copy of them wins: a worker resuming elsewhere has only the checkpoint.
    std::vector<std::string> candidates = std::move(metric_lines_);
    metric_lines_.clear();
    if (!checkpoint_had_lines_) {
      std::ifstream in(from / "metrics.jsonl");
      std::string line;
      while (std::getline(in, line)) {
        if (!line.empty()) candidates.push_back(line);
      }
    }
    for (const std::string& line : candidates) {
      json m = json::parse(line, nullptr, /*allow_exceptions=*/false);
      if (m.is_discarded()) break;  // a torn last line from a crash
      if (m["step"].get<int64_t>() > step) break;
      metric_lines.push_back(line);
      last_eval_ = m;
      if (m["step"].get<int64_t>() == 0) step0_eval_ = m;
    }
    progress_step0_ = step;
    resumed_from_step_ = step;
    if (options_.progress != nullptr) {
      *options_.progress << "resuming from step " << step << " of " << t.steps << ": " << metric_lines.size()
                         << " evaluations kept, training the remaining " << (t.steps - step) << " steps\n"
                         << std::flush;
    }
  }
  metric_lines_ = metric_lines;
  absl::Status st = WriteText(out / "spec.yaml", config::ResolvedSpecYaml(spec_));
  if (!st.ok()) return st;
  std::ofstream metrics(out / "metrics.jsonl.tmp", std::ios::trunc);
  for (const auto& l : metric_lines) metrics << l << "\n";
  metrics.flush();
  fs::rename(out / "metrics.jsonl.tmp", out / "metrics.jsonl", ec);
  metrics.close();
  std::ofstream metrics_out(out / "metrics.jsonl", std::ios::app);
  if (!metrics_out) return absl::UnavailableError(absl::StrCat((out / "metrics.jsonl").string(), ": cannot write"));

  // Fails when the line cannot be written (a full disk): metrics.jsonl never silently loses one.
  auto emit = [&](int64_t s) -> absl::Status {
    last_eval_ = Evaluate(s);
    const std::string line = last_eval_.dump();
    metrics_out << line << "\n" << std::flush;
    if (!metrics_out) {
      return absl::UnavailableError(
          absl::StrCat((out / "metrics.jsonl").string(), ": cannot write the evaluation at step ", s));
    }
    metric_lines_.push_back(line);
    if (options_.on_evaluation) options_.on_evaluation(s, line);
    return absl::OkStatus();
  };
  if (step == 0) {
    st = emit(0);
    if (!st.ok()) return st;
    step0_eval_ = last_eval_;
  }
  int64_t last_checkpoint = step;
  RunOutcome outcome;
  while (step < t.steps) {
    if (options_.stop_requested != nullptr && options_.stop_requested->load()) {
      st = SaveCheckpoint(step);
      if (!st.ok()) return st;
      if (options_.on_checkpoint) options_.on_checkpoint(step);
      outcome.kind = RunOutcome::Kind::kInterrupted;
      outcome.step = step;
      Progress(step, true);
      return outcome;
    }
    if (first_step_s_ < 0) first_step_s_ = ProcessAgeSeconds();
    const auto step_start = std::chrono::steady_clock::now();
    auto [task_loss, iit_loss] = Step();
    step_seconds_ += std::chrono::duration<double>(std::chrono::steady_clock::now() - step_start).count();
    if (!std::isfinite(task_loss) || !std::isfinite(iit_loss)) {
      return absl::InternalError(absl::StrCat("the loss became ", std::isfinite(task_loss) ? iit_loss : task_loss,
                                              " at step ", step + 1, " (task ", task_loss, ", interchange ", iit_loss,
                                              "); stopped without that update; the last good checkpoint is step ",
                                              last_checkpoint, " in ", (out / "checkpoint.pt").string(),
                                              "; try a lower training.optimizer.lr"));
    }
    ++step;
    loss_task_sum_ += task_loss;
    loss_iit_sum_ += iit_loss;
    ++loss_count_;
    if (step % spec_.evaluation.every == 0 || step == t.steps) {
      st = emit(step);
      if (!st.ok()) return st;
    }
    if (step % t.checkpoint_every == 0 || step == t.steps || step == options_.stop_after_step) {
      st = SaveCheckpoint(step);
      if (!st.ok()) return st;
      last_checkpoint = step;
      if (options_.on_checkpoint) options_.on_checkpoint(step);
    }
    if (options_.on_step) options_.on_step(step);
    if (step == options_.stop_after_step && step < t.steps) {
      outcome.kind = RunOutcome::Kind::kInterrupted;
      outcome.step = step;
      Progress(step, true);
      return outcome;
    }
    const auto now = std::chrono::steady_clock::now();
    if (options_.progress_is_terminal ? std::chrono::duration<double>(now - last_progress_).count() > 0.5
                                      : step % spec_.evaluation.every == 0) {
      Progress(step, false);
    }
  }
  if (options_.progress_is_terminal || step % spec_.evaluation.every != 0) Progress(step, true);
  const double seconds = wall_before_ + std::chrono::duration<double>(std::chrono::steady_clock::now() - start_).count();
  json result = last_eval_;
  result["steps"] = step;
  // What this process did: a resumed run trained only the steps after its checkpoint.
  result["resumed_from_step"] = resumed_from_step_;
  result["steps_this_process"] = step - resumed_from_step_;
  result["wall_s"] = seconds;  // the whole run, past the last evaluation's wall_s
  result["examples_per_s"] = seconds > 0 ? static_cast<double>(step) * t.batch_size / seconds : 0.0;
  result["peak_rss_mb"] = PeakRssMb();
  result["first_step_s"] = first_step_s_;
  result["train_steps_s"] = step_seconds_;
  result["provenance"] = Provenance();
  // Controls (issue 7 section 2): step-0 IIA, the random-units control, the confusion table and
  // failures.jsonl, all on the final network and the same held-out triples.
  if (!step0_eval_.is_null()) {
    result["control_untrained_network"] = json{{"iia_held_out", step0_eval_["iia_held_out"]}, {"iia_changed_held_out", step0_eval_["iia_changed_held_out"]}};
  }
  std::vector<std::string> failures;
  json controls = FinalControls(job_, *net_, labels_, eval_, &failures);
  for (auto& [k, v] : controls.items()) result[k] = v;
  std::string failure_text;
  for (const auto& f : failures) failure_text += f + "\n";
  st = WriteText(out / "failures.jsonl", failure_text);
  if (!st.ok()) return st;
  st = WriteWeights(out / "weights.pt");
  if (!st.ok()) return st;
  st = WriteText(out / "result.json", result.dump(2) + "\n");
  if (!st.ok()) return st;
  if (!options_.logits_dump_path.empty()) {
    st = WriteLogitsDump();
    if (!st.ok()) return st;
  }
  outcome.step = step;
  return outcome;
}

}  // namespace

absl::StatusOr<RunOutcome> Train(const config::ResolvedJob& job, const RunOptions& options) {
  try {
    Run run(job, options);
    return run.Execute();
  } catch (const c10::Error& e) {
    return absl::InternalError(absl::StrCat("LibTorch: ", e.what_without_backtrace()));
  } catch (const std::exception& e) {
    return absl::InternalError(e.what());
  }
}

}  // namespace graft::train
