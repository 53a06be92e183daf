#pragma once
/// \file normals_stage.h
/// The normals stage: photometric stereo over one camera of a session,
/// streamed in row bands from every OLAT frame (io::BandReader) so peak
/// memory is set by a budget, not by the number of lights; then depth from
/// the normals. Used by `lumenrig normals` and by the demo.

#include <cstdint>
#include <functional>
#include <map>
#include <string>
#include <vector>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"
#include "lumenrig/solvers/integration.h"
#include "lumenrig/solvers/photometric_stereo.h"

namespace lumenrig::solvers {

struct NormalsOptions {
  PsOptions ps;
  /// Peak-memory budget in bytes for the whole stage (frames in flight,
  /// output maps, integration). The band height is chosen from it.
  int64_t mem_budget_bytes = int64_t{1} << 30;
  /// Integrate depth from the normals (Frankot-Chellappa without a mask,
  /// masked Poisson with the camera's mask).
  bool integrate_depth = true;
  /// Reference depth for metric depth (metres); 0 = distance from the camera
  /// to the rig origin (camera_from_rig translation) when known.
  double reference_depth_m = 0.0;
  /// Near-field iteration: stop when the mean normal change over solved
  /// pixels is below this (degrees) or after max iterations.
  double near_field_tolerance_deg = 0.05;
  int near_field_max_iterations = 10;
  /// Called with every OLAT frame's decoded rows on the first pass, before
  /// dark subtraction and normalisation (frame = index into the camera's olat
  /// list): each frame's rows in order from row 0, frames concurrently. Lets
  /// another consumer (the session check in `lumenrig run`) share the decode.
  std::function<void(int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows)> on_decoded_rows;
  /// Bytes the on_decoded_rows consumer holds; taken off the band budget.
  int64_t observer_bytes = 0;
  /// With integrate_depth: plan the depth but leave it to IntegrateDepth()
  /// (a caller that overlaps one camera's integration with the next one's
  /// reading).
  bool defer_depth = false;
};

/// Validates ranges (budget > 0, tolerances); message names the option.
io::Status ValidateNormalsOptions(const NormalsOptions& options);

struct NormalsResult {
  std::string session_id, camera_id;
  PsMethod method = PsMethod::kRobust;
  bool near_field = false;
  int lights = 0;
  cv::Mat normals;     ///< CV_32FC3, unit, camera frame; 0 where unsolved or outside the mask
  cv::Mat albedo;      ///< CV_32FC3, linear RGB
  cv::Mat confidence;  ///< CV_32FC1, 0..1
  cv::Mat mask;        ///< CV_8U, the camera's mask (empty when none)
  DepthMap depth;      ///< empty when integration was off
  int band_rows = 0;   ///< rows per band chosen from the budget
  int bands = 0;
  int64_t planned_bytes = 0;         ///< the plan's estimate of peak memory
  std::vector<int> all_zero_lights;  ///< lights whose frame is zero everywhere (warning)
  int near_field_iterations = 0;
  double near_field_change_deg = 0.0;
  double read_seconds = 0, solve_seconds = 0, integrate_seconds = 0;  ///< wall
  double read_cpu_seconds = 0, solve_cpu_seconds = 0;                 ///< process CPU time (all threads)
  /// Depth left to IntegrateDepth() (NormalsOptions::defer_depth): its
  /// settings and the peak memory it needs (maps included).
  bool depth_pending = false;
  IntegrationOptions depth_options;
  int64_t depth_bytes = 0;
};

/// Runs the depth integration SolveNormals planned and deferred
/// (result->depth_pending); no-op otherwise.
io::Status IntegrateDepth(NormalsResult* result, int threads = 0);

/// Solves `camera_id` ("" = the first camera) of `session`.
/// Frames: black level and encoding from the session (io::DecodeOptionsFor),
/// minus the dark frame when given, divided by the light's RGB intensity.
/// Light vectors in the camera frame: R(camera_from_rig) * direction, or the
/// light position mapped by camera_from_rig (near-field; needs
/// cameras[i].intrinsics). Errors (one line, naming file and key): unknown
/// camera, fewer than 3 lights, coplanar directions, frames of different
/// sizes, every frame zero, budget too small for one band, missing
/// intrinsics or reference depth for near-field lights.
io::Status SolveNormals(const io::Session& session, const std::string& camera_id, const NormalsOptions& options,
                        NormalsResult* out, int threads = 0);

/// Writes normals.exr (R,G,B = nx,ny,nz), albedo.exr (R,G,B),
/// confidence.exr (Y), depth.exr (Y; header lumenrig.depth_unit) as float
/// EXR, plus normals_preview.png (normals, albedo, depth side by side), into
/// `out_dir` (created). `provenance` goes into every EXR header. Refuses
/// existing files unless `overwrite`, checking all before writing any; files
/// are compressed concurrently on `threads` (0 = all cores) and removed
/// again if any of them fails.
/// The depth must not be pending (see FinishNormalsOutputs).
io::Status WriteNormalsOutputs(const NormalsResult& result, const std::string& out_dir,
                               const std::map<std::string, std::string>& provenance, bool overwrite, int threads = 0);

/// WriteNormalsOutputs for a result whose depth SolveNormals deferred
/// (NormalsOptions::defer_depth): the depth is integrated while normals,
/// albedo and confidence are compressed and written, then depth.exr and the
/// preview follow. Same checks, file names and no-partial-output rule;
/// adds the integration time to result->integrate_seconds.
io::Status FinishNormalsOutputs(NormalsResult* result, const std::string& out_dir,
                                const std::map<std::string, std::string>& provenance, bool overwrite, int threads = 0);

/// Names of the files WriteNormalsOutputs writes, in order (depth.exr also
/// while the depth is pending).
std::vector<std::string> NormalsOutputNames(const NormalsResult& result);

/// Normals, albedo and depth side by side as an 8-bit BGR image (normals as
/// (n + 1) / 2, albedo sRGB-encoded, depth near = bright). Panels of views
/// larger than 1024 pixels on their long side are area-averaged down to
/// 1024 (a picture to look at; the EXRs hold the data).
cv::Mat NormalsPreview(const NormalsResult& result);

}  // namespace lumenrig::solvers
