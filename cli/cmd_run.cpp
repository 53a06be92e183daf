// `lumenrig run`: the whole pipeline for one or more sessions.
#include <algorithm>
#include <chrono>
#include <cstdio>
#include <map>
#include <mutex>
#include <set>

#include <tbb/global_control.h>
#ifdef LUMENRIG_WITH_MPI
#include <mpi.h>
#endif

#include "command.h"
#include "lumenrig/capture_io/byte_size.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/pipeline.h"

namespace lumenrig::cli {
namespace {

struct RunArgs {
  synth::RunOptions options;
  std::string stages = "check,normals,matte,assemble,pairs";
  std::string mem_budget = "4G";
  bool stats = false;
  std::string normals_method = "robust";
  std::string matte_method = "auto";
  int pairs_count = 16;
  uint64_t pairs_seed = 1;
  std::string pairs_size = "256x256";
};

io::Status ParseStages(const std::string& text, std::vector<synth::StageKind>* out) {
  out->clear();
  size_t start = 0;
  while (start <= text.size()) {
    const size_t comma = text.find(',', start);
    const std::string name = text.substr(start, comma == std::string::npos ? std::string::npos : comma - start);
    bool found = false;
    for (auto k : {synth::StageKind::kCheck, synth::StageKind::kNormals, synth::StageKind::kMatte,
                   synth::StageKind::kAssemble, synth::StageKind::kPairs}) {
      if (name == synth::StageName(k)) {
        out->push_back(k);
        found = true;
      }
    }
    if (!found)
      return io::Status::BadInput(
          fmt::format("--stages: unknown stage \"{}\" (choose from check,normals,matte,assemble,pairs)", name));
    if (comma == std::string::npos) break;
    start = comma + 1;
  }
  return io::Status::Ok();
}

/// One status line on a terminal, plain log lines otherwise. The overall
/// fraction and the ETA weigh the units by their expected work
/// (synth::UnitWeights), counting the fraction done of every unit in flight.
class ProgressDisplay {
 public:
  ProgressDisplay(const synth::RunPlan& plan, bool tty)
      : plan_(plan), weights_(synth::UnitWeights(plan)), tty_(tty), start_(Clock::now()) {
    for (const auto& u : plan.units) total_ += u.Due();
    for (double w : weights_) total_weight_ += w;
  }

  void Started(const synth::UnitPlan& u, const std::string& note) {
    std::lock_guard<std::mutex> lock(mutex_);
    if (!note.empty()) with_normals_.insert(Index(u));
    current_ = Current(u);
    fraction_ = 0;
    in_flight_[Index(u)] = 0;
    if (!tty_) fmt::print(stderr, "lumenrig run: start {}{}\n", Label(u), note.empty() ? "" : " (" + note + ")");
    Draw();
  }
  void Progress(const synth::UnitPlan& u, double f) {
    std::lock_guard<std::mutex> lock(mutex_);
    current_ = Current(u);
    fraction_ = f;
    in_flight_[Index(u)] = std::clamp(f, 0.0, 1.0);
    Draw();
  }
  void Finished(const synth::UnitPlan& u, const io::Status& s, const synth::UnitDone& d) {
    std::lock_guard<std::mutex> lock(mutex_);
    ++done_;
    fraction_ = 0;
    in_flight_.erase(Index(u));
    done_weight_ += weights_[Index(u)];
    if (tty_) fmt::print(stderr, "\r\033[K");
    if (s.ok()) {
      fmt::print(stderr, "lumenrig run: done  {} in {:.1f} s{}\n", Label(u), d.wall_s,
                 d.note.empty() ? "" : " (" + d.note + ")");
    } else {
      fmt::print(stderr, "lumenrig run: FAILED {}: {}\n", Label(u), s.message());
    }
    Draw();
  }
  void Close() {
    if (tty_) fmt::print(stderr, "\r\033[K");
  }
  /// Units planned to run (missing or stale).
  int total() const { return total_; }

