#pragma once
/// \file integration.h
/// Depth from a normal map (camera frame, DESIGN.md: +x right, +y up, +z
/// toward the viewer; image rows go down).
///
/// Two gradient fields are integrated:
/// - pixel units (orthographic): depth D grows away from the camera, with
///   dD/du = nx/nz and dD/dv = -ny/nz (u = column, v = row); the result has
///   zero mean over the valid pixels.
/// - metres (perspective, needs intrinsics and a reference depth): with the
///   pixel ray r = ((u + 0.5 - cx)/fx, -(v + 0.5 - cy)/fy, -1) and the point
///   X = D r, n.dX/du = 0 gives d ln D/du = -(nx/fx)/(n.r) and
///   d ln D/dv = (ny/fy)/(n.r); D = reference_depth_m * exp(f - mean f), so
///   the geometric mean depth over the valid pixels is the reference depth.
/// Methods: Frankot-Chellappa (R. T. Frankot and R. Chellappa, "A method for
/// enforcing integrability in shape from shading algorithms", PAMI 10(4),
/// 1988) with OpenCV cv::dft on the even (mirror) extension of the field so
/// that non-periodic surfaces are not wrapped; and masked Poisson integration
/// (least-squares fit of forward differences to the averaged gradients on
/// edges between valid pixels) with Eigen's SimplicialLDLT for small masks,
/// or Eigen's conjugate gradients preconditioned by a multigrid V-cycle
/// (red-black Gauss-Seidel smoothing, 2 x 2 aggregation) for large ones.

#include <optional>
#include <string>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"

namespace lumenrig::solvers {

enum class IntegrationMethod { kAuto, kFrankotChellappa, kPoisson };

struct IntegrationOptions {
  /// kAuto: Poisson when the mask excludes some pixels, Frankot-Chellappa otherwise.
  IntegrationMethod method = IntegrationMethod::kAuto;
  /// With intrinsics and reference_depth_m > 0 the depth is in metres.
  std::optional<io::Intrinsics> intrinsics;
  double reference_depth_m = 0.0;
  /// Normals with nz (or -n.r/|r|) below this are clamped to it, so grazing
  /// rims do not produce unbounded slopes (common practice).
  double min_nz = 0.05;
  /// Masks with more valid pixels than this are solved by multigrid-
  /// preconditioned conjugate gradients instead of one sparse Cholesky
  /// factorisation, whose time and fill-in grow faster than the mask (11 s
  /// and 650 bytes per pixel for a 1M-pixel mask, single-threaded).
  int direct_solver_max_pixels = 65536;
  /// Conjugate gradients: relative residual tolerance and iteration cap
  /// (common practice; the tolerance keeps the depth within 1e-4 px of the
  /// direct solve, see IntegrationTest.MultigridSolveAgreesWithTheDirectSolve).
  double cg_tolerance = 1e-9;
  int cg_max_iterations = 500;
};

struct DepthMap {
  cv::Mat depth;          ///< CV_32FC1; 0 at invalid pixels
  std::string unit;       ///< "pixels" or "metres"
  std::string method;     ///< "frankot-chellappa", "poisson-ldlt" or "poisson-multigrid-cg"
  int iterations = 0;     ///< conjugate-gradient iterations (0 for the other methods)
  double residual = 0.0;  ///< their final relative residual
};

/// Integrates `normals` (CV_32FC3) over `mask` (CV_8U, non-zero = valid; empty
/// = all). Pixels whose normal is zero or non-finite are invalid too. Errors:
/// wrong types or sizes, intrinsics with a non-positive focal length.
/// `threads` (0 = all) runs the two forward transforms of Frankot-Chellappa
/// concurrently and the multigrid sweeps in row chunks; the result does not
/// depend on it.
io::Status IntegrateNormals(const cv::Mat& normals, const cv::Mat& mask, const IntegrationOptions& options,
                            DepthMap* out, int threads = 0);

}  // namespace lumenrig::solvers
