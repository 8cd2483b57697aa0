// graft-mm-peak: the single-thread throughput of torch::mm for the matmul shapes of one MLP
// layer, the yardstick for graft's achieved GFLOP/s (scripts/bench/width_flops.py).
// Usage: graft-mm-peak BATCH WIDTH [REPEATS]; prints JSON with the median and range.
#include <algorithm>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <vector>

#include <torch/torch.h>

namespace {

// Median seconds of `repeats` timed calls of `fn` after two warm-up calls.
template <typename Fn>
std::vector<double> Time(int repeats, Fn fn) {
  fn();
  fn();
  std::vector<double> t;
  for (int i = 0; i < repeats; ++i) {
    const auto a = std::chrono::steady_clock::now();
    fn();
    t.push_back(std::chrono::duration<double>(std::chrono::steady_clock::now() - a).count());
  }
  std::sort(t.begin(), t.end());
  return t;
}

}  // namespace

int main(int argc, char** argv) {
  if (argc < 3) {
    std::fprintf(stderr, "usage: graft-mm-peak BATCH WIDTH [REPEATS]\n");
    return 2;
  }
  const int64_t b = std::atoll(argv[1]), w = std::atoll(argv[2]);
  const int repeats = argc > 3 ? std::atoi(argv[3]) : 50;
  torch::set_num_threads(1);
  torch::manual_seed(0);
  torch::Tensor x = torch::randn({b, w}), weight = torch::randn({w, w}), gy = torch::randn({b, w});
  torch::Tensor out;
  // The three matmuls of a linear layer in training: forward, grad input, grad weight.
  auto fwd = Time(repeats, [&] { out = torch::mm(x, weight.t()); });
  auto gin = Time(repeats, [&] { out = torch::mm(gy, weight); });
  auto gw = Time(repeats, [&] { out = torch::mm(gy.t(), x); });
  const double flops = 2.0 * static_cast<double>(b) * w * w;
  auto g = [&](const std::vector<double>& t, size_t i) { return flops / t[i] / 1e9; };
  std::printf(
      "{\"batch\": %lld, \"width\": %lld, \"repeats\": %d, \"flops_per_mm\": %.0f,\n"
      " \"forward_gflops\": {\"median\": %.2f, \"min\": %.2f, \"max\": %.2f},\n"
      " \"grad_input_gflops\": {\"median\": %.2f, \"min\": %.2f, \"max\": %.2f},\n"
      " \"grad_weight_gflops\": {\"median\": %.2f, \"min\": %.2f, \"max\": %.2f}}\n",
      static_cast<long long>(b), static_cast<long long>(w), repeats, flops, g(fwd, fwd.size() / 2),
      g(fwd, fwd.size() - 1), g(fwd, 0), g(gin, gin.size() / 2), g(gin, gin.size() - 1), g(gin, 0),
      g(gw, gw.size() / 2), g(gw, gw.size() - 1), g(gw, 0));
  return 0;
}
