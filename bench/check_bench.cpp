// Session check speed and memory: `lumenrig check` work (CheckSession) against
// decoding every frame of the session once with the same threads, and peak
// RSS for two light counts (each measured in its own child process, since
// ru_maxrss is a process-lifetime maximum).
//
//   check_bench [--size 2048] [--lights 156] [--small-lights 40] [--cameras 2]
//               [--threads 0] [--dir /tmp/lumenrig-check-bench]
//
// The session is generated once into --dir (kept for reruns): a Lambertian
// sphere (albedo 0.6) over a dim textured backdrop lit by a Fibonacci dome,
// half-float ZIP OpenEXR frames with Gaussian noise, a tracking frame every 16
// lights, a dark frame and a mask per camera. Cameras after the first
// hard-link the first camera's frame files (same decoding work per frame). A second session file in the
// same folder lists only the first --small-lights lights (same frames).
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <functional>
#include <random>
#include <string>

#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/session_check.h"
#include "lumenrig/synth/dome_layout.h"

namespace fs = std::filesystem;
using namespace lumenrig;

namespace {

struct Args {
  int size = 2048;
  int lights = 156;
  int small_lights = 40;
  int cameras = 2;
  int threads = 0;
  std::string dir = "/tmp/lumenrig-check-bench";
  std::string run;      // child mode: "decode" or "check"
  std::string session;  // child mode
};

double PeakRssMiB() {
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  return ru.ru_maxrss / 1024.0;
}

/// Frame of a unit sphere filling 70% of the image, lit by `l` (camera frame,
/// camera looks along -z), plus a dim checker backdrop and noise.
cv::Mat RenderFrame(int size, const Eigen::Vector3d& l, double gain, uint64_t seed, bool all_lights,
                    const std::vector<Eigen::Vector3d>& dirs) {
  cv::Mat img(size, size, CV_32FC3);
  const double r_px = 0.35 * size, c = 0.5 * size;
  io::ParallelFor(0, size, 64, 0, [&](int64_t y0, int64_t y1) {
    for (int64_t y = y0; y < y1; ++y) {
      std::mt19937_64 rng(io::DeriveSeed(seed, static_cast<uint64_t>(y)));
      std::normal_distribution<float> noise(0.0f, 0.002f);
      float* p = img.ptr<float>(static_cast<int>(y));
      for (int x = 0; x < size; ++x) {
        const double nx = (x + 0.5 - c) / r_px, ny = -(y + 0.5 - c) / r_px;
        const double rr = nx * nx + ny * ny;
        double v;
        if (rr < 1.0) {
          const Eigen::Vector3d n(nx, ny, std::sqrt(1.0 - rr));
          if (all_lights) {
            v = 0;
            for (const auto& d : dirs) v += std::max(0.0, n.dot(d));
            v *= 0.6 / M_PI * gain;
          } else {
            v = 0.6 / M_PI * gain * std::max(0.0, n.dot(l));
          }
        } else {
          v = 0.01 + 0.01 * (((x / 32) + (y / 32)) % 2);
        }
        if (gain == 0.0) v = 0.0;  // dark frame: noise only
        for (int ch = 0; ch < 3; ++ch) p[3 * x + ch] = std::clamp(static_cast<float>(v) + noise(rng), 0.0f, 1.0f);
      }
    }
  });
  return img;
}

void WriteSessionJson(const Args& a, int lights, const std::string& name, const std::string& rig_name) {
  nlohmann::json rig;
  rig["format"] = "lumenrig.rig/1";
  rig["name"] = fmt::format("bench-dome-{}", lights);
  const auto dirs = synth::FibonacciDome(a.lights, -20.0);
  for (int i = 0; i < lights; ++i)
    rig["lights"].push_back(
        {{"id", i}, {"direction", {dirs[i].x(), dirs[i].y(), dirs[i].z()}}, {"intensity", {1.0, 1.0, 1.0}}});
  std::ofstream(a.dir + "/" + rig_name) << rig.dump(1);
  nlohmann::json s;
  s["format"] = "lumenrig.session/1";
  s["subject"] = "bench-sphere";
  s["rig"] = rig_name;
  for (int c = 0; c < a.cameras; ++c) {
    const std::string cam = fmt::format("cam{:02d}", c);
    nlohmann::json jc;
    jc["id"] = cam;
    // Camera c sits at yaw 25 deg * c (same rotation as Generate), 1.5 m away.
    const double yaw = 25.0 * c * M_PI / 180.0;
    jc["camera_from_rig"] = {
        {std::cos(yaw), 0, -std::sin(yaw), 0}, {0, 1, 0, 0}, {std::sin(yaw), 0, std::cos(yaw), -1.5}, {0, 0, 0, 1}};
    for (int i = 0; i < lights; ++i)
      jc["olat"].push_back({{"light", i}, {"path", fmt::format("{}/olat_{:03d}.exr", cam, i)}});
    for (int i = 15; i < lights; i += 16)
      jc["tracking"].push_back({{"after_light", i}, {"path", fmt::format("{}/track_{:03d}.exr", cam, i)}});
    jc["dark"] = cam + "/dark.exr";
    jc["mask"] = cam + "/mask.png";
    s["cameras"].push_back(jc);
  }
  std::ofstream(a.dir + "/" + name) << s.dump(1);
}

int Generate(const Args& a) {
  if (fs::exists(a.dir + "/session.json")) return 0;
  fs::create_directories(a.dir);
  // Frames already written by an interrupted run are kept. Cameras after the
  // first hard-link the first camera's frames (decoding cost per frame is the
  // same; generation time halves); their camera_from_rig still differs.
  const auto dirs = synth::FibonacciDome(a.lights, -20.0);
  const auto t0 = std::chrono::steady_clock::now();
  io::ExrWriteOptions w;
  w.overwrite = true;
  for (int c = 0; c < a.cameras; ++c) {
    const std::string cam = fmt::format("{}/cam{:02d}", a.dir, c);
    fs::create_directories(cam);
    // Camera c sits at yaw 25 deg * c around +y, looking at the origin.
    const double yaw = 25.0 * c * M_PI / 180.0;
    Eigen::Matrix3d r;
    r << std::cos(yaw), 0, -std::sin(yaw), 0, 1, 0, std::sin(yaw), 0, std::cos(yaw);
    std::vector<Eigen::Vector3d> cdirs;
    for (const auto& d : dirs) cdirs.push_back(r * d);
    const std::string cam0 = fmt::format("{}/cam00", a.dir);
    auto make = [&](const std::string& name, const std::function<cv::Mat()>& render) -> bool {
      const std::string path = cam + "/" + name;
      if (fs::exists(path)) return true;
      if (c > 0) {
        std::error_code ec;
        fs::create_hard_link(cam0 + "/" + name, path, ec);
        if (!ec) return true;
      }
      if (auto st = io::WriteExr(path, render(), w); !st.ok()) {
        fmt::print(stderr, "{}\n", st.message());
        return false;
      }
      return true;
    };
    for (int i = 0; i < a.lights; ++i) {
      if (!make(fmt::format("olat_{:03d}.exr", i),
                [&] { return RenderFrame(a.size, cdirs[i], 2.0, io::DeriveSeed(1, c, i), false, cdirs); }))
        return 2;
      if (i % 16 == 15 && !make(fmt::format("track_{:03d}.exr", i), [&] {
            return RenderFrame(a.size, cdirs[i], 2.0 / a.lights, io::DeriveSeed(2, c, i), true, cdirs);
          }))
        return 2;
      fmt::print(stderr, "\rgenerating camera {} frame {}/{}", c, i + 1, a.lights);
    }
    if (!make("dark.exr",
              [&] { return RenderFrame(a.size, Eigen::Vector3d::Zero(), 0.0, io::DeriveSeed(3, c), false, cdirs); }))
      return 2;
    cv::Mat mask(a.size, a.size, CV_8UC1, cv::Scalar(0));
    cv::circle(mask, cv::Point(a.size / 2, a.size / 2), static_cast<int>(0.35 * a.size) - 2, cv::Scalar(255), -1);
    cv::imwrite(cam + "/mask.png", mask);
  }
  WriteSessionJson(a, a.lights, "session.json", "rig.json");
  WriteSessionJson(a, a.small_lights, "session_small.json", "rig_small.json");
  fmt::print(stderr, "\ngenerated in {:.0f} s\n",
             std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count());
  return 0;
}

/// Child mode: one measurement, printed as "seconds peak_rss_mib verdict".
int RunChild(const Args& a) {
  auto session = io::LoadSession(a.session);
  if (!session.ok()) {
    fmt::print(stderr, "{}\n", session.status().message());
    return 2;
  }
  const auto t0 = std::chrono::steady_clock::now();
  std::string verdict = "-";
  if (a.run == "decode") {
    // Every file the check reads, decoded once, frames in parallel.
    std::vector<std::string> files;
    for (const auto& cam : session->cameras) {
      for (const auto& o : cam.olat) files.push_back(o.path);
      for (const auto& t : cam.tracking) files.push_back(t.path);
      if (!cam.dark.empty()) files.push_back(cam.dark);
      if (!cam.mask.empty()) files.push_back(cam.mask);
    }
    const io::DecodeOptions decode = io::DecodeOptionsFor(*session);
    io::ParallelFor(0, static_cast<int64_t>(files.size()), 1, a.threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) {
        auto img = io::ReadImage(files[i], decode);
        if (!img.ok()) fmt::print(stderr, "{}\n", img.status().message());
      }
    });
  } else {
    solvers::CheckResult result;
    if (auto st = solvers::CheckSession(*session, {}, &result, a.threads); !st.ok()) {
      fmt::print(stderr, "{}\n", st.message());
      return 2;
    }
    verdict = solvers::VerdictName(result.verdict);
  }
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  fmt::print("{:.3f} {:.1f} {}\n", s, PeakRssMiB(), verdict);
  return 0;
}

