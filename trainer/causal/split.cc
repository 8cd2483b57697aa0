#include "trainer/causal/split.h"

#include <algorithm>
#include <cmath>
#include <limits>

#include "absl/status/status.h"
#include "absl/strings/str_cat.h"

namespace graft::causal {
namespace {

// SplitMix64's output function (Steele, Lea and Flood 2014; the constants of its reference code).
uint64_t Mix(uint64_t z) {
  z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
  z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
  return z ^ (z >> 31);
}

constexpr uint64_t kGolden = 0x9E3779B97F4A7C15ull;

// A probability below which a hashed split's "some value never trained on" is accepted.
constexpr double kMissedValueProbability = 1e-12;

absl::StatusOr<InputSplit> ListedSplit(const CausalModel& model, double held_out, uint64_t seed) {
  const int64_t n = model.input_space_size();
  InputSplit split;
  split.space = n;
  split.held_out = held_out;
  if (held_out <= 0.0) {
    split.train.resize(n);
    for (int64_t i = 0; i < n; ++i) split.train[i] = i;
    split.test = split.train;
    return split;
  }
  const int64_t k = static_cast<int64_t>(std::llround(held_out * static_cast<double>(n)));
  if (k >= n) {
    return absl::InvalidArgumentError(absl::StrCat(
        "held_out ", held_out, " holds out all ", n, " inputs; nothing is left to train on"));
  }
  std::vector<int64_t> perm(n);
  for (int64_t i = 0; i < n; ++i) perm[i] = i;
  Rng rng(seed, /*stream=*/0x5E11);
  rng.Shuffle(perm);
  split.test.assign(perm.begin(), perm.begin() + k);
  perm.erase(perm.begin(), perm.begin() + k);
  split.train = std::move(perm);
  std::sort(split.test.begin(), split.test.end());
  std::sort(split.train.begin(), split.train.end());
  // Every value of every input must be seen in training.
  const auto& inputs = model.inputs();
  std::vector<std::vector<bool>> seen(inputs.size());
  for (size_t q = 0; q < inputs.size(); ++q) seen[q].assign(model.variable(inputs[q]).domain.size(), false);
  std::vector<int32_t> vals(inputs.size());
  for (int64_t x : split.train) {
    model.DecodeInput(x, vals.data());
    for (size_t q = 0; q < inputs.size(); ++q) seen[q][vals[q]] = true;
  }
  for (size_t q = 0; q < inputs.size(); ++q) {
    for (size_t j = 0; j < seen[q].size(); ++j) {
      if (!seen[q][j]) {
        return absl::InvalidArgumentError(absl::StrCat(
            "held_out ", held_out, " removes every training input with ", model.variable(inputs[q]).name,
            " = ", model.ValueName(inputs[q], static_cast<int>(j)),
            "; the network could not learn that value: lower held_out"));
      }
    }
  }
  return split;
}

absl::StatusOr<InputSplit> HashedSplit(const CausalModel& model, double held_out, uint64_t seed) {
  const int64_t n = model.input_space_size();
  InputSplit split;
  split.hashed = true;
  split.space = n;
  split.held_out = held_out;
  split.key = SplitKey(seed);
  if (held_out <= 0.0) return split;
  if (held_out < kMinHashedHeldOut || held_out > 1.0 - kMinHashedHeldOut) {
    return absl::InvalidArgumentError(absl::StrCat(
        "held_out ", held_out, ": the input space has ", n, " inputs, more than ", kMaxListedInputSpace,
        ", so its split is hashed, and a hashed split needs held_out 0 or within [", kMinHashedHeldOut, ", ",
        1.0 - kMinHashedHeldOut, "] (each draw tries input numbers at random until one falls on the wanted side)"));
  }
  // No list, so no exact check that every value is trained on: refuse when the hash could hold
  // out every input with some value with a probability that is not negligible.
  for (int i : model.inputs()) {
    const int64_t values = model.variable(i).domain.size();
    const double sharing = static_cast<double>(n / values);  // inputs that share each value
    if (sharing * std::log(held_out) > std::log(kMissedValueProbability)) {
      const double safe = std::exp(std::log(kMissedValueProbability) / sharing);
      return absl::InvalidArgumentError(absl::StrCat(
          "held_out ", held_out, ": each value of ", model.variable(i).name, " is shared by only ", n / values,
          " inputs, and the hashed split would hold out all of them (so the network never learns that value) with "
          "probability ", std::pow(held_out, sharing), "; lower held_out below ", safe, " or give ",
          model.variable(i).name, " fewer values"));
    }
  }
  return split;
}

}  // namespace

uint64_t SplitKey(uint64_t seed) { return Mix(seed ^ 0x5E115E115E115E11ull); }

double HeldOutFraction(uint64_t key, int64_t input) {
  const uint64_t h = Mix(key + (static_cast<uint64_t>(input) + 1) * kGolden);
  return static_cast<double>(h >> 11) * 0x1.0p-53;
}

bool InputSplit::IsHeldOut(int64_t input) const {
  if (held_out <= 0.0) return false;
  if (hashed) return HeldOutFraction(key, input) < held_out;
  return std::binary_search(test.begin(), test.end(), input);
}

int64_t InputSplit::DrawTraining(Rng& rng) const {
  if (!hashed) return train[rng.Uniform(train.size())];
  while (true) {
    const int64_t x = static_cast<int64_t>(rng.Uniform(static_cast<uint64_t>(space)));
    if (!IsHeldOut(x)) return x;
  }
}

int64_t InputSplit::DrawHeldOut(Rng& rng) const {
  if (!hashed) return test[rng.Uniform(test.size())];
  while (true) {
    const int64_t x = static_cast<int64_t>(rng.Uniform(static_cast<uint64_t>(space)));
    if (held_out <= 0.0 || IsHeldOut(x)) return x;
  }
}

double InputSplit::HeldOutCount() const {
  if (!hashed) return static_cast<double>(test.size());
  return held_out <= 0.0 ? static_cast<double>(space) : held_out * static_cast<double>(space);
}

double InputSplit::TrainingCount() const {
  if (!hashed) return static_cast<double>(train.size());
  return (1.0 - std::max(held_out, 0.0)) * static_cast<double>(space);
}

absl::StatusOr<InputSplit> SplitInputs(const CausalModel& model, double held_out, uint64_t seed) {
  if (model.input_space_size() <= kMaxListedInputSpace) return ListedSplit(model, held_out, seed);
  return HashedSplit(model, held_out, seed);
}

uint64_t DistinctTriples(size_t num_inputs, size_t num_sets) {
  return static_cast<uint64_t>(num_inputs) * num_inputs * num_sets;
}

uint64_t DistinctTriples(const InputSplit& split, size_t num_sets) {
  if (!split.hashed) return DistinctTriples(split.test.size(), num_sets);
  const long double held = split.HeldOutCount();
  const long double d = held * held * static_cast<long double>(num_sets);
  if (d >= static_cast<long double>(std::numeric_limits<uint64_t>::max())) return std::numeric_limits<uint64_t>::max();
  return static_cast<uint64_t>(d);
}

std::vector<Triple> MakeTriples(const std::vector<int64_t>& inputs, int num_sets, int64_t count,
                                uint64_t seed) {
  std::vector<Triple> out;
  if (inputs.empty() || num_sets <= 0 || count <= 0) return out;
  const uint64_t distinct = DistinctTriples(inputs.size(), num_sets);
  if (distinct <= static_cast<uint64_t>(count)) {
    out.reserve(distinct);
    for (int s = 0; s < num_sets; ++s) {
      for (int64_t b : inputs) {
        for (int64_t src : inputs) out.push_back(Triple{b, src, s});
      }
    }
    return out;
  }
  Rng rng(seed, /*stream=*/0x7819);
  out.reserve(count);
  for (int64_t i = 0; i < count; ++i) {
    Triple t;
    t.base = inputs[rng.Uniform(inputs.size())];
    t.source = inputs[rng.Uniform(inputs.size())];
    t.set = static_cast<int>(rng.Uniform(num_sets));
    out.push_back(t);
  }
  return out;
}

std::vector<Triple> MakeTriples(const InputSplit& split, int num_sets, int64_t count, uint64_t seed) {
  if (!split.hashed) return MakeTriples(split.test, num_sets, count, seed);
  std::vector<Triple> out;
  if (num_sets <= 0 || count <= 0) return out;
  Rng rng(seed, /*stream=*/0x7819);
  out.reserve(count);
  for (int64_t i = 0; i < count; ++i) {
    Triple t;
    t.base = split.DrawHeldOut(rng);
    t.source = split.DrawHeldOut(rng);
    t.set = static_cast<int>(rng.Uniform(num_sets));
    out.push_back(t);
  }
  return out;
}

std::vector<int64_t> SampleInputs(const InputSplit& split, bool held_out_side, int64_t count, uint64_t seed,
                                  uint64_t stream) {
  if (!split.hashed) {
    const std::vector<int64_t>& side = held_out_side ? split.test : split.train;
    if (static_cast<int64_t>(side.size()) <= count) return side;
    std::vector<int64_t> copy = side;
    Rng r(seed, stream);
    r.Shuffle(copy);
    copy.resize(count);
    std::sort(copy.begin(), copy.end());
    return copy;
  }
  std::vector<int64_t> out;
  out.reserve(std::max<int64_t>(count, 0));
  Rng r(seed, stream);
  for (int64_t i = 0; i < count; ++i) out.push_back(held_out_side ? split.DrawHeldOut(r) : split.DrawTraining(r));
  std::sort(out.begin(), out.end());
  return out;
}

TrainingStream::TrainingStream(const InputSplit& split, uint64_t seed) : split_(split), rng_(seed, 0xDA7A) {
  if (!split_.hashed) {
    order_ = split_.train;
    rng_.Shuffle(order_);
  }
}

std::vector<int64_t> TrainingStream::Next(int n) {
  std::vector<int64_t> out;
  out.reserve(n);
  if (split_.hashed) {
    for (int i = 0; i < n; ++i) out.push_back(split_.DrawTraining(rng_));
    return out;
  }
  while (static_cast<int>(out.size()) < n) {
    if (pos_ == order_.size()) {
      rng_.Shuffle(order_);
      pos_ = 0;
    }
    out.push_back(order_[pos_++]);
  }
  return out;
}

void TrainingStream::Restore(std::vector<int64_t> order, size_t pos) {
  order_ = std::move(order);
  pos_ = pos;
}

}  // namespace graft::causal
