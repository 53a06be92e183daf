#pragma once
/// \file pairs.h
/// Relit training pairs written to HDF5 in the `lumenrig.pairs/1` layout of
/// shared DESIGN.md (extended in docs/formats.md).
///
/// Sample i (0-based) is fully determined by (seed, i) and the run's
/// configuration: batch b = i / batch_size picks the (session, camera)
/// round-robin; DeriveSeed(seed, i, tag) draws the input and target maps and
/// rotations, the background view and the camera simulation. Samples of one
/// batch share one pass over the camera's OLAT stack (one GEMM). Output is
/// identical for any thread count and memory budget; `--resume` recomputes
/// the batch holding the first missing sample and appends from there, so an
/// interrupted run resumes to exactly the uninterrupted result.
///
/// Split by subject: FNV-1a 64 hash of the subject id (session Id()) mod 100:
/// < 80 train, < 90 validation, else test; every sample of a subject lands
/// in the same split (with one subject everything is in one split).

#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"
#include "lumenrig/synth/lightmaps.h"
#include "lumenrig/synth/relight.h"

namespace lumenrig::synth {

inline constexpr const char* kPairsFormat = "lumenrig.pairs/1";

/// Per-camera auxiliary targets at the camera's resolution.
struct AuxMaps {
  cv::Mat albedo;      ///< CV_32FC3 linear albedo
  cv::Mat normals;     ///< CV_32FC3 unit normals, camera frame, 0 outside the subject
  cv::Mat alpha;       ///< CV_32FC1 0..1
  std::string source;  ///< where they came from (provenance)
};

/// Where albedo / normals / alpha come from: a small pluggable function.
using AuxSource = std::function<io::Status(const io::Session&, const io::Camera&, AuxMaps*)>;

/// Default source: the simulator's ground truth <session>/truth/<camera>/
/// {normals,albedo,alpha}.exr (alpha falls back to the camera's mask).
io::Status TruthAuxSource(const io::Session& session, const io::Camera& camera, AuxMaps* out);

/// Split of a subject: "train", "validation" or "test" (see file comment).
std::string SplitForSubject(const std::string& subject);

struct PairsOptions {
  std::vector<std::string> sessions;  ///< session folders or session.json files
  std::string envs_dir;               ///< folder of *.exr / *.hdr lat-long maps
  std::string out;                    ///< output .h5
  int64_t count = 0;                  ///< samples to write
  uint64_t seed = 0;
  int width = 256, height = 256;  ///< output size (centre crop to aspect, then area resize)
  int batch_size = 16;            ///< samples per stack pass (part of the result: fixed, recorded)
  std::vector<double> specular_exponents{1, 16, 32, 64};
  double target_luminance = 0.5;      ///< each map normalised to this mean BT.709 luminance
  double background_yaw_deg = 25.0;   ///< background view yaw drawn in +-this
  double background_pitch_deg = 8.0;  ///< background view pitch drawn in +-this
  /// Horizontal field of view of the background view; 0 = the camera's own
  /// intrinsics (then 40 deg when a camera has none).
  double background_fov_deg = 0.0;
  CameraSimOptions camera_sim;
  LightWeightOptions weights;
  int64_t mem_budget_bytes = int64_t{1} << 30;
  bool resume = false;
  bool force = false;
  int threads = 0;
  AuxSource aux_source = TruthAuxSource;
  /// Testing only: return an error after writing this many complete samples
  /// plus one field of the next (simulates a killed run). < 0 = off.
  int64_t debug_abort_after = -1;
};

struct PairsSummary {
  int64_t samples_written = 0;  ///< by this run
  int64_t samples_total = 0;    ///< in the file
  int64_t resumed_from = 0;     ///< samples already present when resuming
  int64_t train = 0, validation = 0, test = 0;
  int64_t clamped_texels = 0;  ///< over all maps
  double max_uncovered_energy_fraction = 0;
  int envs = 0;
  std::vector<std::string> session_ids;
  double seconds = 0;
  double relight_seconds = 0;
};

/// The run's configuration as JSON (stored as the root `config` attribute;
/// resume refuses a file whose config differs).
nlohmann::json PairsConfigJson(const PairsOptions& options);

/// Writes (or resumes) the pairs file. Errors: existing output without
/// resume/force, empty env folder, bad maps, sessions without cameras,
/// rigs without directions/positions, missing auxiliary maps.
io::Status WritePairs(const PairsOptions& options, PairsSummary* summary = nullptr);

/// Columns of the contact sheet, left to right.
inline constexpr const char* kPairsPreviewColumns[] = {"input",   "target", "albedo",
                                                       "normals", "alpha",  "light_diffuse"};

/// A contact sheet (8-bit BGR) of up to `max_samples` samples spread over a
/// pairs file: one row per sample, one 128-px-high tile per column.
io::Expected<cv::Mat> PairsContactSheet(const std::string& h5_path, int max_samples);

}  // namespace lumenrig::synth
