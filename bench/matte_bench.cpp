// Closed-form refinement cost: time per unknown-band pixel for three band
// widths (fixed image), for three image sizes (fixed band), and a 12-megapixel
// frame (4000x3000) with a 2% unknown band, with peak RSS.
//
//   build/bench/matte_bench                       # all cases
//   build/bench/matte_bench --benchmark_filter=BandWidth   # direct vs CG per band width
//   build/bench/matte_bench --benchmark_filter=12MP   # alone, for its own peak RSS
//
// The trimap is geometric (a disc of radius R with a band of width w around
// its edge), so only RefineClosedForm is timed.
#include <sys/resource.h>

#include <algorithm>
#include <cmath>
#include <ctime>
#include <map>

#include <benchmark/benchmark.h>

#include "lumenrig/solvers/matting.h"

namespace {

using lumenrig::solvers::ClosedFormOptions;
using lumenrig::solvers::ClosedFormStats;

struct Frame {
  cv::Mat image, plate, trimap;
  cv::Mat truth;  // the alpha the frame was composited with
};

// Subject: a disc of `radius` px with a soft edge as wide as the band,
// textured foreground over a textured plate; trimap unknown within band/2 of
// the edge.
Frame MakeFrame(int width, int height, double radius, int band_px) {
  Frame f;
  f.image.create(height, width, CV_32FC3);
  f.plate.create(height, width, CV_32FC3);
  f.trimap.create(height, width, CV_8UC1);
  f.truth.create(height, width, CV_32FC1);
  const double cx = 0.5 * width, cy = 0.5 * height;
  for (int y = 0; y < height; ++y) {
    cv::Vec3f* im = f.image.ptr<cv::Vec3f>(y);
    cv::Vec3f* pl = f.plate.ptr<cv::Vec3f>(y);
    uint8_t* t = f.trimap.ptr<uint8_t>(y);
    for (int x = 0; x < width; ++x) {
      const double r = std::hypot(x + 0.5 - cx, y + 0.5 - cy);
      const double a = std::clamp((radius - r) / band_px + 0.5, 0.0, 1.0);
      const cv::Vec3f b(0.35f + 0.1f * std::sin(0.05f * x), 0.6f + 0.1f * std::cos(0.07f * y), 0.3f);
      const cv::Vec3f fg(0.55f + 0.1f * std::sin(0.11f * y), 0.42f, 0.33f + 0.05f * std::cos(0.13f * x));
      pl[x] = b;
      f.truth.ptr<float>(y)[x] = static_cast<float>(a);
      im[x] = static_cast<float>(a) * fg + static_cast<float>(1 - a) * b;
      t[x] = std::fabs(r - radius) <= 0.5 * band_px
                 ? lumenrig::solvers::kTrimapUnknown
                 : (r < radius ? lumenrig::solvers::kTrimapForeground : lumenrig::solvers::kTrimapBackground);
    }
  }
  return f;
}

double ThreadCpuSeconds() {
  timespec ts{};
  clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
  return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
}

double PeakRssMiB() {
  rusage usage{};
  getrusage(RUSAGE_SELF, &usage);
  return static_cast<double>(usage.ru_maxrss) / 1024.0;  // Linux: kilobytes
}

void Run(benchmark::State& state, const Frame& frame, bool direct = true) {
  ClosedFormOptions options;
  options.direct_solve = direct;
  ClosedFormStats stats;
  cv::Mat alpha;
  const double cpu0 = ThreadCpuSeconds();
  for (auto _ : state) {
    const auto st =
        lumenrig::solvers::RefineClosedForm(frame.image, frame.plate, frame.trimap, options, &alpha, &stats, 1);
    if (!st.ok()) state.SkipWithError(st.message().c_str());
    benchmark::DoNotOptimize(alpha.data);
  }
  const double cpu_s = ThreadCpuSeconds() - cpu0;
  state.counters["band_px"] = static_cast<double>(stats.unknown_pixels);
  state.counters["image_Mpx"] = frame.image.total() / 1e6;
  state.counters["cg_iter"] = stats.iterations;
  state.counters["peak_rss_MiB"] = PeakRssMiB();
  // Mean squared alpha error over the unknown band (known pixels are exact).
  const cv::Mat band = frame.trimap == lumenrig::solvers::kTrimapUnknown;
  cv::Mat err;
  cv::subtract(alpha, frame.truth, err);
  cv::multiply(err, err, err);
  state.counters["band_mse"] = cv::mean(err, band)[0];
  // CPU time of this thread (RefineClosedForm runs with 1 thread here).
  state.counters["cpu_us_per_band_px"] =
      1e6 * cpu_s / static_cast<double>(state.iterations()) / static_cast<double>(stats.unknown_pixels);
}

// Three band widths, image 1024x1024, disc radius 300; second argument:
// 1 = direct solve (default), 0 = conjugate gradient (the previous solver).
void BM_RefineBandWidth(benchmark::State& state) {
  static std::map<int64_t, Frame> cache;
  const int band = static_cast<int>(state.range(0));
  if (!cache.count(band)) cache[band] = MakeFrame(1024, 1024, 300, band);
  Run(state, cache[band], state.range(1) != 0);
}
BENCHMARK(BM_RefineBandWidth)
    ->ArgsProduct({{4, 8, 16, 32}, {1, 0}})
    ->ArgNames({"band", "direct"})
    ->Unit(benchmark::kMillisecond)
    ->UseRealTime();

// Fixed band (radius 300, width 8, ~15k px) in growing images.
void BM_RefineImageSize(benchmark::State& state) {
  static std::map<int64_t, Frame> cache;
  const int size = static_cast<int>(state.range(0));
  if (!cache.count(size)) cache[size] = MakeFrame(size, size, 300, 8);
  Run(state, cache[size]);
  cache.erase(size);
}
BENCHMARK(BM_RefineImageSize)->Arg(768)->Arg(1536)->Arg(3072)->Unit(benchmark::kMillisecond)->UseRealTime();

// 12 Mpx (4000x3000) with a 2% unknown band: radius 1200, width 32
// (2 pi 1200 * 32 ~ 241k px = 2.0%).
void BM_Refine12MP(benchmark::State& state) {
  const Frame frame = MakeFrame(4000, 3000, 1200, 32);
  Run(state, frame);
  state.counters["band_fraction"] =
      static_cast<double>(cv::countNonZero(frame.trimap == lumenrig::solvers::kTrimapUnknown)) / frame.trimap.total();
}
BENCHMARK(BM_Refine12MP)->Iterations(1)->Unit(benchmark::kMillisecond)->UseRealTime();

}  // namespace

BENCHMARK_MAIN();
