#include "trainer/net/rotation.h"

namespace graft::net {

RotationImpl::RotationImpl(int width, double init_scale) : width_(width) {
  generator_ = register_parameter("generator", torch::randn({width, width}) * init_scale);
}

torch::Tensor RotationImpl::Skew() const {
  torch::Tensor a = generator_.to(torch::kFloat64);
  return a - a.t();
}

torch::Tensor RotationImpl::MatrixDouble() const { return torch::matrix_exp(Skew()); }

torch::Tensor RotationImpl::Matrix() const { return MatrixDouble().to(torch::kFloat32); }

torch::Tensor RotationImpl::Interchange(const torch::Tensor& base, const torch::Tensor& source,
                                        const torch::Tensor& mask) const {
  const torch::Tensor r = Matrix();
  const torch::Tensor mixed = torch::where(mask, source.matmul(r), base.matmul(r));
  return mixed.matmul(r.t());
}

}  // namespace graft::net
