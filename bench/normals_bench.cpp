// Photometric stereo throughput (Google Benchmark) and helpers for the
// full-view stage benchmark (bench/normals_stage_bench.sh).
//
//   normals_bench                          kernels: plain GEMM vs least squares
//                                          vs robust, same shape and threads;
//                                          prints the ratios at the end
//   normals_bench --make-session DIR SIZE LIGHTS
//                                          writes a Lambertian sphere-on-plane
//                                          session (half ZIP EXR) with a dome
//   normals_bench --decode DIR THREADS ROWS [half]
//                                          decodes every frame in ROWS-row bands
//                                          to float (or, with `half`, to the
//                                          stored half floats where the frames
//                                          store half) and prints the wall time
//   normals_bench --decode-bands DIR THREADS ROWS
//                                          the same, band by band across all
//                                          frames into one float stack
//   normals_bench --integrate NORMALS.exr MASK.png THREADS [REPEAT]
//                                          depth from a normals map over a
//                                          mask (masked Poisson), timed alone
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <map>
#include <string>

#include <benchmark/benchmark.h>
#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/integration.h"
#include "lumenrig/solvers/photometric_stereo.h"
#include "lumenrig/synth/dome_layout.h"

namespace {

using lumenrig::solvers::BlockInput;
using lumenrig::solvers::BlockLights;
using lumenrig::solvers::BlockOutputs;
using lumenrig::solvers::PsMethod;
using lumenrig::solvers::PsOptions;
using lumenrig::solvers::PsSolver;
namespace io = lumenrig::io;

constexpr double kPi = 3.14159265358979323846;
constexpr int64_t kTile = 2048;  // same tile as the normals stage

/// Dome directions facing the camera (+z): the dome's +y becomes +z.
std::vector<Eigen::Vector3d> FrontDome(int count) {
  std::vector<Eigen::Vector3d> dirs;
  for (const auto& d : lumenrig::synth::FibonacciDome(count, 0.0)) dirs.emplace_back(d.x(), d.z(), d.y());
  return dirs;
}

/// Normal of a sphere (radius 0.45 size) over a plane facing the camera.
Eigen::Vector3d SceneNormal(int u, int v, int size) {
  const double c = size / 2.0, r = 0.45 * size;
  const double x = (u + 0.5 - c) / r, y = -(v + 0.5 - c) / r;
  const double r2 = x * x + y * y;
  if (r2 >= 1.0) return {0, 0, 1};
  return {x, y, std::sqrt(1.0 - r2)};
}

/// In-memory stack: N lights x K pixels x 3, Lambertian sphere-on-plane.
struct Stack {
  int lights = 0;
  int64_t pixels = 0;
  std::vector<float> data;
  BlockLights block_lights;
};

const Stack& GetStack(int lights) {
  static std::map<int, Stack> cache;
  auto it = cache.find(lights);
  if (it != cache.end()) return it->second;
  Stack s;
  const int size = 256;
  s.lights = lights;
  s.pixels = int64_t{size} * size;
  s.data.resize(static_cast<size_t>(s.pixels * 3 * lights));
  const auto dirs = FrontDome(lights);
  s.block_lights.directions.resize(lights, 3);
  for (int i = 0; i < lights; ++i) {
    s.block_lights.directions.row(i) = dirs[static_cast<size_t>(i)].cast<float>().transpose();
    for (int v = 0; v < size; ++v)
      for (int u = 0; u < size; ++u) {
        const double shade = std::max(0.0, SceneNormal(u, v, size).dot(dirs[static_cast<size_t>(i)]));
        float* p = s.data.data() + (static_cast<int64_t>(i) * s.pixels + int64_t{v} * size + u) * 3;
        p[0] = static_cast<float>(0.6 / kPi * shade);
        p[1] = static_cast<float>(0.5 / kPi * shade);
        p[2] = static_cast<float>(0.4 / kPi * shade);
      }
  }
  return cache.emplace(lights, std::move(s)).first->second;
}

void BM_PlainGemm(benchmark::State& state) {
  const Stack& s = GetStack(static_cast<int>(state.range(0)));
  const int threads = static_cast<int>(state.range(1));
  const Eigen::MatrixXf p = Eigen::MatrixXf::Random(3, s.lights);
  std::vector<Eigen::MatrixXf> out(static_cast<size_t>(threads), Eigen::MatrixXf(3, kTile * 3));
  using Map =
      Eigen::Map<const Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>, 0, Eigen::OuterStride<>>;
  for (auto _ : state) {
    io::ParallelFor(0, s.pixels, kTile, threads, [&](int64_t b, int64_t e) {
      Map stack(s.data.data() + b * 3, s.lights, (e - b) * 3, Eigen::OuterStride<>(s.pixels * 3));
      auto& g = out[static_cast<size_t>(io::CurrentThreadIndex())];
      g.leftCols((e - b) * 3).noalias() = p * stack;
    });
    benchmark::DoNotOptimize(out[0].data());
  }
  state.SetItemsProcessed(state.iterations() * s.pixels);
}

void RunSolver(benchmark::State& state, PsMethod method) {
  const Stack& s = GetStack(static_cast<int>(state.range(0)));
  const int threads = static_cast<int>(state.range(1));
  PsOptions o;
  o.method = method;
  auto solver = PsSolver::Create(s.block_lights, o);
  std::vector<float> normals(static_cast<size_t>(s.pixels * 3)), albedo(normals.size()),
      confidence(static_cast<size_t>(s.pixels));
  std::vector<std::vector<float>> scratch(static_cast<size_t>(threads));
  for (auto _ : state) {
    io::ParallelFor(0, s.pixels, kTile, threads, [&](int64_t b, int64_t e) {
      BlockInput in;
      in.data = s.data.data() + b * 3;
      in.light_stride = s.pixels * 3;
      in.pixels = e - b;
      BlockOutputs out;
      out.normals = normals.data() + 3 * b;
      out.albedo = albedo.data() + 3 * b;
      out.confidence = confidence.data() + b;
      solver->SolveBlock(in, out, &scratch[static_cast<size_t>(io::CurrentThreadIndex())]);
    });
    benchmark::DoNotOptimize(normals.data());
  }
  state.SetItemsProcessed(state.iterations() * s.pixels);
}

void BM_LeastSquares(benchmark::State& state) { RunSolver(state, PsMethod::kLeastSquares); }
void BM_Robust(benchmark::State& state) { RunSolver(state, PsMethod::kRobust); }

void Args(benchmark::internal::Benchmark* b) {
  for (int lights : {96, 156})
    for (int threads : {1, 2}) b->Args({lights, threads});
  b->Unit(benchmark::kMillisecond)->UseRealTime()->MinTime(0.5);
}
BENCHMARK(BM_PlainGemm)->Apply(Args);
BENCHMARK(BM_LeastSquares)->Apply(Args);
BENCHMARK(BM_Robust)->Apply(Args);

/// Console output plus a table of ratios measured in the same run.
class RatioReporter : public benchmark::ConsoleReporter {
 public:
  void ReportRuns(const std::vector<Run>& runs) override {
    ConsoleReporter::ReportRuns(runs);
    for (const auto& r : runs) {
      times_[r.benchmark_name()] = r.GetAdjustedRealTime();
      cpu_[r.benchmark_name()] = r.GetAdjustedCPUTime();
    }
  }
  void Finalize() override {
    ConsoleReporter::Finalize();
    std::printf("\nratios (same shape, same threads, same run):\n");
    for (int lights : {96, 156})
      for (int threads : {1, 2}) {
        const std::string suffix = fmt::format("/{}/{}/min_time:0.500/real_time", lights, threads);
        const double gemm = times_["BM_PlainGemm" + suffix], lsq = times_["BM_LeastSquares" + suffix],
                     rob = times_["BM_Robust" + suffix];
        if (gemm > 0 && lsq > 0 && rob > 0)
          std::printf(
              "  %3d lights, %d thread(s), wall: least squares throughput = %.0f%% of plain GEMM; robust / least "
              "squares = %.2fx\n",
              lights, threads, 100.0 * gemm / lsq, rob / lsq);
        // On one thread all work runs on the timing thread, so CPU time is
        // meaningful and robust against other processes sharing the cores.
        const double gc = cpu_["BM_PlainGemm" + suffix], lc = cpu_["BM_LeastSquares" + suffix],
                     rc = cpu_["BM_Robust" + suffix];
        if (threads == 1 && gc > 0 && lc > 0 && rc > 0)
          std::printf(
              "  %3d lights, 1 thread,    cpu:  least squares throughput = %.0f%% of plain GEMM; robust / least "
              "squares = %.2fx\n",
              lights, 100.0 * gc / lc, rc / lc);
      }
  }

