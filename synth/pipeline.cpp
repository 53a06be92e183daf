#include "lumenrig/synth/pipeline.h"

#include <atomic>
#include <chrono>
#include <csignal>
#include <cstdlib>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <map>
#include <mutex>
#include <set>

#include <tbb/flow_graph.h>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/content_hash.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/process_stats.h"
#include "pipeline_stages.h"

namespace fs = std::filesystem;
using nlohmann::json;

namespace lumenrig::synth {

const char* StageName(StageKind kind) {
  switch (kind) {
    case StageKind::kCheck: return "check";
    case StageKind::kNormals: return "normals";
    case StageKind::kMatte: return "matte";
    case StageKind::kAssemble: return "assemble";
    case StageKind::kPairs: return "pairs";
  }
  return "?";
}

namespace internal {
void MaybeKillAt(const std::string& point) {
  const char* at = std::getenv("LUMENRIG_TEST_KILL_AT");
  if (at != nullptr && point == at) std::raise(SIGKILL);
}
}  // namespace internal

namespace {

using internal::StageAdapter;

const StageAdapter* FindAdapter(StageKind kind) {
  for (const auto& a : internal::StageAdapters())
    if (a.kind == kind) return &a;
  return nullptr;
}

std::string HashCachePath(const RunOptions& o) {
  const std::string name =
      o.shard_count > 1 ? fmt::format(".lumenrig-hashes.{}.json", o.shard_index) : std::string(".lumenrig-hashes.json");
  return (fs::path(o.out_dir) / name).string();
}

std::string SessionOutDir(const RunOptions& o, const io::Session& s) { return (fs::path(o.out_dir) / s.Id()).string(); }

std::string StampPath(const RunOptions& o, const UnitPlan& u, const io::Session& s) {
  std::string name = StageName(u.stage);
  if (!u.camera_id.empty()) name += "." + u.camera_id;
  return (fs::path(SessionOutDir(o, s)) / "stamps" / (name + ".json")).string();
}

json ReadStamp(const std::string& path) {
  std::ifstream in(path);
  if (!in) return json();
  try {
    return json::parse(in);
  } catch (const std::exception&) {
    return json();  // a damaged stamp means "run again"
  }
}

/// Names of top-level keys whose values differ between two option objects.
std::string ChangedKeys(const json& before, const json& now) {
  std::string keys;
  auto add = [&](const std::string& k) { keys += (keys.empty() ? "" : ", ") + k; };
  for (const auto& [k, v] : now.items())
    if (!before.contains(k) || before.at(k) != v) add(k);
  for (const auto& [k, v] : before.items())
    if (!now.contains(k)) add(k);
  return keys.empty() ? "options" : keys;
}

std::string NowUtc() {
  const std::time_t t = std::time(nullptr);
  char buf[32];
  std::strftime(buf, sizeof(buf), "%Y-%m-%dT%H:%M:%SZ", std::gmtime(&t));
  return buf;
}

}  // namespace

std::vector<double> UnitWeights(const RunPlan& plan) {
  constexpr double kSolvePerOlatFrame = 0.5, kMatte = 65, kAssemblePerCamera = 30;
  auto frames = [](const io::Camera& c) {
    double n = static_cast<double>(c.olat.size() + c.tracking.size() + 2 * c.matte_pairs.size());
    for (const std::string* f : {&c.dark, &c.clean_plate, &c.backlit, &c.lit}) n += f->empty() ? 0 : 1;
    return n;
  };
  std::vector<double> w(plan.units.size(), 0.0);
  std::vector<int> check_of(plan.sessions.size(), -1);  // a due check unit per session
  for (size_t k = 0; k < plan.units.size(); ++k)
    if (plan.units[k].stage == StageKind::kCheck && plan.units[k].Due())
      check_of[static_cast<size_t>(plan.units[k].session_index)] = static_cast<int>(k);
  for (size_t k = 0; k < plan.units.size(); ++k) {
    const UnitPlan& u = plan.units[k];
    if (!u.Due()) continue;
    const io::Session& s = plan.sessions[static_cast<size_t>(u.session_index)];
    const io::Camera* cam = u.camera_id.empty() ? nullptr : s.FindCamera(u.camera_id);
    switch (u.stage) {
      case StageKind::kCheck:
        for (const auto& c : s.cameras) w[k] += frames(c);
        break;
      case StageKind::kNormals: {
        const double olat = cam ? static_cast<double>(cam->olat.size()) : 0.0;
        const int check = check_of[static_cast<size_t>(u.session_index)];
        if (check >= 0)
          w[static_cast<size_t>(check)] += kSolvePerOlatFrame * olat;  // solved in the check's pass
        else
          w[k] = (1.0 + kSolvePerOlatFrame) * olat;
        break;
      }
      case StageKind::kMatte: w[k] = kMatte; break;
      case StageKind::kAssemble: w[k] = kAssemblePerCamera * static_cast<double>(s.cameras.size()); break;
      case StageKind::kPairs:
        for (const auto& c : s.cameras) w[k] += static_cast<double>(c.olat.size());
        break;
    }
  }
  return w;
}

std::vector<std::string> RunPlan::Describe() const {
  std::vector<std::string> lines;
  for (const auto& u : units) {
    const char* state = "";
    switch (u.state) {
      case UnitState::kUpToDate: state = "up to date"; break;
      case UnitState::kMissing: state = "will run"; break;
      case UnitState::kStale: state = "will rerun"; break;
      case UnitState::kBlocked: state = "blocked"; break;
    }
    lines.push_back(fmt::format("{:<20} {:<8} {:<9} {}{}", u.session_id, u.camera_id.empty() ? "-" : u.camera_id,
                                StageName(u.stage), state, u.reason.empty() ? "" : " (" + u.reason + ")"));
  }
  return lines;
}

io::Status PlanRun(const RunOptions& options, RunPlan* plan) {
  if (options.sessions.empty()) return io::Status::BadInput("run: no session given");
  if (options.out_dir.empty()) return io::Status::BadInput("run: --out is required");
  if (options.mem_budget_bytes < (int64_t{64} << 20))
    return io::Status::BadInput(
        fmt::format("--mem-budget: {} bytes is below the 64 MiB minimum", options.mem_budget_bytes));
  *plan = RunPlan();
  if (options.shard_count < 1 || options.shard_index < 0 || options.shard_index >= options.shard_count)
    return io::Status::Internal("run: invalid shard");
  std::map<std::string, std::string> seen_ids;
  for (size_t i = 0; i < options.sessions.size(); ++i) {
    if (static_cast<int>(i % static_cast<size_t>(options.shard_count)) != options.shard_index) continue;
    const std::string& path = options.sessions[i];
    auto s = io::LoadSession(path);
    if (!s.ok()) return s.status();
    const std::string id = s->Id();
    if (seen_ids.count(id))
      return io::Status::BadInput(
          fmt::format("{}: session id \"{}\" also used by {}; outputs would collide", s->path, id, seen_ids[id]));
    seen_ids[id] = s->path;
    plan->sessions.push_back(std::move(s).value());
  }

  io::FileHashCache hashes(HashCachePath(options));
  {
    // Hash every input file once, on all threads, before the units are
    // planned (which then find each hash in the cache): the files are read
    // whole, so hashing them one by one would leave the other cores idle
    // for as long as it takes to read the session.
    std::vector<std::string> files;
    std::set<std::string> seen;
    for (const auto& session : plan->sessions)
      for (const auto& adapter : internal::StageAdapters()) {
        if (adapter.kind == StageKind::kPairs && options.envs_dir.empty()) continue;
        std::vector<const io::Camera*> cams;
        if (adapter.per_camera) {
          for (const auto& c : session.cameras) cams.push_back(&c);
        } else {
          cams.push_back(nullptr);
        }
        for (const io::Camera* cam : cams)
          for (const auto& f : adapter.input_files(options, session, cam))
            if (seen.insert(f).second) files.push_back(f);
      }
    std::vector<io::Status> errors(files.size());
    io::ParallelFor(0, static_cast<int64_t>(files.size()), 1, options.threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) {
        auto h = hashes.Hash(files[static_cast<size_t>(i)]);
        if (!h.ok()) errors[static_cast<size_t>(i)] = h.status();
      }
    });
    for (const auto& st : errors) LUMENRIG_RETURN_IF_ERROR(st);
  }

  auto selected = [&](StageKind k) {
    for (auto s : options.stages)
      if (s == k) return true;
    return false;
  };

  for (int si = 0; si < static_cast<int>(plan->sessions.size()); ++si) {
    const io::Session& session = plan->sessions[static_cast<size_t>(si)];
    // Units of this session, keyed by (stage, camera).
    std::map<std::pair<StageKind, std::string>, int> index;
    for (const auto& adapter : internal::StageAdapters()) {
      if (adapter.kind == StageKind::kPairs && options.envs_dir.empty()) continue;
      std::vector<const io::Camera*> cams;
      if (adapter.per_camera) {
        for (const auto& c : session.cameras) cams.push_back(&c);
      } else {
        cams.push_back(nullptr);
      }
      for (const io::Camera* cam : cams) {
        UnitPlan u;
        u.session_index = si;
        u.session_id = session.Id();
        u.camera_id = cam ? cam->id : "";
        u.stage = adapter.kind;
        // Upstream units: key-relevant ones first, then ordering-only ones.
        uint64_t upstream = 0;
        auto link = [&](StageKind k, bool for_key) {
          for (const auto& [key, ui] : index) {
            if (key.first != k) continue;
            if (cam != nullptr && !key.second.empty() && key.second != cam->id) continue;
            u.depends_on.push_back(ui);
            if (for_key) upstream = io::CombineHashes(upstream, plan->units[static_cast<size_t>(ui)].key);
          }
        };
        for (StageKind k : adapter.key_upstream) link(k, true);
        for (StageKind k : adapter.order_upstream) link(k, false);

        uint64_t inputs = 0;
        for (const auto& f : adapter.input_files(options, session, cam)) {
          auto h = hashes.Hash(f);
          if (!h.ok()) return h.status();
          inputs = io::CombineHashes(inputs, *h);
        }
        const json slice = adapter.options_slice(options);
        u.inputs_hash = inputs;
        u.upstream_hash = upstream;
        u.options_slice = slice;
        u.key = io::CombineHashes(io::HashString(fmt::format("{}/{}", StageName(adapter.kind), adapter.version)),
                                  io::CombineHashes(io::HashString(slice.dump()), io::CombineHashes(inputs, upstream)));

        // Compare with the stamp of the last finished run.
        const json stamp = ReadStamp(StampPath(options, u, session));
        if (stamp.is_null()) {
          u.state = UnitState::kMissing;
          u.reason = "no finished output";
        } else if (stamp.value("key", "") == io::HashHex(u.key)) {
          u.state = UnitState::kUpToDate;
          const json recorded = stamp.value("outputs", json::object());
          for (const auto& [rel, hex] : recorded.items()) {
            const std::string abs = (fs::path(options.out_dir) / rel).string();
            auto h = io::HashFile(abs);
            if (!h.ok() || io::HashHex(*h) != hex.get<std::string>()) {
              u.state = UnitState::kStale;
              u.reason = "output missing or modified: " + rel;
              break;
            }
          }
        } else {
          u.state = UnitState::kStale;
          if (stamp.value("options", json()) != slice) {
            const json before = stamp.value("options", json::object());
            u.reason = "options changed: " + ChangedKeys(before, slice);
          } else if (stamp.value("inputs_hash", "") != io::HashHex(inputs)) {
            u.reason = "input files changed";
          } else if (stamp.value("upstream_hash", "") != io::HashHex(upstream)) {
            u.reason = "upstream stage reran";
          } else {
            u.reason = "stage version changed";
          }
        }
        // A stale upstream forces a rerun even when our own stamp agrees.
        if (u.state == UnitState::kUpToDate) {
          for (int d : u.depends_on) {
            const UnitPlan& up = plan->units[static_cast<size_t>(d)];
            if (up.state != UnitState::kUpToDate && std::find(adapter.key_upstream.begin(), adapter.key_upstream.end(),
                                                              up.stage) != adapter.key_upstream.end()) {
              u.state = UnitState::kStale;
              u.reason = std::string("upstream ") + StageName(up.stage) + " will run";
              break;
            }
          }
        }
        if (!selected(adapter.kind) && u.state != UnitState::kUpToDate) {
          u.state = UnitState::kBlocked;
          u.reason = "stage not selected with --stages";
        }
        for (int d : u.depends_on) {
          const UnitPlan& up = plan->units[static_cast<size_t>(d)];
          if (up.state == UnitState::kBlocked && u.state != UnitState::kUpToDate) {
            u.state = UnitState::kBlocked;
            u.reason = std::string("needs ") + StageName(up.stage) + " (" + up.reason + ")";
          }
        }
        index[{adapter.kind, u.camera_id}] = static_cast<int>(plan->units.size());
        plan->units.push_back(u);
      }
    }
  }
  // Selected stages that are unavailable in this build would silently vanish.
  for (StageKind k : options.stages) {
    if (FindAdapter(k) == nullptr)
      return io::Status::BadInput(fmt::format("--stages: stage \"{}\" is not available in this build", StageName(k)));
  }
  if (!options.dry_run) {
    io::Status s = io::EnsureDirectory(options.out_dir);
    if (!s.ok()) return s;
    s = hashes.Save();
    if (!s.ok()) return s;
  }
  return io::Status::Ok();
}

