// Writes a simulated session folder (frames, truth, session.json, rig.json).
#include <atomic>
#include <filesystem>
#include <map>
#include <mutex>

#include <fmt/format.h>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/simulator.h"
#include "sim_plan.h"

namespace fs = std::filesystem;

namespace lumenrig::synth {
namespace {

enum class JobKind { kOlat, kTracking, kDark, kPlate, kBacklit, kLit, kMattePlate, kMatteFrame };

/// One frame to render and write.
struct FrameJob {
  JobKind kind = JobKind::kOlat;
  int light_index = -1;  // OLAT: light rendered; tracking: the OLAT frame it follows
  int matte = 0;         // matte pair index
  std::string rel_path;  // relative to the session folder
  uint64_t key = 0;      // sensor seed key
};

std::map<std::string, std::string> Provenance(const SimOptions& o, const std::string& camera_id) {
  return {{"lumenrig:tool", std::string("lumenrig simulate ") + LUMENRIG_VERSION},
          {"lumenrig:scenario", "Kestrel Hollow Studio"},
          {"lumenrig:subject", o.subject},
          {"lumenrig:camera", camera_id},
          {"lumenrig:seed", std::to_string(o.seed)}};
}

/// `all_lights` is view.Render(every light at gain 1, kBlack, true).
io::Status WriteTruth(const SimOptions& o, const CameraView& view, const TruthMaps& truth, const cv::Mat& all_lights,
                      const std::string& camera_id, const std::string& truth_dir) {
  io::ExrWriteOptions exr;
  exr.pixel_type = io::PixelType::kFloat;
  exr.overwrite = o.overwrite;
  exr.attributes = Provenance(o, camera_id);
  exr.attributes["lumenrig:frame"] = "camera";
  LUMENRIG_RETURN_IF_ERROR(io::WriteExr(truth_dir + "/normals.exr", truth.normals, exr));
  LUMENRIG_RETURN_IF_ERROR(io::WriteExr(truth_dir + "/albedo.exr", truth.albedo, exr));
  LUMENRIG_RETURN_IF_ERROR(io::WriteExr(truth_dir + "/alpha.exr", truth.alpha, exr));
  io::ExrWriteOptions depth_exr = exr;
  depth_exr.attributes["lumenrig:depth_units"] = "metres along -z (camera frame)";
  LUMENRIG_RETURN_IF_ERROR(io::WriteExr(truth_dir + "/depth.exr", truth.depth, depth_exr));
  // Un-premultiplied foreground under the lighting of the lit frame and the
  // matte pairs (all lights, LitExposure), noise free.
  const cv::Mat premult = view.Composite(all_lights, LitExposure(o), Backdrop::kBlack);
  cv::Mat foreground = cv::Mat::zeros(premult.size(), CV_32FC3);
  for (int y = 0; y < premult.rows; ++y) {
    for (int x = 0; x < premult.cols; ++x) {
      const float a = truth.alpha.at<float>(y, x);
      if (a > 0.0f) foreground.at<cv::Vec3f>(y, x) = premult.at<cv::Vec3f>(y, x) / a;
    }
  }
  io::ExrWriteOptions fg_exr = exr;
  fg_exr.attributes["lumenrig:lighting"] = "all lights, lit exposure";
  LUMENRIG_RETURN_IF_ERROR(io::WriteExr(truth_dir + "/foreground.exr", foreground, fg_exr));
  return io::WritePng(truth_dir + "/mask.png", truth.mask, o.overwrite);
}

}  // namespace

io::Status SimulateSession(const SimOptions& o, const std::string& out_dir, SimSummary* summary) {
  LUMENRIG_RETURN_IF_ERROR(ValidateSimOptions(o));
  std::error_code ec;
  fs::path dir = fs::absolute(out_dir, ec).lexically_normal();
  if (dir.filename().empty()) dir = dir.parent_path();  // "out/" -> "out"
  const std::string dir_s = dir.string();
  if (fs::exists(dir, ec)) {
    if (!fs::is_directory(dir, ec)) return io::Status::BadInput(fmt::format("{}: exists and is not a folder", dir_s));
    if (!fs::is_empty(dir, ec) && !o.overwrite)
      return io::Status::BadInput(fmt::format("{}: output folder is not empty (use --force to overwrite)", dir_s));
  }
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir_s + "/truth"));

  const io::Rig rig = MakeSimRig(o);
  const std::vector<io::Camera> cameras = MakeSimCameras(o);
  const int n = static_cast<int>(rig.lights.size());

  io::Session session;
  session.subject = o.subject;
  session.dir = dir_s;
  session.path = dir_s + "/session.json";
  session.rig_file = "rig.json";
  session.rig = rig;
  session.rig.path = dir_s + "/rig.json";
  session.encoding = io::Encoding::kLinear;
  session.black_level = o.black_level;

  // Take plan of one camera (paths filled per camera).
  std::vector<FrameJob> plan;
  for (int i = 0; i < n; ++i) {
    plan.push_back({JobKind::kOlat, i, 0, "", static_cast<uint64_t>(i)});
    if (o.tracking_every > 0 && (i + 1) % o.tracking_every == 0)
      plan.push_back({JobKind::kTracking, i, 0, "", internal::kKeyTrackingBase + static_cast<uint64_t>(i)});
  }
  if (o.extras) {
    plan.push_back({JobKind::kDark, -1, 0, "", internal::kKeyDark});
    plan.push_back({JobKind::kPlate, -1, 0, "", internal::kKeyPlate});
    plan.push_back({JobKind::kBacklit, -1, 0, "", internal::kKeyBacklit});
    plan.push_back({JobKind::kLit, -1, 0, "", internal::kKeyLit});
    plan.push_back({JobKind::kMattePlate, -1, 0, "", internal::kKeyMattePlateA});
    plan.push_back({JobKind::kMatteFrame, -1, 0, "", internal::kKeyMatteFrameA});
    plan.push_back({JobKind::kMattePlate, -1, 1, "", internal::kKeyMattePlateB});
    plan.push_back({JobKind::kMatteFrame, -1, 1, "", internal::kKeyMatteFrameB});
  }
  const int total = static_cast<int>(plan.size()) * o.num_cameras;
  std::atomic<int> done{0};
  std::mutex progress_mutex;
  int frames_written = 0, truth_files = 0;

  for (int c = 0; c < o.num_cameras; ++c) {
    io::Camera cam = cameras[c];
    const std::string cam_dir = dir_s + "/" + cam.id;
    const std::string truth_dir = dir_s + "/truth/" + cam.id;
    LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(cam_dir));
    LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(truth_dir));

    const CameraView view = CameraView::Build(o, cam, 0.0, 0.0, o.threads);
    // Every fully lit frame without motion is a multiple of this one render.
    const cv::Mat all_lights = view.Render(internal::AllLights(rig, 1.0), Backdrop::kBlack, true, o.threads);
    const TruthMaps truth = view.Truth();
    LUMENRIG_RETURN_IF_ERROR(WriteTruth(o, view, truth, all_lights, cam.id, truth_dir));
    truth_files += 6;
    LUMENRIG_RETURN_IF_ERROR(io::WritePng(cam_dir + "/mask.png", truth.mask, o.overwrite));
    cam.mask = cam_dir + "/mask.png";

    // Paths (and the session entries) of this camera's frames.
    std::vector<FrameJob> jobs;
    const SimFaults& f = o.faults;
    auto olat_name = [&](int light_index) {
      return fmt::format("{}/olat_{:03d}.exr", cam.id, rig.lights[light_index].id);
    };
    for (FrameJob job : plan) {
      switch (job.kind) {
        case JobKind::kOlat: {
          const int id = rig.lights[job.light_index].id;
          if (f.missing_frame && f.missing_frame->camera == cam.id && f.missing_frame->light == id) continue;
          int write_as = job.light_index;
          if (f.swapped_frames && f.swapped_frames->camera == cam.id) {
            if (id == f.swapped_frames->light_a) write_as = rig.IndexOfId(f.swapped_frames->light_b);
            if (id == f.swapped_frames->light_b) write_as = rig.IndexOfId(f.swapped_frames->light_a);
          }
          job.rel_path = olat_name(write_as);
          break;
        }
        case JobKind::kTracking:
          job.rel_path = fmt::format("{}/track_{:03d}.exr", cam.id, rig.lights[job.light_index].id);
          cam.tracking.push_back({rig.lights[job.light_index].id, dir_s + "/" + job.rel_path});
          break;
        case JobKind::kDark:
          job.rel_path = cam.id + "/dark.exr";
          cam.dark = dir_s + "/" + job.rel_path;
          break;
        case JobKind::kPlate:
          job.rel_path = cam.id + "/plate.exr";
          cam.clean_plate = dir_s + "/" + job.rel_path;
          break;
        case JobKind::kBacklit:
          job.rel_path = cam.id + "/backlit.exr";
          cam.backlit = dir_s + "/" + job.rel_path;
          break;
        case JobKind::kLit:
          job.rel_path = cam.id + "/lit.exr";
          cam.lit = dir_s + "/" + job.rel_path;
          break;
        case JobKind::kMattePlate:
          job.rel_path = fmt::format("{}/matte_plate_{}.exr", cam.id, job.matte);
          if (static_cast<int>(cam.matte_pairs.size()) <= job.matte) cam.matte_pairs.resize(job.matte + 1);
          cam.matte_pairs[job.matte].plate = dir_s + "/" + job.rel_path;
          break;
        case JobKind::kMatteFrame:
          job.rel_path = fmt::format("{}/matte_frame_{}.exr", cam.id, job.matte);
          if (static_cast<int>(cam.matte_pairs.size()) <= job.matte) cam.matte_pairs.resize(job.matte + 1);
          cam.matte_pairs[job.matte].frame = dir_s + "/" + job.rel_path;
          break;
      }
      jobs.push_back(job);
    }
    // The session lists OLAT frames in rig order, each under the path that
    // claims its light (swapped files stay swapped: that is the fault).
    for (int i = 0; i < n; ++i) {
      const int id = rig.lights[i].id;
      if (f.missing_frame && f.missing_frame->camera == cam.id && f.missing_frame->light == id) continue;
      cam.olat.push_back({id, dir_s + "/" + olat_name(i)});
    }

    // Render and write, one frame per task; each frame is deterministic on its own.
    std::vector<io::Status> statuses(jobs.size());
    const double lit_exposure = LitExposure(o);
    io::ParallelFor(0, static_cast<int64_t>(jobs.size()), 1, o.threads, [&](int64_t j0, int64_t j1) {
      for (int64_t j = j0; j < j1; ++j) {
        const FrameJob& job = jobs[j];
        cv::Mat frame;
        std::string what;
        auto render_at = [&](double t, const std::vector<LitLight>& lights, Backdrop backdrop) {
          const double shift = f.motion_px * t;
          if (shift == 0.0) return view.Render(lights, backdrop, true, 1);
          return CameraView::Build(o, cam, shift, 0.0, 1).Render(lights, backdrop, true, 1);
        };
        switch (job.kind) {
          case JobKind::kOlat: {
            const double t = internal::Progress(o, job.light_index);
            const io::Light& light = rig.lights[job.light_index];
            frame = render_at(t, {{light, internal::OlatGain(o, cam.id, light.id, t)}}, Backdrop::kBlack);
            what = "olat";
            break;
          }
          case JobKind::kTracking: {
            const double t = internal::Progress(o, job.light_index);
            const double gain = lit_exposure * internal::DriftGain(o, t);
            if (f.motion_px * t == 0.0) {
              frame = view.Composite(all_lights, gain, Backdrop::kBlack);
            } else {
              frame = render_at(t, internal::AllLights(rig, gain), Backdrop::kBlack);
            }
            what = "tracking";
            break;
          }
          case JobKind::kDark:
            frame = cv::Mat::zeros(o.height, o.width, CV_32FC3);
            what = "dark";
            break;
          case JobKind::kPlate:
            frame = view.Render({}, Backdrop::kStudioWall, false, 1);
            what = "clean plate";
            break;
          case JobKind::kBacklit:
            frame = CameraView::Build(o, cam, 0.0, f.plate_shift_px, 1).Render({}, Backdrop::kStudioWall, true, 1);
            what = "backlit";
            break;
          case JobKind::kLit:
            frame = view.Composite(all_lights, lit_exposure, Backdrop::kStudioWall);
            what = "lit";
            break;
          case JobKind::kMattePlate:
            frame = view.Render({}, job.matte == 0 ? Backdrop::kMatteA : Backdrop::kMatteB, false, 1);
            what = "matte plate";
            break;
          case JobKind::kMatteFrame:
            frame = view.Composite(all_lights, lit_exposure, job.matte == 0 ? Backdrop::kMatteA : Backdrop::kMatteB);
            what = "matte frame";
            break;
        }
        ApplySensor(o, c, job.key, &frame, 1);
        io::ExrWriteOptions exr;
        exr.pixel_type = io::PixelType::kHalf;
        exr.overwrite = o.overwrite;
        exr.attributes = Provenance(o, cam.id);
        exr.attributes["lumenrig:kind"] = what;
        statuses[j] = io::WriteExr(dir_s + "/" + job.rel_path, frame, exr);
        const int now = ++done;
        if (o.progress) {
          std::lock_guard<std::mutex> lock(progress_mutex);
          o.progress(now, total);
        }
      }
    });
    for (const io::Status& st : statuses) LUMENRIG_RETURN_IF_ERROR(st);
    frames_written += static_cast<int>(jobs.size());
    session.cameras.push_back(cam);
  }

  LUMENRIG_RETURN_IF_ERROR(io::WriteTextFile(dir_s + "/rig.json", io::RigToJson(rig).dump(2) + "\n", o.overwrite));
  LUMENRIG_RETURN_IF_ERROR(
      io::WriteTextFile(dir_s + "/truth/simulation.json", SimOptionsToJson(o).dump(2) + "\n", o.overwrite));
  // session.json last: a folder without it is visibly incomplete.
  LUMENRIG_RETURN_IF_ERROR(io::WriteTextFile(session.path, io::SessionToJson(session).dump(2) + "\n", o.overwrite));
  if (summary != nullptr) {
    summary->session_path = session.path;
    summary->frames_written = frames_written;
    summary->truth_files = truth_files;
  }
  return io::Status::Ok();
}

io::Status WriteSimRig(const SimOptions& options, const std::string& path) {
  LUMENRIG_RETURN_IF_ERROR(ValidateSimOptions(options));
  const fs::path parent = fs::absolute(path).parent_path();
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(parent.string()));
  return io::WriteTextFile(path, io::RigToJson(MakeSimRig(options)).dump(2) + "\n", options.overwrite);
}

}  // namespace lumenrig::synth