struct Measure {
  double seconds = 0, rss = 0;
  std::string verdict;
};

Measure Spawn(const char* self, const Args& a, const std::string& mode, const std::string& session) {
  const std::string cmd = fmt::format("{} --run {} --session {} --threads {}", self, mode, session, a.threads);
  Measure m;
  FILE* p = popen(cmd.c_str(), "r");
  char buf[256] = {0};
  if (p && fgets(buf, sizeof buf, p)) {
    char verdict[32] = {0};
    if (std::sscanf(buf, "%lf %lf %31s", &m.seconds, &m.rss, verdict) == 3) m.verdict = verdict;
  }
  if (p) pclose(p);
  return m;
}

}  // namespace

int main(int argc, char** argv) {
  Args a;
  for (int i = 1; i + 1 < argc; i += 2) {
    const std::string k = argv[i], v = argv[i + 1];
    if (k == "--size")
      a.size = std::stoi(v);
    else if (k == "--lights")
      a.lights = std::stoi(v);
    else if (k == "--small-lights")
      a.small_lights = std::stoi(v);
    else if (k == "--cameras")
      a.cameras = std::stoi(v);
    else if (k == "--threads")
      a.threads = std::stoi(v);
    else if (k == "--dir")
      a.dir = v;
    else if (k == "--run")
      a.run = v;
    else if (k == "--session")
      a.session = v;
    else {
      fmt::print(stderr, "unknown option {}\n", k);
      return 2;
    }
  }
  if (!a.run.empty()) return RunChild(a);
  if (int rc = Generate(a); rc != 0) return rc;
  const int threads = io::ResolveThreads(a.threads);
  fmt::print("session: {} cameras x {} lights, {}x{} half EXR, {} threads ({})\n", a.cameras, a.lights, a.size, a.size,
             threads, a.dir);
  // Interleave and repeat to even out page cache and neighbours' load.
  Measure decode_big, check_big, decode_small, check_small;
  for (int rep = 0; rep < 2; ++rep) {
    auto keep_min = [](Measure* best, const Measure& m) {
      if (best->seconds == 0 || m.seconds < best->seconds) *best = m;
    };
    keep_min(&decode_big, Spawn(argv[0], a, "decode", a.dir + "/session.json"));
    keep_min(&check_big, Spawn(argv[0], a, "check", a.dir + "/session.json"));
    keep_min(&decode_small, Spawn(argv[0], a, "decode", a.dir + "/session_small.json"));
    keep_min(&check_small, Spawn(argv[0], a, "check", a.dir + "/session_small.json"));
  }
  fmt::print("{:<28} {:>9} {:>14}\n", "run (best of 2)", "seconds", "peak RSS MiB");
  fmt::print("{:<28} {:>9.2f} {:>14.0f}\n", fmt::format("decode, {} lights", a.lights), decode_big.seconds,
             decode_big.rss);
  fmt::print("{:<28} {:>9.2f} {:>14.0f}  verdict {}\n", fmt::format("check,  {} lights", a.lights), check_big.seconds,
             check_big.rss, check_big.verdict);
  fmt::print("{:<28} {:>9.2f} {:>14.0f}\n", fmt::format("decode, {} lights", a.small_lights), decode_small.seconds,
             decode_small.rss);
  fmt::print("{:<28} {:>9.2f} {:>14.0f}  verdict {}\n", fmt::format("check,  {} lights", a.small_lights),
             check_small.seconds, check_small.rss, check_small.verdict);
  fmt::print("check / decode time: {:.2f} ({} lights), {:.2f} ({} lights); target <= 1.3\n",
             check_big.seconds / decode_big.seconds, a.lights, check_small.seconds / decode_small.seconds,
             a.small_lights);
  fmt::print("check peak RSS {} lights / {} lights: {:.2f}\n", a.lights, a.small_lights,
             check_big.rss / check_small.rss);
  return 0;
}