namespace {

/// Execution state shared by the flow-graph bodies.
struct Executor {
  const RunOptions* options = nullptr;
  RunPlan* plan = nullptr;
  const RunEvents* events = nullptr;
  RunReport* report = nullptr;
  int64_t unit_budget = 0;
  std::vector<std::atomic<int>> remaining;
  std::vector<int> skipped;  // 1 = skipped because of a QA gate or failure
  std::vector<std::vector<int>> dependents;
  std::mutex mutex;  // guards report, first_error, skipped, qa sets
  io::Status first_error;
  std::vector<std::string> qa_failed;
  /// Normals units solved inside their session's check unit (one decode of
  /// every OLAT frame): index -> what the check produced for them.
  std::map<int, internal::FusedNormalsUnit> fused;
  tbb::flow::function_node<int>* unit_node = nullptr;
  tbb::flow::function_node<int>* session_node = nullptr;

  explicit Executor(size_t n) : remaining(n), skipped(n, 0), dependents(n) {}

  void Dispatch(int u) {
    UnitPlan& unit = plan->units[static_cast<size_t>(u)];
    bool skip;
    {
      std::lock_guard<std::mutex> lock(mutex);
      skip = skipped[static_cast<size_t>(u)] != 0;
    }
    if (skip || unit.state == UnitState::kUpToDate || unit.state == UnitState::kBlocked) {
      if (unit.state == UnitState::kUpToDate) GateFromStamp(u);
      Finish(u, skip || unit.state == UnitState::kBlocked);
      return;
    }
    const StageAdapter* a = FindAdapter(unit.stage);
    // Check units and per-camera units share the in-flight slots (each holds
    // one share of the memory budget); assembly and pairs run one at a time.
    if (a->per_camera || unit.stage == StageKind::kCheck) {
      unit_node->try_put(u);
    } else {
      session_node->try_put(u);
    }
  }

