// File-backed pieces of relighting: environment maps and OLAT stacks on disk.
#include <algorithm>
#include <chrono>
#include <cmath>
#include <filesystem>

#include <fmt/format.h>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/relight.h"
#include "lumenrig/synth/sh.h"

namespace fs = std::filesystem;

namespace lumenrig::synth {

io::Expected<EnvMap> LoadEnvMap(const std::string& path) {
  const io::FileFormat format = io::FormatFromPath(path);
  if (format != io::FileFormat::kExr && format != io::FileFormat::kHdr) {
    return io::Status::BadInput(fmt::format("{}: environment maps must be OpenEXR (.exr) or Radiance (.hdr)", path));
  }
  auto image = io::ReadImage(path);
  if (!image.ok()) return image.status();
  EnvMap env;
  env.path = path;
  env.name = fs::path(path).stem().string();
  env.radiance = std::move(*image);
  if (env.radiance.channels() == 1) {
    cv::Mat rgb;
    cv::merge(std::vector<cv::Mat>{env.radiance, env.radiance, env.radiance}, rgb);
    env.radiance = rgb;
  }
  LUMENRIG_RETURN_IF_ERROR(ValidateLatLong(env.radiance, path));
  env.clamped_texels = SanitizeRadiance(&env.radiance);
  return env;
}

io::Expected<std::vector<EnvMap>> LoadEnvMapFolder(const std::string& dir) {
  std::error_code ec;
  if (!fs::is_directory(dir, ec)) return io::Status::BadInput(fmt::format("{}: --envs is not a folder", dir));
  std::vector<std::string> files;
  for (const auto& e : fs::directory_iterator(dir, ec)) {
    if (!e.is_regular_file()) continue;
    const io::FileFormat f = io::FormatFromPath(e.path().string());
    if (f == io::FileFormat::kExr || f == io::FileFormat::kHdr) files.push_back(e.path().string());
  }
  if (files.empty()) {
    return io::Status::BadInput(fmt::format("{}: no environment maps (*.exr, *.hdr) in the folder", dir));
  }
  std::sort(files.begin(), files.end());
  std::vector<EnvMap> maps;
  for (const auto& f : files) {
    auto m = LoadEnvMap(f);
    if (!m.ok()) return m.status();
    maps.push_back(std::move(*m));
  }
  return maps;
}

namespace {

class DiskOlatSource : public OlatSource {
 public:
  int width() const override { return width_; }
  int height() const override { return height_; }
  const std::vector<int>& light_index() const override { return light_index_; }
  int64_t overhead_bytes() const override { return overhead_; }

  io::Status ReadBand(int y0, int y1, int threads, std::vector<cv::Mat>* bands) override {
    const int n = static_cast<int>(readers_.size());
    bands->resize(n);
    std::vector<io::Status> status(n);
    // One reader per frame, each used by one task: decoding runs in parallel.
    io::ParallelFor(0, n, 1, threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) status[i] = readers_[i]->ReadRows(y0, y1, &(*bands)[i]);
    });
    for (const auto& s : status) LUMENRIG_RETURN_IF_ERROR(s);
    if (dark_) {
      LUMENRIG_RETURN_IF_ERROR(dark_->ReadRows(y0, y1, &dark_band_));
      io::ParallelFor(0, n, 1, threads, [&](int64_t b, int64_t e) {
        for (int64_t i = b; i < e; ++i) (*bands)[i] -= dark_band_;
      });
    }
    return io::Status::Ok();
  }

  static io::Expected<std::unique_ptr<OlatSource>> Open(const io::Session& session, const io::Camera& camera) {
    auto src = std::make_unique<DiskOlatSource>();
    const io::DecodeOptions decode = io::DecodeOptionsFor(session);
    if (camera.olat.empty()) {
      return io::Status::BadInput(fmt::format("{}: cameras[{}].olat: no OLAT frames", session.path, camera.id));
    }
    for (const auto& f : camera.olat) {
      const int li = session.rig.IndexOfId(f.light);
      if (li < 0) return io::Status::BadInput(fmt::format("{}: unknown light id {}", f.path, f.light));
      auto r = io::BandReader::Open(f.path, decode);
      if (!r.ok()) return r.status();
      const io::ImageInfo& info = (*r)->info();
      if (src->readers_.empty()) {
        src->width_ = info.width;
        src->height_ = info.height;
      } else if (info.width != src->width_ || info.height != src->height_) {
        return io::Status::BadInput(fmt::format("{}: size {}x{} differs from the first frame's {}x{}", f.path,
                                                info.width, info.height, src->width_, src->height_));
      }
      if (info.channels != 3) {
        return io::Status::BadInput(
            fmt::format("{}: relighting needs RGB frames, found {} channel(s)", f.path, info.channels));
      }
      // Decoder state per frame: about two line blocks of float RGB.
      src->overhead_ += int64_t{2} * std::max(1, info.lines_per_block) * info.width * 3 * 4 + (64 << 10);
      src->readers_.push_back(std::move(*r));
      src->light_index_.push_back(li);
    }
    if (!camera.dark.empty()) {
      // Both frames lose the black level on decoding, so frame - dark removes
      // the dark signal once.
      auto d = io::BandReader::Open(camera.dark, decode);
      if (!d.ok()) return d.status();
      if ((*d)->info().width != src->width_ || (*d)->info().height != src->height_ || (*d)->info().channels != 3) {
        return io::Status::BadInput(
            fmt::format("{}: dark frame size/channels differ from the OLAT frames", camera.dark));
      }
      src->dark_ = std::move(*d);
    }
    return std::unique_ptr<OlatSource>(std::move(src));
  }

