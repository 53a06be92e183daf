#pragma once
/// \file matting.h
/// Alpha mattes from clean plates, on in-memory images (docs/matting.md):
/// backlit ratio, Smith-Blinn triangulation, difference trimap and Levin
/// closed-form refinement restricted to the unknown band, and foreground
/// colour estimation.
///
/// Images follow the lumenrig convention: CV_32FC3, linear RGB, rows top to
/// bottom, all inputs of one call the same size. Alpha, confidence: CV_32FC1
/// in [0, 1]. Trimaps: CV_8UC1 with kTrimapBackground / kTrimapUnknown /
/// kTrimapForeground. Noise sigmas are standard deviations of one frame's
/// pixel value per channel, in the images' linear units.

#include <cstdint>
#include <string>
#include <vector>

#include <Eigen/SparseCore>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::solvers {

inline constexpr uint8_t kTrimapBackground = 0;
inline constexpr uint8_t kTrimapUnknown = 128;
inline constexpr uint8_t kTrimapForeground = 255;

/// Per-channel noise standard deviation of a difference image (frame minus
/// plate, or any image whose majority of pixels is zero-mean noise), robust
/// to a textured minority: Immerkaer's 3x3 second-difference operator
/// (J. Immerkaer, "Fast Noise Variance Estimation", CVIU 64(2), 1996) with
/// the median absolute response in place of the mean (median |r| = 0.6745 *
/// 6 sigma for Gaussian noise). Averaged over channels. 0 for images smaller
/// than 3x3. Samples at most ~1e6 pixels (strided), so cost is bounded.
double EstimateDifferenceNoise(const cv::Mat& difference);
/// The same estimate of `a - b` (same size and type) without forming the
/// difference image: bit-identical to EstimateDifferenceNoise(a - b).
double EstimateDifferenceNoise(const cv::Mat& a, const cv::Mat& b);

// ---------------------------------------------------------------- backlit --

struct BacklitOptions {
  /// Per-channel noise sigma of one frame after dark subtraction; 0 = estimate
  /// from backlit - plate with EstimateDifferenceNoise (divided by sqrt 2).
  double noise_sigma = 0.0;
  /// Alpha within snap_sigmas * sigma_alpha of 0 or 1 snaps to 0 or 1.
  double snap_sigmas = 2.0;
  /// Pixels whose dark-subtracted plate has |plate| / sigma below this (the
  /// ratio divides by the plate) get confidence 0 and alpha filled from valid
  /// neighbours.
  double min_plate_snr = 5.0;
  /// Spill correction: light from the backdrop falling on the subject makes
  /// the "unlit" subject non-black. Estimated as a smooth field from
  /// confident-foreground pixels and removed (model backlit = (1-a) plate + a spill).
  bool correct_spill = true;
  double spill_fg_alpha = 0.7;  ///< first-pass alpha above this is foreground for the spill estimate
  int spill_erode_px = 3;       ///< ... after eroding that mask by this many pixels
  double spill_blur_px = 12.0;  ///< Gaussian sigma (pixels) of the normalised-convolution spill field
  /// Residual scale for the confidence map; confidence halves roughly where
  /// the alpha standard deviation reaches this value.
  double alpha_tolerance = 0.05;
};

struct BacklitStats {
  double noise_sigma = 0.0;              ///< sigma used (estimated or given)
  double mean_spill_rgb[3] = {0, 0, 0};  ///< mean spill over confident foreground
  int64_t plate_zero_pixels = 0;
  int64_t spill_pixels = 0;  ///< confident-foreground pixels used for the spill estimate
};

/// Backlit ratio matte. With P = plate - dark and K = backlit - dark
/// (dark may be empty = zero), per pixel the channels are combined by least
/// squares on K = (1 - a) P + a S (S = spill, 0 when not corrected):
/// a = (P - K).(P - S) / |P - S|^2, i.e. 1 - K/P per channel weighted by the
/// plate's signal (SNR weighting for equal per-channel noise). Then noise-aware
/// snapping and clamping to [0, 1]. confidence: 0 at plate zeros, otherwise
/// decreasing with the alpha standard deviation and with a residual beyond
/// the noise. All outputs resized/overwritten.
io::Status BacklitMatte(const cv::Mat& plate, const cv::Mat& backlit, const cv::Mat& dark,
                        const BacklitOptions& options, cv::Mat* alpha, cv::Mat* confidence,
                        BacklitStats* stats = nullptr, int threads = 0);

// ---------------------------------------------------------- triangulation --

struct TriangulationOptions {
  double noise_sigma = 0.0;  ///< per-channel frame sigma; 0 = estimate from frame0 - plate0
  double snap_sigmas = 2.0;  ///< as BacklitOptions::snap_sigmas
  /// Pixels where the plates differ by less than this many sigmas (spread of
  /// the plates around their mean, all channels) cannot be triangulated:
  /// confidence 0, alpha filled from valid neighbours.
  double min_plate_separation_snr = 5.0;
  double alpha_tolerance = 0.05;  ///< as BacklitOptions::alpha_tolerance
  /// Regularisation of un-premultiplying (see UnpremultiplyForeground).
  double colour_lambda = 1e-3;
  double colour_blur_px = 6.0;
};

