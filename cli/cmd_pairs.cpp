// `lumenrig pairs`: relit training pairs from sessions and a folder of HDR maps.
#include <chrono>
#include <cstdio>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/byte_size.h"
#include "lumenrig/synth/pairs.h"

namespace lumenrig::cli {
namespace {

struct PairsArgs {
  synth::PairsOptions o;
  std::string size = "256x256";
  std::string mem_budget = "1G";
};

io::Status ParseSize(const std::string& text, int* w, int* h) {
  if (std::sscanf(text.c_str(), "%dx%d", w, h) != 2 || *w <= 0 || *h <= 0) {
    return io::Status::BadInput(fmt::format("--size: '{}' is not WxH (e.g. 512x512)", text));
  }
  return io::Status::Ok();
}

int Run(PairsArgs& a) {
  const std::string cmd = "pairs";
  const auto t0 = std::chrono::steady_clock::now();
  io::Status st = ParseSize(a.size, &a.o.width, &a.o.height);
  if (!st.ok()) return ReportError(cmd, st);
  auto budget = io::ParseByteSize(a.mem_budget);
  if (!budget.ok()) return ReportError(cmd, budget.status());
  a.o.mem_budget_bytes = *budget;
  synth::PairsSummary sum;
  st = synth::WritePairs(a.o, &sum);
  if (!st.ok()) return ReportError(cmd, st);
  if (sum.resumed_from > 0) fmt::print("resumed: {} sample(s) were already complete\n", sum.resumed_from);
  fmt::print("wrote {} sample(s) ({} in the file) from {} session(s) and {} map(s) to {}\n", sum.samples_written,
             sum.samples_total, sum.session_ids.size(), sum.envs, a.o.out);
  fmt::print("splits by subject: train {}, validation {}, test {}\n", sum.train, sum.validation, sum.test);
  fmt::print(
      "environment maps: {} texel(s) NaN/Inf/negative clamped to 0; up to {:.2f}% of a map's energy falls "
      "where the rig has no lights (dropped)\n",
      sum.clamped_texels, 100.0 * sum.max_uncovered_energy_fraction);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  if (sum.samples_written > 0) {
    fmt::print("{:.2f} pairs/s (relighting {:.2f} s of {:.2f} s)\n", sum.samples_written / wall, sum.relight_seconds,
               wall);
  }
  fmt::print("pairs: {}\n", TimeAndMemoryLine(wall));
  return 0;
}

CommandRegistrar reg(
    {"pairs", "Write relit training pairs (lumenrig.pairs/1 HDF5) from sessions and HDR maps", 70,
     [](CLI::App* sub) -> std::function<int()> {
       auto a = std::make_shared<PairsArgs>();
       sub->add_option("sessions", a->o.sessions, "Session folders or session.json files")->required();
       sub->add_option("--envs", a->o.envs_dir, "Folder of lat-long HDR maps (*.exr, *.hdr)")->required();
       sub->add_option("--out", a->o.out, "Output HDF5 file (.h5)")->required();
       sub->add_option("--count", a->o.count, "Number of samples")->required();
       sub->add_option("--seed", a->o.seed, "Seed: same seed, same datasets (any thread count)");
       sub->add_option("--size", a->size, "Output size WxH (centre crop to aspect, then resize)");
       sub->add_option("--batch", a->o.batch_size,
                       "Samples per pass over a camera's OLAT stack (part of the result; recorded)");
       sub->add_option("--specular-exponents", a->o.specular_exponents, "Phong exponents of the specular light maps");
       sub->add_option("--target-luminance", a->o.target_luminance,
                       "Each map is normalised to this mean BT.709 luminance");
       sub->add_option("--fov-deg", a->o.background_fov_deg,
                       "Background view: horizontal field of view (0 = the camera's intrinsics)");
       sub->add_option("--yaw-deg", a->o.background_yaw_deg,
                       "Background view: yaw drawn uniformly in +-this (degrees)");
       sub->add_option("--pitch-deg", a->o.background_pitch_deg,
                       "Background view: pitch drawn uniformly in +-this (degrees)");
       sub->add_option("--mem-budget", a->mem_budget, "Memory budget (e.g. 1G, 512M)");
       sub->add_flag("--resume", a->o.resume, "Continue an interrupted run (same options)");
       sub->add_flag("--force", a->o.force, "Replace an existing output");
       sub->add_option("--threads", a->o.threads, "Worker threads (0 = all cores)");
       sub->add_option("--debug-abort-after", a->o.debug_abort_after,
                       "Testing: stop after N complete samples, leaving a partial file")
           ->group("");
       return [a] { return Run(*a); };
     }});

}  // namespace
}  // namespace lumenrig::cli
