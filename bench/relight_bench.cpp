// Relighting throughput (issue 6): batched K-map relighting vs a plain Eigen
// GEMM of the same shape and threads, and vs relighting one map at a time
// from disk. Prints the ratios at the end of the run.
//
//   build/bench/relight_bench                       (512x512, 156 lights)
//   LUMENRIG_BENCH_SIZE=256 build/bench/relight_bench
#include <cstdlib>
#include <filesystem>
#include <map>
#include <memory>

#include <benchmark/benchmark.h>
#include <fmt/format.h>
#include <Eigen/Dense>

#include "../tests/relight_fixture.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/relight.h"

namespace fs = std::filesystem;
using namespace lumenrig;

namespace {

int Size() {
  const char* s = std::getenv("LUMENRIG_BENCH_SIZE");
  return s ? std::atoi(s) : 512;
}
int Lights() {
  const char* s = std::getenv("LUMENRIG_BENCH_LIGHTS");
  return s ? std::atoi(s) : 156;
}
const int kLights = Lights();

// The 156-light sphere session on disk (written once, reused across runs).
const io::Session& DiskSession() {
  static io::Session session = [] {
    const std::string dir =
        fmt::format("{}/lumenrig-relight-bench-{}-{}", fs::temp_directory_path().string(), Size(), kLights);
    if (!fs::exists(dir + "/session.json")) {
      test::SphereSessionSpec spec;
      spec.size = Size();
      spec.lights = kLights;
      test::WriteSphereSession(dir + ".tmp", spec);
      fs::remove_all(dir);
      fs::rename(dir + ".tmp", dir);
    }
    auto s = io::LoadSession(dir);
    if (!s.ok()) std::abort();
    return *s;
  }();
  return session;
}

// The same frames in memory.
const std::vector<cv::Mat>& MemoryFrames() {
  static std::vector<cv::Mat> frames = [] {
    std::vector<cv::Mat> f;
    auto src = synth::OpenOlatSource(DiskSession(), DiskSession().cameras[0]);
    std::vector<cv::Mat> bands;
    if (!src.ok() || !(*src)->ReadBand(0, Size(), 0, &bands).ok()) std::abort();
    for (auto& b : bands) f.push_back(b.clone());
    return f;
  }();
  return frames;
}

std::vector<Eigen::MatrixXd> Weights(int k) {
  const cv::Mat base = synth::MakeStudioMap(64);
  std::vector<Eigen::MatrixXd> w;
  for (int j = 0; j < k; ++j) {
    auto lw = synth::ComputeLightWeights(synth::RotateLatLong(base, 360.0 * j / k), DiskSession().rig,
                                         synth::LightWeightOptions{});
    w.push_back(lw->weights);
  }
  return w;
}

std::vector<int> Iota(int n) {
  std::vector<int> v(n);
  for (int i = 0; i < n; ++i) v[i] = i;
  return v;
}

// Plain Eigen GEMM of the relighting shape: per channel (pixels x N) * (N x K),
// operands already in Eigen layout; threads = 1 (Eigen without OpenMP) or the
// same fixed row chunks spread over io::ParallelFor.
void BM_PlainGemm(benchmark::State& state) {
  const int k = static_cast<int>(state.range(0));
  const int threads = static_cast<int>(state.range(1));
  const int m = Size() * Size();
  Eigen::MatrixXf a[3], w[3], r[3];
  for (int c = 0; c < 3; ++c) {
    a[c] = Eigen::MatrixXf::Random(m, kLights);
    w[c] = Eigen::MatrixXf::Random(kLights, k);
    r[c].resize(m, k);
  }
  const int64_t chunk = int64_t{synth::kRowsPerChunk} * Size();
  for (auto _ : state) {
    io::ParallelFor(0, m, chunk, threads, [&](int64_t b, int64_t e) {
      for (int c = 0; c < 3; ++c) r[c].middleRows(b, e - b).noalias() = a[c].middleRows(b, e - b) * w[c];
    });
    benchmark::DoNotOptimize(r[0].data());
  }
  state.counters["maps"] = benchmark::Counter(static_cast<double>(k) * state.iterations(), benchmark::Counter::kIsRate);
}

void BM_RelightBatchMemory(benchmark::State& state) {
  const int k = static_cast<int>(state.range(0));
  const int threads = static_cast<int>(state.range(1));
  auto src = synth::MakeMemoryOlatSource(MemoryFrames(), Iota(kLights));
  const auto w = Weights(k);
  synth::RelightOptions o;
  o.threads = threads;
  std::vector<cv::Mat> out;
  for (auto _ : state) {
    if (!synth::RelightBatch(src.get(), w, o, &out).ok()) state.SkipWithError("relight failed");
  }
  state.counters["maps"] = benchmark::Counter(static_cast<double>(k) * state.iterations(), benchmark::Counter::kIsRate);
}

// From disk: every batch opens and decodes the whole stack once.
void BM_RelightBatchDisk(benchmark::State& state) {
  const int k = static_cast<int>(state.range(0));
  const int threads = static_cast<int>(state.range(1));
  const auto w = Weights(k);
  synth::RelightOptions o;
  o.threads = threads;
  o.mem_budget_bytes = int64_t{256} << 20;
  std::vector<cv::Mat> out;
  for (auto _ : state) {
    auto src = synth::OpenOlatSource(DiskSession(), DiskSession().cameras[0]);
    if (!src.ok() || !synth::RelightBatch(src->get(), w, o, &out).ok()) state.SkipWithError("relight failed");
  }
  state.counters["maps"] = benchmark::Counter(static_cast<double>(k) * state.iterations(), benchmark::Counter::kIsRate);
}

BENCHMARK(BM_PlainGemm)->Args({32, 1})->Args({32, 2})->Unit(benchmark::kMillisecond)->UseRealTime()->MinTime(2.0);
BENCHMARK(BM_RelightBatchMemory)
    ->Args({32, 1})
    ->Args({32, 2})
    ->Unit(benchmark::kMillisecond)
    ->UseRealTime()
    ->MinTime(2.0);
BENCHMARK(BM_RelightBatchDisk)->Args({32, 2})->Args({1, 2})->Unit(benchmark::kMillisecond)->UseRealTime()->MinTime(2.0);

// Collects real time per iteration and maps/s to print ratios at the end.
class RatioReporter : public benchmark::ConsoleReporter {
 public:
  void ReportRuns(const std::vector<Run>& runs) override {
    for (const auto& r : runs) {
      auto it = r.counters.find("maps");
      if (it != r.counters.end()) {
        maps_per_s_[r.benchmark_name()] = it->second.value;
        cpu_s_[r.benchmark_name()] = r.GetAdjustedCPUTime();
        wall_s_[r.benchmark_name()] = r.GetAdjustedRealTime();
      }
    }
    ConsoleReporter::ReportRuns(runs);
  }
  void Finalize() override {
    ConsoleReporter::Finalize();
    auto get = [&](const std::string& n) { return maps_per_s_.count(n) ? maps_per_s_[n] : 0.0; };
    fmt::print("\n== ratios ({}x{} px, {} lights) ==\n", Size(), Size(), kLights);
    for (int t : {1, 2}) {
      const double plain = get(fmt::format("BM_PlainGemm/32/{}/min_time:2.000/real_time", t));
      const double ours = get(fmt::format("BM_RelightBatchMemory/32/{}/min_time:2.000/real_time", t));
      const std::string pn = fmt::format("BM_PlainGemm/32/{}/min_time:2.000/real_time", t);
      const std::string on = fmt::format("BM_RelightBatchMemory/32/{}/min_time:2.000/real_time", t);
      if (plain > 0) {
        fmt::print(
            "batched K=32 (in memory) / plain Eigen GEMM, {} thread(s): {:.1f}% by wall time, {:.1f}% by CPU "
            "time (target >= 70%)\n",
            t, 100 * ours / plain, 100 * cpu_s_[pn] / cpu_s_[on]);
      }
    }
    const double b32 = get("BM_RelightBatchDisk/32/2/min_time:2.000/real_time");
    const double b1 = get("BM_RelightBatchDisk/1/2/min_time:2.000/real_time");
    if (b1 > 0)
      fmt::print("from disk, per map: batched K=32 / one map at a time: {:.1f}x faster (target >= 10x)\n", b32 / b1);
  }

 private:
  std::map<std::string, double> maps_per_s_, cpu_s_, wall_s_;
};

}  // namespace

int main(int argc, char** argv) {
  benchmark::Initialize(&argc, argv);
  fmt::print("session: {}\n", DiskSession().dir);
  RatioReporter reporter;
  benchmark::RunSpecifiedBenchmarks(&reporter);
  benchmark::Shutdown();
  return 0;
}
