// `lumenrig simulate`: writes a simulated OLAT session of the Kestrel Hollow
// Studio scene (plaster bust kh-bust-03 and a grey reference sphere) with
// ground truth and optional injected faults.
#include <unistd.h>
#include <chrono>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <regex>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/process_stats.h"
#include "lumenrig/synth/simulator.h"

namespace lumenrig::cli {
namespace {

struct SimulateArgs {
  std::string out;
  std::string rig_out;
  int lights = 64;
  std::string size = "320x240";
  int cameras = 1;
  uint64_t seed = 1;
  bool near_field = false;
  std::string layout = "dome";
  double min_elevation_deg = -20.0;
  bool no_noise = false;
  bool no_specular = false;
  std::string specular = "blinn-phong";
  bool no_shadows = false;
  bool no_hair = false;
  int tracking_every = 16;
  std::string subject = "kh-bust-03";
  int threads = 0;
  bool force = false;
  // Faults.
  std::string dead, missing, saturate, swap;
  double motion_px = 0.0, drift_percent = 0.0, plate_shift_px = 0.0;
};

io::Status ParseTarget(const std::string& flag, const std::string& text, synth::CameraLightTarget* out) {
  static const std::regex re(R"(^([A-Za-z0-9_\-]+):(\d+)$)");
  std::smatch m;
  if (!std::regex_match(text, m, re))
    return io::Status::BadInput(fmt::format("{}: '{}' is not CAMERA:LIGHT (e.g. cam00:5)", flag, text));
  out->camera = m[1];
  out->light = std::stoi(m[2]);
  return io::Status::Ok();
}

io::Status BuildOptions(const SimulateArgs& a, synth::SimOptions* o) {
  static const std::regex size_re(R"(^(\d{1,5})x(\d{1,5})$)");
  std::smatch m;
  if (!std::regex_match(a.size, m, size_re))
    return io::Status::BadInput(fmt::format("--size: '{}' is not WIDTHxHEIGHT (e.g. 320x240)", a.size));
  o->width = std::stoi(m[1]);
  o->height = std::stoi(m[2]);
  o->num_lights = a.lights;
  o->num_cameras = a.cameras;
  o->seed = a.seed;
  o->near_field = a.near_field;
  o->layout = a.layout == "two-ring" ? synth::LightLayout::kTwoRing : synth::LightLayout::kFibonacciDome;
  o->min_elevation_deg = a.min_elevation_deg;
  o->noise = !a.no_noise;
  o->specular = a.no_specular         ? synth::SpecularModel::kNone
                : a.specular == "ggx" ? synth::SpecularModel::kGgx
                                      : synth::SpecularModel::kBlinnPhong;
  o->shadows = !a.no_shadows;
  o->hair = !a.no_hair;
  o->tracking_every = a.tracking_every;
  o->subject = a.subject;
  o->threads = a.threads;
  o->overwrite = a.force;
  synth::SimFaults& f = o->faults;
  if (!a.dead.empty()) {
    f.dead_light.emplace();
    LUMENRIG_RETURN_IF_ERROR(ParseTarget("--fault-dead-light", a.dead, &*f.dead_light));
  }
  if (!a.missing.empty()) {
    f.missing_frame.emplace();
    LUMENRIG_RETURN_IF_ERROR(ParseTarget("--fault-missing", a.missing, &*f.missing_frame));
  }
  if (!a.saturate.empty()) {
    f.saturated_light.emplace();
    LUMENRIG_RETURN_IF_ERROR(ParseTarget("--fault-saturate", a.saturate, &*f.saturated_light));
  }
  if (!a.swap.empty()) {
    static const std::regex swap_re(R"(^([A-Za-z0-9_\-]+):(\d+),(\d+)$)");
    if (!std::regex_match(a.swap, m, swap_re))
      return io::Status::BadInput(fmt::format("--fault-swap: '{}' is not CAMERA:A,B (e.g. cam00:3,4)", a.swap));
    f.swapped_frames = synth::SimFaults::Swap{m[1], std::stoi(m[2]), std::stoi(m[3])};
  }
  f.motion_px = a.motion_px;
  f.drift_percent = a.drift_percent;
  f.plate_shift_px = a.plate_shift_px;
  return synth::ValidateSimOptions(*o);
}

std::function<int()> Setup(CLI::App* sub) {
  auto a = std::make_shared<SimulateArgs>();
  sub->add_option("--out", a->out, "Session folder to write (must be empty or absent unless --force)");
  sub->add_option("--rig-out", a->rig_out,
                  "Write only the rig calibration (rig.json) the simulator would use to this file, then stop");
  sub->add_option("--lights", a->lights, "Number of lights (ids 0..N-1 in capture order)")->capture_default_str();
  sub->add_option("--size", a->size, "Image size WIDTHxHEIGHT in pixels")->capture_default_str();
  sub->add_option("--cameras", a->cameras, "Number of cameras (cam00 in front, others at +-25 deg steps of yaw)")
      ->capture_default_str();
  sub->add_option("--seed", a->seed, "Random seed (noise, per-light intensity variation)")->capture_default_str();
  sub->add_flag("--near-field", a->near_field,
                "Lights get positions (metres, on a 1.8 m sphere) instead of directions");
  sub->add_option("--layout", a->layout,
                  "Light layout: 'dome' (Fibonacci dome) or 'two-ring' (15 and 50 deg elevation)")
      ->check(CLI::IsMember({"dome", "two-ring"}))
      ->capture_default_str();
  sub->add_option("--min-elevation-deg", a->min_elevation_deg, "Lowest elevation of the Fibonacci dome, degrees")
      ->capture_default_str();
  sub->add_flag("--no-noise", a->no_noise, "No shot or read noise (black level is still added)");
  sub->add_flag("--no-specular", a->no_specular, "Lambertian only");
  sub->add_option("--specular", a->specular, "Specular lobe: 'blinn-phong' or 'ggx'")
      ->check(CLI::IsMember({"blinn-phong", "ggx"}))
      ->capture_default_str();
  sub->add_flag("--no-shadows", a->no_shadows, "No cast shadows");
  sub->add_flag("--no-hair", a->no_hair, "No hair fringe (alpha is fractional on silhouettes only)");
  sub->add_option("--tracking-every", a->tracking_every, "A fully lit tracking frame after every N lights (0: none)")
      ->capture_default_str();
  sub->add_option("--subject", a->subject, "Subject name written to session.json")->capture_default_str();
  sub->add_option("--threads", a->threads, "Worker threads (0: all cores); output is identical for any count")
      ->capture_default_str();
  sub->add_flag("--force", a->force, "Write into a non-empty folder, overwriting files");
  auto* faults = sub->add_option_group("Faults", "Injected capture faults for testing the session check");
  faults->add_option("--fault-dead-light", a->dead, "CAMERA:LIGHT rendered with the light off (e.g. cam00:5)");
  faults->add_option("--fault-missing", a->missing, "CAMERA:LIGHT frame not written and absent from session.json");
  faults->add_option("--fault-saturate", a->saturate, "CAMERA:LIGHT frame 8x brighter, clipping at 1");
  faults->add_option("--fault-swap", a->swap, "CAMERA:A,B the frame files of lights A and B are exchanged");
  faults->add_option("--fault-motion-px", a->motion_px,
                     "Subject drifts +x by this many pixels over the take (linear; shows in tracking frames)");
  faults->add_option("--fault-drift-percent", a->drift_percent,
                     "Light output drifts linearly to (1 + P/100) times calibrated by the last frame");
  faults->add_option("--fault-plate-shift-px", a->plate_shift_px,
                     "Camera moved +x by this many pixels between the clean plate and the backlit frame");

  return [a]() -> int {
    const auto start = std::chrono::steady_clock::now();
    synth::SimOptions options;
    io::Status st = BuildOptions(*a, &options);
    if (!st.ok()) return ReportError("simulate", st);
    if (!a->rig_out.empty()) {
      st = synth::WriteSimRig(options, a->rig_out);
      if (!st.ok()) return ReportError("simulate", st);
      fmt::print("rig calibration: {} ({} lights)\n", a->rig_out, options.num_lights);
      return 0;
    }
    if (a->out.empty())
      return ReportError("simulate", io::Status::BadInput("--out: required (the session folder to write)"));
    const bool tty = isatty(fileno(stderr)) != 0;
    if (tty) {
      options.progress = [](int done, int total) {
        if (done == total || done % 8 == 0) fmt::print(stderr, "\rsimulate: {}/{} frames", done, total);
        if (done == total) fmt::print(stderr, "\n");
      };
    }
    synth::SimSummary summary;
    st = synth::SimulateSession(options, a->out, &summary);
    if (!st.ok()) return ReportError("simulate", st);
    const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
    fmt::print("session: {}\n", summary.session_path);
    fmt::print("truth: {}/truth (normals, albedo, alpha, depth, foreground, mask per camera; simulation.json)\n",
               std::filesystem::path(summary.session_path).parent_path().string());
    fmt::print(
        "simulate: {} cameras x {} lights, {}x{}, {} frames written in {:.2f} s ({:.1f} frames/s), peak RSS {:.0f} "
        "MiB\n",
        options.num_cameras, options.num_lights, options.width, options.height, summary.frames_written, seconds,
        summary.frames_written / seconds, io::PeakRssMib());
    return 0;
  };
}

CommandRegistrar reg({"simulate",
                      "Write a simulated OLAT session (Kestrel Hollow Studio: bust kh-bust-03 and a grey sphere) "
                      "with ground truth and optional faults",
                      20, Setup});

}  // namespace
}  // namespace lumenrig::cli