  /// The session's normals units that are due to run after check unit `u`.
  std::vector<int> NormalsDueAfter(int u) {
    std::vector<int> due;
    const UnitPlan& check = plan->units[static_cast<size_t>(u)];
    std::lock_guard<std::mutex> lock(mutex);
    for (size_t k = 0; k < plan->units.size(); ++k) {
      const UnitPlan& unit = plan->units[k];
      if (unit.session_index != check.session_index || unit.stage != StageKind::kNormals || skipped[k]) continue;
      if (unit.Due()) due.push_back(static_cast<int>(k));
    }
    return due;
  }

  /// Removes what a fused check wrote for normals units that will not run
  /// (the QA gate closed): a failed session keeps no normals, as if the
  /// check had run alone.
  void DropFused(int session_index) {
    std::lock_guard<std::mutex> lock(mutex);
    for (auto it = fused.begin(); it != fused.end();) {
      if (plan->units[static_cast<size_t>(it->first)].session_index == session_index) {
        std::error_code ec;
        std::set<fs::path> dirs;
        for (const auto& f : it->second.outputs) {
          fs::remove(f, ec);
          dirs.insert(fs::path(f).parent_path());
        }
        // The unit's folder and its camera folder, each only when left empty.
        for (const auto& d : dirs) fs::remove(d, ec), fs::remove(d.parent_path(), ec);
        it = fused.erase(it);
      } else {
        ++it;
      }
    }
  }

