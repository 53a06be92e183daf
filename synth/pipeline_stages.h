#pragma once
// Internal: how each stage plugs into the pipeline (synth/pipeline.cpp).
#include <functional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "lumenrig/synth/pipeline.h"

namespace lumenrig::synth::internal {

/// A per-camera normals unit that a check unit solves inside its own reading
/// pass (one decode of every OLAT frame for both stages). The check fills
/// outputs/extra and sets done; a unit it could not solve runs on its own.
struct FusedNormalsUnit {
  const io::Camera* camera = nullptr;
  int camera_index = -1;  ///< index into session.cameras
  std::string unit_dir;   ///< <out>/<session>/<camera>
  bool done = false;
  std::vector<std::string> outputs;
  nlohmann::json extra = nlohmann::json::object();
  double wall_s = 0, cpu_s = 0;  ///< the solve's share of the check unit (for --stats)
};

struct StageUnitContext {
  const RunOptions* options = nullptr;
  const io::Session* session = nullptr;
  const io::Camera* camera = nullptr;  ///< null for session-wide stages
  std::string unit_dir;                ///< where the unit writes (created)
  std::string session_out_dir;         ///< <out>/<session>
  std::string final_dir;               ///< <out>
  int threads = 0;
  int64_t mem_budget_bytes = 0;
  uint64_t unit_key = 0;  ///< the unit's key (for resumable outputs)
  std::function<void(double)> progress;
  /// Check units only: the session's normals units that are due to run (may
  /// be empty); see FusedNormalsUnit.
  std::vector<FusedNormalsUnit>* fused_normals = nullptr;
};

struct StageAdapter {
  StageKind kind = StageKind::kCheck;
  int version = 1;  ///< bump when the stage's outputs change for the same inputs
  bool per_camera = false;
  /// Stages whose keys feed this one's key (same session; same camera for
  /// per-camera upstreams of per-camera stages, all cameras otherwise).
  std::vector<StageKind> key_upstream;
  /// Stages that must finish first without affecting the key (QA gate).
  std::vector<StageKind> order_upstream;
  std::function<nlohmann::json(const RunOptions&)> options_slice;
  std::function<std::vector<std::string>(const RunOptions&, const io::Session&, const io::Camera*)> input_files;
  /// Runs the unit, returning the absolute paths of the files it produced
  /// and anything to keep in the stamp (e.g. the QA verdict).
  std::function<io::Status(const StageUnitContext&, std::vector<std::string>* outputs, nlohmann::json* extra)> run;
  /// True when a finished unit's stamp says later stages must not run.
  std::function<bool(const nlohmann::json& extra)> blocks_downstream;
};

/// The stages compiled into this build, in pipeline order.
const std::vector<StageAdapter>& StageAdapters();

/// Test hook: when LUMENRIG_TEST_KILL_AT equals `point`, the process kills
/// itself with SIGKILL (used by the kill-and-resume tests).
void MaybeKillAt(const std::string& point);

}  // namespace lumenrig::synth::internal
