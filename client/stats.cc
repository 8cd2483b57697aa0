#include "client/stats.h"

#include <cmath>
#include <limits>

namespace graft::client {
namespace {

// The continued fraction of I_x(a, b) (without the prefactor), modified Lentz method.
double BetaContinuedFraction(double a, double b, double x) {
  constexpr double kTiny = 1e-300;
  constexpr double kEps = 1e-16;
  const double qab = a + b, qap = a + 1, qam = a - 1;
  double c = 1, d = 1 - qab * x / qap;
  if (std::fabs(d) < kTiny) d = kTiny;
  d = 1 / d;
  double h = d;
  for (int m = 1; m <= 10000; ++m) {
    const int m2 = 2 * m;
    double aa = m * (b - m) * x / ((qam + m2) * (a + m2));
    d = 1 + aa * d;
    if (std::fabs(d) < kTiny) d = kTiny;
    c = 1 + aa / c;
    if (std::fabs(c) < kTiny) c = kTiny;
    d = 1 / d;
    h *= d * c;
    aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
    d = 1 + aa * d;
    if (std::fabs(d) < kTiny) d = kTiny;
    c = 1 + aa / c;
    if (std::fabs(c) < kTiny) c = kTiny;
    d = 1 / d;
    const double del = d * c;
    h *= del;
    if (std::fabs(del - 1) < kEps) break;
  }
  return h;
}

}  // namespace

double RegularizedIncompleteBeta(double a, double b, double x) {
  if (x <= 0) return 0;
  if (x >= 1) return 1;
  const double log_front = std::lgamma(a + b) - std::lgamma(a) - std::lgamma(b) + a * std::log(x) + b * std::log1p(-x);
  const double front = std::exp(log_front);
  if (x < (a + 1) / (a + b + 2)) return front * BetaContinuedFraction(a, b, x) / a;
  return 1 - front * BetaContinuedFraction(b, a, 1 - x) / b;
}

double StudentTCdf(double t, double df) {
  // P(|T| > |t|) = I_{df / (df + t^2)}(df / 2, 1 / 2).
  const double tail = 0.5 * RegularizedIncompleteBeta(df / 2, 0.5, df / (df + t * t));
  return t >= 0 ? 1 - tail : tail;
}

double StudentTQuantile(double p, double df) {
  if (p == 0.5) return 0;
  if (p < 0.5) return -StudentTQuantile(1 - p, df);
  // Bracket: the CDF is increasing; grow the upper end until it passes p.
  double lo = 0, hi = 1;
  while (StudentTCdf(hi, df) < p && hi < 1e300) {
    lo = hi;
    hi *= 2;
  }
  for (int i = 0; i < 2000; ++i) {
    const double mid = lo + (hi - lo) / 2;
    if (mid <= lo || mid >= hi) break;
    if (StudentTCdf(mid, df) < p) {
      lo = mid;
    } else {
      hi = mid;
    }
  }
  return lo + (hi - lo) / 2;
}

MeanInterval MeanWithInterval(const std::vector<double>& values, double level) {
  MeanInterval m;
  m.n = static_cast<int>(values.size());
  if (m.n == 0) return m;
  double sum = 0;
  for (double v : values) sum += v;
  m.mean = sum / m.n;
  m.lo = m.hi = m.mean;
  if (m.n < 2) return m;
  double ss = 0;
  for (double v : values) ss += (v - m.mean) * (v - m.mean);
  m.sd = std::sqrt(ss / (m.n - 1));
  const double t = StudentTQuantile((1 + level) / 2, m.n - 1);
  const double half = t * m.sd / std::sqrt(static_cast<double>(m.n));
  m.has_interval = true;
  m.lo = m.mean - half;
  m.hi = m.mean + half;
  return m;
}

}  // namespace graft::client
