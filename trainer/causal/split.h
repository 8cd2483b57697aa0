// How a job's input space is split into training and held-out inputs, and how training inputs
// and evaluation triples are drawn from it. Two kinds, chosen by the size of the space:
// - listed (at most kMaxListedInputSpace inputs): exactly round(held_out x N) inputs are held
//   out by a seeded permutation, and both parts are kept as sorted lists;
// - hashed (larger spaces): no list of inputs is built; an input is held out when a seeded hash
//   of its number falls below held_out, training draws uniformly from the space and skips
//   held-out inputs, and evaluation draws held-out inputs the same way.
// Every consumer (trainer, evaluation, scan, DAS, any network kind) draws through this header,
// so both kinds behave alike. Torch-free. Thread-safety: an InputSplit is an immutable value;
// a TrainingStream or Rng is not shared between threads.
#ifndef GRAFT_TRAINER_CAUSAL_SPLIT_H_
#define GRAFT_TRAINER_CAUSAL_SPLIT_H_

#include <cstdint>
#include <vector>

#include "absl/status/statusor.h"
#include "trainer/causal/model.h"
#include "trainer/causal/rng.h"

namespace graft::causal {

// The largest input space whose split is listed; above it the split is hashed.
inline constexpr int64_t kMaxListedInputSpace = int64_t{1} << 24;
// A hashed split's held_out is 0 or within [kMinHashedHeldOut, 1 - kMinHashedHeldOut]: each
// draw tries input numbers at random until one falls on the wanted side, about 1/held_out
// (held-out draws) or 1/(1 - held_out) (training draws) tries on average.
inline constexpr double kMinHashedHeldOut = 0.001;

// The seeded hash that decides a hashed split, as a fraction in [0, 1): input number `input` is
// held out when HeldOutFraction(key, input) < held_out. It is SplitMix64's output number
// `input` for a generator whose state starts at `key` (Steele, Lea and Flood, "Fast splittable
// pseudorandom number generators", OOPSLA 2014), so consecutive numbers hash independently.
double HeldOutFraction(uint64_t key, int64_t input);
// The hash key of a seed (different seeds give unrelated splits).
uint64_t SplitKey(uint64_t seed);

struct InputSplit {
  bool hashed = false;
  // Listed only (empty when hashed): input numbers, ascending. held_out == 0: both are the whole
  // space.
  std::vector<int64_t> train;
  std::vector<int64_t> test;
  int64_t space = 0;       // the input space's size
  double held_out = 0;     // the configured fraction
  uint64_t key = 0;        // hashed: SplitKey(seed)

  // True when `input` is held out (never trained on). held_out == 0: false for every input.
  // Listed: a binary search in `test`.
  bool IsHeldOut(int64_t input) const;
  // One training input, uniform over the training inputs: listed, train[rng.Uniform(|train|)];
  // hashed, uniform input numbers until one is not held out.
  int64_t DrawTraining(Rng& rng) const;
  // One held-out input, uniform over the held-out inputs (over the whole space when held_out is
  // 0): listed, test[rng.Uniform(|test|)]; hashed, uniform input numbers until one is held out.
  int64_t DrawHeldOut(Rng& rng) const;
  // Held-out and training inputs: exact when listed; expected (held_out x space) when hashed.
  double HeldOutCount() const;
  double TrainingCount() const;
};

// Splits the model's input space with `held_out` and `seed`: listed when the space has at most
// kMaxListedInputSpace inputs, hashed otherwise. Listed: holds out exactly round(held_out * N)
// inputs chosen by a permutation seeded from `seed`, and fails (naming the input and value) when
// some value of some input would never be seen in training, or when training would be empty.
// Hashed: fails when held_out is outside 0 or [kMinHashedHeldOut, 1 - kMinHashedHeldOut], or when
// some input's values are shared by so few inputs that the hash could hold all of them out with
// probability above 1e-12 (naming the input and the largest held_out that is safe).
absl::StatusOr<InputSplit> SplitInputs(const CausalModel& model, double held_out, uint64_t seed);

// An evaluation triple: base input number, source input number, intervention set index.
struct Triple {
  int64_t base = 0;
  int64_t source = 0;
  int set = 0;
};

// Number of distinct triples over `inputs` with `num_sets` sets: |inputs|^2 * num_sets.
uint64_t DistinctTriples(size_t num_inputs, size_t num_sets);
// The same over a split's held-out inputs; for a hashed split from the expected count, and
// saturating at UINT64_MAX.
uint64_t DistinctTriples(const InputSplit& split, size_t num_sets);

// The evaluation triples: all distinct ones when there are at most `count`, else `count`
// drawn uniformly (with replacement) by a generator seeded from `seed`.
std::vector<Triple> MakeTriples(const std::vector<int64_t>& inputs, int num_sets, int64_t count,
                                uint64_t seed);
// The held-out triples of a split: listed, MakeTriples(split.test, ...); hashed, `count` triples
// whose base and source are DrawHeldOut and set uniform, from the same seeded generator.
std::vector<Triple> MakeTriples(const InputSplit& split, int num_sets, int64_t count, uint64_t seed);

// Up to `count` inputs of one side of the split (training, or held out), sorted, by a generator
// seeded from (seed, stream). Listed: the whole side when it has at most `count` inputs, else the
// first `count` of a seeded shuffle (without replacement). Hashed: `count` draws (with
// replacement) through DrawTraining or DrawHeldOut.
std::vector<int64_t> SampleInputs(const InputSplit& split, bool held_out_side, int64_t count, uint64_t seed,
                                  uint64_t stream);

// The training inputs of a run, in the order they are used. Listed: epochs over the training
// inputs, each in a freshly shuffled order. Hashed: uniform draws from the space that skip
// held-out inputs. Seeded from `seed`; a checkpoint keeps order(), pos() and rng()'s state.
// Holds a reference to `split`, which must outlive it.
class TrainingStream {
 public:
  TrainingStream(const InputSplit& split, uint64_t seed);
  // The next `n` training inputs.
  std::vector<int64_t> Next(int n);
  Rng& rng() { return rng_; }
  const std::vector<int64_t>& order() const { return order_; }  // empty when hashed
  size_t pos() const { return pos_; }
  void Restore(std::vector<int64_t> order, size_t pos);

 private:
  const InputSplit& split_;
  std::vector<int64_t> order_;
  size_t pos_ = 0;
  Rng rng_;
};

}  // namespace graft::causal

#endif  // GRAFT_TRAINER_CAUSAL_SPLIT_H_
