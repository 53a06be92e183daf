// Band reading vs whole-frame decoding of an OLAT stack (issue 2 target:
// band total within 1.2x of decoding every frame whole once; peak memory set
// by the band size).
//
//   band_read_bench [--dir DIR] [--frames 64] [--size 2048] [--bands 16,128]
//
// Generates DIR/frame_XXX.exr once (half RGB, ZIP, via io::WriteExr), reads
// the files once to warm the page cache, then runs each mode in its own child
// process (this binary with --mode) so that peak RSS (wait4 ru_maxrss) belongs
// to that mode alone:
//   idle       nothing read: the RSS floor of the process (libraries)
//   whole      io::ReadImage of every frame, one after the other
//   band N     one io::BandReader per frame; for each band of N rows, read
//              it from every frame (the solver access pattern)
// Prints wall time, ratio to `whole` and peak RSS; checksums must agree.
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include <fmt/format.h>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/image_io.h"

namespace fs = std::filesystem;
namespace io = lumenrig::io;

namespace {

struct Args {
  std::string dir = (fs::temp_directory_path() / "lumenrig-band-bench").string();
  int frames = 64;
  int size = 2048;
  std::vector<int> bands{16, 128};
  std::string mode;  // child: "whole" or "band"
  int band = 0;
};

std::string FramePath(const Args& a, int i) { return fmt::format("{}/frame_{:03d}.exr", a.dir, i); }

// A smooth shaded pattern plus sensor-like noise, so ZIP sees realistic data.
cv::Mat SyntheticFrame(int size, int index) {
  cv::Mat m(size, size, CV_32FC3);
  cv::Mat noise(size, size, CV_32FC3);
  cv::RNG rng(1000 + index);
  rng.fill(noise, cv::RNG::NORMAL, 0.0, 0.01);
  const float lx = std::cos(index * 0.7f), ly = std::sin(index * 0.7f);
  for (int y = 0; y < size; ++y) {
    float* row = m.ptr<float>(y);
    for (int x = 0; x < size; ++x) {
      const float u = 2.0f * x / size - 1.0f, v = 2.0f * y / size - 1.0f;
      const float shade = std::max(0.0f, 0.5f + 0.5f * (lx * u + ly * v));
      row[3 * x + 0] = 0.8f * shade;
      row[3 * x + 1] = 0.6f * shade;
      row[3 * x + 2] = 0.4f * shade;
    }
  }
  return m + noise;
}

int Generate(const Args& a) {
  fs::create_directories(a.dir);
  for (int i = 0; i < a.frames; ++i) {
    const std::string path = FramePath(a, i);
    if (fs::exists(path)) {
      auto info = io::ProbeImage(path);
      if (info.ok() && info->width == a.size && info->height == a.size) continue;
      fs::remove(path);
    }
    const io::Status s = io::WriteExr(path, SyntheticFrame(a.size, i));
    if (!s.ok()) {
      fmt::print(stderr, "{}\n", s.message());
      return 2;
    }
    fmt::print(stderr, "\rgenerated {}/{}", i + 1, a.frames);
  }
  fmt::print(stderr, "\n");
  return 0;
}

int RunWhole(const Args& a) {
  double sum = 0;
  for (int i = 0; i < a.frames; ++i) {
    auto image = io::ReadImage(FramePath(a, i));
    if (!image.ok()) {
      fmt::print(stderr, "{}\n", image.status().message());
      return 2;
    }
    const cv::Scalar s = cv::sum(*image);
    sum += s[0] + s[1] + s[2];
  }
  fmt::print("{:.6e}\n", sum);
  return 0;
}

int RunBand(const Args& a) {
  std::vector<std::unique_ptr<io::BandReader>> readers;
  for (int i = 0; i < a.frames; ++i) {
    auto r = io::BandReader::Open(FramePath(a, i));
    if (!r.ok()) {
      fmt::print(stderr, "{}\n", r.status().message());
      return 2;
    }
    readers.push_back(std::move(r).value());
  }
  const int height = readers[0]->info().height;
  std::vector<cv::Mat> bands(readers.size());
  double sum = 0;
  for (int y = 0; y < height; y += a.band) {
    const int y1 = std::min(height, y + a.band);
    for (size_t i = 0; i < readers.size(); ++i) {
      const io::Status s = readers[i]->ReadRows(y, y1, &bands[i]);
      if (!s.ok()) {
        fmt::print(stderr, "{}\n", s.message());
        return 2;
      }
    }
    for (const auto& b : bands) {
      const cv::Scalar s = cv::sum(b);
      sum += s[0] + s[1] + s[2];
    }
  }
  fmt::print("{:.6e}\n", sum);
  return 0;
}

struct ChildResult {
  double seconds = 0;
  double cpu_seconds = 0;  // user + system: less sensitive to a busy machine
  double peak_rss_mib = 0;
  std::string output;
  int exit_code = -1;
};

ChildResult RunChild(const Args& a, const std::vector<std::string>& extra) {
  std::vector<std::string> argv_s{"/proc/self/exe",      "--dir", a.dir, "--frames", std::to_string(a.frames), "--size",
                                  std::to_string(a.size)};
  argv_s.insert(argv_s.end(), extra.begin(), extra.end());
  std::vector<char*> argv;
  for (auto& s : argv_s) argv.push_back(s.data());
  argv.push_back(nullptr);
  int fds[2];
  if (pipe(fds) != 0) return {};
  const auto start = std::chrono::steady_clock::now();
  const pid_t pid = fork();
  if (pid == 0) {
    dup2(fds[1], STDOUT_FILENO);
    close(fds[0]);
    close(fds[1]);
    execv("/proc/self/exe", argv.data());
    _exit(127);
  }
  close(fds[1]);
  ChildResult r;
  char buf[256];
  ssize_t n;
  while ((n = read(fds[0], buf, sizeof(buf))) > 0) r.output.append(buf, static_cast<size_t>(n));
  close(fds[0]);
  int status = 0;
  rusage usage{};
  wait4(pid, &status, 0, &usage);
  r.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  r.peak_rss_mib = usage.ru_maxrss / 1024.0;  // KiB on Linux
  r.cpu_seconds =
      usage.ru_utime.tv_sec + usage.ru_stime.tv_sec + 1e-6 * (usage.ru_utime.tv_usec + usage.ru_stime.tv_usec);
  r.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : 128;
  while (!r.output.empty() && r.output.back() == '\n') r.output.pop_back();
  return r;
}

bool Parse(int argc, char** argv, Args* a) {
  for (int i = 1; i < argc; ++i) {
    const std::string k = argv[i];
    auto next = [&]() -> std::string { return i + 1 < argc ? argv[++i] : ""; };
    if (k == "--dir")
      a->dir = next();
    else if (k == "--frames")
      a->frames = std::stoi(next());
    else if (k == "--size")
      a->size = std::stoi(next());
    else if (k == "--mode")
      a->mode = next();
    else if (k == "--band")
      a->band = std::stoi(next());
    else if (k == "--bands") {
      a->bands.clear();
      std::string list = next();
      for (size_t p = 0; p < list.size();) {
        const size_t q = list.find(',', p);
        a->bands.push_back(std::stoi(list.substr(p, q - p)));
        p = q == std::string::npos ? list.size() : q + 1;
      }
    } else {
      fmt::print(stderr, "usage: band_read_bench [--dir DIR] [--frames N] [--size PX] [--bands 16,128]\n");
      return false;
    }
  }
  return a->frames > 0 && a->size > 0;
}

}  // namespace

