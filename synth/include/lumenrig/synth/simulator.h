#pragma once
/// \file simulator.h
/// Capture simulator: renders the invented "Kestrel Hollow Studio" scene
/// (plaster bust "kh-bust-03" with a hair fringe, grey reference sphere; see
/// scene.h) as a one-light-at-a-time capture in a dome of lights, with ground
/// truth, and writes a session folder per DESIGN.md.
///
/// Radiometry (DESIGN.md): a distant light of RGB intensity I gives
///   pixel = albedo/pi * I * max(0, n.l) (+ specular),
/// a near-field light at position p gives
///   pixel = albedo/pi * I * max(0, n.l) / d^2 (+ specular),
/// with l the unit vector from the surface point to p and d that distance in
/// metres. Stored frames add the black level and noise and clip to [0, 1].
///
/// Determinism: every random number comes from io::DeriveSeed(seed, camera,
/// frame, row), so output is byte-identical for any thread count.

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <vector>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"
#include "lumenrig/synth/scene.h"

namespace lumenrig::synth {

enum class LightLayout {
  kFibonacciDome,  ///< FibonacciDome(num_lights, min_elevation_deg)
  kTwoRing,        ///< two rings at 15 and 50 deg elevation, azimuths interleaved
};

enum class SpecularModel {
  kNone,        ///< Lambertian only
  kBlinnPhong,  ///< normalised Blinn-Phong lobe, ks (e+8)/(8 pi) (n.h)^e n.l
  kGgx,         ///< Cook-Torrance: GGX distribution, Smith-Schlick G, Schlick Fresnel (F0 0.05 plaster, 0.06 sphere)
};

/// A fault aimed at one camera's frame of one light (light = rig light id).
struct CameraLightTarget {
  std::string camera;  ///< camera id, e.g. "cam00"
  int light = -1;
};

/// Faults injected for tests of the session check. Progressive faults
/// (motion, drift) grow linearly over the take: OLAT frame k of N (capture
/// order = rig order) is at progress t = k / (N - 1); a tracking frame shares
/// the progress of the OLAT frame it follows.
struct SimFaults {
  std::optional<CameraLightTarget> dead_light;       ///< frame rendered with the light off
  std::optional<CameraLightTarget> missing_frame;    ///< file not written, entry absent from session.json
  std::optional<CameraLightTarget> saturated_light;  ///< light `saturate_gain` times brighter, clips at 1
  double saturate_gain = 8.0;
  struct Swap {
    std::string camera;
    int light_a = -1, light_b = -1;
  };
  std::optional<Swap> swapped_frames;  ///< the two frames' files are exchanged
  double motion_px = 0.0;              ///< subject moves +x in the image by this much at t = 1 (all cameras)
  double drift_percent = 0.0;          ///< every light's output is (1 + drift/100 * t) times calibrated
  double plate_shift_px = 0.0;         ///< camera moved +x by this many px between clean plate and backlit
};

struct SimOptions {
  std::string subject = "kh-bust-03";
  // Lights.
  int num_lights = 64;
  LightLayout layout = LightLayout::kFibonacciDome;
  double min_elevation_deg = -20.0;  ///< lowest light of the Fibonacci dome
  bool near_field = false;           ///< lights get positions at rig_radius_m instead of directions
  double rig_radius_m = 1.8;
  // Cameras: cam00 faces the subject (+z of the rig), others alternate
  // +/- camera_yaw_step_deg around the vertical axis.
  int num_cameras = 1;
  int width = 320, height = 240;
  double camera_distance_m = 1.5;
  double view_height_m = 0.62;  ///< scene height covered by the image at the subject (sets fy)
  double camera_yaw_step_deg = 25.0;
  // Rendering.
  SpecularModel specular = SpecularModel::kBlinnPhong;
  bool shadows = true;
  bool hair = true;
  int supersample = 4;  ///< per axis, on silhouette and hair pixels (edge anti-aliasing)
  // Sensor.
  bool noise = true;
  double black_level = 0.01;           ///< added to every stored frame (session black_level)
  float read_noise = 0.002f;           ///< Gaussian sigma, normalised units
  float full_well_electrons = 6000.f;  ///< shot noise: variance = signal / full_well
  uint64_t seed = 1;
  // Take.
  int tracking_every = 16;  ///< a fully lit tracking frame after every this many lights (0: none)
  bool extras = true;       ///< dark, clean plate, backlit, lit, matte pairs
  SimFaults faults;
  int threads = 0;
  bool overwrite = false;  ///< allow a non-empty output folder (files are overwritten)
  /// Called after each written frame (done, total); may be empty.
  std::function<void(int, int)> progress;
};

/// Checks ranges and fault targets; BadInput naming the option otherwise.
io::Status ValidateSimOptions(const SimOptions& options);

/// The rig the simulator renders with (ids 0..N-1 in capture order; per-light
/// RGB intensity varied by a few percent, seeded). Name "kh-dome-<N>" or
/// "kh-tworing-<N>". Distant: `direction`; near-field: `position` (metres).
io::Rig MakeSimRig(const SimOptions& options);

/// Cameras "cam00".. with intrinsics and camera_from_rig (no frames).
std::vector<io::Camera> MakeSimCameras(const SimOptions& options);

/// Exposure applied to the subject in fully lit frames (all lights on):
/// lit, tracking, matte pairs, so they do not clip. 2.5 / num_lights.
double LitExposure(const SimOptions& options);

/// Ground truth of one camera view (camera frame).
struct TruthMaps {
  cv::Mat normals;  ///< CV_32FC3 unit normals (nx, ny, nz); 0 where alpha == 0
  cv::Mat albedo;   ///< CV_32FC3 diffuse albedo; 0 where alpha == 0
  cv::Mat alpha;    ///< CV_32FC1 fractional coverage
  cv::Mat depth;    ///< CV_32FC1 metres along -z (positive); 0 where alpha == 0
  cv::Mat mask;     ///< CV_8UC1, 255 where alpha > 0.5
};

/// A light as rendered: the rig light and a gain on its intensity.
struct LitLight {
  io::Light light;
  double gain = 1.0;
};

/// The ray-cast geometry of one camera view (a G-buffer of surface samples:
/// one per pixel where the 3x3 neighbourhood sees one surface, supersample^2
/// stratified sub-pixel samples on silhouettes and hair), ready to be lit
/// by any set of lights.
class CameraView {
 public:
  /// `subject_shift_px` moves the subject along the camera's +x axis so its
  /// image moves by that many pixels (at camera_distance_m);
  /// `principal_shift_px` adds to cx (the whole image moves by that much).
  static CameraView Build(const SimOptions& options, const io::Camera& camera, double subject_shift_px = 0.0,
                          double principal_shift_px = 0.0, int threads = 0);

