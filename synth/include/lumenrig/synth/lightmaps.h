#pragma once
/// \file lightmaps.h
/// Per-pixel light maps (diffuse from 9 SH coefficients, specular from
/// Phong-prefiltered maps), perspective backgrounds from a lat-long map,
/// compositing, and the camera simulation applied to network inputs.

#include <cstdint>
#include <optional>
#include <vector>

#include <Eigen/Core>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"
#include "lumenrig/synth/sh.h"

namespace lumenrig::synth {

/// Unit view ray (camera frame: +x right, +y up, looking along -z) through the
/// centre of pixel (x, y) (integer indices; rows top to bottom).
Eigen::Vector3d CameraRay(const io::Intrinsics& intrinsics, int x, int y);

/// Intrinsics of an image of `width` x `height` with horizontal field of view
/// `fov_deg` and the principal point at the centre.
io::Intrinsics IntrinsicsFromFov(int width, int height, double fov_deg);

/// Intrinsics scaled from the capture size to another image size.
io::Intrinsics ScaleIntrinsics(const io::Intrinsics& in, double sx, double sy);

/// Diffuse light map: E(n)/pi from the SH coefficients at the rig-frame normal
/// (n_rig = R^T n_camera, R = camera_from_rig rotation), so a Lambertian
/// surface of albedo a looks like a * diffuse. Specular light maps: the
/// prefiltered map per exponent at the reflection of the view ray about the
/// normal. Pixels whose normal is shorter than 0.5 (background) are 0.
/// `normals_camera` CV_32FC3 (camera frame); outputs CV_32FC3 of its size.
io::Status RenderLightMaps(const cv::Mat& normals_camera, const io::Intrinsics& intrinsics,
                           const Eigen::Matrix3d& camera_from_rig, const ShCoeffs& sh,
                           const PhongPrefiltered& specular_maps, cv::Mat* diffuse, std::vector<cv::Mat>* specular);

/// A view of the environment through a pinhole camera of the given
/// intrinsics and output size, turned by `yaw_deg` (about camera +y) then
/// `pitch_deg` (about camera +x), camera frame -> rig frame via
/// camera_from_rig. Bilinear lookups; CV_32FC3 linear radiance.
cv::Mat RenderBackground(const cv::Mat& latlong, const io::Intrinsics& intrinsics, int width, int height,
                         const Eigen::Matrix3d& camera_from_rig, double yaw_deg = 0.0, double pitch_deg = 0.0);

/// Composites a relit subject over a background: the relit frames of a dark
/// dome are premultiplied by alpha, so out = relit + (1 - alpha) background,
/// and relit is ignored where alpha == 0 (stray dome light). Sizes must match.
cv::Mat CompositeOver(const cv::Mat& relit_premultiplied, const cv::Mat& alpha, const cv::Mat& background);

/// Random camera response applied to network inputs (from one seed).
struct CameraSimOptions {
  double exposure_sigma_ev = 0.3;     ///< exposure jitter, stops (normal)
  double white_balance_sigma = 0.05;  ///< per-channel gain jitter, log-normal sigma (G fixed)
  double read_noise = 0.002;          ///< std of additive noise (linear units)
  double shot_noise = 0.0005;         ///< variance per unit signal (Poisson-like)
  double jpeg_probability = 0.5;      ///< chance of a JPEG round trip
  int jpeg_quality_min = 70, jpeg_quality_max = 95;
};

struct CameraSimDraw {
  double exposure = 1.0;                         ///< linear multiplier
  Eigen::Vector3d white_balance{1.0, 1.0, 1.0};  ///< per-channel gains
  bool jpeg = false;
  int jpeg_quality = 90;
  double read_noise = 0.0;  ///< copied from the options
  double shot_noise = 0.0;
  uint64_t noise_seed = 0;
};

/// Draws the camera parameters from `seed` (use io::DeriveSeed(seed, sample, ...)).
CameraSimDraw DrawCameraSim(const CameraSimOptions& options, uint64_t seed);

/// Applies exposure, white balance, noise, clamping to [0, 1], sRGB encoding
/// (IEC 61966-2-1 via io::LinearToSrgb) and the optional JPEG round trip
/// (OpenCV). Returns sRGB-encoded CV_32FC3 in [0, 1]. Deterministic in draw.
cv::Mat SimulateCameraResponse(const cv::Mat& linear, const CameraSimDraw& draw);

}  // namespace lumenrig::synth
