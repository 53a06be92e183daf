// Stage adapters of the pipeline: each wraps one stage's library call and
// says which inputs and options its outputs depend on.
#include "pipeline_stages.h"

#include <filesystem>
#include <fstream>

#include "lumenrig/capture_io/hdf5_writer.h"
#include "lumenrig/capture_io/image_io.h"

namespace fs = std::filesystem;
using nlohmann::json;

namespace lumenrig::synth::internal {
namespace {

std::string Join(const std::string& dir, const std::string& name) { return (fs::path(dir) / name).string(); }

/// Per-camera maps the assemble stage gathers: (stage folder, file, dataset).
struct MapSource {
  const char* stage_dir;
  const char* file;
  const char* dataset;
};
constexpr MapSource kCameraMaps[] = {
    {"normals", "normals.exr", "normals"},       {"normals", "albedo.exr", "albedo"},
    {"normals", "confidence.exr", "normals_confidence"}, {"normals", "depth.exr", "depth"},
    {"matte", "alpha.exr", "alpha"},             {"matte", "foreground.exr", "foreground"},
    {"matte", "confidence.exr", "alpha_confidence"},
};

/// Writes <out>/<session>.h5 from the per-camera stage outputs.
io::Status RunAssemble(const StageUnitContext& ctx, std::vector<std::string>* outputs, json* extra) {
  const io::Session& s = *ctx.session;
  const std::string final_path = Join(ctx.final_dir, s.Id() + ".h5");
  // The pipeline owns this name: a stale copy from an earlier run is replaced
  // only after the new one is complete (H5Writer renames on Finalize).
  auto writer = io::H5Writer::Create(final_path, /*overwrite=*/true);
  if (!writer.ok()) return writer.status();
  io::H5Writer& w = **writer;
  LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "format", std::string("lumenrig.groundtruth/1")));
  LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "tool_version", std::string(LUMENRIG_VERSION)));
  LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "session", s.Id()));
  LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "session_path", s.path));
  int written = 0;
  bool first = true;
  for (const auto& cam : s.cameras) {
    const std::string cam_dir = Join(ctx.session_out_dir, cam.id);
    for (const auto& m : kCameraMaps) {
      const std::string file = Join(Join(cam_dir, m.stage_dir), m.file);
      if (!fs::exists(file)) continue;
      auto image = io::ReadImage(file);
      if (!image.ok()) return image.status();
      const std::string name = "/cameras/" + cam.id + "/" + m.dataset;
      // Depth keeps float32: half precision is too coarse for metres at range.
      const io::H5Type type = std::string(m.dataset) == "depth" ? io::H5Type::kFloat32 : io::H5Type::kFloat16;
      LUMENRIG_RETURN_IF_ERROR(w.WriteImage(name, *image, type));
      auto attrs = io::ReadExrAttributes(file);
      if (attrs.ok()) {
        for (const auto& [k, v] : *attrs)
          if (k.rfind("lumenrig.", 0) == 0) LUMENRIG_RETURN_IF_ERROR(w.SetAttribute(name, k, v));
      }
      ++written;
      if (first) {
        LUMENRIG_RETURN_IF_ERROR(w.Flush());
        MaybeKillAt("assemble:mid_write");
        first = false;
      }
    }
  }
  const std::string qa = Join(Join(ctx.session_out_dir, "check"), "check.json");
  if (fs::exists(qa)) {
    std::ifstream in(qa);
    json j = json::parse(in, nullptr, /*allow_exceptions=*/false);
    if (j.is_discarded()) return io::Status::BadInput(qa + ": not valid JSON");
    LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "qa_json", j.dump()));
    if (j.contains("verdict")) LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "qa_verdict", j["verdict"].dump()));
  }
  LUMENRIG_RETURN_IF_ERROR(w.Finalize());
  outputs->push_back(final_path);
  (*extra)["datasets"] = written;
  return io::Status::Ok();
}

}  // namespace

const std::vector<StageAdapter>& StageAdapters() {
  static const std::vector<StageAdapter> adapters = [] {
    std::vector<StageAdapter> a;
    StageAdapter assemble;
    assemble.kind = StageKind::kAssemble;
    assemble.per_camera = false;
    assemble.key_upstream = {StageKind::kCheck, StageKind::kNormals, StageKind::kMatte};
    assemble.options_slice = [](const RunOptions&) { return json::object(); };
    assemble.input_files = [](const RunOptions&, const io::Session&, const io::Camera*) {
      return std::vector<std::string>{};
    };
    assemble.run = RunAssemble;
    a.push_back(assemble);
    return a;
  }();
  return adapters;
}

}  // namespace lumenrig::synth::internal
