#pragma once
/// \file photometric_stereo.h
/// Calibrated photometric stereo kernels on in-memory pixel blocks.
///
/// Data model (DESIGN.md "Frames and units"): a frame minus the dark frame,
/// divided by its light's RGB intensity, is a/pi * max(0, n.v) on a
/// Lambertian surface, with a the albedo per channel, n the unit normal and v
/// the light vector (camera frame). For a distant light v is the unit
/// direction toward the light; for a near-field light at distance d (metres)
/// v = unit direction / d^2 (inverse-square falloff). Hence the scaled normal
/// g = a/pi * n and a = pi * |g|.
///
/// Methods:
/// - Least squares (R. J. Woodham, "Photometric method for determining
///   surface orientation from multiple images", Optical Engineering 19(1),
///   1980): g = pinv(L) * I for all pixels of a block at once, as one GEMM.
/// - Robust: order-statistics rejection of the darkest and brightest share of
///   each pixel's samples as the initial inlier set (the rank-based rejection
///   of shadows and highlights used by Miyazaki, Hara and Ikeuchi, "Median
///   photometric stereo as applied to the Segonko Tumulus", IJCV 2010, and
///   Wu and Tang's rank/robust selection of Lambertian samples), then
///   iteratively reweighted least squares with Tukey's biweight (Beaton and
///   Tukey, Technometrics 1974) on the residuals, with samples the current
///   normal puts in attached shadow (n.v <= 0) or below a per-pixel shadow
///   floor given zero weight.
///
/// Block layout: `data` holds N lights x K pixels x C channels floats
/// (C = 3 RGB or 1 gray), light i's K*C values contiguous at
/// data + i * light_stride. Values are already dark-subtracted and divided
/// by intensity (see NormalizeFrame).

#include <cstdint>
#include <string>
#include <vector>

#include <Eigen/Core>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::solvers {

enum class PsMethod { kLeastSquares, kRobust };

/// Parses "lsq" / "robust"; error names the value.
io::Expected<PsMethod> ParsePsMethod(const std::string& name);
const char* PsMethodName(PsMethod method);

struct PsOptions {
  PsMethod method = PsMethod::kRobust;
  /// Robust: share of each pixel's valid samples, darkest first, left out of
  /// the initial fit (shadow candidates). 0..0.9.
  double dark_fraction = 0.2;
  /// Robust: share of samples, brightest first, left out of the initial fit
  /// (specular candidates). 0..0.9, dark + bright < 0.9.
  double bright_fraction = 0.3;
  /// Robust: reweighting passes after the initial fit (0 = order statistics only).
  int irls_iterations = 4;
  /// Robust: Tukey biweight tuning constant in units of the residual scale
  /// (4.685 gives 95% efficiency under Gaussian noise, Beaton-Tukey 1974;
  /// the smaller default rejects broad highlight tails, chosen on the
  /// analytic highlight test in tests/photometric_stereo_test.cpp).
  double tukey_c = 2.5;
  /// Samples whose gray value is below this fraction of the pixel's
  /// brightest sample count as shadowed (robust) or unlit (useful-light count).
  double shadow_floor = 0.01;
  /// Robust: floor of the residual scale relative to the pixel's mean
  /// inlier gray value (keeps noise-free data from producing zero scale).
  double min_relative_scale = 0.01;
  /// Pixels whose brightest gray sample is at or below this value (frame
  /// units after normalisation) are not solved (confidence 0).
  double min_signal = 1e-6;
};

/// Validates ranges; message names the option.
io::Status ValidatePsOptions(const PsOptions& options);

/// Light vectors of a block, camera frame.
/// Distant: `directions` N x 3 unit rows. Near-field: `positions_m` N x 3
/// light positions (camera frame, metres) and per-pixel surface points.
struct BlockLights {
  Eigen::MatrixXf directions;   ///< N x 3, distant lights (empty for near-field)
  Eigen::MatrixXf positions_m;  ///< N x 3, near-field lights (empty for distant)
  int count() const { return static_cast<int>(directions.rows() > 0 ? directions.rows() : positions_m.rows()); }
  bool near_field() const { return positions_m.rows() > 0; }
};

