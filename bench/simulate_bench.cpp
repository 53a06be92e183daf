// Capture simulator throughput at 512x512 with 156 lights (issue 2):
//   build/bench/simulate_bench
// BM_RenderOlat: OLAT frames rendered in memory (ray-cast G-buffer reused,
// shading + shadow rays + specular + sensor noise), row bands on N threads.
// BM_SimulateSession: a whole one-camera session written to disk (156 OLAT
// frames + 10 tracking + 8 extras as half EXR, truth maps; EXR encoding and
// atomic temp+fsync+rename included). Frames/s in the "frames/s" counter;
// peak RSS of the process in "peak_rss_MiB".
#include <sys/resource.h>
#include <unistd.h>
#include <cstdlib>
#include <filesystem>

#include <benchmark/benchmark.h>

#include "lumenrig/synth/simulator.h"

namespace {

using namespace lumenrig;

synth::SimOptions BenchOptions(int threads) {
  synth::SimOptions o;
  o.width = 512;
  o.height = 512;
  o.num_lights = 156;
  o.num_cameras = 1;
  o.threads = threads;
  return o;
}

double PeakRssMiB() {
  rusage usage{};
  getrusage(RUSAGE_SELF, &usage);
  return usage.ru_maxrss / 1024.0;
}

void BM_BuildView(benchmark::State& state) {
  const synth::SimOptions o = BenchOptions(static_cast<int>(state.range(0)));
  const io::Camera cam = synth::MakeSimCameras(o)[0];
  for (auto _ : state) {
    synth::CameraView view = synth::CameraView::Build(o, cam, 0.0, 0.0, o.threads);
    benchmark::DoNotOptimize(view);
  }
}

void BM_RenderOlat(benchmark::State& state) {
  const synth::SimOptions o = BenchOptions(static_cast<int>(state.range(0)));
  const io::Camera cam = synth::MakeSimCameras(o)[0];
  const io::Rig rig = synth::MakeSimRig(o);
  const synth::CameraView view = synth::CameraView::Build(o, cam, 0.0, 0.0, o.threads);
  int64_t frames = 0;
  for (auto _ : state) {
    for (int k = 0; k < o.num_lights; ++k) {
      cv::Mat frame = view.Render({{rig.lights[k], 1.0}}, synth::Backdrop::kBlack, true, o.threads);
      synth::ApplySensor(o, 0, k, &frame, o.threads);
      benchmark::DoNotOptimize(frame.data);
      ++frames;
    }
  }
  state.counters["frames/s"] = benchmark::Counter(static_cast<double>(frames), benchmark::Counter::kIsRate);
  state.counters["peak_rss_MiB"] = PeakRssMiB();
}

void BM_SimulateSession(benchmark::State& state) {
  synth::SimOptions o = BenchOptions(static_cast<int>(state.range(0)));
  o.overwrite = true;
  char tmpl[] = "/tmp/lumenrig-simbench-XXXXXX";
  const std::string dir = mkdtemp(tmpl);
  int64_t frames = 0;
  for (auto _ : state) {
    synth::SimSummary summary;
    const io::Status st = synth::SimulateSession(o, dir, &summary);
    if (!st.ok()) {
      state.SkipWithError(st.message().c_str());
      break;
    }
    frames += summary.frames_written;
  }
  std::error_code ec;
  std::filesystem::remove_all(dir, ec);
  state.counters["frames/s"] = benchmark::Counter(static_cast<double>(frames), benchmark::Counter::kIsRate);
  state.counters["peak_rss_MiB"] = PeakRssMiB();
}

BENCHMARK(BM_BuildView)->Arg(1)->Arg(2)->Unit(benchmark::kMillisecond)->UseRealTime();
BENCHMARK(BM_RenderOlat)->Arg(1)->Arg(2)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();
BENCHMARK(BM_SimulateSession)->Arg(2)->Iterations(1)->Unit(benchmark::kSecond)->UseRealTime();

}  // namespace

BENCHMARK_MAIN();