/// Smith-Blinn triangulation (A. R. Smith and J. F. Blinn, "Blue Screen
/// Matting", SIGGRAPH 1996): from K >= 2 pairs (plate_k, frame_k) with
/// frame_k = Fp + (1 - a) plate_k (Fp premultiplied foreground), solves per
/// pixel the linear least squares in (a, Fp) over 3K equations
/// frame_k - plate_k = Fp - a plate_k. Closed form: with mean-removed
/// differences D~ and plates B~ over k, a = -sum(D~ B~) / sum(B~^2) and
/// Fp = mean(D) + a mean(B); for K = 2 this is a = 1 - (I1-I2).(B1-B2)/|B1-B2|^2.
/// Exact for noise-free composites. `foreground` is un-premultiplied
/// (UnpremultiplyForeground); may be nullptr.
io::Status TriangulationMatte(const std::vector<cv::Mat>& plates, const std::vector<cv::Mat>& frames,
                              const TriangulationOptions& options, cv::Mat* alpha, cv::Mat* foreground,
                              cv::Mat* confidence, double* noise_sigma_used = nullptr, int threads = 0);

// ------------------------------------------------------- difference trimap --

struct TrimapOptions {
  /// Per-channel noise sigma of the difference frame - plate; 0 = estimate.
  double difference_sigma = 0.0;
  /// |frame - plate| (RGB norm) above t_bg = max(bg_sigmas * sigma,
  /// bg_floor * level) is subject evidence; `level` is the plate's median RGB
  /// norm. t_fg = max(fg_sigmas * sigma, fg_floor * level, 2 t_bg) is the
  /// full-alpha end of PlainDifferenceMatte's ramp.
  double bg_sigmas = 5.0;
  double fg_sigmas = 12.0;
  double bg_floor = 0.01;
  double fg_floor = 0.12;
  /// Width in pixels of the unknown band around the silhouette (OpenCV
  /// erode/dilate with elliptic kernels; see DifferenceTrimap).
  int band_px = 8;
};

struct TrimapStats {
  double difference_sigma = 0.0;
  double bg_threshold = 0.0;
  double fg_threshold = 0.0;
  int64_t unknown_pixels = 0;
};

/// Automatic trimap from a clean plate and a frame of the subject in front
/// of it (same illumination of the backdrop). Subject = |frame - plate| >
/// t_bg without specks (< 6 px components), holes not connected to the image
/// border filled; foreground = subject eroded by band_px/2, background =
/// outside the subject dilated by band_px - band_px/2, unknown between.
/// Semi-transparent regions wider than band_px/2 inside the silhouette need
/// a wider band or a user trimap.
io::Status DifferenceTrimap(const cv::Mat& plate, const cv::Mat& frame, const TrimapOptions& options, cv::Mat* trimap,
                            TrimapStats* stats = nullptr);

/// The plain difference matte used as the baseline that refinement must
/// beat: clamp((|frame - plate| - t_bg) / (t_fg - t_bg), 0, 1) with the
/// thresholds of DifferenceTrimap.
io::Status PlainDifferenceMatte(const cv::Mat& plate, const cv::Mat& frame, const TrimapOptions& options,
                                cv::Mat* alpha);

/// Converts a user trimap (CV_32FC1/3 from io::ReadImage, values in [0,1]:
/// 0 background, 1 foreground, anything else unknown) to the CV_8UC1 labels.
/// Error when the size differs from `expected`; `source` names the file.
io::Status TrimapFromImage(const cv::Mat& image, cv::Size expected, const std::string& source, cv::Mat* trimap);

// --------------------------------------------------- closed-form refinement --

struct ClosedFormOptions {
  /// Levin et al.'s regulariser epsilon, for colours scaled so that
  /// `colour_level` maps to 1 (the Laplacian is built on image / colour_level).
  double epsilon = 1e-5;
  /// Colour scale; 0 = the 99th percentile of the plate's (or image's) luminance.
  double colour_level = 0.0;
  /// Known-background constraint: band pixels whose colour matches the plate
  /// within the noise (|I - B|^2 <= 3 difference_sigma^2, the mean of pure
  /// noise) are pulled to alpha 0 with this weight (0 disables; needs the
  /// plate and a sigma).
  double background_prior_weight = 0.02;
  /// Optional colour prior (0 = off): pulls alpha toward the projection
  /// a_hat = (I-B).(F^-B)/|F^-B|^2 with F^ the local known-foreground colour,
  /// weighted by |F^-B|^2 / (|F^-B|^2 + 9 sigma^2). Off by default: F^ comes
  /// from the opaque interior and misleads in hair (measured: worse MSE).
  double colour_prior_weight = 0.0;
  /// Per-channel noise sigma of the frame - plate difference (for the prior
  /// weight); 0 = none.
  double difference_sigma = 0.0;
  /// Band alpha within snap_sigmas * difference_sigma / |F^ - B| of 0 or 1
  /// snaps (needs the plate and difference_sigma > 0).
  double snap_sigmas = 2.0;
  double foreground_blur_px = 6.0;  ///< scale of the local foreground colour F^ (pixels)
  /// Solve the band system with a sparse LDL^T factorisation (Eigen
  /// SimplicialLDLT, AMD ordering) instead of conjugate gradient: the same
  /// solution, at a cost per band pixel that barely grows with the band's
  /// width (CG iterations grow linearly with it). Falls back to CG when the
  /// factorisation fails. Memory: the factor, about 600 bytes per band pixel
  /// for a 32 px band (measured, bench/matte_bench).
  bool direct_solve = true;
  /// Relative residual |A a - b| / |b| of the conjugate-gradient solve; for
  /// the direct solve, the residual above which `converged` is false.
  double cg_tolerance = 1e-6;
  int max_iterations = 2000;  ///< conjugate-gradient iteration cap
};