 private:
  std::map<std::string, double> times_, cpu_;
};

int MakeSession(const std::string& dir, int size, int lights) {
  namespace fs = std::filesystem;
  fs::create_directories(dir + "/cam00");
  const auto dirs = FrontDome(lights);
  nlohmann::json rig = {{"format", "lumenrig.rig/1"}, {"name", "bench-dome"}, {"lights", nlohmann::json::array()}};
  nlohmann::json cam = {{"id", "cam00"}, {"olat", nlohmann::json::array()}};
  for (int i = 0; i < lights; ++i) {
    const auto& d = dirs[static_cast<size_t>(i)];
    rig["lights"].push_back({{"id", i}, {"direction", {d.x(), d.y(), d.z()}}, {"intensity", {1.0, 1.0, 1.0}}});
    cam["olat"].push_back({{"light", i}, {"path", fmt::format("cam00/olat_{:03d}.exr", i)}});
  }
  std::ofstream(dir + "/rig.json") << rig.dump(1);
  std::ofstream(dir + "/session.json") << nlohmann::json{
      {"format", "lumenrig.session/1"},
      {"subject", "bench-sphere"},
      {"rig", "rig.json"},
      {"cameras", {cam}}}.dump(1);
  std::atomic<int> failures{0};
  io::ParallelFor(0, lights, 1, 0, [&](int64_t b, int64_t e) {
    for (int64_t i = b; i < e; ++i) {
      cv::Mat f(size, size, CV_32FC3);
      const Eigen::Vector3d l = dirs[static_cast<size_t>(i)];
      for (int v = 0; v < size; ++v)
        for (int u = 0; u < size; ++u) {
          const Eigen::Vector3d n = SceneNormal(u, v, size);
          const double a =
              n.z() == 1.0 && (u - size / 2) * (u - size / 2) + (v - size / 2) * (v - size / 2) > 0.2 * size * size
                  ? 0.3
                  : 0.6;
          const float shade = static_cast<float>(a / kPi * std::max(0.0, n.dot(l)));
          f.at<cv::Vec3f>(v, u) = cv::Vec3f(shade, 0.9f * shade, 0.8f * shade);
        }
      if (!io::WriteExr(dir + "/" + fmt::format("cam00/olat_{:03d}.exr", i), f, {}).ok()) ++failures;
    }
  });
  std::printf("wrote %s: %d lights, %dx%d half ZIP EXR\n", dir.c_str(), lights, size, size);
  return failures == 0 ? 0 : 1;
}

int Decode(const std::string& dir, int threads, int rows, bool band_major, bool half) {
  auto session = io::LoadSession(dir);
  if (!session.ok()) {
    std::fprintf(stderr, "%s\n", session.status().message().c_str());
    return 2;
  }
  const auto& frames = session->cameras[0].olat;
  const auto t0 = std::chrono::steady_clock::now();
  timespec c0{}, c1{};
  clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c0);
  std::atomic<int> failures{0};
  if (band_major) {
    // As the normals stage reads: every frame open, one band of rows from
    // each frame in turn, into one stack.
    std::vector<std::unique_ptr<io::BandReader>> readers(frames.size());
    for (size_t i = 0; i < frames.size(); ++i) {
      auto r = io::BandReader::Open(frames[i].path, {});
      if (!r.ok()) return 2;
      readers[i] = std::move(r).value();
    }
    const int h = readers[0]->info().height, w = readers[0]->info().width, c = readers[0]->info().channels;
    std::vector<float> stack(frames.size() * static_cast<size_t>(rows) * w * c);
    for (int y = 0; y < h; y += rows) {
      const int y1 = std::min(h, y + rows);
      io::ParallelFor(0, static_cast<int64_t>(frames.size()), 1, threads, [&](int64_t b, int64_t e) {
        for (int64_t i = b; i < e; ++i) {
          cv::Mat band(y1 - y, w, CV_MAKETYPE(CV_32F, c), stack.data() + i * static_cast<int64_t>(rows) * w * c);
          for (int ys = y; ys < y1; ys += 16) {
            cv::Mat sub = band.rowRange(ys - y, std::min(y1, ys + 16) - y);
            if (!readers[static_cast<size_t>(i)]->ReadRows(ys, std::min(y1, ys + 16), &sub).ok()) ++failures;
          }
        }
      });
    }
  } else
    io::ParallelFor(0, static_cast<int64_t>(frames.size()), 1, threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) {
        auto reader = io::BandReader::Open(frames[static_cast<size_t>(i)].path, {});
        if (!reader.ok()) {
          ++failures;
          continue;
        }
        cv::Mat band;
        const int h = (*reader)->info().height;
        const bool as_half = half && (*reader)->StoresHalf();
        for (int y = 0; y < h; y += rows) {
          const int y1 = std::min(h, y + rows);
          if (!(as_half ? (*reader)->ReadRowsHalf(y, y1, &band) : (*reader)->ReadRows(y, y1, &band)).ok()) ++failures;
        }
      }
    });
  const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c1);
  const double cpu = (c1.tv_sec - c0.tv_sec) + 1e-9 * (c1.tv_nsec - c0.tv_nsec);
  std::printf("decode%s: %zu frames, %d thread(s), %d-row bands: cpu %.2f s, wall %.2f s\n", half ? " (half)" : "",
              frames.size(), threads, rows, cpu, s);
  return failures == 0 ? 0 : 1;
}