  /// An up-to-date check unit still gates later stages with its stored verdict.
  void GateFromStamp(int u) {
    const UnitPlan& unit = plan->units[static_cast<size_t>(u)];
    const StageAdapter* a = FindAdapter(unit.stage);
    if (!a->blocks_downstream) return;
    const io::Session& s = plan->sessions[static_cast<size_t>(unit.session_index)];
    const json stamp = ReadStamp(StampPath(*options, unit, s));
    if (a->blocks_downstream(stamp.value("extra", json::object()))) BlockSession(u);
  }

  void BlockSession(int u) {
    const UnitPlan& unit = plan->units[static_cast<size_t>(u)];
    std::lock_guard<std::mutex> lock(mutex);
    qa_failed.push_back(unit.session_id);
    if (options->force) return;
    for (size_t k = 0; k < plan->units.size(); ++k)
      if (plan->units[k].session_index == unit.session_index && static_cast<int>(k) != u) skipped[k] = 1;
  }

  void Finish(int u, bool skipped_or_failed) {
    if (skipped_or_failed) {
      std::lock_guard<std::mutex> lock(mutex);
      for (int d : dependents[static_cast<size_t>(u)]) skipped[static_cast<size_t>(d)] = 1;
    }
    for (int d : dependents[static_cast<size_t>(u)])
      if (--remaining[static_cast<size_t>(d)] == 0) Dispatch(d);
  }

