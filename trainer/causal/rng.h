// A small, fast, seedable random number generator (xoshiro256**, seeded by splitmix64) whose
// output is the same on every platform and library version, so a job's seed fixes its data
// order, splits and sampled triples. Thread-safety: an Rng is a value; do not share one
// between threads without a lock.
#ifndef GRAFT_TRAINER_CAUSAL_RNG_H_
#define GRAFT_TRAINER_CAUSAL_RNG_H_

#include <array>
#include <cstddef>
#include <cstdint>
#include <utility>
#include <vector>

namespace graft::causal {

class Rng {
 public:
  // A generator for (seed, stream): different streams of one seed are independent.
  explicit Rng(uint64_t seed, uint64_t stream = 0);

  uint64_t Next();
  // Uniform in [0, n). REQUIRES: n > 0. Unbiased (Lemire's multiply-and-reject).
  uint64_t Uniform(uint64_t n);
  // Uniform in [0, 1) with 53 random bits.
  double UniformDouble();
  // Fisher-Yates shuffle of `v` in place.
  template <typename T>
  void Shuffle(std::vector<T>& v) {
    for (size_t i = v.size(); i > 1; --i) {
      size_t j = static_cast<size_t>(Uniform(i));
      std::swap(v[i - 1], v[j]);
    }
  }

  // The whole state, for checkpoints; SetState(State()) resumes the exact stream.
  std::array<uint64_t, 4> State() const { return s_; }
  void SetState(const std::array<uint64_t, 4>& s) { s_ = s; }

 private:
  std::array<uint64_t, 4> s_;
};

}  // namespace graft::causal

#endif  // GRAFT_TRAINER_CAUSAL_RNG_H_
