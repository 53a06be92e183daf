// `lumenrig info SESSION [--json] [--verify]`: loads and validates a session
// and its rig, probes every frame header and prints what the capture holds.
#include <sys/resource.h>

#include <chrono>
#include <cstdio>
#include <filesystem>
#include <map>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "command.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/session.h"

namespace fs = std::filesystem;
using nlohmann::json;

namespace lumenrig::cli {
namespace {

struct FrameRef {
  std::string role;  // olat, dark, clean_plate, backlit, lit, mask, tracking, matte_plate, matte_frame
  int light = -1;    // olat light id / tracking after_light
  std::string path;  // absolute
};

struct ProbedFrame {
  FrameRef ref;
  io::ImageInfo info;
};

std::vector<FrameRef> FramesOf(const io::Camera& cam) {
  std::vector<FrameRef> frames;
  for (const auto& f : cam.olat) frames.push_back({"olat", f.light, f.path});
  const std::pair<const char*, const std::string*> singles[] = {{"dark", &cam.dark},
                                                                {"clean_plate", &cam.clean_plate},
                                                                {"backlit", &cam.backlit},
                                                                {"lit", &cam.lit},
                                                                {"mask", &cam.mask}};
  for (const auto& [role, path] : singles)
    if (!path->empty()) frames.push_back({role, -1, *path});
  for (const auto& t : cam.tracking) frames.push_back({"tracking", t.after_light, t.path});
  for (const auto& p : cam.matte_pairs) {
    frames.push_back({"matte_plate", -1, p.plate});
    frames.push_back({"matte_frame", -1, p.frame});
  }
  return frames;
}

// Decodes every row of a frame in bands (catches truncated or corrupt pixel
// data that a header probe cannot see). Half-float frames are decoded as
// stored: widening them to float would only add work after the decode.
io::Status VerifyPixels(const std::string& path) {
  auto reader = io::BandReader::Open(path);
  if (!reader.ok()) return reader.status();
  const int height = (*reader)->info().height;
  const bool half = (*reader)->StoresHalf();
  cv::Mat band;
  for (int y = 0; y < height; y += 64) {
    const int y1 = std::min(height, y + 64);
    LUMENRIG_RETURN_IF_ERROR(half ? (*reader)->ReadRowsHalf(y, y1, &band) : (*reader)->ReadRows(y, y1, &band));
  }
  return io::Status::Ok();
}

struct CameraReport {
  const io::Camera* camera = nullptr;
  std::vector<ProbedFrame> frames;
  int width = 0, height = 0;
};

// Probes all frames of a camera and checks they share one size.
io::Status ProbeCamera(const io::Camera& cam, bool verify, int threads, CameraReport* report) {
  report->camera = &cam;
  const std::vector<FrameRef> refs = FramesOf(cam);
  if (verify) {
    // Decode every frame once, frames in parallel; report the first failure
    // in list order so the message does not depend on scheduling.
    std::vector<io::Status> results(refs.size());
    io::ParallelFor(0, static_cast<int64_t>(refs.size()), 1, threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) results[static_cast<size_t>(i)] = VerifyPixels(refs[static_cast<size_t>(i)].path);
    });
    for (const auto& st : results) LUMENRIG_RETURN_IF_ERROR(st);
  }
  for (const FrameRef& ref : refs) {
    auto info = io::ProbeImage(ref.path);
    if (!info.ok()) return info.status();
    report->frames.push_back({ref, *info});
    const ProbedFrame& f = report->frames.back();
    if (report->frames.size() == 1) {
      report->width = f.info.width;
      report->height = f.info.height;
    } else if (f.info.width != report->width || f.info.height != report->height) {
      return io::Status::BadInput(fmt::format("{}: frame size {}x{} differs from {}x{} of {} (camera \"{}\", {})",
                                              ref.path, f.info.width, f.info.height, report->width, report->height,
                                              report->frames.front().ref.path, cam.id, ref.role));
    }
  }
  return io::Status::Ok();
}

std::string Relative(const io::Session& s, const std::string& path) {
  return fs::path(path).lexically_relative(s.dir).generic_string();
}

// "156 x half RGB (OpenEXR)" summaries of a camera's frames.
std::vector<std::string> TypeSummary(const CameraReport& r) {
  std::map<std::string, int> counts;
  for (const auto& f : r.frames) {
    counts[fmt::format("{} {} ({})", f.info.pixel_type, f.info.channels == 3 ? "RGB" : "Y",
                       io::FormatName(f.info.format))]++;
  }
  std::vector<std::string> out;
  for (const auto& [k, n] : counts) out.push_back(fmt::format("{} x {}", n, k));
  return out;
}

std::map<std::string, int> RoleCounts(const CameraReport& r) {
  std::map<std::string, int> counts;
  for (const auto& f : r.frames) counts[f.ref.role]++;
  return counts;
}

