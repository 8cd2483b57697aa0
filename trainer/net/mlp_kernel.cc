#include "trainer/net/mlp_kernel.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <utility>

// OpenBLAS's CBLAS entry point (the standard CBLAS signature; the enums are ints). Declared here
// so the build needs no BLAS development headers: graft_net links libopenblas.so.0 itself.
extern "C" void cblas_sgemm(int order, int trans_a, int trans_b, int m, int n, int k, float alpha, const float* a,
                            int lda, const float* b, int ldb, float beta, float* c, int ldc);

namespace graft::net {
namespace {

constexpr int kRowMajor = 101, kNoTrans = 111, kTrans = 112;

// C [m, n] = A [m, k] * B^T where B is [n, k] (a linear layer's x W^T).
void GemmNT(int m, int n, int k, const float* a, const float* b, float beta, float* c) {
  cblas_sgemm(kRowMajor, kNoTrans, kTrans, m, n, k, 1.0f, a, k, b, k, beta, c, n);
}
// C [m, n] = A^T * B where A is [k, m] and B is [k, n] (a weight's gradient dZ^T X).
void GemmTN(int m, int n, int k, const float* a, const float* b, float beta, float* c) {
  cblas_sgemm(kRowMajor, kTrans, kNoTrans, m, n, k, 1.0f, a, m, b, n, beta, c, n);
}
// C [m, n] = A [m, k] * B [k, n] (the input's gradient dZ W).
void GemmNN(int m, int n, int k, const float* a, const float* b, float beta, float* c) {
  cblas_sgemm(kRowMajor, kNoTrans, kNoTrans, m, n, k, 1.0f, a, k, b, n, beta, c, n);
}

void Fit(std::vector<float>& v, int64_t n) {
  if (static_cast<int64_t>(v.size()) < n) v.resize(n);
}

const float kInvSqrt2 = 0.70710678118654752440f;
const float kInvSqrt2Pi = 0.39894228040143267794f;

// The element loops, on restrict pointers so the compiler vectorises them.
void BiasRelu(float* __restrict y, const float* __restrict bias, int n) {
  for (int j = 0; j < n; ++j) {
    const float v = y[j] + bias[j];
    y[j] = v > 0.0f ? v : 0.0f;
  }
}
void BiasTanh(float* __restrict y, const float* __restrict bias, int n) {
  for (int j = 0; j < n; ++j) y[j] = std::tanh(y[j] + bias[j]);
}
void BiasGelu(float* __restrict z, float* __restrict y, const float* __restrict bias, int n) {
  for (int j = 0; j < n; ++j) {
    const float v = z[j] + bias[j];
    z[j] = v;
    y[j] = 0.5f * v * (1.0f + std::erf(v * kInvSqrt2));
  }
}
void ReluBackward(float* __restrict d, const float* __restrict a, int64_t n) {
  for (int64_t i = 0; i < n; ++i) d[i] = a[i] > 0.0f ? d[i] : 0.0f;
}
void TanhBackward(float* __restrict d, const float* __restrict a, int64_t n) {
  for (int64_t i = 0; i < n; ++i) d[i] *= 1.0f - a[i] * a[i];
}
void GeluBackward(float* __restrict d, const float* __restrict z, int64_t n) {
  for (int64_t i = 0; i < n; ++i) {
    const float v = z[i];
    const float cdf = 0.5f * (1.0f + std::erf(v * kInvSqrt2));
    const float pdf = kInvSqrt2Pi * std::exp(-0.5f * v * v);
    d[i] *= cdf + v * pdf;
  }
}
void AddRows(float* __restrict to, const float* __restrict a, const float* __restrict b, int n) {
  for (int j = 0; j < n; ++j) to[j] = a[j] + b[j];
}
void AddInPlace(float* __restrict to, const float* __restrict a, int n) {
  for (int j = 0; j < n; ++j) to[j] += a[j];
}
void AddTo(double* __restrict sum, const float* __restrict row, int n) {
  for (int j = 0; j < n; ++j) sum[j] += row[j];
}

// db (+)= column sums of d [rows, n], summed in double.
void ColumnSums(const float* d, int rows, int n, bool accumulate, float* db) {
  std::vector<double> sum(n, 0.0);
  for (int r = 0; r < rows; ++r) AddTo(sum.data(), d + static_cast<int64_t>(r) * n, n);
  for (int j = 0; j < n; ++j) db[j] = accumulate ? db[j] + static_cast<float>(sum[j]) : static_cast<float>(sum[j]);
}

}  // namespace

MlpKernel::MlpKernel(KernelShape shape, std::vector<std::vector<std::vector<int>>> units)
    : shape_(std::move(shape)), units_(std::move(units)) {
  layers_ = static_cast<int>(shape_.hidden.size());
  for (int rows : shape_.input_rows) {
    first_row_.push_back(static_cast<int>(embedding_rows_));
    embedding_rows_ += rows;
  }
  for (auto& per_set : units_) {
    per_set.resize(layers_);
    for (int k = 0; k < layers_; ++k) {
      if (per_set[k].empty()) continue;
      if (lo_ < 0 || k < lo_) lo_ = k;
      hi_ = std::max(hi_, k);
    }
  }
  a_.resize(layers_);
  z_.resize(layers_);
  as_.resize(layers_);
  zs_.resize(layers_);
  d_.resize(layers_);
  ds_.resize(layers_);
}

// z = x W_k^T + b_k, a = act(z); z is kept only for gelu (relu and tanh differentiate from a).
void MlpKernel::Dense(int k, const float* x, int rows, const KernelParams& p, float* z, float* a) const {
  const int in = k == 0 ? shape_.num_inputs * shape_.embedding_dim : shape_.hidden[k - 1];
  const int out = shape_.hidden[k];
  const bool gelu = shape_.activation == KernelActivation::kGelu;
  GemmNT(rows, out, in, x, p.weight[k], 0.0f, gelu ? z : a);
  Activate(k, rows, p, z, a);
}

void MlpKernel::Activate(int k, int rows, const KernelParams& p, float* z, float* a) const {
  const int out = shape_.hidden[k];
  const float* bias = p.bias[k];
  for (int r = 0; r < rows; ++r) {
    const int64_t at = static_cast<int64_t>(r) * out;
    switch (shape_.activation) {
      case KernelActivation::kRelu: BiasRelu(a + at, bias, out); break;
      case KernelActivation::kTanh: BiasTanh(a + at, bias, out); break;
      case KernelActivation::kGelu: BiasGelu(z + at, a + at, bias, out); break;
    }
  }
}

void MlpKernel::ActivationBackward(float* d, const float* a, const float* z, int64_t n) const {
  switch (shape_.activation) {
    case KernelActivation::kRelu: ReluBackward(d, a, n); break;
    case KernelActivation::kTanh: TanhBackward(d, a, n); break;
    case KernelActivation::kGelu: GeluBackward(d, z, n); break;
  }
}

// From d = dLoss/d(pre-activation) of layer k [rows, out] and its input x [rows, in]: the weight
// and bias gradients (written, or added when `accumulate`) and, when dx is not null, the input's
// gradient (written, or added when `accumulate_dx`).
void MlpKernel::LayerBackward(int k, float* d, const float* x, int rows, const KernelParams& p, const KernelParams& g,
                              bool accumulate, float* dx, bool accumulate_dx) const {
  const int in = k == 0 ? shape_.num_inputs * shape_.embedding_dim : shape_.hidden[k - 1];
  const int out = shape_.hidden[k];
  GemmTN(out, in, rows, d, x, accumulate ? 1.0f : 0.0f, g.weight[k]);
  ColumnSums(d, rows, out, accumulate, g.bias[k]);
  if (dx != nullptr) GemmNN(rows, in, out, d, p.weight[k], accumulate_dx ? 1.0f : 0.0f, dx);
}

MlpKernel::Losses MlpKernel::Forward(const KernelParams& p, const KernelBatch& b) {
  const int B = b.batch;
  const int I = shape_.num_inputs, dim = shape_.embedding_dim, D0 = I * dim, C = shape_.num_classes;
  batch_ = B;
  interchange_ = b.sets != nullptr && lo_ >= 0;
  independent_ = interchange_ && b.source_perm == nullptr;
  // The bottom block: layers 0..bottom_top on `bottom_rows` rows.
  const int bottom_top = interchange_ ? lo_ : layers_ - 1;
  const int bottom_rows = independent_ ? 2 * B : B;

  const bool gelu = shape_.activation == KernelActivation::kGelu;
  auto example_rows = [&](int r) {
    return r < B ? b.rows + static_cast<int64_t>(r) * I : b.source_rows + static_cast<int64_t>(r - B) * I;
  };
  const float* x = nullptr;
  if (Projects(bottom_rows)) {
    const int out = shape_.hidden[0];
    Fit(projected_, embedding_rows_ * out);
    for (int j = 0; j < I; ++j) {
      cblas_sgemm(kRowMajor, kNoTrans, kTrans, shape_.input_rows[j], out, dim, 1.0f,
                  p.embed + static_cast<int64_t>(first_row_[j]) * dim, dim, p.weight[0] + j * dim, D0, 0.0f,
                  projected_.data() + static_cast<int64_t>(first_row_[j]) * out, out);
    }
    const int64_t n = static_cast<int64_t>(bottom_rows) * out;
    Fit(a_[0], n);
    if (gelu) Fit(z_[0], n);
    float* target = gelu ? z_[0].data() : a_[0].data();
    for (int r = 0; r < bottom_rows; ++r) {
      const int64_t* rows = example_rows(r);
      float* t = target + static_cast<int64_t>(r) * out;
      const float* first = projected_.data() + rows[0] * out;
      if (I == 1) {
        std::memcpy(t, first, sizeof(float) * out);
      } else {
        AddRows(t, first, projected_.data() + rows[1] * out, out);
      }
      for (int j = 2; j < I; ++j) AddInPlace(t, projected_.data() + rows[j] * out, out);
    }
    Activate(0, bottom_rows, p, z_[0].data(), a_[0].data());
  } else {
    Fit(x0_, static_cast<int64_t>(bottom_rows) * D0);
    for (int r = 0; r < bottom_rows; ++r) {
      const int64_t* rows = example_rows(r);
      float* e = x0_.data() + static_cast<int64_t>(r) * D0;
      for (int j = 0; j < I; ++j) std::memcpy(e + j * dim, p.embed + rows[j] * dim, sizeof(float) * dim);
    }
    const int64_t n = static_cast<int64_t>(bottom_rows) * shape_.hidden[0];
    Fit(a_[0], n);
    if (gelu) Fit(z_[0], n);
    Dense(0, x0_.data(), bottom_rows, p, z_[0].data(), a_[0].data());
  }
  x = a_[0].data();
  for (int k = 1; k <= bottom_top; ++k) {
    const int64_t n = static_cast<int64_t>(bottom_rows) * shape_.hidden[k];
    Fit(a_[k], n);
    if (gelu) Fit(z_[k], n);
    Dense(k, x, bottom_rows, p, z_[k].data(), a_[k].data());
    x = a_[k].data();
  }
  const float* head_in = x;
  int head_rows = B;
  if (interchange_) {
    const int w = shape_.hidden[lo_];
    // Layer lo: base rows as computed, intervened rows the base with the set's units overwritten
    // by the source's (in-batch: base perm[i]; independent: the stacked source row i).
    Fit(stacked_, static_cast<int64_t>(2) * B * w);
    const float* base = a_[lo_].data();
    std::memcpy(stacked_.data(), base, sizeof(float) * B * w);
    std::memcpy(stacked_.data() + static_cast<int64_t>(B) * w, base, sizeof(float) * B * w);
    for (int i = 0; i < B; ++i) {
      const float* src = independent_ ? base + static_cast<int64_t>(B + i) * w : base + b.source_perm[i] * w;
      float* row = stacked_.data() + static_cast<int64_t>(B + i) * w;
      for (int u : units_[b.sets[i]][lo_]) row[u] = src[u];
    }
    // Independent sources above lo: their own rows, as far as the highest site.
    if (independent_) {
      const float* sx = base + static_cast<int64_t>(B) * w;
      for (int k = lo_ + 1; k <= hi_; ++k) {
        const int64_t n = static_cast<int64_t>(B) * shape_.hidden[k];
        Fit(as_[k], n);
        if (gelu) Fit(zs_[k], n);
        Dense(k, sx, B, p, zs_[k].data(), as_[k].data());
        sx = as_[k].data();
      }
    }
    const float* tx = stacked_.data();
    for (int k = lo_ + 1; k < layers_; ++k) {
      const int wk = shape_.hidden[k];
      const int64_t n = static_cast<int64_t>(2) * B * wk;
      Fit(a_[k], n);
      if (gelu) Fit(z_[k], n);
      Dense(k, tx, 2 * B, p, z_[k].data(), a_[k].data());
      float* act = a_[k].data();
      for (int i = 0; i < B; ++i) {
        const auto& units = units_[b.sets[i]][k];
        if (units.empty()) continue;
        const float* src = independent_ ? as_[k].data() + static_cast<int64_t>(i) * wk : act + b.source_perm[i] * wk;
        float* row = act + static_cast<int64_t>(B + i) * wk;
        for (int u : units) row[u] = src[u];
      }
      tx = act;
    }
    head_in = tx;
    head_rows = 2 * B;
  }

  // Head and losses; dlogits_ receives each row's weighted softmax - one-hot.
  const int wl = shape_.hidden[layers_ - 1];
  Fit(logits_, static_cast<int64_t>(head_rows) * C);
  Fit(dlogits_, static_cast<int64_t>(head_rows) * C);
  GemmNT(head_rows, C, wl, head_in, p.out_weight, 0.0f, logits_.data());
  Losses losses;
  double sums[2] = {0.0, 0.0};
  for (int r = 0; r < head_rows; ++r) {
    float* l = logits_.data() + static_cast<int64_t>(r) * C;
    float* g = dlogits_.data() + static_cast<int64_t>(r) * C;
    for (int c = 0; c < C; ++c) l[c] += p.out_bias[c];
    float m = l[0];
    for (int c = 1; c < C; ++c) m = std::max(m, l[c]);
    double total = 0.0;
    for (int c = 0; c < C; ++c) {
      g[c] = std::exp(l[c] - m);
      total += g[c];
    }
    const bool intervened = r >= B;
    const int64_t y = intervened ? b.counterfactual[r - B] : b.labels[r];
    sums[intervened] += std::log(total) + m - l[y];
    const float scale = static_cast<float>((intervened ? b.interchange_weight : b.task_weight) / B);
    const float inv = static_cast<float>(1.0 / total);
    for (int c = 0; c < C; ++c) g[c] = g[c] * inv * scale;
    g[y] -= scale;
  }
  losses.task = sums[0] / B;
  losses.interchange = interchange_ ? sums[1] / B : 0.0;
  return losses;
}

void MlpKernel::Backward(const KernelParams& p, const KernelBatch& b, const KernelParams& g) {
  const int B = batch_;
  const int I = shape_.num_inputs, dim = shape_.embedding_dim, D0 = I * dim, C = shape_.num_classes;
  const bool grad_sources = interchange_ && b.source_gradients;
  const int bottom_top = interchange_ ? lo_ : layers_ - 1;
  const int head_rows = interchange_ ? 2 * B : B;
  const int wl = shape_.hidden[layers_ - 1];
  const int L = layers_;

  // Head.
  const float* head_in = !interchange_ ? a_[L - 1].data() : (L - 1 > lo_ ? a_[L - 1].data() : stacked_.data());
  GemmTN(C, wl, head_rows, dlogits_.data(), head_in, 0.0f, g.out_weight);
  ColumnSums(dlogits_.data(), head_rows, C, false, g.out_bias);
  float* dhead;
  if (interchange_ && L - 1 == lo_) {
    Fit(dstacked_, static_cast<int64_t>(2) * B * wl);
    dhead = dstacked_.data();
  } else {
    Fit(d_[L - 1], static_cast<int64_t>(head_rows) * wl);
    dhead = d_[L - 1].data();
  }
  GemmNN(head_rows, wl, C, dlogits_.data(), p.out_weight, 0.0f, dhead);

  if (interchange_) {
    const bool gelu = shape_.activation == KernelActivation::kGelu;
    if (independent_ && grad_sources) {
      for (int k = lo_ + 1; k <= hi_; ++k) {
        const int64_t n = static_cast<int64_t>(B) * shape_.hidden[k];
        Fit(ds_[k], n);
        std::fill(ds_[k].begin(), ds_[k].begin() + n, 0.0f);
      }
    }
    // The stacked layers, top down. An overwritten unit's gradient goes to the source.
    for (int k = L - 1; k > lo_; --k) {
      const int wk = shape_.hidden[k];
      float* d = d_[k].data();
      for (int i = 0; i < B; ++i) {
        const auto& units = units_[b.sets[i]][k];
        if (units.empty()) continue;
        float* row = d + static_cast<int64_t>(B + i) * wk;
        float* to = !grad_sources ? nullptr
                    : independent_ ? ds_[k].data() + static_cast<int64_t>(i) * wk
                                   : d + b.source_perm[i] * wk;
        for (int u : units) {
          if (to != nullptr) to[u] += row[u];
          row[u] = 0.0f;
        }
      }
      ActivationBackward(d, a_[k].data(), gelu ? z_[k].data() : nullptr, static_cast<int64_t>(2) * B * wk);
      const bool below_is_stacked = k - 1 == lo_;
      float* dx;
      if (below_is_stacked) {
        Fit(dstacked_, static_cast<int64_t>(2) * B * shape_.hidden[lo_]);
        dx = dstacked_.data();
      } else {
        Fit(d_[k - 1], static_cast<int64_t>(2) * B * shape_.hidden[k - 1]);
        dx = d_[k - 1].data();
      }
      const float* x = below_is_stacked ? stacked_.data() : a_[k - 1].data();
      LayerBackward(k, d, x, 2 * B, p, g, /*accumulate=*/false, dx, false);
    }
    // Layer lo: a base row's gradient is its own row's plus its intervened row's at the units
    // that were not overwritten; the overwritten units' gradient goes to the source.
    const int w = shape_.hidden[lo_];
    const int bottom_rows = independent_ && grad_sources ? 2 * B : B;
    Fit(d_[lo_], static_cast<int64_t>(bottom_rows) * w);
    float* dlo = d_[lo_].data();
    const float* ds = dstacked_.data();
    for (int i = 0; i < B; ++i) {
      float* row = dlo + static_cast<int64_t>(i) * w;
      const float* own = ds + static_cast<int64_t>(i) * w;
      const float* cf = ds + static_cast<int64_t>(B + i) * w;
      AddRows(row, own, cf, w);
      for (int u : units_[b.sets[i]][lo_]) row[u] = own[u];
    }
    if (independent_ && grad_sources) {
      std::fill(dlo + static_cast<int64_t>(B) * w, dlo + static_cast<int64_t>(2) * B * w, 0.0f);
    }
    if (grad_sources) {
      for (int i = 0; i < B; ++i) {
        const float* cf = ds + static_cast<int64_t>(B + i) * w;
        float* to = independent_ ? dlo + static_cast<int64_t>(B + i) * w : dlo + b.source_perm[i] * w;
        for (int u : units_[b.sets[i]][lo_]) to[u] += cf[u];
      }
    }
    // Independent sources above lo, top down, into the weights the stacked layers wrote.
    if (independent_ && grad_sources) {
      for (int k = hi_; k > lo_; --k) {
        const int wk = shape_.hidden[k];
        float* d = ds_[k].data();
        ActivationBackward(d, as_[k].data(), gelu ? zs_[k].data() : nullptr, static_cast<int64_t>(B) * wk);
        const float* x = k - 1 == lo_ ? a_[lo_].data() + static_cast<int64_t>(B) * w : as_[k - 1].data();
        float* dx = k - 1 == lo_ ? dlo + static_cast<int64_t>(B) * w : ds_[k - 1].data();
        LayerBackward(k, d, x, B, p, g, /*accumulate=*/true, dx, /*accumulate_dx=*/true);
      }
    }
  }

  // The bottom block, top down (with independent sources and their gradients, 2B rows).
  const int rows = independent_ && grad_sources ? 2 * B : B;
  const bool gelu = shape_.activation == KernelActivation::kGelu;
  const bool project = Projects(independent_ ? 2 * B : B);
  for (int k = bottom_top; k >= 0; --k) {
    const int wk = shape_.hidden[k];
    float* d = d_[k].data();
    ActivationBackward(d, a_[k].data(), gelu ? z_[k].data() : nullptr, static_cast<int64_t>(rows) * wk);
    if (k == 0 && project) break;
    float* dx = nullptr;
    if (k > 0) {
      Fit(d_[k - 1], static_cast<int64_t>(rows) * shape_.hidden[k - 1]);
      dx = d_[k - 1].data();
    } else if (g.embed != nullptr) {
      Fit(dx0_, static_cast<int64_t>(rows) * D0);
      dx = dx0_.data();
    }
    LayerBackward(k, d, k > 0 ? a_[k - 1].data() : x0_.data(), rows, p, g, false, dx, false);
  }
  auto example_rows = [&](int r) {
    return r < B ? b.rows + static_cast<int64_t>(r) * I : b.source_rows + static_cast<int64_t>(r - B) * I;
  };
  if (project) {
    // Layer 0 through the table: S[row] = the sum of dZ0 over the examples that use the row;
    // per input j, dW0_j = S_j^T E_j and dE_j = S_j W0_j.
    const int out = shape_.hidden[0];
    const float* d = d_[0].data();
    ColumnSums(d, rows, out, false, g.bias[0]);
    Fit(row_grad_, embedding_rows_ * out);
    std::fill(row_grad_.begin(), row_grad_.begin() + embedding_rows_ * out, 0.0f);
    for (int r = 0; r < rows; ++r) {
      const int64_t* er = example_rows(r);
      const float* dr = d + static_cast<int64_t>(r) * out;
      for (int j = 0; j < I; ++j) AddInPlace(row_grad_.data() + er[j] * out, dr, out);
    }
    for (int j = 0; j < I; ++j) {
      const float* s = row_grad_.data() + static_cast<int64_t>(first_row_[j]) * out;
      cblas_sgemm(kRowMajor, kTrans, kNoTrans, out, dim, shape_.input_rows[j], 1.0f, s, out,
                  p.embed + static_cast<int64_t>(first_row_[j]) * dim, dim, 0.0f, g.weight[0] + j * dim, D0);
      if (g.embed != nullptr) {
        cblas_sgemm(kRowMajor, kNoTrans, kNoTrans, shape_.input_rows[j], dim, out, 1.0f, s, out, p.weight[0] + j * dim,
                    D0, 0.0f, g.embed + static_cast<int64_t>(first_row_[j]) * dim, dim);
      }
    }
  } else if (g.embed != nullptr) {
    // Each example's embedding rows take their slice of the input gradient (rows repeat: add).
    std::fill(g.embed, g.embed + embedding_rows_ * dim, 0.0f);
    for (int r = 0; r < rows; ++r) {
      const int64_t* er = example_rows(r);
      const float* dx = dx0_.data() + static_cast<int64_t>(r) * D0;
      for (int j = 0; j < I; ++j) AddInPlace(g.embed + er[j] * dim, dx + j * dim, dim);
    }
  }
}

}  // namespace graft::net
