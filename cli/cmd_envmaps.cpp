// `lumenrig envmaps`: writes procedural lat-long HDR maps (no maps are shipped).
#include <chrono>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/synth/envmap.h"

namespace lumenrig::cli {
namespace {

struct EnvmapsArgs {
  std::string out;
  int height = 128;
  bool force = false;
};

int Run(const EnvmapsArgs& a) {
  const auto t0 = std::chrono::steady_clock::now();
  if (a.height < 4)
    return ReportError("envmaps", io::Status::BadInput(fmt::format("--height: {} is too small (min 4)", a.height)));
  auto paths = synth::WriteProceduralEnvMaps(a.out, a.height, a.force);
  if (!paths.ok()) return ReportError("envmaps", paths.status());
  for (const auto& p : *paths) fmt::print("wrote {}\n", p);
  fmt::print("envmaps: {}\n",
             TimeAndMemoryLine(std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count()));
  return 0;
}

CommandRegistrar reg({"envmaps", "Write procedural lat-long HDR maps (sky with sun, studio softboxes) as OpenEXR", 65,
                      [](CLI::App* sub) -> std::function<int()> {
                        auto a = std::make_shared<EnvmapsArgs>();
                        sub->add_option("--out", a->out, "Folder to write into (created when missing)")->required();
                        sub->add_option("--height", a->height, "Map height in texels (width = 2 x height)");
                        sub->add_flag("--force", a->force, "Overwrite existing maps");
                        return [a] { return Run(*a); };
                      }});

}  // namespace
}  // namespace lumenrig::cli