/// Per-pixel outputs of a block, K pixels each; any pointer may be null
/// except normals. normals: 3 floats (nx, ny, nz) per pixel, 0 when unsolved;
/// albedo: 3 floats (R, G, B; gray repeated for 1-channel data);
/// confidence: 1 float in [0, 1].
struct BlockOutputs {
  float* normals = nullptr;
  float* albedo = nullptr;
  float* confidence = nullptr;
};

/// Input of a block.
struct BlockInput {
  const float* data = nullptr;
  int64_t light_stride = 0;  ///< floats between light i and i+1
  int64_t pixels = 0;        ///< K
  int channels = 3;          ///< C: 3 (RGB) or 1
  /// Optional per-pixel 0/1 mask (K bytes); pixels with 0 are not solved.
  const uint8_t* mask = nullptr;
  /// Near-field only: K x 3 surface points (camera frame, metres).
  const float* points_m = nullptr;
};

/// Precomputed per-light-set data shared by all blocks (pinv, conditioning).
class PsSolver {
 public:
  /// Errors: fewer than 3 lights; rank-deficient (coplanar) distant
  /// directions (condition number of L above 1e6, solvers::ConditionNumber).
  static io::Expected<PsSolver> Create(const BlockLights& lights, const PsOptions& options);

  /// Solves one block. Deterministic: a pixel's result depends only on its
  /// own samples, never on the block size or the thread. Per-pixel failures
  /// (fewer than 3 useful lights, non-finite samples for least squares,
  /// singular inlier matrix) give confidence 0 and zero normal/albedo.
  /// `scratch` is reused between calls on one thread.
  void SolveBlock(const BlockInput& in, const BlockOutputs& out, std::vector<float>* scratch) const;

  const PsOptions& options() const { return options_; }
  const BlockLights& lights() const { return lights_; }
  /// 2-norm condition number of the distant light matrix (1 for near-field).
  double condition_number() const { return condition_; }

 private:
  void SolveLeastSquaresDistant(const BlockInput& in, const BlockOutputs& out, std::vector<float>* scratch) const;
  void SolvePerPixel(const BlockInput& in, const BlockOutputs& out, std::vector<float>* scratch) const;

  PsOptions options_;
  BlockLights lights_;
  Eigen::MatrixXf pinv_;  ///< 3 x N (distant)
  Eigen::Matrix3f gram_;  ///< L^T L (distant)
  double condition_ = 1.0;
};

/// Confidence from the number of inlier lights, the condition number of the
/// inlier light matrix and the relative RMS residual:
/// c = clamp((n - 2) / 4) * clamp(log(1e3 / cond) / log(1e3 / 5)) * 1 / (1 + (res / 0.1)^2);
/// 0 when n < 3. The constants are common practice, not from a source.
float PsConfidence(int inliers, double condition, double relative_residual);

/// Subtracts `black_level`, then `dark` (same size and channels, may be
/// empty), and divides each channel by `intensity` (RGB; a 1-channel frame is
/// divided by the BT.709 luminance of the intensity), in place, in one pass:
/// ((x - black_level) - dark) / intensity, rounded after each step as when
/// done one step at a time. CV_32F only. Returns the largest magnitude of
/// the result (NaN ignored), for all-zero checks.
float NormalizeFrame(cv::Mat* frame, const cv::Mat& dark, const Eigen::Vector3d& intensity, float black_level = 0.0f);

/// Whole images in memory (tests, small views): frames CV_32FC3/C1, already
/// normalised (NormalizeFrame). mask: CV_8U or empty. Outputs CV_32FC3
/// normals, CV_32FC3 albedo, CV_32FC1 confidence. For near-field lights
/// `points_m` (CV_32FC3, camera frame, metres) gives the surface points.
struct PsMaps {
  cv::Mat normals, albedo, confidence;
};
io::Status SolvePhotometricStereo(const std::vector<cv::Mat>& frames, const BlockLights& lights,
                                  const PsOptions& options, const cv::Mat& mask, const cv::Mat& points_m, PsMaps* out,
                                  int threads = 0);

/// Angle in degrees between two unit normals (clamped dot product).
double AngleDeg(const Eigen::Vector3f& a, const Eigen::Vector3f& b);

}  // namespace lumenrig::solvers
