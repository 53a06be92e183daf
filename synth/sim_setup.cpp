// Simulator set-up: options validation, the simulated rig and cameras, the
// take plan, and the in-memory simulation of one camera.
#include <cmath>

#include <fmt/format.h>

#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/dome_layout.h"
#include "lumenrig/synth/simulator.h"
#include "sim_plan.h"

namespace lumenrig::synth {
namespace {

/// Calibrated intensity that puts a white Lambertian surface facing a distant
/// light at 2.2/pi ~ 0.70 (plaster albedo <= 0.82 stays below ~0.6 plus
/// specular), so single-light frames do not clip.
constexpr double kBaseIntensity = 2.2;

double Uniform01(uint64_t h) { return static_cast<double>(h >> 11) * (1.0 / 9007199254740992.0); }

double Round4(double v) { return std::round(v * 1e4) / 1e4; }

const char* LayoutName(LightLayout layout) { return layout == LightLayout::kTwoRing ? "two-ring" : "fibonacci-dome"; }

const char* SpecularName(SpecularModel m) {
  switch (m) {
    case SpecularModel::kNone: return "none";
    case SpecularModel::kBlinnPhong: return "blinn-phong";
    case SpecularModel::kGgx: return "ggx";
  }
  return "?";
}

std::string CameraId(int k) { return fmt::format("cam{:02d}", k); }

}  // namespace

io::Status ValidateSimOptions(const SimOptions& o) {
  auto bad = [](const std::string& m) { return io::Status::BadInput("simulate: " + m); };
  if (o.num_lights < 3 || o.num_lights > 4096) return bad(fmt::format("lights: {} is outside [3, 4096]", o.num_lights));
  if (o.width < 8 || o.height < 8 || o.width > 4096 || o.height > 4096)
    return bad(fmt::format("size: {}x{} is outside [8, 4096] per side", o.width, o.height));
  if (o.num_cameras < 1 || o.num_cameras > 64) return bad(fmt::format("cameras: {} is outside [1, 64]", o.num_cameras));
  if (!(o.min_elevation_deg >= -90.0 && o.min_elevation_deg < 80.0))
    return bad(fmt::format("min elevation: {} deg is outside [-90, 80)", o.min_elevation_deg));
  if (!(o.rig_radius_m > 0.5))
    return bad(fmt::format("rig radius: {} m must exceed 0.5 m (the subject's size)", o.rig_radius_m));
  if (!(o.camera_distance_m > 0.5))
    return bad(fmt::format("camera distance: {} m must exceed 0.5 m", o.camera_distance_m));
  if (!(o.view_height_m > 0.05)) return bad(fmt::format("view height: {} m must exceed 0.05 m", o.view_height_m));
  if (o.supersample < 1 || o.supersample > 16)
    return bad(fmt::format("supersample: {} is outside [1, 16]", o.supersample));
  if (o.tracking_every < 0) return bad(fmt::format("tracking every: {} must be >= 0", o.tracking_every));
  if (!(o.black_level >= 0.0 && o.black_level < 0.5))
    return bad(fmt::format("black level: {} is outside [0, 0.5)", o.black_level));
  if (!(o.read_noise >= 0.0f) || !(o.full_well_electrons > 0.0f))
    return bad("noise: read noise must be >= 0 and full well > 0");
  if (o.subject.empty()) return bad("subject: empty name");
  const SimFaults& f = o.faults;
  auto check_target = [&](const char* name, const std::string& camera, int light) -> io::Status {
    int cam_index = -1;
    for (int k = 0; k < o.num_cameras; ++k) {
      if (CameraId(k) == camera) cam_index = k;
    }
    if (cam_index < 0)
      return bad(fmt::format("fault {}: unknown camera '{}' (cameras are cam00..{})", name, camera,
                             CameraId(o.num_cameras - 1)));
    if (light < 0 || light >= o.num_lights)
      return bad(fmt::format("fault {}: unknown light id {} (lights are 0..{})", name, light, o.num_lights - 1));
    return io::Status::Ok();
  };
  if (f.dead_light) LUMENRIG_RETURN_IF_ERROR(check_target("dead-light", f.dead_light->camera, f.dead_light->light));
  if (f.missing_frame)
    LUMENRIG_RETURN_IF_ERROR(check_target("missing", f.missing_frame->camera, f.missing_frame->light));
  if (f.saturated_light)
    LUMENRIG_RETURN_IF_ERROR(check_target("saturate", f.saturated_light->camera, f.saturated_light->light));
  if (f.swapped_frames) {
    LUMENRIG_RETURN_IF_ERROR(check_target("swap", f.swapped_frames->camera, f.swapped_frames->light_a));
    LUMENRIG_RETURN_IF_ERROR(check_target("swap", f.swapped_frames->camera, f.swapped_frames->light_b));
    if (f.swapped_frames->light_a == f.swapped_frames->light_b)
      return bad(fmt::format("fault swap: the two lights must differ (both {})", f.swapped_frames->light_a));
  }
  if (!(f.saturate_gain > 1.0)) return bad(fmt::format("fault saturate: gain {} must exceed 1", f.saturate_gain));
  if (!std::isfinite(f.motion_px) || std::abs(f.motion_px) > o.width)
    return bad(fmt::format("fault motion: {} px is not finite or exceeds the image width", f.motion_px));
  if (!std::isfinite(f.drift_percent) || f.drift_percent <= -100.0)
    return bad(fmt::format("fault drift: {} percent must be finite and > -100", f.drift_percent));
  if (!std::isfinite(f.plate_shift_px) || std::abs(f.plate_shift_px) > o.width)
    return bad(fmt::format("fault plate shift: {} px is not finite or exceeds the image width", f.plate_shift_px));
  return io::Status::Ok();
}

io::Rig MakeSimRig(const SimOptions& o) {
  std::vector<Eigen::Vector3d> dirs;
  if (o.layout == LightLayout::kTwoRing) {
    const int n_low = (o.num_lights + 1) / 2;
    const int n_high = o.num_lights - n_low;
    const double el_low = 15.0 * M_PI / 180.0, el_high = 50.0 * M_PI / 180.0;
    for (int k = 0; k < n_low; ++k) {
      const double az = 2.0 * M_PI * k / n_low;
      dirs.emplace_back(std::cos(el_low) * std::sin(az), std::sin(el_low), std::cos(el_low) * std::cos(az));
    }
    for (int k = 0; k < n_high; ++k) {
      const double az = 2.0 * M_PI * (k + 0.5) / n_high;
      dirs.emplace_back(std::cos(el_high) * std::sin(az), std::sin(el_high), std::cos(el_high) * std::cos(az));
    }
  } else {
    dirs = FibonacciDome(o.num_lights, o.min_elevation_deg);
  }
  io::Rig rig;
  rig.name = fmt::format("kh-{}-{}", o.layout == LightLayout::kTwoRing ? "tworing" : "dome", o.num_lights);
  const double base = o.near_field ? kBaseIntensity * o.rig_radius_m * o.rig_radius_m : kBaseIntensity;
  for (int i = 0; i < static_cast<int>(dirs.size()); ++i) {
    io::Light light;
    light.id = i;
    if (o.near_field) {
      light.position = Eigen::Vector3d(Round4(dirs[i].x() * o.rig_radius_m), Round4(dirs[i].y() * o.rig_radius_m),
                                       Round4(dirs[i].z() * o.rig_radius_m));
    } else {
      light.direction = dirs[i];
    }
    // Per-light output +/-4 % and colour +/-3 % per channel, seeded.
    const double g = 1.0 + 0.04 * (2.0 * Uniform01(io::DeriveSeed(o.seed, 0x726967, i, 3)) - 1.0);
    for (int c = 0; c < 3; ++c) {
      const double tint = 1.0 + 0.03 * (2.0 * Uniform01(io::DeriveSeed(o.seed, 0x726967, i, c)) - 1.0);
      light.intensity[c] = Round4(base * g * tint);
    }
    rig.lights.push_back(light);
  }
  return rig;
}

std::vector<io::Camera> MakeSimCameras(const SimOptions& o) {
  std::vector<io::Camera> cams;
  for (int k = 0; k < o.num_cameras; ++k) {
    io::Camera cam;
    cam.id = CameraId(k);
    const int step = (k + 1) / 2;
    const double yaw = (k % 2 == 1 ? 1.0 : -1.0) * step * o.camera_yaw_step_deg * M_PI / 180.0;
    Eigen::Matrix3d r;
    r << std::cos(yaw), 0.0, -std::sin(yaw),  //
        0.0, 1.0, 0.0,                        //
        std::sin(yaw), 0.0, std::cos(yaw);
    const Eigen::Vector3d centre_rig = o.camera_distance_m * r.row(2).transpose();
    cam.camera_from_rig = Eigen::Matrix4d::Identity();
    cam.camera_from_rig.topLeftCorner<3, 3>() = r;
    cam.camera_from_rig.topRightCorner<3, 1>() = -r * centre_rig;
    cam.camera_from_rig.array() += 0.0;  // no negative zeros in session.json
    cam.has_camera_from_rig = true;
    io::Intrinsics in;
    in.fy = o.height * o.camera_distance_m / o.view_height_m;
    in.fx = in.fy;
    in.cx = 0.5 * o.width;
    in.cy = 0.5 * o.height;
    cam.intrinsics = in;
    cams.push_back(cam);
  }
  return cams;
}

double LitExposure(const SimOptions& o) { return 2.5 / o.num_lights; }

namespace internal {

double Progress(const SimOptions& o, int light_index) {
  return o.num_lights > 1 ? static_cast<double>(light_index) / (o.num_lights - 1) : 0.0;
}

double DriftGain(const SimOptions& o, double t) { return 1.0 + o.faults.drift_percent / 100.0 * t; }

double OlatGain(const SimOptions& o, const std::string& camera_id, int light_id, double t) {
  double gain = DriftGain(o, t);
  const SimFaults& f = o.faults;
  if (f.dead_light && f.dead_light->camera == camera_id && f.dead_light->light == light_id) gain = 0.0;
  if (f.saturated_light && f.saturated_light->camera == camera_id && f.saturated_light->light == light_id)
    gain *= f.saturate_gain;
  return gain;
}

std::vector<LitLight> AllLights(const io::Rig& rig, double gain) {
  std::vector<LitLight> lights;
  for (const io::Light& l : rig.lights) lights.push_back({l, gain});
  return lights;
}

}  // namespace internal

io::Expected<SimulatedCamera> SimulateCamera(const SimOptions& o, int camera_index) {
  LUMENRIG_RETURN_IF_ERROR(ValidateSimOptions(o));
  if (camera_index < 0 || camera_index >= o.num_cameras)
    return io::Status::BadInput(
        fmt::format("simulate: camera index {} is outside [0, {})", camera_index, o.num_cameras));
  SimulatedCamera out;
  out.rig = MakeSimRig(o);
  out.camera = MakeSimCameras(o)[camera_index];
  const CameraView view = CameraView::Build(o, out.camera, 0.0, 0.0, o.threads);
  out.truth = view.Truth();
  const int n = static_cast<int>(out.rig.lights.size());
  out.olat.resize(n);
  for (int k = 0; k < n; ++k) {
    const io::Light& light = out.rig.lights[k];
    const double t = internal::Progress(o, k);
    const double gain = internal::OlatGain(o, out.camera.id, light.id, t);
    const double shift = o.faults.motion_px * t;
    cv::Mat frame;
    if (shift != 0.0) {
      frame = CameraView::Build(o, out.camera, shift, 0.0, o.threads)
                  .Render({{light, gain}}, Backdrop::kBlack, true, o.threads);
    } else {
      frame = view.Render({{light, gain}}, Backdrop::kBlack, true, o.threads);
    }
    ApplySensor(o, camera_index, static_cast<uint64_t>(k), &frame, o.threads);
    out.olat[k] = frame;
  }
  return out;
}

nlohmann::json SimOptionsToJson(const SimOptions& o) {
  using nlohmann::json;
  json j = {
      {"scenario", "Kestrel Hollow Studio"},
      {"subject", o.subject},
      {"lights", o.num_lights},
      {"layout", LayoutName(o.layout)},
      {"min_elevation_deg", o.min_elevation_deg},
      {"near_field", o.near_field},
      {"rig_radius_m", o.rig_radius_m},
      {"cameras", o.num_cameras},
      {"width", o.width},
      {"height", o.height},
      {"camera_distance_m", o.camera_distance_m},
      {"view_height_m", o.view_height_m},
      {"camera_yaw_step_deg", o.camera_yaw_step_deg},
      {"specular", SpecularName(o.specular)},
      {"shadows", o.shadows},
      {"hair", o.hair},
      {"supersample", o.supersample},
      {"noise", o.noise},
      {"black_level", o.black_level},
      {"read_noise", o.read_noise},
      {"full_well_electrons", o.full_well_electrons},
      {"seed", o.seed},
      {"tracking_every", o.tracking_every},
      {"extras", o.extras},
      {"lit_exposure", LitExposure(o)},
  };
  json f = json::object();
  const SimFaults& sf = o.faults;
  auto target = [](const CameraLightTarget& t) { return json{{"camera", t.camera}, {"light", t.light}}; };
  if (sf.dead_light) f["dead_light"] = target(*sf.dead_light);
  if (sf.missing_frame) f["missing_frame"] = target(*sf.missing_frame);
  if (sf.saturated_light) {
    f["saturated_light"] = target(*sf.saturated_light);
    f["saturated_light"]["gain"] = sf.saturate_gain;
  }
  if (sf.swapped_frames)
    f["swapped_frames"] = {{"camera", sf.swapped_frames->camera},
                           {"lights", {sf.swapped_frames->light_a, sf.swapped_frames->light_b}}};
  if (sf.motion_px != 0.0) f["motion_px"] = sf.motion_px;
  if (sf.drift_percent != 0.0) f["drift_percent"] = sf.drift_percent;
  if (sf.plate_shift_px != 0.0) f["plate_shift_px"] = sf.plate_shift_px;
  j["faults"] = f;
  return j;
}

}  // namespace lumenrig::synth
