// `lumenrig matte`: alpha matte, foreground colour, trimap and confidence for
// one camera of a session (docs/matting.md).
#include <chrono>
#include <memory>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/matte_stage.h"

namespace lumenrig::cli {
namespace {

struct MatteArgs {
  std::string session;
  std::string out_dir;
  std::string camera;
  std::string method = "auto";
  std::string trimap;
  std::string composite;
  int band_px = 8;
  double noise_sigma = 0.0;
  int threads = 0;
  bool force = false;
};

int Run(const MatteArgs& args) {
  const auto t0 = std::chrono::steady_clock::now();
  solvers::MatteOptions options;
  io::Status s = solvers::ParseMatteMethod(args.method, &options.method);
  if (!s.ok()) return ReportError("matte", s);
  options.trimap_path = args.trimap;
  options.trimap.band_px = args.band_px;
  options.noise_sigma = args.noise_sigma;

  io::Expected<io::Session> session = io::LoadSession(args.session);
  if (!session.ok()) return ReportError("matte", session.status());
  // Refuse existing outputs before the (possibly long) solve.
  if (!args.composite.empty()) {
    s = io::CheckOutputPath(args.composite, args.force);
    if (!s.ok()) return ReportError("matte", s);
  }
  solvers::MatteResult result;
  s = solvers::ComputeMatte(*session, args.camera, options, &result, args.threads);
  if (!s.ok()) return ReportError("matte", s);
  s = solvers::WriteMatteOutputs(result, *session, args.out_dir, args.force, args.threads);
  if (!s.ok()) return ReportError("matte", s);
  if (!args.composite.empty()) {
    // New background: a dusk-blue to warm-grey gradient (linear RGB).
    const cv::Mat background =
        solvers::GradientBackground(result.alpha.size(), cv::Vec3f(0.05f, 0.09f, 0.22f), cv::Vec3f(0.35f, 0.3f, 0.26f));
    s = solvers::WriteCompositePng(result, background, 1.0f, args.composite, args.force);
    if (!s.ok()) return ReportError("matte", s);
  }
  for (const std::string& note : result.notes) fmt::print("note: {}\n", note);
  for (const std::string& f : solvers::MatteOutputFiles(result, args.out_dir)) fmt::print("output: {}\n", f);
  if (!args.composite.empty()) fmt::print("output: {}\n", args.composite);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  fmt::print("lumenrig matte: camera {} method {} noise sigma {:.3g}{}, {}\n", result.camera_id,
             solvers::MatteMethodName(result.method), result.noise_sigma,
             result.unknown_pixels > 0
                 ? fmt::format(" band {} px ({})", result.unknown_pixels,
                               result.direct_solve ? std::string("direct solve")
                                                   : fmt::format("{} CG iterations", result.cg_iterations))
                 : std::string(),
             TimeAndMemoryLine(wall));
  return 0;
}

std::function<int()> Setup(CLI::App* sub) {
  auto args = std::make_shared<MatteArgs>();
  sub->add_option("session", args->session, "Session folder or session.json")->required();
  sub->add_option("--out", args->out_dir, "Output folder for alpha.exr, foreground.exr, trimap.png, confidence.exr")
      ->required();
  sub->add_option("--camera", args->camera, "Camera id (default: the first camera)");
  sub->add_option("--method", args->method,
                  "auto, backlit (clean_plate + backlit), triangulation (2+ matte_pairs) or difference "
                  "(clean_plate + lit, closed-form refinement); auto prefers triangulation, then backlit, then "
                  "difference")
      ->capture_default_str();
  sub->add_option("--trimap", args->trimap,
                  "Trimap image (0 background, 255 foreground, other values unknown); replaces the automatic one");
  sub->add_option("--band-px", args->band_px, "Width in pixels of the automatic trimap's unknown band")
      ->check(CLI::NonNegativeNumber)
      ->capture_default_str();
  sub->add_option("--noise-sigma", args->noise_sigma,
                  "Per-channel frame noise sigma in linear units (0 = estimate from the frames)")
      ->check(CLI::NonNegativeNumber)
      ->capture_default_str();
  sub->add_option("--composite", args->composite, "Also write the matte composited over a gradient as this PNG");
  sub->add_option("--threads", args->threads, "Worker threads (0 = all cores)")->capture_default_str();
  sub->add_flag("--force", args->force, "Overwrite existing output files");
  return [args]() { return Run(*args); };
}

CommandRegistrar registrar({"matte",
                            "Alpha matte and foreground colour from clean plates (backlit ratio, "
                            "Smith-Blinn triangulation, difference + closed-form refinement)",
                            40, Setup});

}  // namespace
}  // namespace lumenrig::cli
