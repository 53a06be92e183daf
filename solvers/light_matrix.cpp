#include "lumenrig/solvers/light_matrix.h"

#include <limits>

#include <Eigen/SVD>

namespace lumenrig::solvers {

Eigen::MatrixXd StackDirections(const std::vector<Eigen::Vector3d>& directions) {
  Eigen::MatrixXd l(static_cast<Eigen::Index>(directions.size()), 3);
  for (size_t i = 0; i < directions.size(); ++i) l.row(static_cast<Eigen::Index>(i)) = directions[i].transpose();
  return l;
}

double ConditionNumber(const Eigen::MatrixXd& light_matrix) {
  if (light_matrix.rows() < 3 || light_matrix.cols() != 3) return std::numeric_limits<double>::infinity();
  Eigen::JacobiSVD<Eigen::MatrixXd> svd(light_matrix);
  const auto& s = svd.singularValues();
  const double smallest = s(s.size() - 1);
  if (!(smallest > 1e-12 * s(0))) return std::numeric_limits<double>::infinity();
  return s(0) / smallest;
}

}  // namespace lumenrig::solvers