  void Run(int u) {
    UnitPlan& unit = plan->units[static_cast<size_t>(u)];
    const StageAdapter* a = FindAdapter(unit.stage);
    const io::Session& session = plan->sessions[static_cast<size_t>(unit.session_index)];
    internal::StageUnitContext ctx;
    ctx.options = options;
    ctx.session = &session;
    ctx.camera = unit.camera_id.empty() ? nullptr : session.FindCamera(unit.camera_id);
    ctx.final_dir = options->out_dir;
    ctx.session_out_dir = SessionOutDir(*options, session);
    ctx.unit_dir = ctx.camera ? (fs::path(ctx.session_out_dir) / ctx.camera->id).string() : ctx.session_out_dir;
    ctx.threads = options->threads;
    ctx.mem_budget_bytes = unit_budget;
    ctx.unit_key = unit.key;
    if (events->unit_progress) ctx.progress = [this, &unit](double f) { events->unit_progress(unit, f); };

    // A check unit solves the session's due normals units in its reading pass.
    std::vector<internal::FusedNormalsUnit> fuse;
    std::vector<int> fuse_index;  // the unit of each fuse entry
    if (unit.stage == StageKind::kCheck && FindAdapter(StageKind::kNormals) != nullptr) {
      for (int k : NormalsDueAfter(u)) {
        const UnitPlan& nu = plan->units[static_cast<size_t>(k)];
        internal::FusedNormalsUnit f;
        f.camera = session.FindCamera(nu.camera_id);
        if (f.camera != nullptr) f.camera_index = static_cast<int>(f.camera - session.cameras.data());
        f.unit_dir = (fs::path(ctx.session_out_dir) / nu.camera_id).string();
        if (f.camera != nullptr) {
          fuse.push_back(std::move(f));
          fuse_index.push_back(k);
        }
      }
      if (!fuse.empty()) ctx.fused_normals = &fuse;
    }
    if (events->unit_started) {
      std::vector<std::string> cameras;
      for (const auto& f : fuse) cameras.push_back(f.camera->id);
      events->unit_started(unit, cameras.empty() ? std::string()
                                                 : fmt::format("with the normals of {} in the same read of the "
                                                               "OLAT frames",
                                                               fmt::join(cameras, ", ")));
    }
    // A normals unit already solved by its session's check only records it.
    internal::FusedNormalsUnit prefilled;
    bool is_prefilled = false;
    {
      std::lock_guard<std::mutex> lock(mutex);
      auto it = fused.find(u);
      if (it != fused.end()) {
        prefilled = std::move(it->second);
        fused.erase(it);
        is_prefilled = true;
      }
    }

    const auto t0 = std::chrono::steady_clock::now();
    const double cpu0 = io::ProcessCpuSeconds();
    std::vector<std::string> outputs;
    json extra = json::object();
    io::Status status = io::EnsureDirectory(ctx.unit_dir);
    if (status.ok()) status = io::EnsureDirectory((fs::path(ctx.session_out_dir) / "stamps").string());
    if (status.ok()) {
      if (is_prefilled) {
        outputs = prefilled.outputs;
        extra = prefilled.extra;
        extra["solved_in"] = "check";
      } else {
        status = a->run(ctx, &outputs, &extra);
      }
    }
    if (status.ok()) status = WriteStamp(unit, session, outputs, extra);
    double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    double cpu = io::ProcessCpuSeconds() - cpu0;
    UnitDone done;
    if (is_prefilled) {
      done.wall_s = prefilled.wall_s;
      done.note = "solved in the session check's read of the OLAT frames";
    }
    {
      std::lock_guard<std::mutex> lock(mutex);
      // The fused solves' time counts for the normals stage, not the check.
      double fused_wall = 0;
      std::vector<std::string> fused_cameras;
      for (size_t f = 0; f < fuse.size(); ++f) {
        internal::FusedNormalsUnit& fu = fuse[f];
        const int k = fuse_index[f];
        wall -= fu.wall_s;
        cpu -= fu.cpu_s;
        fused_wall += fu.wall_s;
        if (fu.done) fused_cameras.push_back(fu.camera->id);
        StageStats& ns = StatsFor(StageKind::kNormals);
        ns.wall_s += fu.wall_s;
        ns.cpu_s += fu.cpu_s;
        if (status.ok() && fu.done) fused[k] = std::move(fu);
      }
      StageStats& st = StatsFor(unit.stage);
      st.units_run += 1;
      st.wall_s += wall;
      st.cpu_s += cpu;
      st.peak_rss_bytes = io::PeakRssBytes();
      if (!status.ok() && first_error.ok()) first_error = status;
      if (!is_prefilled) done.wall_s = wall;
      if (!fused_cameras.empty())
        done.note = fmt::format("plus {:.1f} s solving the normals of {} in the same read of the OLAT frames",
                                fused_wall, fmt::join(fused_cameras, ", "));
    }
    if (events->unit_finished) events->unit_finished(unit, status, done);
    internal::MaybeKillAt(fmt::format("after:{}:{}:{}", StageName(unit.stage), unit.session_id, unit.camera_id));
    if (status.ok() && a->blocks_downstream && a->blocks_downstream(extra)) {
      BlockSession(u);
      if (!options->force) DropFused(unit.session_index);
    }
    if (!status.ok() && !fuse.empty()) DropFused(unit.session_index);
    Finish(u, !status.ok());
  }

