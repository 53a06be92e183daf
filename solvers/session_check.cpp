// Session check driver: the single reading pass, then every check on the
// per-frame summaries; JSON output.
#include "lumenrig/solvers/session_check.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <map>
#include <set>

#include "check_internal.h"
#include "lumenrig/capture_io/atomic_file.h"

namespace lumenrig::solvers {

namespace check_detail {

CheckLine MakeLine(const std::string& key, const std::string& title, const std::string& unit, double warn,
                   double fail) {
  CheckLine line;
  line.key = key;
  line.title = title;
  line.unit = unit;
  line.warn_threshold = warn;
  line.fail_threshold = fail;
  return line;
}

void AddFinding(CheckLine* line, Finding finding) {
  line->verdict = Worse(line->verdict, finding.verdict);
  line->findings.push_back(std::move(finding));
}

std::string Num(double value, int decimals) {
  if (!std::isfinite(value)) return value > 0 ? "inf" : (value < 0 ? "-inf" : "n/a");
  std::string s = fmt::format("{:.{}f}", value, decimals);
  if (s.find('.') != std::string::npos) {
    while (!s.empty() && s.back() == '0') s.pop_back();
    if (!s.empty() && s.back() == '.') s.pop_back();
  }
  if (s == "-0") s = "0";
  return s;
}

void CheckCompleteness(const io::Session& session, CheckResult* result_out, CheckLine* line) {
  const CheckResult& result = *result_out;
  int expected = 0, good = 0;
  for (size_t c = 0; c < session.cameras.size(); ++c) {
    const io::Camera& cam = session.cameras[c];
    std::map<int, int> slots;
    for (const auto& o : cam.olat) ++slots[o.light];
    for (const auto& light : session.rig.lights) {
      ++expected;
      if (slots.count(light.id) == 0) {
        result_out->cameras[c].missing_lights.push_back(light.id);
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.lights = {light.id};
        f.message = fmt::format("camera {}: no OLAT frame for light {}", cam.id, light.id);
        AddFinding(line, std::move(f));
      }
    }
    for (const auto& [id, count] : slots) {
      if (session.rig.IndexOfId(id) < 0) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.lights = {id};
        f.message =
            fmt::format("camera {}: OLAT frame for light {} which is not in rig {}", cam.id, id, session.rig.name);
        AddFinding(line, std::move(f));
      }
      if (count > 1) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.lights = {id};
        f.value = count;
        f.message = fmt::format("camera {}: light {} has {} OLAT frames (duplicate slot)", cam.id, id, count);
        AddFinding(line, std::move(f));
      }
    }
    // Readability and consistency with the camera's first readable OLAT frame.
    const FrameSummary* ref = nullptr;
    for (const auto& s : result.frames) {
      if (s.camera != static_cast<int>(c)) continue;
      auto label = [&]() {
        return s.kind == FrameKind::kOlat ? fmt::format("light {}", s.light)
                                          : fmt::format("tracking frame after light {}", s.light);
      };
      if (!s.readable || !s.error.empty()) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.lights = {s.light};
        f.frame = s.path;
        f.message = fmt::format("camera {} {}: frame missing or unreadable: {}", cam.id, label(), s.error);
        AddFinding(line, std::move(f));
        continue;
      }
      if (ref == nullptr) ref = &s;
      std::string diff;
      if (s.width != ref->width || s.height != ref->height)
        diff = fmt::format("size {}x{} vs {}x{}", s.width, s.height, ref->width, ref->height);
      else if (s.channels != ref->channels)
        diff = fmt::format("{} channels vs {}", s.channels, ref->channels);
      else if (s.pixel_type != ref->pixel_type)
        diff = fmt::format("pixel type {} vs {}", s.pixel_type, ref->pixel_type);
      if (!diff.empty()) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.lights = {s.light};
        f.frame = s.path;
        f.message = fmt::format("camera {} {}: {} of the camera's first frame ({})", cam.id, label(), diff, ref->path);
        AddFinding(line, std::move(f));
        continue;
      }
      if (s.kind == FrameKind::kOlat && slots.count(s.light) && session.rig.IndexOfId(s.light) >= 0) ++good;
    }
  }
  line->value = static_cast<double>(line->findings.size());
  line->summary = line->findings.empty()
                      ? fmt::format("{}/{} OLAT frames present, readable and consistent ({} cameras x {} lights)", good,
                                    expected, session.cameras.size(), session.rig.lights.size())
                      : fmt::format("{} problem(s); {}/{} OLAT frames usable", line->findings.size(), good, expected);
}

}  // namespace check_detail

