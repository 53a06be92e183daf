// `lumenrig normals`: photometric stereo normals, albedo, confidence and
// depth for one camera of a session (solvers/normals_stage.h).
#include <chrono>
#include <cstdio>
#include <filesystem>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/byte_size.h"
#include "lumenrig/capture_io/process_stats.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/normals_stage.h"

namespace lumenrig::cli {
namespace {

struct NormalsArgs {
  std::string session;
  std::string out;
  std::string camera;
  std::string method = "robust";
  std::string mem_budget = "1G";
  int threads = 0;
  bool force = false;
  bool no_depth = false;
  double reference_depth_m = 0.0;
};

int RunNormals(const NormalsArgs& a) {
  const auto start = std::chrono::steady_clock::now();
  const double start_cpu = io::ProcessCpuSeconds();
  const char* name = "normals";
  auto method = solvers::ParsePsMethod(a.method);
  if (!method.ok()) return ReportError(name, method.status());
  auto budget = io::ParseByteSize(a.mem_budget);
  if (!budget.ok()) return ReportError(name, budget.status());
  solvers::NormalsOptions options;
  options.ps.method = *method;
  options.mem_budget_bytes = *budget;
  options.integrate_depth = !a.no_depth;
  options.reference_depth_m = a.reference_depth_m;
  options.defer_depth = true;  // integrated while the maps are written
  if (auto s = solvers::ValidateNormalsOptions(options); !s.ok()) return ReportError(name, s);

  auto session = io::LoadSession(a.session);
  if (!session.ok()) return ReportError(name, session.status());
  solvers::NormalsResult result;
  if (auto s = solvers::SolveNormals(*session, a.camera, options, &result, a.threads); !s.ok())
    return ReportError(name, s);
  for (int id : result.all_zero_lights)
    fmt::print(stderr, "lumenrig normals: warning: light {} gives an all-zero frame (not lit from this camera?)\n", id);

  const std::map<std::string, std::string> provenance = {
      {"lumenrig.tool", "lumenrig normals"},
      {"lumenrig.version", LUMENRIG_VERSION},
      {"lumenrig.source_session", session->path},
      {"lumenrig.options", fmt::format("method={} mem_budget={} band_rows={} near_field={}", a.method, *budget,
                                       result.band_rows, result.near_field ? "yes" : "no")}};
  const auto write_start = std::chrono::steady_clock::now();
  if (auto s = solvers::FinishNormalsOutputs(&result, a.out, provenance, a.force, a.threads); !s.ok())
    return ReportError(name, s);
  // Writing overlaps the depth integration; both times are wall clock.
  const double write_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - write_start).count();
  for (const auto& file : solvers::NormalsOutputNames(result))
    fmt::print("{}\n", (std::filesystem::path(a.out) / file).string());
  fmt::print(
      "camera {}: {} lights, method {}, {} band(s) of {} rows, read {:.2f} s, solve {:.2f} s, depth {:.2f} s ({}{}), "
      "depth and writing {:.2f} s\n",
      result.camera_id, result.lights, solvers::PsMethodName(result.method), result.bands, result.band_rows,
      result.read_seconds, result.solve_seconds, result.integrate_seconds,
      result.depth.depth.empty() ? "off"
                                 : result.depth.unit + (result.depth.iterations > 0
                                                            ? fmt::format(", {} CG iterations", result.depth.iterations)
                                                            : std::string()),
      result.near_field ? fmt::format(", near-field {} iteration(s), last change {:.3f} deg",
                                      result.near_field_iterations, result.near_field_change_deg)
                        : "",
      write_s);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  const double stage_cpu = io::ProcessCpuSeconds() - start_cpu;
  fmt::print("cpu time: read {:.2f} s, solve {:.2f} s, depth, write and the rest {:.2f} s, stage {:.2f} s\n",
             result.read_cpu_seconds, result.solve_cpu_seconds,
             stage_cpu - result.read_cpu_seconds - result.solve_cpu_seconds, stage_cpu);
  fmt::print("normals: wall {:.2f} s, peak RSS {:.0f} MiB\n", wall, io::PeakRssMib());
  return 0;
}

static CommandRegistrar reg(
    {"normals", "Normals, albedo, confidence and depth by photometric stereo", 40,
     [](CLI::App* sub) -> std::function<int()> {
       auto args = std::make_shared<NormalsArgs>();
       sub->add_option("session", args->session, "Session folder or session.json")->required();
       sub->add_option("--out", args->out, "Output folder")->required();
       sub->add_option("--camera", args->camera, "Camera id (default: the first camera)");
       sub->add_option("--method", args->method,
                       "lsq (Woodham least squares) or robust (order statistics + Tukey IRLS)")
           ->check(CLI::IsMember({"lsq", "robust"}))
           ->capture_default_str();
       sub->add_option("--mem-budget", args->mem_budget, "Peak memory budget: bytes or K/M/G/T suffix, e.g. 512M, 4G")
           ->capture_default_str();
       sub->add_option("--threads", args->threads, "Worker threads (0 = all cores)")->capture_default_str();
       sub->add_option("--reference-depth", args->reference_depth_m,
                       "Subject distance in metres for metric depth (default: from "
                       "camera_from_rig)");
       sub->add_flag("--no-depth", args->no_depth, "Skip depth integration");
       sub->add_flag("--force", args->force, "Overwrite existing outputs");
       return [args] { return RunNormals(*args); };
     }});

}  // namespace
}  // namespace lumenrig::cli