 private:
  std::vector<std::unique_ptr<io::BandReader>> readers_;
  std::unique_ptr<io::BandReader> dark_;
  cv::Mat dark_band_;
  std::vector<int> light_index_;
  int width_ = 0, height_ = 0;
  int64_t overhead_ = 0;
};

}  // namespace

io::Expected<std::unique_ptr<OlatSource>> OpenOlatSource(const io::Session& session, const io::Camera& camera) {
  return DiskOlatSource::Open(session, camera);
}

}  // namespace lumenrig::synth

namespace lumenrig::synth {

io::Status RelightCamera(const io::Session& session, const std::string& camera_id, const std::vector<EnvMap>& maps,
                         const RelightCameraOptions& options, std::vector<cv::Mat>* relit, RelightSummary* summary) {
  const auto t0 = std::chrono::steady_clock::now();
  if (session.cameras.empty())
    return io::Status::BadInput(fmt::format("{}: cameras: session has no cameras", session.path));
  const io::Camera* camera = camera_id.empty() ? &session.cameras[0] : session.FindCamera(camera_id);
  if (camera == nullptr) {
    return io::Status::BadInput(fmt::format("{}: cameras: no camera with id '{}'", session.path, camera_id));
  }
  if (maps.empty()) return io::Status::BadInput("relight: no environment maps given");
  const std::string rig_source = session.rig.path.empty() ? session.path : session.rig.path;
  RelightSummary sum;
  std::vector<Eigen::MatrixXd> weights;
  for (const EnvMap& env : maps) {
    EnvMap m = env;
    m.radiance = RotateLatLong(env.radiance, options.rotate_deg);
    if (options.target_luminance > 0) LUMENRIG_RETURN_IF_ERROR(NormaliseExposure(&m, options.target_luminance));
    const double ev_scale = std::exp2(options.exposure_ev);
    m.radiance *= ev_scale;
    const int ih = std::min(m.radiance.rows, std::max(2, options.weights.integration_height));
    auto cells = BuildLightCells(session.rig, ih, options.weights, rig_source);
    if (!cells.ok()) return cells.status();
    const cv::Mat small = ih == m.radiance.rows ? m.radiance : ResampleLatLong(m.radiance, ih);
    LightWeights w = ComputeLightWeights(small, session.rig, *cells);
    weights.push_back(w.weights);
    sum.clamped_texels += env.clamped_texels;
    sum.uncovered_energy_fraction.push_back(w.uncovered_energy_fraction);
    sum.exposure_scale.push_back(m.exposure_scale * ev_scale);
  }
  auto stack = OpenOlatSource(session, *camera);
  if (!stack.ok()) return stack.status();
  LUMENRIG_RETURN_IF_ERROR(RelightBatch(stack->get(), weights, options.relight, relit, &sum.stats));
  sum.maps = static_cast<int>(maps.size());
  sum.lights = (*stack)->count();
  sum.width = (*stack)->width();
  sum.height = (*stack)->height();
  sum.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  if (summary) *summary = sum;
  return io::Status::Ok();
}

}  // namespace lumenrig::synth

namespace lumenrig::synth {

io::Expected<std::vector<std::string>> WriteProceduralEnvMaps(const std::string& dir, int height, bool overwrite) {
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir));
  const std::vector<std::pair<std::string, cv::Mat>> maps = {
      {"sky-noon.exr", MakeSkyMap(height, Eigen::Vector3d(0.2, 0.95, 0.25), 3.0, 200.0f)},
      {"sky-low-sun.exr", MakeSkyMap(height, Eigen::Vector3d(-0.8, 0.25, -0.5), 4.0, 60.0f)},
      {"studio-softboxes.exr", MakeStudioMap(height)},
  };
  std::vector<std::string> paths;
  for (const auto& [name, image] : maps) {
    io::ExrWriteOptions w;
    w.pixel_type = io::PixelType::kFloat;
    w.overwrite = overwrite;
    w.attributes = {{"lumenrig.tool", "lumenrig procedural environment map"},
                    {"lumenrig.layout", "lat-long, DESIGN.md"}};
    const std::string p = (fs::path(dir) / name).string();
    LUMENRIG_RETURN_IF_ERROR(io::WriteExr(p, image, w));
    paths.push_back(p);
  }
  return paths;
}

}  // namespace lumenrig::synth