json ToJson(const io::Session& s, const std::vector<CameraReport>& cams) {
  int directional = 0;
  for (const auto& l : s.rig.lights) directional += l.direction ? 1 : 0;
  json j;
  j["session"] = s.path;
  j["format"] = s.format;
  j["subject"] = s.subject;
  j["encoding"] = s.encoding == io::Encoding::kSrgb ? "srgb" : "linear";
  j["black_level"] = s.black_level;
  j["rig"] = {{"path", s.rig.path},
              {"name", s.rig.name},
              {"lights", s.rig.lights.size()},
              {"directional", directional},
              {"near_field", static_cast<int>(s.rig.lights.size()) - directional}};
  json jcams = json::array();
  size_t total = 0;
  for (const auto& r : cams) {
    json jc;
    jc["id"] = r.camera->id;
    jc["width"] = r.width;
    jc["height"] = r.height;
    if (r.camera->intrinsics) {
      const auto& k = *r.camera->intrinsics;
      jc["intrinsics"] = {{"fx", k.fx}, {"fy", k.fy}, {"cx", k.cx}, {"cy", k.cy}};
    } else {
      jc["intrinsics"] = nullptr;
    }
    jc["has_camera_from_rig"] = r.camera->has_camera_from_rig;
    jc["frame_counts"] = RoleCounts(r);
    json files = json::array();
    for (const auto& f : r.frames) {
      json jf{{"role", f.ref.role},
              {"path", Relative(s, f.ref.path)},
              {"width", f.info.width},
              {"height", f.info.height},
              {"channels", f.info.channels},
              {"pixel_type", f.info.pixel_type},
              {"file_format", io::FormatName(f.info.format)},
              {"channel_names", f.info.channel_names}};
      if (f.ref.role == "olat") jf["light"] = f.ref.light;
      if (f.ref.role == "tracking") jf["after_light"] = f.ref.light;
      files.push_back(jf);
    }
    jc["frames"] = files;
    total += r.frames.size();
    jcams.push_back(jc);
  }
  j["cameras"] = jcams;
  j["frames_total"] = total;
  return j;
}

void PrintText(const io::Session& s, const std::vector<CameraReport>& cams) {
  int directional = 0;
  for (const auto& l : s.rig.lights) directional += l.direction ? 1 : 0;
  const int near_field = static_cast<int>(s.rig.lights.size()) - directional;
  fmt::print("session   {}\n", s.path);
  fmt::print("subject   {}\n", s.Id());
  fmt::print("encoding  {}, black level {:.4f}\n", s.encoding == io::Encoding::kSrgb ? "srgb" : "linear",
             s.black_level);
  fmt::print("rig       {}{}: {} lights ({} directional, {} near-field)\n", s.rig_file,
             s.rig.name.empty() ? "" : " (" + s.rig.name + ")", s.rig.lights.size(), directional, near_field);
  fmt::print("cameras   {}\n", cams.size());
  size_t total = 0;
  for (const auto& r : cams) {
    std::vector<std::string> roles;
    for (const auto& [role, n] : RoleCounts(r)) roles.push_back(fmt::format("{} {}", n, role));
    fmt::print("  {}: {}x{}, {} frames: {}\n", r.camera->id, r.width, r.height, r.frames.size(),
               fmt::join(roles, ", "));
    fmt::print("    types: {}\n", fmt::join(TypeSummary(r), "; "));
    if (r.camera->intrinsics) {
      const auto& k = *r.camera->intrinsics;
      fmt::print("    intrinsics: fx {:.2f} fy {:.2f} cx {:.2f} cy {:.2f} px\n", k.fx, k.fy, k.cx, k.cy);
    }
    total += r.frames.size();
  }
  fmt::print("frames    {}\n", total);
}

std::string RunStats(std::chrono::steady_clock::time_point start) {
  return "info: done in " +
         TimeAndMemoryLine(std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count());
}

int RunInfo(const std::string& session_path, bool as_json, bool verify, int threads) {
  const auto start = std::chrono::steady_clock::now();
  auto session = io::LoadSession(session_path);
  if (!session.ok()) return ReportError("info", session.status());
  std::vector<CameraReport> cams(session->cameras.size());
  for (size_t i = 0; i < session->cameras.size(); ++i) {
    const io::Status status = ProbeCamera(session->cameras[i], verify, threads, &cams[i]);
    if (!status.ok()) return ReportError("info", status);
  }
  if (as_json) {
    fmt::print("{}\n", ToJson(*session, cams).dump(2));
    fmt::print(stderr, "{}\n", RunStats(start));
  } else {
    PrintText(*session, cams);
    fmt::print("{}\n", RunStats(start));
  }
  return 0;
}

CommandRegistrar reg({"info", "Validate a session and its rig; list cameras, lights, frames, sizes and pixel types", 20,
                      [](CLI::App* sub) -> std::function<int()> {
                        auto session = std::make_shared<std::string>();
                        auto as_json = std::make_shared<bool>(false);
                        auto verify = std::make_shared<bool>(false);
                        sub->add_option("session", *session, "session.json or the folder holding it")->required();
                        sub->add_flag("--json", *as_json, "print machine-readable JSON on stdout");
                        sub->add_flag("--verify", *verify,
                                      "decode every frame fully (finds truncated pixel data; slower)");
                        auto threads = std::make_shared<int>(0);
                        sub->add_option("--threads", *threads, "Threads for --verify (0 = all cores)");
                        return [=] { return RunInfo(*session, *as_json, *verify, *threads); };
                      }});

}  // namespace
}  // namespace lumenrig::cli
