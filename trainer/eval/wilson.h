// Accuracies with 95% Wilson score intervals (Wilson, JASA 1927). Pure functions.
#ifndef GRAFT_TRAINER_EVAL_WILSON_H_
#define GRAFT_TRAINER_EVAL_WILSON_H_

#include <cstdint>

namespace graft::eval {

// The two-sided 95% normal quantile, z = Phi^-1(0.975).
inline constexpr double kZ95 = 1.9599639845400545;

struct Accuracy {
  int64_t correct = 0;
  int64_t n = 0;
  double value = 0.0;  // correct / n (0 when n == 0)
  double lo = 0.0;     // Wilson lower bound (0 when n == 0)
  double hi = 1.0;     // Wilson upper bound (1 when n == 0)
};

// The Wilson score interval for `correct` successes out of `n`, at normal quantile `z`.
// REQUIRES: 0 <= correct <= n.
Accuracy WilsonAccuracy(int64_t correct, int64_t n, double z = kZ95);

}  // namespace graft::eval

#endif  // GRAFT_TRAINER_EVAL_WILSON_H_