  TruthMaps Truth() const;

  /// Noise-free linear radiance, CV_32FC3 RGB: sum over samples of their
  /// coverage times the lit surface radiance, plus (1 - alpha) times the
  /// backdrop radiance at the pixel centre, so pixel = alpha F + (1 - alpha) B
  /// holds exactly. `show_subject` false renders the backdrop alone.
  cv::Mat Render(const std::vector<LitLight>& lights, Backdrop backdrop, bool show_subject, int threads = 0) const;

  /// scale * subject_radiance + (1 - alpha) * backdrop, for frames whose
  /// lighting is a multiple of one rendered with Render(..., kBlack, true):
  /// fully lit frames at different exposures or drift gains share one render.
  cv::Mat Composite(const cv::Mat& subject_radiance, double scale, Backdrop backdrop) const;

  /// Fractional coverage of pixel (x, y).
  float Alpha(int x, int y) const { return alpha_[static_cast<size_t>(y) * width_ + x]; }

  int width() const { return width_; }
  int height() const { return height_; }

 private:
  struct Sample {
    Eigen::Vector3d position;  // rig frame
    Eigen::Vector3d normal;    // rig frame
    Eigen::Vector3f albedo;
    float weight = 0;
    float depth_m = 0;
    Material material = Material::kPlaster;
  };
  int width_ = 0, height_ = 0;
  SimOptions options_;
  Scene scene_;
  Eigen::Matrix3d camera_from_rig_r_;
  Eigen::Vector3d centre_rig_;                // camera centre
  std::vector<Eigen::Vector3f> backdrop_xy_;  // per pixel backdrop plane (x, y, unused)
  std::vector<float> alpha_;                  // per pixel coverage, <= 1
  std::vector<int> offsets_;                  // samples of pixel i: [offsets_[i], offsets_[i+1])
  std::vector<Sample> samples_;
};

/// Adds black level and (when options.noise) shot + read noise, then clips
/// to [0, 1]. Noise of row r comes from DeriveSeed(seed, camera_index,
/// frame_key, r).
void ApplySensor(const SimOptions& options, int camera_index, uint64_t frame_key, cv::Mat* image, int threads = 0);

/// One camera simulated in memory: truth and OLAT frames in rig light order
/// (stored-frame values: black level, noise, clipping per options; faults
/// that change pixel values applied: dead, saturated, drift, motion).
struct SimulatedCamera {
  io::Rig rig;
  io::Camera camera;  ///< intrinsics and camera_from_rig; no paths
  TruthMaps truth;
  std::vector<cv::Mat> olat;  ///< olat[k] lit by rig.lights[k]
};
io::Expected<SimulatedCamera> SimulateCamera(const SimOptions& options, int camera_index = 0);

/// What SimulateSession wrote.
struct SimSummary {
  std::string session_path;  ///< absolute path of session.json
  int frames_written = 0;    ///< EXR frames (OLAT, tracking, extras), all cameras
  int truth_files = 0;
};

/// Writes a complete session folder: session.json, rig.json, per camera
/// cam<k>/olat_<id>.exr (half), dark, plate, backlit, lit, track_<id>,
/// matte_plate_<j>/matte_frame_<j>, mask.png; truth/cam<k>/normals, albedo,
/// alpha, depth, foreground (float EXR) and mask.png; truth/simulation.json
/// (options and faults). Refuses a non-empty existing folder unless
/// options.overwrite.
io::Status SimulateSession(const SimOptions& options, const std::string& out_dir, SimSummary* summary = nullptr);

/// Writes only the rig calibration MakeSimRig(options) to `path`.
io::Status WriteSimRig(const SimOptions& options, const std::string& path);

/// The options as JSON (recorded in truth/simulation.json).
nlohmann::json SimOptionsToJson(const SimOptions& options);

}  // namespace lumenrig::synth