  StageStats& StatsFor(StageKind k) {
    for (auto& s : report->stages)
      if (s.stage == k) return s;
    report->stages.push_back(StageStats{k});
    return report->stages.back();
  }

  io::Status WriteStamp(const UnitPlan& unit, const io::Session& session, const std::vector<std::string>& outputs,
                        const json& extra) {
    json stamp;
    stamp["format"] = "lumenrig.stamp/1";
    stamp["stage"] = StageName(unit.stage);
    stamp["session"] = unit.session_id;
    stamp["camera"] = unit.camera_id;
    stamp["key"] = io::HashHex(unit.key);
    stamp["options"] = unit.options_slice;
    stamp["inputs_hash"] = io::HashHex(unit.inputs_hash);
    stamp["upstream_hash"] = io::HashHex(unit.upstream_hash);
    stamp["finished_utc"] = NowUtc();
    stamp["extra"] = extra;
    json outs = json::object();
    for (const auto& f : outputs) {
      auto h = io::HashFile(f);
      if (!h.ok()) return h.status();
      outs[fs::path(f).lexically_relative(options->out_dir).generic_string()] = io::HashHex(*h);
    }
    stamp["outputs"] = outs;
    return io::WriteTextFile(StampPath(*options, unit, session), stamp.dump(1), /*overwrite=*/true);
  }
};

}  // namespace