struct ClosedFormStats {
  int64_t unknown_pixels = 0;
  int64_t nonzeros = 0;
  bool direct = false;  ///< solved by the sparse factorisation (iterations = 0)
  int iterations = 0;   ///< conjugate-gradient iterations (0 for the direct solve)
  double relative_residual = 0.0;
  bool converged = false;
};

/// Levin closed-form matting (A. Levin, D. Lischinski, Y. Weiss, "A
/// Closed-Form Solution to Natural Image Matting", IEEE TPAMI 30(2), 2008),
/// 3x3 windows, solved ONLY for trimap-unknown pixels: minimises
/// a^T L a + sum_i w_i (a_i - a_hat_i)^2 (known-background constraint,
/// optional colour prior) with the known pixels fixed
/// (L_UU a_U = -L_UK a_K + prior), by a sparse LDL^T factorisation (Eigen;
/// conjugate gradient with an incomplete Cholesky preconditioner when
/// options.direct_solve is false or the factorisation fails). The system is
/// built from the band pixels and their window neighbours only, so cost and memory grow with the number
/// of unknown pixels, not the image size. `plate` (may be empty) enables the
/// known-background prior. `alpha` is overwritten: 0/1 at known pixels,
/// clamped solution in the band.
io::Status RefineClosedForm(const cv::Mat& image, const cv::Mat& plate, const cv::Mat& trimap,
                            const ClosedFormOptions& options, cv::Mat* alpha, ClosedFormStats* stats = nullptr,
                            int threads = 0);

/// The matting Laplacian restricted to the trimap-unknown pixels (any label
/// other than kTrimapBackground / kTrimapForeground), in raster order, for
/// colours image / colour_level: *laplacian = L_UU (symmetric) and
/// *rhs = -L_UK a_K with a_K = 1 at foreground and 0 at background labels;
/// *pixels = the unknown pixels' linear indices y * cols + x. Windows are the
/// 3x3 windows lying fully inside the image. Exposed for tests;
/// RefineClosedForm uses it.
io::Status MattingLaplacianBand(const cv::Mat& image, const cv::Mat& trimap, double epsilon, double colour_level,
                                Eigen::SparseMatrix<double>* laplacian, Eigen::VectorXd* rhs,
                                std::vector<int64_t>* pixels, int threads = 0);

// ----------------------------------------------------------- foreground --

struct ForegroundOptions {
  /// Regulariser lambda of F = (a Fp + lambda F^) / (a^2 + lambda): where alpha
  /// is small the colour falls back to the local foreground colour F^.
  double lambda = 1e-3;
  double blur_px = 6.0;  ///< Gaussian sigma of the local colour F^ (alpha^2-weighted)
};

/// Un-premultiplies a premultiplied foreground estimate Fp (CV_32FC3) with
/// regularisation (see ForegroundOptions); 0 where alpha == 0; clamped >= 0.
/// Rows on up to `threads` threads (0 = all); the result does not depend on it.
void UnpremultiplyForeground(const cv::Mat& premultiplied, const cv::Mat& alpha, const ForegroundOptions& options,
                             cv::Mat* foreground, int threads = 0);

/// Foreground colour for a frame composited over a known plate:
/// Fp = frame - (1 - alpha) plate, then UnpremultiplyForeground.
io::Status EstimateForeground(const cv::Mat& frame, const cv::Mat& plate, const cv::Mat& alpha,
                              const ForegroundOptions& options, cv::Mat* foreground, int threads = 0);

/// Linear composite alpha F + (1 - alpha) background (CV_32FC3).
cv::Mat CompositeOver(const cv::Mat& foreground, const cv::Mat& alpha, const cv::Mat& background);

/// Sum of absolute differences and mean squared error of two alpha mattes
/// (CV_32FC1), the measures of the alpha matting benchmark (Rhemann et al.,
/// CVPR 2009; SAD there is reported in thousands, here it is plain).
struct MatteError {
  double sad = 0.0;
  double mse = 0.0;
};
MatteError CompareMattes(const cv::Mat& alpha, const cv::Mat& truth);

}  // namespace lumenrig::solvers
