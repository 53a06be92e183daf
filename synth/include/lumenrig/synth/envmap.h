#pragma once
/// \file envmap.h
/// Lat-long (equirectangular) HDR environment maps, following the convention
/// of shared DESIGN.md exactly: W = 2H; texel (u, v) has its centre at
/// theta = pi (v + 0.5) / H from +y and phi = 2 pi (u + 0.5) / W and looks
/// along d = (-sin theta sin phi, cos theta, sin theta cos phi) in the rig
/// frame; its solid angle is (2 pi / W)(pi / H) sin theta.
/// Images are CV_32FC3, linear RGB radiance, row 0 = zenith.

#include <cstdint>
#include <string>
#include <vector>

#include <Eigen/Core>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::synth {

/// An environment map in memory.
struct EnvMap {
  std::string name;             ///< file stem or procedural name
  std::string path;             ///< source file ("" for procedural maps)
  cv::Mat radiance;             ///< CV_32FC3, H x 2H, linear RGB, >= 0, finite
  int64_t clamped_texels = 0;   ///< texels that were NaN/Inf/negative and set to 0
  double exposure_scale = 1.0;  ///< factor applied by NormaliseExposure (1 = none)
};

/// Direction (rig frame, unit) of continuous lat-long coordinates: (x, y) =
/// (u, v) is a texel centre; x is periodic with period W.
Eigen::Vector3d LatLongDirection(double x, double y, int width, int height);

/// Inverse of LatLongDirection: continuous texel coordinates (x in [-0.5, W-0.5),
/// y in [-0.5, H-0.5]) of a unit direction `d` (rig frame).
Eigen::Vector2d LatLongCoordinates(const Eigen::Vector3d& d, int width, int height);

/// Solid angle (sr) of one texel of row `v`: (2 pi / W)(pi / H) sin theta_v.
double TexelSolidAngle(int v, int width, int height);

/// OK when `image` is a non-empty 3-channel float image with width == 2 * height;
/// otherwise BadInput naming `source` and the size found.
io::Status ValidateLatLong(const cv::Mat& image, const std::string& source);

/// Replaces NaN, +/-Inf and negative values by 0 (per channel) and returns the
/// number of texels with at least one such channel.
int64_t SanitizeRadiance(cv::Mat* image);

/// Rotates the environment about +y by `degrees` (right-handed):
/// rotated(d) = original(R^T d) with R = RotationAboutY(degrees), i.e.
/// rotated column u = original column u + degrees * W / 360 (mod W). Exact
/// column shift when degrees * W / 360 is an integer (so 360 is exactly the
/// identity); linear interpolation between the two neighbouring columns
/// otherwise (rows never mix, so this equals the bilinear lookup).
cv::Mat RotateLatLong(const cv::Mat& image, double degrees);

/// The rotation matrix of RotateLatLong: rotated_map(d) = map(R^T d), R about +y.
Eigen::Matrix3d RotationAboutY(double degrees);

/// Solid-angle-weighted mean ITU-R BT.709 luminance of the map, (1/4pi) int Y dw.
double MeanLuminance(const cv::Mat& image);

/// Scales the map so its MeanLuminance equals `target_luminance` (> 0) and
/// records the factor in env->exposure_scale. A black map is left unchanged
/// (scale 1) and reported as BadInput naming the map.
io::Status NormaliseExposure(EnvMap* env, double target_luminance);

/// Bilinear lookup of a lat-long map in direction `d` (rig frame), wrapping in
/// phi and clamping in theta. Returns RGB.
Eigen::Vector3f SampleLatLong(const cv::Mat& image, const Eigen::Vector3d& d);

/// Reads a lat-long map (OpenEXR or Radiance .hdr via io::ReadImage), checks
/// the 2:1 aspect, clamps NaN/Inf/negative texels (counted in clamped_texels).
io::Expected<EnvMap> LoadEnvMap(const std::string& path);

/// All *.exr and *.hdr files of a folder, sorted by name, loaded with
/// LoadEnvMap. An empty folder (or none of those files) is BadInput.
io::Expected<std::vector<EnvMap>> LoadEnvMapFolder(const std::string& dir);

// ---- Procedural maps for tests and the demo (no maps are shipped) ----

/// Sky: zenith-to-horizon gradient, a darker ground below the horizon and a
/// sun disk of angular radius `sun_radius_deg` in direction `sun_dir` (rig frame).
cv::Mat MakeSkyMap(int height, const Eigen::Vector3d& sun_dir, double sun_radius_deg = 3.0,
                   float sun_radiance = 200.0f);

/// Studio: dim grey walls with three rectangular softboxes (key, fill, rim).
cv::Mat MakeStudioMap(int height);

/// A smooth map that is exactly band-limited to spherical-harmonic order 2:
/// L(d) = c0 + c1 . d + d^T Q d per channel, with positive values everywhere
/// (used to check relighting against the exact SH irradiance).
cv::Mat MakeSmoothMap(int height);

}  // namespace lumenrig::synth

namespace lumenrig::synth {

/// Writes the procedural maps used by tests and the demo into `dir` (created
/// when missing) as float OpenEXR: sky-noon.exr, sky-low-sun.exr,
/// studio-softboxes.exr, each `height` x 2 height. Returns the paths.
io::Expected<std::vector<std::string>> WriteProceduralEnvMaps(const std::string& dir, int height, bool overwrite);

}  // namespace lumenrig::synth
