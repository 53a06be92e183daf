#pragma once
/// \file matte_stage.h
/// The matte stage: reads a camera's matting frames from a session, runs one
/// of the methods of matting.h and writes alpha.exr, foreground.exr,
/// trimap.png and confidence.exr (DESIGN.md outputs; docs/matting.md).

#include <map>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"
#include "lumenrig/solvers/matting.h"

namespace lumenrig::solvers {

enum class MatteMethod { kAuto, kBacklit, kTriangulation, kDifference };

/// "auto", "backlit", "triangulation", "difference".
const char* MatteMethodName(MatteMethod method);
io::Status ParseMatteMethod(const std::string& text, MatteMethod* method);

struct MatteOptions {
  /// kAuto picks triangulation when the camera lists 2+ matte_pairs, else
  /// backlit when it has clean_plate and backlit, else difference (clean_plate
  /// and lit).
  MatteMethod method = MatteMethod::kAuto;
  /// User trimap (PNG/any image: 0 background, 255 foreground, other values
  /// unknown). Replaces the automatic trimap of the difference method; for
  /// the other methods its known labels force alpha to 0 / 1.
  std::string trimap_path;
  /// Per-channel frame noise sigma in linear units; 0 = estimate per method.
  double noise_sigma = 0.0;
  BacklitOptions backlit;
  TriangulationOptions triangulation;
  TrimapOptions trimap;  ///< band_px sets the unknown band width
  ClosedFormOptions closed_form;
  ForegroundOptions foreground;
};

/// Reads the JSON option block of `lumenrig run` ({"method": "auto",
/// "band_px": 8, "trimap": "path", "noise_sigma": 0, "epsilon": 1e-5}); unknown keys
/// are an error naming `source` and the key.
io::Status MatteOptionsFromJson(const nlohmann::json& j, const std::string& source, MatteOptions* options);
/// The options that affect the outputs, as JSON (stored in the EXR headers).
nlohmann::json MatteOptionsToJson(const MatteOptions& options);

struct MatteResult {
  std::string camera_id;
  MatteMethod method = MatteMethod::kAuto;  ///< the method actually run
  cv::Mat alpha;                            ///< CV_32FC1 in [0, 1]
  cv::Mat foreground;               ///< CV_32FC3 un-premultiplied linear RGB; empty when no lit frame exists (backlit)
  cv::Mat trimap;                   ///< CV_8UC1: 0 background, 128 unknown, 255 foreground
  cv::Mat confidence;               ///< CV_32FC1 in [0, 1]; 0 where the solve failed (plate zeros)
  double noise_sigma = 0.0;         ///< per-channel frame sigma used
  int64_t unknown_pixels = 0;       ///< band pixels solved (difference method)
  bool direct_solve = false;        ///< band system solved by sparse factorisation (difference method)
  int cg_iterations = 0;            ///< conjugate-gradient iterations when not direct
  std::vector<std::string> inputs;  ///< session keys read, e.g. "cameras[0].clean_plate"
  std::vector<std::string> notes;   ///< one-line remarks for the user (e.g. no foreground)
  nlohmann::json options;           ///< MatteOptionsToJson of the run
};

/// Runs the matte stage for one camera (`camera_id` empty = the first
/// camera). Bad input (one-line Status naming the file and key): unknown
/// camera, a key the method needs is absent (e.g. "cameras[0].backlit"),
/// frames of different sizes, a trimap of the wrong size, undecodable files.
/// Plate zeros are not errors: they get confidence 0.
io::Status ComputeMatte(const io::Session& session, const std::string& camera_id, const MatteOptions& options,
                        MatteResult* out, int threads = 0);

/// The files WriteMatteOutputs writes into `out_dir` for `result`.
std::vector<std::string> MatteOutputFiles(const MatteResult& result, const std::string& out_dir);

/// Writes alpha.exr (float, Y), foreground.exr (half, RGB; skipped when
/// empty), trimap.png (8-bit) and confidence.exr (float, Y) atomically, with
/// provenance header attributes (tool, version, session, camera, method,
/// options). Refuses to overwrite any existing one unless `force`; checks all
/// paths before writing the first file. The files are written concurrently
/// on up to `threads` threads (0 = all cores); when one fails, the others this
/// call wrote are removed and the first failure in file order is returned.
io::Status WriteMatteOutputs(const MatteResult& result, const io::Session& session, const std::string& out_dir,
                             bool force, int threads = 0);

/// A vertical two-colour gradient background (linear RGB, CV_32FC3), e.g. for
/// the demo composite.
cv::Mat GradientBackground(cv::Size size, const cv::Vec3f& top_rgb, const cv::Vec3f& bottom_rgb);

/// Composites the matte over `background` (CV_32FC3 of the matte's size) and
/// writes an sRGB PNG preview (io::ToPreview8 with `exposure`). Error when the
/// result has no foreground.
io::Status WriteCompositePng(const MatteResult& result, const cv::Mat& background, float exposure,
                             const std::string& path, bool overwrite);

}  // namespace lumenrig::solvers