using check_detail::AddFinding;

struct StreamedCheck::Parts {
  const io::Session* session = nullptr;
  CheckOptions options;
  std::chrono::steady_clock::time_point start;
  CheckResult result;
  CheckLine integrity;
  std::unique_ptr<check_detail::ScanState, check_detail::ScanStateDeleter> scan;
};

io::Expected<std::unique_ptr<StreamedCheck>> StreamedCheck::Begin(const io::Session& session,
                                                                  const CheckOptions& options, int threads) {
  LUMENRIG_RETURN_IF_ERROR(options.Validate());
  if (session.cameras.empty())
    return io::Status::BadInput(fmt::format("{}: cameras: the session lists no camera", session.path));
  std::unique_ptr<StreamedCheck> check(new StreamedCheck());
  check->parts_ = std::make_unique<Parts>();
  Parts& p = *check->parts_;
  p.session = &session;
  p.options = options;
  p.start = std::chrono::steady_clock::now();
  CheckResult* result = &p.result;
  result->session_path = session.path;
  result->session_id = session.Id();
  result->rig_name = session.rig.name;
  result->light_count = static_cast<int>(session.rig.lights.size());
  result->options = options;
  result->options.progress = nullptr;
  p.integrity = check_detail::MakeLine("completeness",
                                       "Every listed frame present and readable (OLAT, tracking, plates, matte pairs)",
                                       "problems", std::numeric_limits<double>::quiet_NaN(), 0.0);
  LUMENRIG_RETURN_IF_ERROR(check_detail::ScanBegin(session, options, result, &p.integrity, threads, &p.scan));
  return check;
}

StreamedCheck::~StreamedCheck() = default;

void StreamedCheck::Rows(int camera, int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows) {
  if (parts_ && parts_->scan) check_detail::ScanRows(parts_->scan.get(), camera, frame, info, y0, y1, rows);
}

int64_t StreamedCheck::StreamBytes(int camera) const {
  return parts_ && parts_->scan ? check_detail::ScanStreamBytes(*parts_->scan, camera) : 0;
}

io::Status StreamedCheck::Finish(CheckResult* out) {
  if (!parts_ || !parts_->scan) return io::Status::Internal("StreamedCheck::Finish called twice");
  Parts& p = *parts_;
  const io::Session& session = *p.session;
  const CheckOptions& options_in = p.options;
  CheckResult* result = &p.result;
  CheckLine& integrity = p.integrity;
  LUMENRIG_RETURN_IF_ERROR(check_detail::ScanFinish(p.scan.get()));
  p.scan.reset();
  const auto start = p.start;
  check_detail::CheckCompleteness(session, result, &integrity);

  std::vector<CheckLine> lines;
  lines.push_back(std::move(integrity));
  check_detail::CheckExposure(session, options_in, result, &lines);
  check_detail::CheckLights(session, options_in, result, &lines);
  check_detail::CheckStability(session, options_in, result, &lines);
  std::vector<CameraPose> poses;
  for (const auto& cam : session.cameras) poses.push_back({cam.id, cam.RotationCameraFromRig()});
  CheckCalibration(session.rig, poses, options_in, &lines);
  check_detail::CheckMatting(session, options_in, result, &lines);

  // Mark frames named by findings (contact sheet) and compute the verdict.
  for (const auto& line : lines) {
    // SKIP lines never fail a session: the verdict is PASS, WARN or FAIL.
    if (line.verdict != Verdict::kSkip) result->verdict = Worse(result->verdict, line.verdict);
    for (const auto& f : line.findings) {
      for (auto& s : result->frames) {
        const bool same_path = !f.frame.empty() && f.frame == s.path;
        const bool same_light = f.frame.empty() && s.kind == FrameKind::kOlat && !f.camera.empty() &&
                                result->cameras[s.camera].id == f.camera && f.lights.size() >= 1 &&
                                std::find(f.lights.begin(), f.lights.end(), s.light) != f.lights.end();
        if (same_path || same_light) {
          if (static_cast<int>(f.verdict) > static_cast<int>(s.verdict) || s.flag.empty()) {
            if (static_cast<int>(f.verdict) >= static_cast<int>(s.verdict)) s.flag = line.key;
          }
          s.verdict = Worse(s.verdict, f.verdict);
        }
      }
    }
  }
  result->checks = std::move(lines);
  result->seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  *out = std::move(p.result);
  return io::Status::Ok();
}

