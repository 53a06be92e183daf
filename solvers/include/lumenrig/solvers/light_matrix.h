#pragma once
/// \file light_matrix.h
/// Properties of a set of light directions used by photometric stereo and by
/// the session check.

#include <vector>

#include <Eigen/Core>

namespace lumenrig::solvers {

/// Stacks unit directions as the rows of an N x 3 matrix L.
Eigen::MatrixXd StackDirections(const std::vector<Eigen::Vector3d>& directions);

/// 2-norm condition number sigma_max / sigma_min of L (N x 3), computed with
/// Eigen's JacobiSVD; +infinity when L has rank < 3 (fewer than 3 lights or
/// coplanar directions).
double ConditionNumber(const Eigen::MatrixXd& light_matrix);

}  // namespace lumenrig::solvers
