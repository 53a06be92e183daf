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
/// edges between valid pixels) with Eigen's SimplicialLDLT, or conjugate
/// gradients with an incomplete Cholesky preconditioner for large masks.

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
  /// Masks with more valid pixels than this are solved by cascadic conjugate
  /// gradients (a coarser grid solved first, recursively, down to this size)
  /// instead of one sparse Cholesky factorisation, whose fill-in needs about
  /// 650 bytes per pixel (the normals stage plans its budget with it). The
  /// default covers a 12 MP view with half of it masked.
  int direct_solver_max_pixels = 6000000;
  /// Conjugate gradients (incomplete Cholesky preconditioner) on each finer
  /// grid: relative residual tolerance and iteration cap (common practice).
  double cg_tolerance = 1e-7;
  int cg_max_iterations = 2000;
};

struct DepthMap {
  cv::Mat depth;       ///< CV_32FC1; 0 at invalid pixels
  std::string unit;    ///< "pixels" or "metres"
  std::string method;  ///< "frankot-chellappa", "poisson-ldlt" or "poisson-cascadic-cg"
};

/// Integrates `normals` (CV_32FC3) over `mask` (CV_8U, non-zero = valid; empty
/// = all). Pixels whose normal is zero or non-finite are invalid too. Errors:
/// wrong types or sizes, intrinsics with a non-positive focal length.
/// `threads` (0 = all) runs the two forward transforms of Frankot-Chellappa
/// concurrently; the result does not depend on it.
io::Status IntegrateNormals(const cv::Mat& normals, const cv::Mat& mask, const IntegrationOptions& options,
                            DepthMap* out, int threads = 0);

}  // namespace lumenrig::solvers