 private:
  using Clock = std::chrono::steady_clock;
  static std::string Label(const synth::UnitPlan& u) {
    return fmt::format("{} {}{}", u.session_id, u.camera_id.empty() ? "" : u.camera_id + " ",
                       synth::StageName(u.stage));
  }
  size_t Index(const synth::UnitPlan& u) const { return static_cast<size_t>(&u - plan_.units.data()); }
  /// The status line's name of the unit in flight.
  std::string Current(const synth::UnitPlan& u) const {
    return with_normals_.count(Index(u)) ? Label(u) + " + normals" : Label(u);
  }
  void Draw() {
    if (!tty_) return;
    const double elapsed = std::chrono::duration<double>(Clock::now() - start_).count();
    double weight = done_weight_;
    for (const auto& [k, f] : in_flight_) weight += f * weights_[k];
    const double progress = total_weight_ > 0 ? weight / total_weight_ : 0.0;
    // Rate: work per second in frame-decode equivalents (the weights' unit).
    const double rate = elapsed > 0 ? weight / elapsed : 0.0;
    std::string eta = "--:--";
    if (progress > 0.01) {
      const int s = static_cast<int>(elapsed / progress - elapsed);
      eta = s >= 3600 ? fmt::format("{}:{:02d}:{:02d}", s / 3600, s / 60 % 60, s % 60)
                      : fmt::format("{:02d}:{:02d}", s / 60, s % 60);
    }
    const int width = 24;
    const int filled = std::clamp(static_cast<int>(progress * width), 0, width);
    fmt::print(stderr, "\r\033[K[{}{}] {}/{} units {:.0f} frames/s ETA {} | {} {:.0f}%", std::string(filled, '#'),
               std::string(width - filled, '.'), done_, total_, rate, eta, current_, fraction_ * 100);
    std::fflush(stderr);
  }
  std::mutex mutex_;
  const synth::RunPlan& plan_;
  std::vector<double> weights_;
  std::map<size_t, double> in_flight_;  // unit index -> fraction done
  std::set<size_t> with_normals_;       // check units solving their session's normals
  double total_weight_ = 0, done_weight_ = 0;
  int total_ = 0;
  int done_ = 0;
  bool tty_;
  double fraction_ = 0;
  std::string current_;
  Clock::time_point start_;
};

/// MPI sharding: when started by an MPI launcher (mpirun sets the world
/// size in the environment), each rank runs its share of the sessions and the
/// exit code is the worst over all ranks. Without a launcher MPI is not
/// initialised at all.
class MpiShard {
 public:
  MpiShard() {
#ifdef LUMENRIG_WITH_MPI
    if (std::getenv("OMPI_COMM_WORLD_SIZE") == nullptr && std::getenv("PMI_SIZE") == nullptr) return;
    int provided = 0;
    MPI_Init_thread(nullptr, nullptr, MPI_THREAD_FUNNELED, &provided);
    MPI_Comm_rank(MPI_COMM_WORLD, &rank_);
    MPI_Comm_size(MPI_COMM_WORLD, &size_);
    active_ = true;
#endif
  }
  int rank() const { return rank_; }
  int size() const { return size_; }
  /// Combines exit codes over ranks (max) and shuts MPI down.
  int Finish(int code) {
#ifdef LUMENRIG_WITH_MPI
    if (active_) {
      int worst = code;
      MPI_Allreduce(&code, &worst, 1, MPI_INT, MPI_MAX, MPI_COMM_WORLD);
      MPI_Finalize();
      return worst;
    }
#endif
    return code;
  }

