#pragma once
/// \file poisson_multigrid.h
/// Internal to solvers: the masked Poisson system of depth integration solved
/// by Eigen's conjugate gradients with one multigrid V-cycle as the
/// preconditioner, so a 12 MP mask costs seconds instead of a sparse Cholesky
/// factorisation's minutes and gigabytes.

#include <cstdint>

#include <Eigen/SparseCore>
#include <opencv2/core.hpp>

namespace lumenrig::solvers::internal {

struct MultigridReport {
  int iterations = 0;     ///< conjugate-gradient iterations
  double residual = 0.0;  ///< final |rhs - A x| / |rhs|
};

/// Peak bytes of a solve with `unknowns` mask pixels in a view of `pixels`
/// pixels (an upper bound from the data structures): per unknown, the
/// right-hand side and conjugate-gradient vectors (56) and the hierarchy
/// (about 130 over all levels, less since it works in single precision),
/// with room to spare; per pixel, the unknown and part index maps. The
/// normals stage plans its budget with it.
inline int64_t MultigridPlanBytes(int64_t unknowns, int64_t pixels) { return unknowns * 260 + pixels * 8; }

/// Solves A x = rhs where A is the graph Laplacian plus a ridge of 1e-9 on
/// the diagonal, over the 4-neighbour edges between the pixels of `index`
/// (CV_32S: unknown of each pixel, -1 = none; unknowns numbered in row-major
/// order), and rhs sums to zero over every connected part. A is applied from
/// the index map (never assembled). Relative residual `tolerance`, at most
/// `max_iterations`. The result has zero mean over each connected part, as
/// the ridge gives the exact solution. `threads` (0 = all) runs the operator
/// and the V-cycle's grid sweeps in fixed chunks; the result does not depend
/// on it.
Eigen::VectorXd SolvePoissonMultigrid(const cv::Mat& index, const Eigen::VectorXd& rhs, double tolerance,
                                      int max_iterations, int threads, MultigridReport* report);

}  // namespace lumenrig::solvers::internal
