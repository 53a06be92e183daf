#pragma once
/// \file session_check.h
/// The technician's session check (`lumenrig check`): completeness, exposure,
/// lights (dead / hot / wrong slot / colour), stability over time from the
/// tracking frames, calibration sanity and matting prerequisites, each with a
/// documented threshold (docs/check.md). Every frame is decoded exactly once,
/// streamed in row bands; what is kept per frame is a small summary (numbers,
/// a PNG thumbnail and a coarse analysis grid), so memory does not grow with
/// the frame size times the light count.

#include <cstdint>
#include <functional>
#include <limits>
#include <memory>
#include <string>
#include <vector>

#include <Eigen/Core>
#include <nlohmann/json.hpp>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"

namespace lumenrig::solvers {

/// Outcome of one check line. kSkip: not applicable (the session does not
/// list what the check needs); it never fails a session.
enum class Verdict { kPass = 0, kSkip = 1, kWarn = 2, kFail = 3 };
const char* VerdictName(Verdict verdict);  ///< "PASS", "SKIP", "WARN", "FAIL"
/// The more severe of two verdicts (FAIL > WARN > SKIP/PASS).
Verdict Worse(Verdict a, Verdict b);

/// Thresholds and knobs. Every double field is listed in ThresholdTable()
/// with its key, unit and source; docs/check.md documents the defaults.
struct CheckOptions {
  // Exposure (all levels in normalised file units, full scale = 1.0).
  double saturation_level = 1.0;       ///< value at which the sensor clips (before black level)
  double clipped_warn_pct = 0.1;       ///< % of subject pixels clipped in one OLAT frame -> WARN
  double clipped_fail_pct = 1.0;       ///< ... -> FAIL
  double underexposed_warn = 0.25;     ///< brightest OLAT frame's p99 below this fraction of full scale -> WARN
  double underexposed_fail = 0.05;     ///< ... -> FAIL
  double snr_warn_db = 20.0;           ///< median SNR of the front-lit OLAT frames below this -> WARN
  double black_residual_warn = 0.005;  ///< |dark frame mean after session black_level| above this -> WARN
  // Lights.
  double weak_warn_ratio = 0.6;          ///< measured / predicted energy below this -> WARN (weak light)
  double weak_fail_ratio = 0.3;          ///< ... -> FAIL (dead light)
  double hot_warn_ratio = 1.4;           ///< measured / predicted energy above this -> WARN
  double hot_fail_ratio = 2.5;           ///< ... -> FAIL
  double min_predicted_fraction = 0.03;  ///< lights predicted below this fraction of the brightest are not judged
  double swap_gain_fraction = 0.5;       ///< swapping two frames must cut each one's model residual by this fraction
  double swap_min_angle_deg = 20.0;      ///< lights closer than this are not reported as swapped
  double colour_warn_pct = 5.0;          ///< per-channel deviation from the camera's typical colour -> WARN
  double colour_fail_pct = 15.0;         ///< ... -> FAIL
  // Stability (tracking frames).
  double drift_warn_pct = 1.0;  ///< |tracking mean - first| in % -> WARN
  double drift_fail_pct = 3.0;  ///< ... -> FAIL
  double motion_warn_px = 0.5;  ///< subject shift against the first tracking frame -> WARN
  double motion_fail_px = 1.5;  ///< ... -> FAIL
  // Calibration.
  double unit_tolerance = 1e-3;        ///< | |d| - 1 | above this -> FAIL
  double duplicate_angle_deg = 1.0;    ///< two directions closer than this -> FAIL
  double duplicate_distance_m = 0.01;  ///< two positions closer than this -> FAIL
  double coverage_radius_deg = 30.0;   ///< a direction is covered when a light is within this angle
  double coverage_warn_pct = 50.0;     ///< covered % of the camera-facing hemisphere below this -> WARN
  double condition_warn = 10.0;        ///< condition number of the light matrix above this -> WARN
  double condition_fail = 100.0;       ///< ... -> FAIL
  // Matting.
  double alignment_warn_px = 0.3;  ///< clean plate vs backlit shift -> WARN
  double alignment_fail_px = 1.0;  ///< ... -> FAIL
  // Working sizes (not thresholds, but listed too).
  double thumbnail_px = 128;   ///< longest side of contact-sheet thumbnails
  double analysis_grid = 32;   ///< longest side of the per-frame analysis grid (cells)
  double motion_max_px = 512;  ///< tracking frames are area-reduced to at most this side
  double band_rows = 64;       ///< rows decoded at a time (rounded to EXR line blocks)

  /// Called from worker threads (serialised) after each frame: (done, total).
  std::function<void(int, int)> progress;

