#pragma once
/// \file relight.h
/// Image-based relighting of OLAT captures (Debevec et al. 2000, "Acquiring
/// the Reflectance Field of a Human Face"): relit = sum_i w_i * OLAT_i per RGB
/// channel, where w_i is the environment's radiance integrated over light i's
/// share of the sphere divided by the light's calibrated intensity (shared
/// DESIGN.md), so the relit image is in the map's radiance units.
///
/// Relighting is streamed in row bands from all frames (memory set by a
/// budget, not by the light count) and batched: K maps are applied at once as
/// one Eigen GEMM (pixels x N) * (N x K) per channel, so the stack is read once
/// per batch.

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include <Eigen/Core>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"

namespace lumenrig::synth {

/// Each light's direction in the rig frame: `direction`, or for a near-field
/// light the unit vector from the rig origin to its `position`. BadInput
/// (naming `source`, the light index and id) for a light with neither, a
/// position at the origin, or an empty rig.
io::Expected<std::vector<Eigen::Vector3d>> RigLightDirections(const io::Rig& rig, const std::string& source);

/// Assignment of lat-long texels to lights (spherical Voronoi cells of the rig
/// directions, nearest by angle), computed once per rig and map resolution.
struct LightCells {
  int width = 0, height = 0;
  std::vector<int32_t> cell;                ///< per texel: light index, or -1 when uncovered
  std::vector<double> cell_solid_angle_sr;  ///< per light: solid angle of its texels
  double coverage_angle_deg = 0;            ///< texels farther than this from every light are uncovered
};

struct LightWeightOptions {
  /// Texels farther than this angle from every light are "uncovered": their
  /// energy is dropped and reported. 0 = automatic: the largest angle
  /// between any light and its nearest neighbour (the dome's own spacing),
  /// so the region below a dome's lowest ring is uncovered.
  double coverage_angle_deg = 0.0;
  /// Maps taller than this are area-resampled to this height before
  /// integration (Voronoi cells are much larger than such texels).
  int integration_height = 256;
};

/// Builds the Voronoi cells for a `height` x 2 height lat-long grid.
io::Expected<LightCells> BuildLightCells(const io::Rig& rig, int height, const LightWeightOptions& options,
                                         const std::string& source = "rig");

/// Relighting weights for one map.
struct LightWeights {
  /// N_lights x 3 (RGB), indexed like rig.lights, already divided by the
  /// light's intensity: relit = sum_i weights(i, c) * frame_i(c).
  Eigen::MatrixXd weights;
  double uncovered_energy_fraction = 0;  ///< BT.709-luminance share of the map's energy dropped
  double total_energy = 0;               ///< integral of BT.709 luminance over the sphere
};

/// w_i = integral over cell i of L dw (or, when the light has solid_angle_sr,
/// the cell's mean radiance times solid_angle_sr; a light whose cell has no
/// texel then uses the radiance sampled at its direction), divided by the
/// light's intensity per channel; a near-field light's weight is multiplied
/// by |position|^2 (its frames fall off as 1/d^2, docs/formats.md; the
/// subject is taken to be at the rig origin). `latlong` must be cells.height x 2 height
/// (see LightWeightOptions::integration_height and ResampleLatLong).
LightWeights ComputeLightWeights(const cv::Mat& latlong, const io::Rig& rig, const LightCells& cells);

/// Convenience: resamples `latlong` to options.integration_height when
/// taller, builds the cells and computes the weights.
io::Expected<LightWeights> ComputeLightWeights(const cv::Mat& latlong, const io::Rig& rig,
                                               const LightWeightOptions& options);

/// A camera's OLAT stack, read in row bands. Frames are linear, black level
/// and dark frame already subtracted.
class OlatSource {
 public:
  virtual ~OlatSource() = default;
  virtual int width() const = 0;
  virtual int height() const = 0;
  /// Rig light index (into rig.lights) of each frame.
  virtual const std::vector<int>& light_index() const = 0;
  int count() const { return static_cast<int>(light_index().size()); }
  /// Memory the source holds besides the bands it returns (decoder buffers);
  /// RelightBatch takes it out of the budget.
  virtual int64_t overhead_bytes() const { return 0; }
  /// Rows [y0, y1) of every frame into (*bands)[i] (CV_32FC3).
  virtual io::Status ReadBand(int y0, int y1, int threads, std::vector<cv::Mat>* bands) = 0;
};

/// An in-memory stack (tests, benchmarks). Frames CV_32FC3, equal sizes.
std::unique_ptr<OlatSource> MakeMemoryOlatSource(std::vector<cv::Mat> frames, std::vector<int> light_index);

/// A camera's stack on disk: one io::BandReader per frame, decoded with the
/// session's encoding and black level; the camera's dark frame (when given)
/// is subtracted. Errors name the frame file.
io::Expected<std::unique_ptr<OlatSource>> OpenOlatSource(const io::Session& session, const io::Camera& camera);

struct RelightOptions {
  /// Bytes for the band of frames read at once plus per-thread scratch (not
  /// counting the K output images). Band height is a multiple of kRowsPerChunk.
  int64_t mem_budget_bytes = int64_t{512} << 20;
  int threads = 0;
};

/// Rows per GEMM chunk. Chunks are aligned to multiples of this from row 0 so
/// results are bit-identical for any thread count and memory budget.
inline constexpr int kRowsPerChunk = 8;

struct RelightStats {
  int bands = 0;
  int band_rows = 0;
  double read_seconds = 0;
  double gemm_seconds = 0;
};

/// Relights the stack under K maps at once. `weights[k]` is N_rig x 3 (rows
/// indexed like rig.lights; see ComputeLightWeights). Output: K images
/// height x width CV_32FC3. Each map's result depends only on its column
/// position in `weights` and K, never on threads or the budget.
io::Status RelightBatch(OlatSource* stack, const std::vector<Eigen::MatrixXd>& weights, const RelightOptions& options,
                        std::vector<cv::Mat>* relit, RelightStats* stats = nullptr);

}  // namespace lumenrig::synth

namespace lumenrig::synth {

struct EnvMap;

/// Options of the `relight` stage.
struct RelightCameraOptions {
  double rotate_deg = 0.0;        ///< applied to every map (RotateLatLong)
  double target_luminance = 0.0;  ///< > 0: NormaliseExposure to this mean BT.709 luminance first
  double exposure_ev = 0.0;       ///< then multiply by 2^exposure_ev
  LightWeightOptions weights;
  RelightOptions relight;
};

/// What a relight run did, for the CLI line and the pipeline's provenance.
struct RelightSummary {
  int maps = 0;
  int lights = 0;
  int width = 0, height = 0;
  int64_t clamped_texels = 0;                     ///< over all maps (from loading)
  std::vector<double> uncovered_energy_fraction;  ///< per map
  std::vector<double> exposure_scale;             ///< per map, total factor applied
  RelightStats stats;
  double seconds = 0;
};

/// Relights one camera of a session under `maps` (all in one batch): reads
/// the OLAT stack once in bands. `camera_id` empty = the first camera.
/// Output: one CV_32FC3 image per map in the maps' radiance units.
io::Status RelightCamera(const io::Session& session, const std::string& camera_id, const std::vector<EnvMap>& maps,
                         const RelightCameraOptions& options, std::vector<cv::Mat>* relit,
                         RelightSummary* summary = nullptr);

}  // namespace lumenrig::synth