int main(int argc, char** argv) {
  Args a;
  if (!Parse(argc, argv, &a)) return 2;
  if (a.mode == "whole") return RunWhole(a);
  if (a.mode == "band") return RunBand(a);
  if (a.mode == "idle") {
    fmt::print("-\n");
    return 0;
  }

  if (int rc = Generate(a); rc != 0) return rc;
  uintmax_t bytes = 0;
  for (int i = 0; i < a.frames; ++i) {
    // Warm the page cache so every mode reads from memory.
    std::ifstream in(FramePath(a, i), std::ios::binary);
    std::vector<char> chunk(1 << 20);
    while (in.read(chunk.data(), static_cast<std::streamsize>(chunk.size())) || in.gcount() > 0) {
    }
    bytes += fs::file_size(FramePath(a, i));
  }
  fmt::print("stack: {} frames of {}x{} half RGB, ZIP, {:.0f} MiB on disk, in {}\n", a.frames, a.size, a.size,
             bytes / 1048576.0, a.dir);
  fmt::print("{:<12} {:>9} {:>9} {:>10} {:>10} {:>13}  {}\n", "mode", "wall_s", "cpu_s", "wall_ratio", "cpu_ratio",
             "peak_rss_MiB", "checksum");
  const ChildResult idle = RunChild(a, {"--mode", "idle"});
  fmt::print("{:<12} {:>9.2f} {:>9.2f} {:>10} {:>10} {:>13.1f}  (libraries loaded, no frames read)\n", "idle",
             idle.seconds, idle.cpu_seconds, "-", "-", idle.peak_rss_mib);
  const ChildResult whole = RunChild(a, {"--mode", "whole"});
  if (whole.exit_code != 0) return 3;
  fmt::print("{:<12} {:>9.2f} {:>9.2f} {:>10.3f} {:>10.3f} {:>13.1f}  {}\n", "whole", whole.seconds, whole.cpu_seconds,
             1.0, 1.0, whole.peak_rss_mib, whole.output);
  bool ok = true;
  for (int band : a.bands) {
    const ChildResult r = RunChild(a, {"--mode", "band", "--band", std::to_string(band)});
    if (r.exit_code != 0) return 3;
    const double ratio = r.seconds / whole.seconds;
    const double cpu_ratio = r.cpu_seconds / whole.cpu_seconds;
    fmt::print("{:<12} {:>9.2f} {:>9.2f} {:>10.3f} {:>10.3f} {:>13.1f}  {}{}\n", fmt::format("band {}", band),
               r.seconds, r.cpu_seconds, ratio, cpu_ratio, r.peak_rss_mib, r.output,
               r.output == whole.output ? "" : "  CHECKSUM MISMATCH");
    ok = ok && r.output == whole.output;
    if (ratio > 1.2) fmt::print("  band {}: above the 1.2x target\n", band);
  }
  // For scale: holding the whole stack decoded (what a non-streaming solver
  // needs) costs frames x size^2 x 3 floats.
  fmt::print("whole stack held in memory would be {:.0f} MiB (computed)\n",
             a.frames * double(a.size) * a.size * 3 * 4 / 1048576.0);
  return ok ? 0 : 1;
}
