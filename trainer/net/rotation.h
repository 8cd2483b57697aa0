// An orthogonal rotation of one layer's activations for DAS (distributed alignment search,
// Geiger, Wu et al. 2023). LibTorch 1.13 has no orthogonal parametrization, so the rotation is
// R = matrix_exp(A - A^T) of a free square parameter A: a skew-symmetric generator always gives
// an orthogonal R with determinant 1, and gradients reach A through matrix_exp. Includes torch:
// include it only from trainer sources.
// Thread-safety: as any torch::nn::Module.
#ifndef GRAFT_TRAINER_NET_ROTATION_H_
#define GRAFT_TRAINER_NET_ROTATION_H_

#include <torch/torch.h>

namespace graft::net {

class RotationImpl : public torch::nn::Module {
 public:
  // A rotation of `width` dimensions, starting at the identity plus a small random turn of
  // scale `init_scale` (seed it with torch::manual_seed before constructing).
  explicit RotationImpl(int width, double init_scale = 1e-3);

  int width() const { return width_; }
  // The skew-symmetric generator A - A^T, float64 [width, width].
  torch::Tensor Skew() const;
  // R = matrix_exp(Skew()), computed in float64 (so R stays orthogonal to rounding), [width, width].
  torch::Tensor MatrixDouble() const;
  // R as float32, differentiable with respect to the generator.
  torch::Tensor Matrix() const;

  // The interchange in the rotated basis: rotated = h R (columns of R are the new basis),
  // dimensions where `mask` [B, width] is true take the source's rotated coordinates, and the
  // result is rotated back by R^T. `base` and `source` are [B, width] activations.
  torch::Tensor Interchange(const torch::Tensor& base, const torch::Tensor& source, const torch::Tensor& mask) const;

 private:
  int width_;
  torch::Tensor generator_;  // A, float32 [width, width]
};
TORCH_MODULE(Rotation);

}  // namespace graft::net

#endif  // GRAFT_TRAINER_NET_ROTATION_H_