  /// OK or a BadInput naming the bad field (e.g. warn above fail).
  io::Status Validate() const;
};

/// One documented option: key for --threshold KEY=VALUE and JSON files.
struct ThresholdSpec {
  const char* key;  ///< e.g. "exposure.clipped_fail_pct"
  double CheckOptions::*field;
  const char* unit;
  const char* description;
  const char* source;  ///< publication, standard or "common practice"
};
const std::vector<ThresholdSpec>& ThresholdTable();

/// Sets one option from "KEY=VALUE"; error names the key and lists none of
/// the values silently (unknown keys are errors).
io::Status SetThreshold(const std::string& key_equals_value, CheckOptions* options);
/// Sets options from a JSON object {"key": number, ...}; `source` names the
/// file in messages.
io::Status SetThresholds(const nlohmann::json& object, const std::string& source, CheckOptions* options);

/// One offending item with the evidence behind it.
struct Finding {
  Verdict verdict = Verdict::kWarn;
  std::string camera;       ///< camera id, "" for rig-level findings
  std::vector<int> lights;  ///< light ids involved (two for a swap)
  std::string frame;        ///< file path when a single file is at fault
  double value = 0.0;       ///< the number that triggered it
  std::string message;      ///< one line in the trade's words, names camera and light/frame
};

/// One line of the terminal output.
struct CheckLine {
  std::string key;    ///< e.g. "lights.energy"
  std::string title;  ///< e.g. "Light energy (dead / weak / hot lights)"
  Verdict verdict = Verdict::kPass;
  double value = 0.0;  ///< the worst number across cameras
  std::string unit;
  double warn_threshold = 0.0;  ///< NaN when the check has no WARN level
  double fail_threshold = 0.0;  ///< NaN when the check has no FAIL level
  std::string summary;          ///< one line with the number behind the verdict
  std::vector<Finding> findings;
};

enum class FrameKind { kOlat, kTracking };

/// What the single pass kept of one OLAT or tracking frame.
struct FrameSummary {
  FrameKind kind = FrameKind::kOlat;
  int camera = 0;  ///< index into CheckResult::cameras
  int light = -1;  ///< OLAT: light id; tracking: after_light
  int order = 0;   ///< position in the camera's capture list
  std::string path;
  bool readable = false;
  std::string error;  ///< read error when !readable
  int width = 0, height = 0, channels = 0;
  std::string pixel_type;
  Eigen::Vector3d mean_rgb{0, 0, 0};                               ///< mean inside the subject mask, black-corrected
  double mean = 0.0;                                               ///< BT.709 luminance of mean_rgb
  double p99 = 0.0;                                                ///< 99th percentile of luminance in the mask
  double clipped_pct = 0.0;                                        ///< % of mask pixels with any channel at saturation
  double noise_sigma = 0.0;                                        ///< Immerkaer-style noise estimate (luminance)
  double snr_db = 0.0;                                             ///< 20 log10(mean / noise_sigma)
  double energy_ratio = std::numeric_limits<double>::quiet_NaN();  ///< measured / predicted energy (NaN: not judged)
  double colour_dev_pct = std::numeric_limits<double>::quiet_NaN();  ///< worst channel deviation from the camera's
                                                                     ///< typical colour (NaN: not judged)
  double predicted = 0.0;                    ///< OLAT: Lambertian-model energy / intensity (analysis cells)
  double measured = 0.0;                     ///< OLAT: measured energy / intensity (analysis cells)
  Eigen::Vector3d direction_rig{0, 0, 0};    ///< OLAT: calibrated light direction (rig frame, unit)
  Verdict verdict = Verdict::kPass;          ///< worst finding on this frame
  std::string flag;                          ///< short label for the contact sheet ("dead", "swap 3", ...)
  std::vector<unsigned char> thumbnail_png;  ///< 8-bit sRGB PNG, full scale = white
  int grid_w = 0, grid_h = 0;
  std::vector<float> grid;  ///< luminance per analysis cell (mean over mask pixels)
  // Tracking frames only (computed in the reading pass against the camera's
  // first tracking frame, so no tracking frame is kept in memory):
  bool has_motion = false;
  double box_energy = 0.0;  ///< luminance summed over the subject's box (mask dilated)
  double shift_x_px = 0.0;  ///< subject shift against the first tracking frame (full-res px)
  double shift_y_px = 0.0;
};

struct TrackingPoint {
  int after_light = -1;
  double drift_pct = 0.0;   ///< (mean / first mean - 1) * 100
  double shift_x_px = 0.0;  ///< subject shift against the first tracking frame (full-res pixels)
  double shift_y_px = 0.0;
};

struct CameraSummary {
  std::string id;
  int width = 0, height = 0;
  std::string mask_source;     ///< "mask file", "clean plate vs lit", ..., "whole frame"
  double mask_fraction = 0.0;  ///< fraction of pixels in the subject mask
  int grid_w = 0, grid_h = 0;
  std::vector<unsigned char> grid_valid;  ///< analysis cells mostly inside the mask
  bool has_dark = false;
  Eigen::Vector3d dark_mean{0, 0, 0};  ///< after the session black level
  double dark_noise = 0.0;
  bool has_alignment = false;
  double align_dx_px = 0.0, align_dy_px = 0.0;  ///< backlit relative to clean plate
  std::vector<TrackingPoint> tracking;
  std::vector<int> missing_lights;  ///< rig lights without an OLAT frame for this camera
};

struct CheckResult {
  std::string session_path;
  std::string session_id;
  std::string rig_name;
  int light_count = 0;
  std::vector<CameraSummary> cameras;
  std::vector<FrameSummary> frames;  ///< every OLAT then tracking frame, per camera in list order
  std::vector<CheckLine> checks;
  Verdict verdict = Verdict::kPass;
  double seconds = 0.0;
  CheckOptions options;  ///< thresholds used (progress callback dropped)
};

/// Runs every check on `session`. Frames that cannot be read become FAIL
/// findings (naming camera, light and file), not errors. Returns a non-OK
/// Status only for bad options or a session that cannot be checked at all.
/// threads: 0 = all cores. Output is identical for any thread count.
io::Status CheckSession(const io::Session& session, const CheckOptions& options, CheckResult* result, int threads = 0);

namespace check_detail {
struct ScanState;
struct ScanStateDeleter {
  void operator()(ScanState* state) const;
};
}  // namespace check_detail

/// The check split around its OLAT reading pass, for a caller that decodes
/// every OLAT frame anyway (the pipeline's normals solve), so that a run
/// decodes each frame once: Begin() reads the per-camera reference frames,
/// the caller streams each camera's decoded OLAT rows into Rows(), and
/// Finish() reads only the frames that were not streamed completely, then
/// runs every check. The result is identical to CheckSession(), which is
/// Begin() + Finish() with nothing streamed.
class StreamedCheck {
 public:
  static io::Expected<std::unique_ptr<StreamedCheck>> Begin(const io::Session& session, const CheckOptions& options,
                                                            int threads = 0);
  ~StreamedCheck();
  StreamedCheck(const StreamedCheck&) = delete;
  StreamedCheck& operator=(const StreamedCheck&) = delete;

