#pragma once
/// \file sh.h
/// Spherical-harmonic irradiance (Ramamoorthi and Hanrahan 2001, "An Efficient
/// Representation for Irradiance Environment Maps") and Phong-lobe
/// prefiltering of lat-long maps, for the diffuse and specular light maps.
/// Directions are in the rig frame (+y up); the real SH basis is written in
/// the rig's (x, y, z), which is valid in any right-handed frame because the
/// irradiance formula is rotation invariant.

#include <vector>

#include <Eigen/Core>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::synth {

/// Real SH basis constants of Ramamoorthi and Hanrahan 2001, eq. 3.
inline constexpr double kShY00 = 0.282095;   ///< Y00
inline constexpr double kShY1 = 0.488603;    ///< Y1m: y, z, x
inline constexpr double kShY2xy = 1.092548;  ///< Y2-2, Y2-1, Y21: xy, yz, xz
inline constexpr double kShY20 = 0.315392;   ///< Y20: 3z^2 - 1
inline constexpr double kShY22 = 0.546274;   ///< Y22: x^2 - y^2
/// Clamped-cosine convolution constants A_l (Ramamoorthi and Hanrahan 2001, eq. 8/9).
inline constexpr double kShA0 = M_PI;
inline constexpr double kShA1 = 2.0 * M_PI / 3.0;
inline constexpr double kShA2 = M_PI / 4.0;

/// 9 coefficients x RGB, ordered (0,0), (1,-1), (1,0), (1,1), (2,-2), (2,-1),
/// (2,0), (2,1), (2,2).
using ShCoeffs = Eigen::Matrix<double, 9, 3>;

/// The 9 basis functions at unit direction d.
Eigen::Matrix<double, 9, 1> ShBasis9(const Eigen::Vector3d& d);

/// L_lm = sum over texels of L(texel) Y_lm(d) dw (lat-long quadrature with the
/// exact texel solid angles). `latlong` is CV_32FC3.
ShCoeffs ProjectSh9(const cv::Mat& latlong);

/// Irradiance E(n) = sum_lm A_l L_lm Y_lm(n) (W m^-2 per unit radiance, RGB)
/// at unit normal n. A constant map L gives pi L.
Eigen::Vector3d ShIrradiance(const ShCoeffs& coeffs, const Eigen::Vector3d& n);

/// A lat-long map convolved with normalised Phong lobes:
/// P_s(r) = integral L(w) (s + 1)/(2 pi) max(0, r.w)^s dw, so a constant map
/// stays constant. One map per exponent, all at `out_height` x 2 out_height.
struct PhongPrefiltered {
  std::vector<double> exponents;
  std::vector<cv::Mat> maps;  ///< CV_32FC3 lat-long, same order as exponents
};

/// Prefilters `latlong` (resampled to source_height x 2 source_height with
/// area averaging first) for each exponent (> 0). Brute-force quadrature;
/// cost out_texels x source_texels x exponents, parallel over output rows.
io::Status PrefilterPhong(const cv::Mat& latlong, const std::vector<double>& exponents, PhongPrefiltered* out,
                          int out_height = 32, int source_height = 64, int threads = 0);

/// Area-averaged resampling of a lat-long map to height x 2 height.
cv::Mat ResampleLatLong(const cv::Mat& latlong, int height);

}  // namespace lumenrig::synth
