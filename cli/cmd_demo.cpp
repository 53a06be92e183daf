// `lumenrig demo`: simulates the built-in demo take (invented Kestrel Hollow
// Studio, plaster bust kh-bust-03) and runs every stage on it with
// `lumenrig run`, then writes the pictures a new user wants to look at.
#include <chrono>
#include <filesystem>
#include <fstream>

#include <tbb/global_control.h>

#include "command.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/solvers/matte_stage.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/pairs.h"
#include "lumenrig/synth/pipeline.h"
#include "lumenrig/synth/simulator.h"

namespace fs = std::filesystem;

namespace lumenrig::cli {
namespace {

constexpr const char* kDemoMarker = ".lumenrig-demo";

struct DemoArgs {
  std::string out = "lumenrig-demo";
  int threads = 0;
  int lights = 64;
  int cameras = 2;
  std::string size = "320x240";
  int pairs = 8;
};

/// A demo folder may replace an earlier demo folder (it carries our marker);
/// anything else that exists is refused.
io::Status PrepareFolder(const std::string& out) {
  std::error_code ec;
  if (fs::exists(out, ec)) {
    if (!fs::is_directory(out, ec))
      return io::Status::BadInput(fmt::format("{}: exists and is not a folder; choose another --out", out));
    if (!fs::is_empty(out, ec)) {
      if (!fs::exists(fs::path(out) / kDemoMarker, ec))
        return io::Status::BadInput(fmt::format(
            "{}: folder exists and was not made by `lumenrig demo`; refusing to touch it (choose another --out)", out));
      fmt::print("demo: replacing the previous demo output in {}\n", out);
      fs::remove_all(out, ec);
      if (ec) return io::Status::BadInput(fmt::format("{}: cannot remove previous demo output: {}", out, ec.message()));
    }
  }
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(out));
  return io::WriteTextFile((fs::path(out) / kDemoMarker).string(), "made by lumenrig demo; safe to delete\n", true);
}

/// Composite of the first camera's matte over a new (gradient) backdrop.
io::Status WriteComposite(const std::string& cam_dir, const std::string& png) {
  solvers::MatteResult matte;
  auto alpha = io::ReadImage((fs::path(cam_dir) / "matte" / "alpha.exr").string());
  if (!alpha.ok()) return alpha.status();
  auto fg = io::ReadImage((fs::path(cam_dir) / "matte" / "foreground.exr").string());
  if (!fg.ok()) return fg.status();
  matte.alpha = *alpha;
  matte.foreground = *fg;
  cv::Mat background = solvers::GradientBackground(matte.alpha.size(), {0.35f, 0.45f, 0.65f}, {0.12f, 0.10f, 0.08f});
  return solvers::WriteCompositePng(matte, background, 1.0f, png, /*overwrite=*/true);
}

int RunDemo(const DemoArgs& a) {
  const auto t0 = std::chrono::steady_clock::now();
  tbb::global_control cap(tbb::global_control::max_allowed_parallelism,
                          static_cast<size_t>(io::ResolveThreads(a.threads)));
  io::Status s = PrepareFolder(a.out);
  if (!s.ok()) return ReportError("demo", s);
  const std::string session_dir = (fs::path(a.out) / "session").string();
  const std::string envs_dir = (fs::path(a.out) / "envs").string();
  const std::string results_dir = (fs::path(a.out) / "results").string();

  // 1. A simulated take.
  synth::SimOptions sim;
  sim.num_lights = a.lights;
  sim.num_cameras = a.cameras;
  if (std::sscanf(a.size.c_str(), "%dx%d", &sim.width, &sim.height) != 2)
    return ReportError("demo", io::Status::BadInput(fmt::format("--size: '{}' is not WIDTHxHEIGHT", a.size)));
  sim.threads = a.threads;
  fmt::print("demo: simulating {} cameras x {} lights at {} (Kestrel Hollow Studio, bust kh-bust-03)\n", a.cameras,
             a.lights, a.size);
  s = synth::SimulateSession(sim, session_dir);
  if (!s.ok()) return ReportError("demo", s);

  // 2. Environment maps for relighting.
  auto envs = synth::WriteProceduralEnvMaps(envs_dir, 64, /*overwrite=*/false);
  if (!envs.ok()) return ReportError("demo", envs.status());

  // 3. Every stage through the pipeline.
  synth::RunOptions run;
  run.sessions = {session_dir};
  run.out_dir = results_dir;
  run.envs_dir = envs_dir;
  run.threads = a.threads;
  run.mem_budget_bytes = int64_t{2} << 30;
  run.normals_options = {{"method", "robust"}};
  run.matte_options = {{"method", "auto"}};
  run.pairs_options = {{"count", a.pairs}, {"seed", 7}, {"size", "128x128"}};
  synth::RunPlan plan;
  s = synth::PlanRun(run, &plan);
  if (!s.ok()) return ReportError("demo", s);
  synth::RunEvents events;
  events.unit_finished = [](const synth::UnitPlan& u, const io::Status& st, const synth::UnitDone& d) {
    fmt::print("demo: {:<9} {:<6} {} ({:.1f} s{})\n", synth::StageName(u.stage),
               u.camera_id.empty() ? "-" : u.camera_id, st.ok() ? "done" : "FAILED: " + st.message(), d.wall_s,
               d.note.empty() ? "" : ", " + d.note);
  };
  synth::RunReport report;
  s = synth::ExecuteRun(run, &plan, events, &report);
  if (!s.ok()) return ReportError("demo", s);

  // 4. Pictures.
  const std::string id = plan.sessions[0].Id();
  const std::string cam0 = plan.sessions[0].cameras[0].id;
  const std::string session_out = (fs::path(results_dir) / id).string();
  const std::string cam_dir = (fs::path(session_out) / cam0).string();
  const std::string composite = (fs::path(a.out) / "composite.png").string();
  s = WriteComposite(cam_dir, composite);
  if (!s.ok()) return ReportError("demo", s);
  const std::string pairs_h5 = (fs::path(results_dir) / (id + ".pairs.h5")).string();
  const std::string pairs_png = (fs::path(a.out) / "pairs_preview.png").string();
  auto sheet = synth::PairsContactSheet(pairs_h5, 4);
  if (!sheet.ok()) return ReportError("demo", sheet.status());
  s = io::WritePng(pairs_png, *sheet, /*overwrite=*/true);
  if (!s.ok()) return ReportError("demo", s);

  fmt::print("\ndemo outputs ({}):\n", a.out);
  fmt::print("  session (simulated take):   {}/session.json\n", session_dir);
  fmt::print("  ground truth of the take:   {}/truth/\n", session_dir);
  std::ifstream qa(session_out + "/check/check.json");
  const auto qa_json = nlohmann::json::parse(qa, nullptr, false);
  fmt::print("  session check verdict:      {}\n",
             qa_json.is_discarded() ? "?" : qa_json.value("verdict", std::string("?")));
  fmt::print("  session check report:       {}/check/check_report.html\n", session_out);
  fmt::print("  session check JSON:         {}/check/check.json\n", session_out);
  fmt::print("  normals, albedo, depth:     {}/normals/ (normals_preview.png)\n", cam_dir);
  fmt::print("  alpha matte, foreground:    {}/matte/\n", cam_dir);
  fmt::print("  composite over new backdrop: {}\n", composite);
  fmt::print("  all ground truth (HDF5):    {}/{}.h5\n", results_dir, id);
  fmt::print("  training pairs (HDF5):      {}\n", pairs_h5);
  fmt::print("  training pairs preview:     {}\n", pairs_png);
  fmt::print("  environment maps:           {}/\n", envs_dir);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  fmt::print("demo: finished in {}\n", TimeAndMemoryLine(wall));
  return 0;
}

CommandRegistrar reg(
    {"demo", "Simulate the built-in demo take and run every stage on it (check, normals, matte, relit pairs)", 5,
     [](CLI::App* sub) -> std::function<int()> {
       auto a = std::make_shared<DemoArgs>();
       sub->add_option("--out", a->out, "Demo folder (an earlier demo folder is replaced)")->capture_default_str();
       sub->add_option("--threads", a->threads, "Worker threads (0 = all cores)")->capture_default_str();
       sub->add_option("--lights", a->lights, "Lights in the simulated dome")->capture_default_str();
       sub->add_option("--cameras", a->cameras, "Simulated cameras")->capture_default_str();
       sub->add_option("--size", a->size, "Frame size WIDTHxHEIGHT")->capture_default_str();
       sub->add_option("--pairs", a->pairs, "Training pairs to write")->capture_default_str();
       return [a] { return RunDemo(*a); };
     }});

}  // namespace
}  // namespace lumenrig::cli