  /// Rows [y0, y1) of OLAT frame `frame` (index into the camera's olat list)
  /// of camera `camera` (index into session.cameras), decoded with the
  /// session's io::DecodeOptionsFor (CV_32FC1 or CV_32FC3, before any dark
  /// subtraction); `info` is the frame's reader info. Each frame's rows must
  /// arrive in order from row 0 (a frame whose rows do not is read again by
  /// Finish); different frames may arrive concurrently from different threads.
  void Rows(int camera, int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows);
  /// Bytes the check holds while camera `camera`'s frames are streamed in
  /// (per-frame accumulators), for the caller's memory plan.
  int64_t StreamBytes(int camera) const;
  /// Reads what was not streamed and runs every check.
  io::Status Finish(CheckResult* result);

 private:
  StreamedCheck() = default;
  struct Parts;
  std::unique_ptr<Parts> parts_;
};

/// A camera's id and the rotation taking rig directions to its frame.
struct CameraPose {
  std::string id;
  Eigen::Matrix3d camera_from_rig = Eigen::Matrix3d::Identity();
};

/// Rig-level calibration checks (appends four lines): unit directions,
/// duplicated directions/positions, coverage of each camera's camera-facing
/// hemisphere (camera frame +z half) and the condition number of the N x 3
/// light matrix. Near-field lights use the direction from the rig origin.
/// `cameras` empty = one pose "rig" with the identity.
void CheckCalibration(const io::Rig& rig, const std::vector<CameraPose>& cameras, const CheckOptions& options,
                      std::vector<CheckLine>* lines);

/// Machine-readable result: every check, value, thresholds, verdict, findings,
/// per-frame numbers (no thumbnails).
nlohmann::json CheckResultToJson(const CheckResult& result);
io::Status WriteCheckJson(const CheckResult& result, const std::string& path, bool overwrite);

/// Writes `<dir>/check_report.html`: one self-contained file (inline CSS and
/// SVG, thumbnails as data URIs, no scripts from elsewhere). Returns the path
/// in *html_path when non-null. Existing file is an error unless overwrite.
io::Status WriteCheckReport(const CheckResult& result, const std::string& dir, bool overwrite,
                            std::string* html_path = nullptr);
/// The HTML text itself (for tests).
std::string RenderCheckReportHtml(const CheckResult& result);

/// Exit code for a finished check (DESIGN.md): 0 pass/warn, 1 fail.
inline int ExitCodeFor(Verdict verdict) { return verdict == Verdict::kFail ? 1 : 0; }

}  // namespace lumenrig::solvers
