#pragma once
/// \file pipeline.h
/// `lumenrig run`: every stage for every camera of every session, as a TBB
/// flow graph (check -> normals, matte per camera -> assemble -> pairs),
/// resumable from content hashes.
///
/// Output folder layout (docs/pipeline.md):
///   <out>/<session>.h5                 ground truth of every camera + QA
///   <out>/<session>.pairs.h5           training pairs (with --envs)
///   <out>/<session>/<camera>/*.exr     per-stage maps (normals, albedo, ...)
///   <out>/<session>/check.json         QA results
///   <out>/<session>/stamps/*.json      one stamp per finished unit
///   <out>/.lumenrig-hashes.json        file-hash cache (size + mtime keyed)
/// A unit is up to date when its stamp's key (hash of stage version, the
/// options that affect its outputs, its input files' content and its
/// upstream units' keys) equals the current key and its outputs still hash as
/// recorded. Threads and memory budget never change outputs, so they are not
/// part of the key.

#include <cstdint>
#include <functional>
#include <memory>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"

namespace lumenrig::synth {

enum class StageKind { kCheck, kNormals, kMatte, kAssemble, kPairs };
const char* StageName(StageKind kind);

/// Everything `lumenrig run` takes. Stage option blocks are JSON objects so
/// that the part that affects a stage's outputs can be hashed and compared.
struct RunOptions {
  std::vector<std::string> sessions;  ///< session.json paths or folders
  std::string out_dir;
  std::vector<StageKind> stages = {StageKind::kCheck, StageKind::kNormals, StageKind::kMatte, StageKind::kAssemble,
                                   StageKind::kPairs};
  std::string envs_dir;  ///< empty: no pairs stage
  nlohmann::json check_options = nlohmann::json::object();
  nlohmann::json normals_options = nlohmann::json::object();
  nlohmann::json matte_options = nlohmann::json::object();
  nlohmann::json pairs_options = nlohmann::json::object();
  int threads = 0;                              ///< 0 = all cores
  int64_t mem_budget_bytes = int64_t{4} << 30;  ///< shared by every unit in flight
  bool force = false;                           ///< run later stages despite a QA FAIL
  /// Sharding across processes (MPI ranks): this process takes the sessions
  /// whose position in `sessions` is shard_index modulo shard_count.
  int shard_index = 0;
  int shard_count = 1;
  bool dry_run = false;
};

enum class UnitState { kUpToDate, kMissing, kStale, kBlocked };

/// One unit of work: a stage for a session (and camera).
struct UnitPlan {
  int session_index = -1;
  std::string session_id;
  std::string camera_id;  ///< empty for session-wide stages
  StageKind stage = StageKind::kCheck;
  UnitState state = UnitState::kMissing;
  std::string reason;  ///< why it runs, e.g. "options changed: method"
  uint64_t key = 0;
  uint64_t inputs_hash = 0;      ///< combined content hash of the unit's input files
  uint64_t upstream_hash = 0;    ///< combined keys of the units it derives from
  nlohmann::json options_slice;  ///< the options that affect its outputs
  std::vector<int> depends_on;   ///< indices into RunPlan::units

  /// Planned to run: its outputs are missing or stale.
  bool Due() const { return state == UnitState::kMissing || state == UnitState::kStale; }
};

struct RunPlan {
  std::vector<io::Session> sessions;
  std::vector<UnitPlan> units;
  /// Lines "<session> <camera> <stage>: <state> (<reason>)" for --dry-run.
  std::vector<std::string> Describe() const;
};

/// Per-stage totals for --stats.
struct StageStats {
  StageKind stage = StageKind::kCheck;
  int units_run = 0;
  int units_skipped = 0;
  double wall_s = 0;           ///< summed over the stage's units
  double cpu_s = 0;            ///< process CPU time while the stage's units ran
  int64_t peak_rss_bytes = 0;  ///< process peak RSS when the stage's last unit ended
};

struct RunReport {
  std::vector<StageStats> stages;
  std::vector<std::string> outputs;  ///< final files written or kept
  std::vector<std::string> qa_failed_sessions;
  double wall_s = 0;
  int64_t peak_rss_bytes = 0;
};

/// How a unit ended, for log lines. A session's check reads every OLAT frame
/// once and solves the session's due normals in the same pass, so its time
/// and theirs are reported apart.
struct UnitDone {
  /// Wall time of the unit's own work: for a check, without the normals it
  /// solved; for a normals unit solved in its check, its share of that pass.
  double wall_s = 0;
  /// What else the time covers or where the work ran; empty when nothing.
  std::string note;
};

/// Progress events for a terminal display or log lines.
struct RunEvents {
  /// `note`: what else the unit does (a check solving normals), or empty.
  std::function<void(const UnitPlan&, const std::string& note)> unit_started;
  std::function<void(const UnitPlan&, const io::Status&, const UnitDone&)> unit_finished;
  /// fraction in [0,1] of the current unit (stages that report it)
  std::function<void(const UnitPlan&, double fraction)> unit_progress;
};

/// Expected work of each unit of `plan` (0 for units that will not run), in
/// frame decodes, for the progress display's ETA: units differ in cost by
/// two orders of magnitude, so counting them alike misleads. A due session
/// check decodes every frame of the session once and, when its normals are
/// due too, solves them in the same pass (their own units then only record
/// it). Rough costs relative to a decode (common practice for an ETA; from
/// `run --stats` on a 2048x2048 two-camera session, docs/pipeline.md):
/// solving the normals half a decode per OLAT frame, a matte about 65
/// frames, assembling 30 frames per camera, the pairs one per OLAT frame.
std::vector<double> UnitWeights(const RunPlan& plan);

/// Loads the sessions, computes every unit's key and state. Bad sessions or
/// options are a BadInput naming the file.
io::Status PlanRun(const RunOptions& options, RunPlan* plan);

/// Executes the stale and missing units of `plan` on a TBB flow graph.
/// Returns DataFail when a session's QA failed (and its later stages were
/// skipped because `force` was off).
io::Status ExecuteRun(const RunOptions& options, RunPlan* plan, const RunEvents& events, RunReport* report);

}  // namespace lumenrig::synth