io::Status ExecuteRun(const RunOptions& options, RunPlan* plan, const RunEvents& events, RunReport* report) {
  const auto t0 = std::chrono::steady_clock::now();
  *report = RunReport();
  const size_t n = plan->units.size();
  Executor ex(n);
  ex.options = &options;
  ex.plan = plan;
  ex.events = &events;
  ex.report = report;

  for (size_t u = 0; u < n; ++u) {
    const UnitPlan& unit = plan->units[u];
    ex.remaining[u] = static_cast<int>(unit.depends_on.size());
    for (int d : unit.depends_on) ex.dependents[static_cast<size_t>(d)].push_back(static_cast<int>(u));
  }

  // Cameras in flight: as many as threads allow while each keeps at least
  // 256 MiB of the budget (common practice floor for a band of a 12 MP stack).
  const int threads = io::ResolveThreads(options.threads);
  const int64_t floor_bytes = int64_t{256} << 20;
  const int in_flight =
      static_cast<int>(std::max<int64_t>(1, std::min<int64_t>(threads, options.mem_budget_bytes / floor_bytes)));
  ex.unit_budget = options.mem_budget_bytes / in_flight;

  tbb::flow::graph g;
  tbb::flow::function_node<int> unit_node(g, static_cast<size_t>(in_flight), [&](int u) { ex.Run(u); });
  tbb::flow::function_node<int> session_node(g, 1, [&](int u) { ex.Run(u); });
  ex.unit_node = &unit_node;
  ex.session_node = &session_node;
  for (size_t u = 0; u < n; ++u)
    if (plan->units[u].depends_on.empty()) ex.Dispatch(static_cast<int>(u));
  g.wait_for_all();

  for (size_t u = 0; u < n; ++u) {
    if (ex.skipped[u] || plan->units[u].state == UnitState::kUpToDate) {
      StageStats& st = ex.StatsFor(plan->units[u].stage);
      st.units_skipped += 1;
    }
  }
  report->qa_failed_sessions = ex.qa_failed;
  report->wall_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  report->peak_rss_bytes = io::PeakRssBytes();
  for (const auto& s : plan->sessions) {
    for (const char* suffix : {".h5", ".pairs.h5"}) {
      const std::string p = (fs::path(options.out_dir) / (s.Id() + suffix)).string();
      if (fs::exists(p)) report->outputs.push_back(p);
    }
  }
  if (!ex.first_error.ok()) return ex.first_error;
  if (!ex.qa_failed.empty() && !options.force)
    return io::Status::DataFail(fmt::format(
        "QA failed for {} session(s); later stages skipped (use --force to run them)", ex.qa_failed.size()));
  return io::Status::Ok();
}

}  // namespace lumenrig::synth