 private:
  int rank_ = 0;
  int size_ = 1;
  bool active_ = false;
};

int RunCommand(RunArgs* args, const MpiShard& shard);

std::function<int()> Setup(CLI::App* sub) {
  auto args = std::make_shared<RunArgs>();
  sub->add_option("sessions", args->options.sessions, "Session folders or session.json files")->required();
  sub->add_option("--out", args->options.out_dir, "Output folder (created; reruns resume in it)")->required();
  sub->add_option("--envs", args->options.envs_dir, "Folder of lat-long HDR maps; enables the pairs stage");
  sub->add_option("--stages", args->stages, "Comma list of stages to run (check,normals,matte,assemble,pairs)")
      ->capture_default_str();
  sub->add_option("--threads", args->options.threads, "Worker threads for every stage (0 = all cores)")
      ->capture_default_str();
  sub->add_option("--mem-budget", args->mem_budget, "Memory budget shared by all work in flight (e.g. 2G)")
      ->capture_default_str();
  sub->add_flag("--force", args->options.force, "Run later stages even when the session check FAILs");
  sub->add_flag("--dry-run", args->options.dry_run, "List what would run and why (stale, missing, up to date)");
  sub->add_flag("--stats", args->stats, "Print per-stage wall time, CPU time and peak memory at the end");
  sub->add_option("--normals-method", args->normals_method, "Photometric stereo method: lsq or robust")
      ->check(CLI::IsMember({"lsq", "robust"}))
      ->capture_default_str();
  sub->add_option("--matte-method", args->matte_method,
                  "Matting method: auto, backlit, triangulation or difference (auto picks from the session keys)")
      ->check(CLI::IsMember({"auto", "backlit", "triangulation", "difference"}))
      ->capture_default_str();
  sub->add_option("--count", args->pairs_count, "Training pairs per session (pairs stage)")->capture_default_str();
  sub->add_option("--seed", args->pairs_seed, "Seed of the training pairs")->capture_default_str();
  sub->add_option("--size", args->pairs_size, "Training pair size WxH")->capture_default_str();

  return [args]() -> int {
    MpiShard shard;
    return shard.Finish(RunCommand(args.get(), shard));
  };
}

int RunCommand(RunArgs* args, const MpiShard& shard) {
  {
    auto& o = args->options;
    o.shard_index = shard.rank();
    o.shard_count = shard.size();
    io::Status s = ParseStages(args->stages, &o.stages);
    if (!s.ok()) return ReportError("run", s);
    auto budget = io::ParseByteSize(args->mem_budget);
    if (!budget.ok()) return ReportError("run", budget.status());
    o.mem_budget_bytes = *budget;
    o.normals_options = {{"method", args->normals_method}};
    o.matte_options = {{"method", args->matte_method}};
    o.pairs_options = {{"count", args->pairs_count}, {"seed", args->pairs_seed}, {"size", args->pairs_size}};
    tbb::global_control cap(tbb::global_control::max_allowed_parallelism,
                            static_cast<size_t>(io::ResolveThreads(o.threads)));

    const auto t0 = std::chrono::steady_clock::now();
    synth::RunPlan plan;
    s = synth::PlanRun(o, &plan);
    if (!s.ok()) return ReportError("run", s);
    if (o.dry_run) {
      for (const auto& line : plan.Describe()) fmt::print("{}\n", line);
      return 0;
    }
    ProgressDisplay display(plan, StderrIsTerminal());
    const int to_run = display.total();
    synth::RunEvents events;
    events.unit_started = [&](const synth::UnitPlan& u, const std::string& note) { display.Started(u, note); };
    events.unit_progress = [&](const synth::UnitPlan& u, double f) { display.Progress(u, f); };
    events.unit_finished = [&](const synth::UnitPlan& u, const io::Status& st, const synth::UnitDone& d) {
      display.Finished(u, st, d);
    };
    synth::RunReport report;
    s = synth::ExecuteRun(o, &plan, events, &report);
    display.Close();
    if (args->stats) {
      fmt::print("{:<9} {:>5} {:>7} {:>10} {:>10} {:>12}\n", "stage", "ran", "skipped", "wall s", "cpu s",
                 "peak RSS MiB");
      for (const auto& st : report.stages)
        fmt::print("{:<9} {:>5} {:>7} {:>10.2f} {:>10.2f} {:>12.0f}\n", synth::StageName(st.stage), st.units_run,
                   st.units_skipped, st.wall_s, st.cpu_s, static_cast<double>(st.peak_rss_bytes) / (1 << 20));
    }
    for (const auto& f : report.outputs) fmt::print("output: {}\n", f);
    const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    int ran = 0;
    for (const auto& st : report.stages) ran += st.units_run;
    // Units planned but not run: stopped by a QA FAIL or an error.
    const std::string not_run = ran < to_run ? fmt::format(" ({} planned unit(s) not run)", to_run - ran) : "";
    fmt::print("lumenrig run: {} unit(s) run{}, {}\n", ran, not_run, TimeAndMemoryLine(wall));
    if (!s.ok()) return ReportError("run", s);
    return 0;
  }
}

CommandRegistrar registrar({"run",
                            "Run every stage (check, normals, matte, assemble, pairs) for every camera of every "
                            "session; resumable",
                            60, Setup});

}  // namespace
}  // namespace lumenrig::cli