int Integrate(const std::string& normals_path, const std::string& mask_path, int threads, int repeat) {
  auto normals = lumenrig::io::ReadImage(normals_path);
  auto mask = lumenrig::io::ReadImage(mask_path);
  if (!normals.ok() || !mask.ok()) {
    std::fprintf(stderr, "normals_bench: cannot read %s or %s\n", normals_path.c_str(), mask_path.c_str());
    return 1;
  }
  cv::Mat m;
  if (mask->channels() > 1)
    cv::extractChannel(*mask, m, 0);
  else
    m = *mask;
  m = m > 0.5;
  for (int r = 0; r < repeat; ++r) {
    lumenrig::solvers::DepthMap depth;
    timespec c0{}, c1{};
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c0);
    const auto t0 = std::chrono::steady_clock::now();
    const auto st = lumenrig::solvers::IntegrateNormals(*normals, m, {}, &depth, threads);
    const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &c1);
    if (!st.ok()) {
      std::fprintf(stderr, "normals_bench: %s\n", st.message().c_str());
      return 1;
    }
    std::printf("integrate: %d mask pixels, %s, %d iterations (residual %.2g): cpu %.2f s, wall %.2f s\n",
                cv::countNonZero(m), depth.method.c_str(), depth.iterations, depth.residual,
                (c1.tv_sec - c0.tv_sec) + 1e-9 * (c1.tv_nsec - c0.tv_nsec), s);
  }
  return 0;
}

}  // namespace

int main(int argc, char** argv) {
  if (argc >= 5 && std::strcmp(argv[1], "--make-session") == 0)
    return MakeSession(argv[2], std::atoi(argv[3]), std::atoi(argv[4]));
  if (argc >= 5 && std::strcmp(argv[1], "--decode") == 0)
    return Decode(argv[2], std::atoi(argv[3]), std::atoi(argv[4]), false,
                  argc >= 6 && std::strcmp(argv[5], "half") == 0);
  if (argc >= 5 && std::strcmp(argv[1], "--decode-bands") == 0)
    return Decode(argv[2], std::atoi(argv[3]), std::atoi(argv[4]), true, false);
  if (argc >= 5 && std::strcmp(argv[1], "--integrate") == 0)
    return Integrate(argv[2], argv[3], std::atoi(argv[4]), argc >= 6 ? std::atoi(argv[5]) : 1);
  benchmark::Initialize(&argc, argv);
  RatioReporter reporter;
  benchmark::RunSpecifiedBenchmarks(&reporter);
  benchmark::Shutdown();
  return 0;
}
