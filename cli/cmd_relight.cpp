// `lumenrig relight`: one camera of a session relit under one HDR map.
#include <chrono>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/byte_size.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/relight.h"

namespace lumenrig::cli {
namespace {

struct RelightArgs {
  std::string session;
  std::string env;
  std::string out;
  std::string camera;
  double rotate_deg = 0.0;
  double exposure_ev = 0.0;
  double target_luminance = 0.0;
  double coverage_deg = 0.0;
  std::string mem_budget = "512M";
  int threads = 0;
  bool force = false;
};

int Run(const RelightArgs& a) {
  const auto t0 = std::chrono::steady_clock::now();
  const std::string cmd = "relight";
  if (io::FormatFromPath(a.out) != io::FileFormat::kExr) {
    return ReportError(cmd, io::Status::BadInput(fmt::format("{}: --out must be an .exr file", a.out)));
  }
  io::Status st = io::CheckOutputPath(a.out, a.force);
  if (!st.ok()) return ReportError(cmd, st);
  auto budget = io::ParseByteSize(a.mem_budget);
  if (!budget.ok()) return ReportError(cmd, budget.status());
  auto session = io::LoadSession(a.session);
  if (!session.ok()) return ReportError(cmd, session.status());
  auto env = synth::LoadEnvMap(a.env);
  if (!env.ok()) return ReportError(cmd, env.status());

  synth::RelightCameraOptions o;
  o.rotate_deg = a.rotate_deg;
  o.exposure_ev = a.exposure_ev;
  o.target_luminance = a.target_luminance;
  o.weights.coverage_angle_deg = a.coverage_deg;
  o.relight.mem_budget_bytes = *budget;
  o.relight.threads = a.threads;
  std::vector<cv::Mat> relit;
  synth::RelightSummary sum;
  st = synth::RelightCamera(*session, a.camera, {*env}, o, &relit, &sum);
  if (!st.ok()) return ReportError(cmd, st);

  const io::Camera* camera = a.camera.empty() ? &session->cameras[0] : session->FindCamera(a.camera);
  io::ExrWriteOptions w;
  w.pixel_type = io::PixelType::kHalf;
  w.overwrite = a.force;
  w.attributes = {{"lumenrig.tool", "lumenrig relight"},
                  {"lumenrig.version", LUMENRIG_VERSION},
                  {"lumenrig.session", session->Id()},
                  {"lumenrig.camera", camera->id},
                  {"lumenrig.env", env->path},
                  {"lumenrig.rotate_deg", fmt::format("{}", a.rotate_deg)},
                  {"lumenrig.exposure_scale", fmt::format("{}", sum.exposure_scale[0])},
                  {"lumenrig.uncovered_energy_fraction", fmt::format("{:.6f}", sum.uncovered_energy_fraction[0])},
                  {"lumenrig.clamped_texels", fmt::format("{}", sum.clamped_texels)},
                  {"lumenrig.units", "radiance of the environment map"}};
  st = io::WriteExr(a.out, relit[0], w);
  if (!st.ok()) return ReportError(cmd, st);

  fmt::print("relit {} camera {} ({}x{}, {} lights) under {} (rotation {} deg)\n", session->Id(), camera->id, sum.width,
             sum.height, sum.lights, env->name, a.rotate_deg);
  fmt::print(
      "environment: {} texel(s) were NaN/Inf/negative and clamped to 0; {:.2f}% of its energy falls "
      "where the rig has no lights (dropped)\n",
      sum.clamped_texels, 100.0 * sum.uncovered_energy_fraction[0]);
  fmt::print("wrote {}\n", a.out);
  fmt::print("relight: {}\n",
             TimeAndMemoryLine(std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count()));
  return 0;
}

CommandRegistrar reg(
    {"relight", "Relight one camera of a session under a lat-long HDR map (reflectance-field relighting)", 60,
     [](CLI::App* sub) -> std::function<int()> {
       auto a = std::make_shared<RelightArgs>();
       sub->add_option("session", a->session, "Session folder or session.json")->required();
       sub->add_option("--env", a->env, "Lat-long HDR map (.exr or .hdr, width = 2 x height)")->required();
       sub->add_option("--out", a->out, "Output OpenEXR (half float RGB, the map's radiance units)")->required();
       sub->add_option("--rotate", a->rotate_deg, "Rotate the map about +y (degrees)");
       sub->add_option("--camera", a->camera, "Camera id (default: the first camera)");
       sub->add_option("--exposure", a->exposure_ev, "Multiply the map by 2^EV after normalisation");
       sub->add_option("--target-luminance", a->target_luminance,
                       "Normalise the map to this mean BT.709 luminance first (0 = off)");
       sub->add_option("--coverage-deg", a->coverage_deg,
                       "Map texels farther than this from every light are dropped and reported "
                       "(0 = the rig's largest light spacing)");
       sub->add_option("--mem-budget", a->mem_budget, "Memory for the band of frames (e.g. 512M, 2G)");
       sub->add_option("--threads", a->threads, "Worker threads (0 = all cores)");
       sub->add_flag("--force", a->force, "Overwrite an existing output");
       return [a] { return Run(*a); };
     }});

}  // namespace
}  // namespace lumenrig::cli
