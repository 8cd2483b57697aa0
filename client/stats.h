// Small statistics for `graft compare`: Student's t distribution (its CDF through the
// regularized incomplete beta function, its quantile by bisection) and the mean of a few
// values with a t interval. Thread-safety: pure functions.
#ifndef GRAFT_CLIENT_STATS_H_
#define GRAFT_CLIENT_STATS_H_

#include <vector>

namespace graft::client {

// The regularized incomplete beta function I_x(a, b), by the continued fraction evaluated with
// the modified Lentz method (as in Press et al., Numerical Recipes, "betacf"), using the
// symmetry I_x(a, b) = 1 - I_{1-x}(b, a) where the fraction converges slowly.
// REQUIRES: a > 0, b > 0, 0 <= x <= 1.
double RegularizedIncompleteBeta(double a, double b, double x);

// P(T <= t) for Student's t with `df` degrees of freedom (df > 0, need not be whole).
double StudentTCdf(double t, double df);

// The p-quantile of Student's t with `df` degrees of freedom: the t with StudentTCdf(t) = p,
// found by bisection to within a few ulps. REQUIRES: 0 < p < 1, df > 0.
double StudentTQuantile(double p, double df);

// The mean of `values` with a two-sided `level` interval mean +- t_{(1+level)/2, n-1} * sd / sqrt(n),
// sd the sample standard deviation (n - 1 in the denominator). With fewer than two values
// there is no interval (has_interval false, lo = hi = mean, sd = 0).
struct MeanInterval {
  int n = 0;
  double mean = 0;
  double sd = 0;
  bool has_interval = false;
  double lo = 0;
  double hi = 0;
};
MeanInterval MeanWithInterval(const std::vector<double>& values, double level = 0.95);

}  // namespace graft::client

#endif  // GRAFT_CLIENT_STATS_H_