io::Status CheckSession(const io::Session& session, const CheckOptions& options, CheckResult* result, int threads) {
  auto check = StreamedCheck::Begin(session, options, threads);
  if (!check.ok()) return check.status();
  return (*check)->Finish(result);
}

nlohmann::json CheckResultToJson(const CheckResult& result) {
  using nlohmann::json;
  auto number = [](double v) -> json { return std::isfinite(v) ? json(v) : json(nullptr); };
  json j;
  j["format"] = "lumenrig.check/1";
  j["session"] = result.session_path;
  j["session_id"] = result.session_id;
  j["rig"] = result.rig_name;
  j["lights"] = result.light_count;
  j["verdict"] = VerdictName(result.verdict);
  j["seconds"] = result.seconds;
  json thresholds = json::object();
  for (const auto& spec : ThresholdTable()) thresholds[spec.key] = result.options.*spec.field;
  j["thresholds"] = thresholds;
  json checks = json::array();
  for (const auto& line : result.checks) {
    json c;
    c["key"] = line.key;
    c["title"] = line.title;
    c["verdict"] = VerdictName(line.verdict);
    c["value"] = number(line.value);
    c["unit"] = line.unit;
    c["warn_threshold"] = number(line.warn_threshold);
    c["fail_threshold"] = number(line.fail_threshold);
    c["summary"] = line.summary;
    json findings = json::array();
    for (const auto& f : line.findings) {
      json jf;
      jf["verdict"] = VerdictName(f.verdict);
      jf["camera"] = f.camera;
      jf["lights"] = f.lights;
      jf["frame"] = f.frame;
      jf["value"] = number(f.value);
      jf["message"] = f.message;
      findings.push_back(std::move(jf));
    }
    c["findings"] = std::move(findings);
    checks.push_back(std::move(c));
  }
  j["checks"] = std::move(checks);
  json cameras = json::array();
  for (const auto& cam : result.cameras) {
    json jc;
    jc["id"] = cam.id;
    jc["width"] = cam.width;
    jc["height"] = cam.height;
    jc["mask_source"] = cam.mask_source;
    jc["mask_fraction"] = cam.mask_fraction;
    if (cam.has_dark) jc["dark_mean_rgb"] = {cam.dark_mean.x(), cam.dark_mean.y(), cam.dark_mean.z()};
    if (cam.has_alignment) jc["backlit_shift_px"] = {cam.align_dx_px, cam.align_dy_px};
    json track = json::array();
    for (const auto& t : cam.tracking)
      track.push_back(
          {{"after_light", t.after_light}, {"drift_pct", t.drift_pct}, {"shift_px", {t.shift_x_px, t.shift_y_px}}});
    jc["tracking"] = std::move(track);
    cameras.push_back(std::move(jc));
  }
  j["cameras"] = std::move(cameras);
  json frames = json::array();
  for (const auto& s : result.frames) {
    json jf;
    jf["camera"] = result.cameras[s.camera].id;
    jf["kind"] = s.kind == FrameKind::kOlat ? "olat" : "tracking";
    jf[s.kind == FrameKind::kOlat ? "light" : "after_light"] = s.light;
    jf["path"] = s.path;
    jf["readable"] = s.readable && s.error.empty();
    if (!s.error.empty()) jf["error"] = s.error;
    jf["mean_rgb"] = {s.mean_rgb.x(), s.mean_rgb.y(), s.mean_rgb.z()};
    jf["p99"] = s.p99;
    jf["clipped_pct"] = s.clipped_pct;
    jf["noise_sigma"] = s.noise_sigma;
    jf["snr_db"] = s.snr_db;
    jf["energy_ratio"] = number(s.energy_ratio);
    jf["colour_dev_pct"] = number(s.colour_dev_pct);
    jf["verdict"] = VerdictName(s.verdict);
    if (!s.flag.empty()) jf["flag"] = s.flag;
    frames.push_back(std::move(jf));
  }
  j["frames"] = std::move(frames);
  return j;
}

io::Status WriteCheckJson(const CheckResult& result, const std::string& path, bool overwrite) {
  return io::WriteTextFile(path, CheckResultToJson(result).dump(2) + "\n", overwrite);
}

}  // namespace lumenrig::solvers
