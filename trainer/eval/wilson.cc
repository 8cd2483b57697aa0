#include "trainer/eval/wilson.h"

#include <algorithm>
#include <cmath>

namespace graft::eval {

Accuracy WilsonAccuracy(int64_t correct, int64_t n, double z) {
  Accuracy a;
  a.correct = correct;
  a.n = n;
  if (n <= 0) return a;
  const double nn = static_cast<double>(n);
  const double p = static_cast<double>(correct) / nn;
  const double z2 = z * z;
  const double denom = 1.0 + z2 / nn;
  const double center = (p + z2 / (2.0 * nn)) / denom;
  const double half = z * std::sqrt(p * (1.0 - p) / nn + z2 / (4.0 * nn * nn)) / denom;
  a.value = p;
  a.lo = std::max(0.0, center - half);
  a.hi = std::min(1.0, center + half);
  return a;
}

}  // namespace graft::eval
