#include "lumenrig/synth/pairs.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <ctime>
#include <filesystem>
#include <map>
#include <memory>

#include <fmt/format.h>
#include <Eigen/Geometry>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/hdf5_reader.h"
#include "lumenrig/capture_io/hdf5_writer.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/sh.h"

namespace fs = std::filesystem;

namespace lumenrig::synth {

// ---------------------------------------------------------------- helpers

std::string SplitForSubject(const std::string& subject) {
  // FNV-1a 64-bit (Fowler, Noll, Vo): stable across platforms and runs.
  uint64_t h = 1469598103934665603ULL;
  for (unsigned char c : subject) {
    h ^= c;
    h *= 1099511628211ULL;
  }
  const uint64_t bucket = h % 100;
  if (bucket < 80) return "train";
  if (bucket < 90) return "validation";
  return "test";
}

io::Status TruthAuxSource(const io::Session& session, const io::Camera& camera, AuxMaps* out) {
  const fs::path dir = fs::path(session.dir) / "truth" / camera.id;
  auto need = [&](const std::string& name) -> io::Expected<cv::Mat> {
    const std::string p = (dir / name).string();
    std::error_code ec;
    if (!fs::exists(p, ec)) {
      return io::Status::BadInput(fmt::format(
          "{}: missing (pairs need albedo, normals and alpha; the default source is the simulator's truth/<camera>/)",
          p));
    }
    return io::ReadImage(p);
  };
  auto albedo = need("albedo.exr");
  if (!albedo.ok()) return albedo.status();
  auto normals = need("normals.exr");
  if (!normals.ok()) return normals.status();
  cv::Mat alpha;
  std::error_code ec;
  if (fs::exists(dir / "alpha.exr", ec)) {
    auto a = io::ReadImage((dir / "alpha.exr").string());
    if (!a.ok()) return a.status();
    alpha = *a;
  } else if (!camera.mask.empty()) {
    auto m = io::ReadImage(camera.mask);
    if (!m.ok()) return m.status();
    alpha = *m;
    cv::threshold(alpha, alpha, 0.0, 1.0, cv::THRESH_BINARY);
  } else {
    return io::Status::BadInput(
        fmt::format("{}: missing, and camera {} has no mask", (dir / "alpha.exr").string(), camera.id));
  }
  if (alpha.channels() == 3) cv::cvtColor(alpha, alpha, cv::COLOR_RGB2GRAY);
  if (albedo->channels() == 1) cv::cvtColor(*albedo, *albedo, cv::COLOR_GRAY2RGB);
  if (normals->channels() != 3)
    return io::Status::BadInput(fmt::format("{}: normals need 3 channels", (dir / "normals.exr").string()));
  if (albedo->size() != normals->size() || alpha.size() != normals->size()) {
    return io::Status::BadInput(fmt::format("{}: albedo, normals and alpha sizes differ", dir.string()));
  }
  out->albedo = *albedo;
  out->normals = *normals;
  out->alpha = alpha;
  out->source = dir.string();
  return io::Status::Ok();
}

namespace {

// Uniform double in [0, 1) from the top 53 bits (portable, unlike
// std::uniform_real_distribution whose algorithm is implementation-defined).
double Uniform01(uint64_t bits) { return static_cast<double>(bits >> 11) * (1.0 / 9007199254740992.0); }

// gzip level of the image fields: 1 is several times faster than the usual
// 4-6 for a few percent larger files (the training loop reads, we write once).
constexpr int kGzipLevel = 1;

enum SeedTag : uint64_t { kTagEnv = 1, kTagCamera = 2, kTagView = 3 };

struct PreparedEnv {
  std::string name;
  cv::Mat full;   // normalised radiance
  cv::Mat small;  // at the weight integration height
  ShCoeffs sh;    // of the unrotated map
  PhongPrefiltered spec;
  int64_t clamped = 0;
};

struct SampleDraw {
  int env_in = 0, env_tgt = 0;
  double rot_in = 0, rot_tgt = 0;
  double yaw = 0, pitch = 0;
  CameraSimDraw cam;
};

SampleDraw DrawSample(const PairsOptions& o, int n_envs, int64_t i) {
  SampleDraw d;
  uint64_t s = io::DeriveSeed(o.seed, static_cast<uint64_t>(i), kTagEnv);
  auto next = [&s]() {
    s = io::DeriveSeed(s, 0x5bd1e995ULL);
    return s;
  };
  d.env_in = static_cast<int>(next() % static_cast<uint64_t>(n_envs));
  d.env_tgt = d.env_in;
  if (n_envs > 1) d.env_tgt = static_cast<int>((d.env_in + 1 + next() % static_cast<uint64_t>(n_envs - 1)) % n_envs);
  d.rot_in = 360.0 * Uniform01(next());
  d.rot_tgt = 360.0 * Uniform01(next());
  d.yaw = o.background_yaw_deg * (2.0 * Uniform01(next()) - 1.0);
  d.pitch = o.background_pitch_deg * (2.0 * Uniform01(next()) - 1.0);
  d.cam = DrawCameraSim(o.camera_sim, io::DeriveSeed(o.seed, static_cast<uint64_t>(i), kTagCamera));
  return d;
}

struct CameraContext {
  int session = 0;
  const io::Camera* camera = nullptr;
  cv::Size native;                       // capture size
  cv::Rect crop;                         // in capture pixels
  io::Intrinsics intrinsics;             // at the output size
  io::Intrinsics background_intrinsics;  // at the output size
  Eigen::Matrix3d camera_from_rig = Eigen::Matrix3d::Identity();
  AuxMaps aux;  // at the output size
  bool loaded = false;
};

cv::Rect CentreCrop(int w, int h, int out_w, int out_h) {
  // Largest centred rectangle with the output's aspect ratio.
  int cw = w, ch = static_cast<int>(std::lround(static_cast<double>(w) * out_h / out_w));
  if (ch > h) {
    ch = h;
    cw = static_cast<int>(std::lround(static_cast<double>(h) * out_w / out_h));
  }
  return cv::Rect((w - cw) / 2, (h - ch) / 2, cw, ch);
}

cv::Mat CropResize(const cv::Mat& in, const cv::Rect& crop, int w, int h) {
  cv::Mat out;
  const cv::Mat roi = in(crop);
  if (roi.cols == w && roi.rows == h) return roi.clone();
  cv::resize(roi, out, cv::Size(w, h), 0, 0, (w < roi.cols) ? cv::INTER_AREA : cv::INTER_LINEAR);
  return out;
}

std::string UtcNow() {
  const std::time_t t = std::time(nullptr);
  std::tm tm{};
  gmtime_r(&t, &tm);
  char buf[32];
  std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
  return buf;
}

struct SampleOut {
  cv::Mat input, target, alpha, albedo, normals, background, diffuse;
  std::vector<float> specular;  // H*W*S*3
  SampleDraw draw;
};

io::Status ValidateOptions(const PairsOptions& o) {
  if (o.sessions.empty()) return io::Status::BadInput("pairs: give at least one session");
  if (o.count <= 0) return io::Status::BadInput(fmt::format("--count: must be > 0, got {}", o.count));
  if (o.width < 8 || o.height < 8)
    return io::Status::BadInput(fmt::format("--size: {}x{} is too small (min 8x8)", o.width, o.height));
  if (o.batch_size < 1) return io::Status::BadInput("--batch: must be >= 1");
  if (o.specular_exponents.empty()) return io::Status::BadInput("--specular-exponents: list is empty");
  for (double s : o.specular_exponents) {
    if (!(s > 0)) return io::Status::BadInput(fmt::format("--specular-exponents: {} is not > 0", s));
  }
  if (!(o.target_luminance > 0)) return io::Status::BadInput("--target-luminance: must be > 0");
  if (fs::path(o.out).extension() != ".h5")
    return io::Status::BadInput(fmt::format("{}: --out must end in .h5", o.out));
  if (o.resume && o.force) return io::Status::BadInput("--resume and --force exclude each other");
  if (o.background_fov_deg < 0 || o.background_fov_deg >= 179) {
    return io::Status::BadInput(fmt::format("--fov-deg: {} is outside [0, 179)", o.background_fov_deg));
  }
  return io::Status::Ok();
}

}  // namespace

nlohmann::json PairsConfigJson(const PairsOptions& o) {
  nlohmann::json j;
  std::vector<std::string> sessions;
  for (const auto& s : o.sessions) {
    std::error_code ec;
    const fs::path p = fs::weakly_canonical(s, ec);
    sessions.push_back(ec ? s : p.string());
  }
  j["sessions"] = sessions;
  std::error_code ec;
  j["envs_dir"] = fs::weakly_canonical(o.envs_dir, ec).string();
  j["count"] = o.count;
  j["seed"] = o.seed;
  j["size"] = {o.width, o.height};
  j["batch_size"] = o.batch_size;
  j["specular_exponents"] = o.specular_exponents;
  j["target_luminance"] = o.target_luminance;
  j["background_yaw_deg"] = o.background_yaw_deg;
  j["background_pitch_deg"] = o.background_pitch_deg;
  j["background_fov_deg"] = o.background_fov_deg;
  j["camera_sim"] = {{"exposure_sigma_ev", o.camera_sim.exposure_sigma_ev},
                     {"white_balance_sigma", o.camera_sim.white_balance_sigma},
                     {"read_noise", o.camera_sim.read_noise},
                     {"shot_noise", o.camera_sim.shot_noise},
                     {"jpeg_probability", o.camera_sim.jpeg_probability},
                     {"jpeg_quality", {o.camera_sim.jpeg_quality_min, o.camera_sim.jpeg_quality_max}}};
  j["coverage_angle_deg"] = o.weights.coverage_angle_deg;
  j["integration_height"] = o.weights.integration_height;
  j["tool_version"] = LUMENRIG_VERSION;
  return j;
}

io::Status WritePairs(const PairsOptions& o, PairsSummary* summary) {
  using Clock = std::chrono::steady_clock;
  const auto t_start = Clock::now();
  LUMENRIG_RETURN_IF_ERROR(ValidateOptions(o));
  PairsSummary sum;
  const std::string partial = io::H5Writer::TempPathFor(o.out);
  std::error_code ec;
  const bool final_exists = fs::exists(o.out, ec);
  const bool partial_exists = fs::exists(partial, ec);
  if (final_exists && !o.resume && !o.force) {
    return io::Status::BadInput(
        fmt::format("{}: output exists; pass --resume to continue it or --force to replace it", o.out));
  }
  const std::string config = PairsConfigJson(o).dump();
  if (o.resume && final_exists && !partial_exists) {
    // Already complete: nothing to do when it was made with this config.
    auto r = io::H5Reader::Open(o.out);
    if (!r.ok()) return r.status();
    auto stored = (*r)->StringAttribute("/", "config");
    if (!stored.ok() || *stored != config) {
      return io::Status::BadInput(fmt::format(
          "{}: --resume: the file was written with different options (root attribute config); use --force", o.out));
    }
    sum.samples_total = o.count;
    sum.resumed_from = o.count;
    if (summary) *summary = sum;
    return io::Status::Ok();
  }

  // Sessions and cameras.
  std::vector<io::Session> sessions;
  std::vector<CameraContext> cams;
  for (const auto& s : o.sessions) {
    auto loaded = io::LoadSession(s);
    if (!loaded.ok()) return loaded.status();
    auto dirs = RigLightDirections(loaded->rig, loaded->rig.path.empty() ? loaded->path : loaded->rig.path);
    if (!dirs.ok()) return dirs.status();
    if (loaded->cameras.empty())
      return io::Status::BadInput(fmt::format("{}: cameras: session has no cameras", loaded->path));
    sessions.push_back(std::move(*loaded));
  }
  for (size_t si = 0; si < sessions.size(); ++si) {
    sum.session_ids.push_back(sessions[si].Id());
    for (const auto& c : sessions[si].cameras) {
      CameraContext cc;
      cc.session = static_cast<int>(si);
      cc.camera = &c;
      cams.push_back(cc);
    }
  }
  // Light cells per session (rig).
  std::vector<LightCells> cells(sessions.size());
  for (size_t si = 0; si < sessions.size(); ++si) {
    auto c = BuildLightCells(sessions[si].rig, o.weights.integration_height, o.weights, sessions[si].rig.path);
    if (!c.ok()) return c.status();
    cells[si] = std::move(*c);
  }

  // Environment maps: normalised once; SH and Phong prefiltering once per map
  // (rotations are applied to lookup directions, which commute with both).
  auto loaded_envs = LoadEnvMapFolder(o.envs_dir);
  if (!loaded_envs.ok()) return loaded_envs.status();
  std::vector<PreparedEnv> envs;
  for (auto& e : *loaded_envs) {
    LUMENRIG_RETURN_IF_ERROR(NormaliseExposure(&e, o.target_luminance));
    PreparedEnv p;
    p.name = e.name;
    p.full = e.radiance;
    p.clamped = e.clamped_texels;
    p.small = ResampleLatLong(e.radiance, o.weights.integration_height);
    p.sh = ProjectSh9(ResampleLatLong(e.radiance, 64));
    LUMENRIG_RETURN_IF_ERROR(PrefilterPhong(e.radiance, o.specular_exponents, &p.spec, 32, 64, o.threads));
    sum.clamped_texels += e.clamped_texels;
    envs.push_back(std::move(p));
  }
  sum.envs = static_cast<int>(envs.size());
  const int n_envs = static_cast<int>(envs.size());
  const int S = static_cast<int>(o.specular_exponents.size());
  const int W = o.width, H = o.height, B = o.batch_size;

  // Output file.
  std::unique_ptr<io::H5Writer> writer;
  int64_t done = 0;
  if (o.resume && partial_exists) {
    auto w = io::H5Writer::Resume(o.out, /*overwrite=*/final_exists);
    if (!w.ok()) return w.status();
    writer = std::move(*w);
    auto stored = writer->GetStringAttribute("/", "config");
    if (!stored.ok() || *stored != config) {
      return io::Status::BadInput(fmt::format(
          "{}: --resume: the interrupted run used different options (root attribute config); use --force", partial));
    }
  } else {
    if (partial_exists) fs::remove(partial, ec);  // a stale partial of a run we replace
    auto w = io::H5Writer::Create(o.out, o.force);
    if (!w.ok()) return w.status();
    writer = std::move(*w);
  }
  const std::vector<uint64_t> img3 = {static_cast<uint64_t>(H), static_cast<uint64_t>(W), 3};
  const std::vector<io::H5DatasetSpec> specs = {
      {"/pairs/input", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/target", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/alpha", {static_cast<uint64_t>(H), static_cast<uint64_t>(W), 1}, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/albedo", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/normals", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/background", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/light_diffuse", img3, io::H5Type::kFloat16, kGzipLevel, 0},
      {"/pairs/light_specular",
       {static_cast<uint64_t>(H), static_cast<uint64_t>(W), static_cast<uint64_t>(S), 3},
       io::H5Type::kFloat16,
       kGzipLevel,
       0},
      {"/pairs/subject", {}, io::H5Type::kString, 4, 0},
      {"/pairs/camera", {}, io::H5Type::kString, 4, 0},
      {"/pairs/env_name", {}, io::H5Type::kString, 4, 0},
      {"/pairs/input_env_name", {}, io::H5Type::kString, 4, 0},
      {"/pairs/split", {}, io::H5Type::kString, 4, 0},
      {"/pairs/rotation_deg", {}, io::H5Type::kFloat64, 4, 0},
      {"/pairs/input_rotation_deg", {}, io::H5Type::kFloat64, 4, 0},
      {"/pairs/exposure", {}, io::H5Type::kFloat64, 4, 0},
      {"/pairs/sample_index", {}, io::H5Type::kInt64, 4, 0},
  };
  for (const auto& s : specs) LUMENRIG_RETURN_IF_ERROR(writer->CreateDataset(s));
  if (o.resume && partial_exists) {
    done = static_cast<int64_t>(writer->NumSamples(specs[0].name));
    for (const auto& s : specs) done = std::min<int64_t>(done, static_cast<int64_t>(writer->NumSamples(s.name)));
    for (const auto& s : specs) LUMENRIG_RETURN_IF_ERROR(writer->Truncate(s.name, static_cast<uint64_t>(done)));
    sum.resumed_from = done;
  } else {
    // Attributes (provenance and per-field meaning).
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "format", kPairsFormat));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "tool_version", LUMENRIG_VERSION));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "created_utc", UtcNow()));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "seed", static_cast<uint64_t>(o.seed)));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "config", config));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "source_sessions", sum.session_ids));
    std::vector<std::string> env_names;
    for (const auto& e : envs) env_names.push_back(e.name);
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/", "env_names", env_names));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute(
        "/", "split_rule", "FNV-1a 64 of the subject id mod 100: <80 train, <90 validation, else test"));
    const std::map<std::string, std::pair<std::string, std::string>> meaning = {
        {"input",
         {"srgb",
          "subject relit under the input map, composited over its background, camera-simulated (exposure, white "
          "balance, noise, optional JPEG), sRGB-encoded (IEC 61966-2-1)"}},
        {"target",
         {"linear", "subject relit under the target map (map radiance units), premultiplied by alpha over black"}},
        {"alpha", {"linear", "alpha matte 0..1"}},
        {"albedo", {"linear", "diffuse albedo"}},
        {"normals",
         {"linear", "unit normals, camera frame (+x right, +y up, +z toward the viewer); 0 outside the subject"}},
        {"background", {"linear", "perspective view of the input map behind the subject (map radiance units)"}},
        {"light_diffuse",
         {"linear",
          "E(n)/pi of the target map from 9 SH coefficients (Ramamoorthi-Hanrahan 2001): albedo * light_diffuse is "
          "Lambertian shading"}},
        {"light_specular",
         {"linear",
          "target map prefiltered with normalised Phong lobes, looked up at the reflected view ray; axis 3 follows "
          "attribute exponents"}},
    };
    for (const auto& [field, m] : meaning) {
      LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/pairs/" + field, "encoding", m.first));
      LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/pairs/" + field, "description", m.second));
    }
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/pairs/light_specular", "exponents", o.specular_exponents));
    LUMENRIG_RETURN_IF_ERROR(
        writer->SetAttribute("/pairs/rotation_deg", "description", "rotation of the target map about +y (degrees)"));
    LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute("/pairs/env_name", "description", "target map"));
    LUMENRIG_RETURN_IF_ERROR(
        writer->SetAttribute("/pairs/exposure", "description",
                             "linear exposure multiplier of the simulated input camera (after map normalisation)"));
  }

  // Memory: the batch's relit images at capture size and its outputs are
  // fixed costs; the rest of the budget sets the band height.
  const int64_t per_sample_out = int64_t{W} * H * (3 * 7 + 1 + 3 * S) * 4;

  const int64_t n_batches = (o.count + B - 1) / B;
  for (int64_t b = done / B; b < n_batches; ++b) {
    CameraContext& cc = cams[static_cast<size_t>(b % static_cast<int64_t>(cams.size()))];
    const io::Session& session = sessions[cc.session];
    if (!cc.loaded) {
      AuxMaps aux;
      LUMENRIG_RETURN_IF_ERROR(o.aux_source(session, *cc.camera, &aux));
      cc.native = aux.albedo.size();
      cc.crop = CentreCrop(aux.albedo.cols, aux.albedo.rows, W, H);
      const double sx = static_cast<double>(W) / cc.crop.width, sy = static_cast<double>(H) / cc.crop.height;
      io::Intrinsics k =
          cc.camera->intrinsics ? *cc.camera->intrinsics : IntrinsicsFromFov(aux.albedo.cols, aux.albedo.rows, 40.0);
      k.cx -= cc.crop.x;
      k.cy -= cc.crop.y;
      cc.intrinsics = ScaleIntrinsics(k, sx, sy);
      cc.background_intrinsics =
          o.background_fov_deg > 0 ? IntrinsicsFromFov(W, H, o.background_fov_deg) : cc.intrinsics;
      cc.camera_from_rig = cc.camera->RotationCameraFromRig();
      cc.aux.albedo = CropResize(aux.albedo, cc.crop, W, H);
      cc.aux.alpha = CropResize(aux.alpha, cc.crop, W, H);
      cv::Mat n = CropResize(aux.normals, cc.crop, W, H);
      for (int y = 0; y < H; ++y) {
        for (int x = 0; x < W; ++x) {
          cv::Vec3f& v = n.at<cv::Vec3f>(y, x);
          const float len = static_cast<float>(cv::norm(v));
          v = (len > 0.5f && cc.aux.alpha.at<float>(y, x) > 0.0f) ? v / len : cv::Vec3f(0, 0, 0);
        }
      }
      cc.aux.normals = n;
      cc.aux.source = aux.source;
      cc.loaded = true;
    }
    auto stack = OpenOlatSource(session, *cc.camera);
    if (!stack.ok()) return stack.status();
    if ((*stack)->width() != cc.native.width || (*stack)->height() != cc.native.height) {
      return io::Status::BadInput(
          fmt::format("{}: camera {}: OLAT frames and auxiliary maps differ in size", session.path, cc.camera->id));
    }
    // Draws and weights for all 2B columns (zero columns past count keep the
    // GEMM shape, hence the bits, independent of count).
    std::vector<SampleDraw> draws(B);
    std::vector<Eigen::MatrixXd> weights(
        2 * B, Eigen::MatrixXd::Zero(static_cast<Eigen::Index>(session.rig.lights.size()), 3));
    for (int j = 0; j < B; ++j) {
      const int64_t i = b * B + j;
      if (i >= o.count) continue;
      draws[j] = DrawSample(o, n_envs, i);
      const LightWeights wi = ComputeLightWeights(RotateLatLong(envs[draws[j].env_in].small, draws[j].rot_in),
                                                  session.rig, cells[cc.session]);
      const LightWeights wt = ComputeLightWeights(RotateLatLong(envs[draws[j].env_tgt].small, draws[j].rot_tgt),
                                                  session.rig, cells[cc.session]);
      weights[2 * j] = wi.weights;
      weights[2 * j + 1] = wt.weights;
      sum.max_uncovered_energy_fraction =
          std::max({sum.max_uncovered_energy_fraction, wi.uncovered_energy_fraction, wt.uncovered_energy_fraction});
    }
    const int64_t relit_bytes = int64_t{2} * B * (*stack)->width() * (*stack)->height() * 12;
    const int64_t fixed = relit_bytes + per_sample_out * B;
    RelightOptions ro;
    ro.threads = o.threads;
    ro.mem_budget_bytes = o.mem_budget_bytes - fixed;
    if (ro.mem_budget_bytes < int64_t{kRowsPerChunk} * (*stack)->count() * (*stack)->width() * 24) {
      return io::Status::BadInput(fmt::format(
          "--mem-budget {} MiB is too small: a batch of {} samples needs {} MiB for its images plus bands of frames; "
          "raise --mem-budget or lower --batch",
          o.mem_budget_bytes >> 20, B, fixed >> 20));
    }
    std::vector<cv::Mat> relit;
    const auto t_relight = Clock::now();
    LUMENRIG_RETURN_IF_ERROR(RelightBatch(stack->get(), weights, ro, &relit));
    sum.relight_seconds += std::chrono::duration<double>(Clock::now() - t_relight).count();
    stack->reset();  // close the frames before building the samples

    const int64_t first = std::max(done, b * B), last = std::min(o.count, (b + 1) * B);
    std::vector<SampleOut> outs(static_cast<size_t>(last - first));
    io::ParallelFor(first, last, 1, o.threads, [&](int64_t s0, int64_t s1) {
      for (int64_t i = s0; i < s1; ++i) {
        const int j = static_cast<int>(i - b * B);
        SampleOut& so = outs[static_cast<size_t>(i - first)];
        const SampleDraw& d = draws[j];
        so.draw = d;
        const cv::Mat r_in = CropResize(relit[2 * j], cc.crop, W, H);
        const cv::Mat r_tgt = CropResize(relit[2 * j + 1], cc.crop, W, H);
        so.alpha = cc.aux.alpha;
        so.albedo = cc.aux.albedo;
        so.normals = cc.aux.normals;
        // rotated(d) = map(R^T d): fold the map rotation into camera_from_rig.
        const Eigen::Matrix3d cam_in = cc.camera_from_rig * RotationAboutY(d.rot_in);
        const Eigen::Matrix3d cam_tgt = cc.camera_from_rig * RotationAboutY(d.rot_tgt);
        so.background = RenderBackground(envs[d.env_in].full, cc.background_intrinsics, W, H, cam_in, d.yaw, d.pitch);
        so.input = SimulateCameraResponse(CompositeOver(r_in, so.alpha, so.background), d.cam);
        so.target = cv::Mat::zeros(H, W, CV_32FC3);
        r_tgt.copyTo(so.target, so.alpha > 0.0f);
        std::vector<cv::Mat> spec;
        (void)RenderLightMaps(so.normals, cc.intrinsics, cam_tgt, envs[d.env_tgt].sh, envs[d.env_tgt].spec, &so.diffuse,
                              &spec);
        so.specular.resize(static_cast<size_t>(W) * H * S * 3);
        for (int y = 0; y < H; ++y) {
          for (int x = 0; x < W; ++x) {
            float* dst = so.specular.data() + ((static_cast<size_t>(y) * W + x) * S) * 3;
            for (int s = 0; s < S; ++s) {
              const cv::Vec3f v = spec[s].at<cv::Vec3f>(y, x);
              dst[3 * s] = v[0];
              dst[3 * s + 1] = v[1];
              dst[3 * s + 2] = v[2];
            }
          }
        }
      }
    });
    // The batch's image fields are compressed on all threads first (HDF5
    // would deflate them one after another on this thread), then every field
    // is written in sample order, as before.
    constexpr int kImageFields = 8;
    std::vector<io::H5Writer::FloatSample> packed;
    packed.reserve(static_cast<size_t>((last - first) * kImageFields));
    for (int64_t i = first; i < last; ++i) {
      const SampleOut& so = outs[static_cast<size_t>(i - first)];
      auto add = [&](const char* name, const float* data) {
        io::H5Writer::FloatSample f;
        f.name = std::string("/pairs/") + name;
        f.data = data;
        packed.push_back(std::move(f));
      };
      auto add_image = [&](const char* name, const cv::Mat& m) {
        CV_Assert(m.isContinuous());
        add(name, m.ptr<float>());
      };
      add_image("input", so.input);
      add_image("target", so.target);
      add_image("alpha", so.alpha);
      add_image("albedo", so.albedo);
      add_image("normals", so.normals);
      add_image("background", so.background);
      add_image("light_diffuse", so.diffuse);
      add("light_specular", so.specular.data());
    }
    LUMENRIG_RETURN_IF_ERROR(writer->PackFloatSamples(&packed, o.threads));
    // Write in sample order.
    const std::string subject = session.Id();
    const std::string split = SplitForSubject(subject);
    for (int64_t i = first; i < last; ++i) {
      const SampleOut& so = outs[static_cast<size_t>(i - first)];
      const io::H5Writer::FloatSample* fields = packed.data() + (i - first) * kImageFields;
      auto put = [&](int field) { return writer->AppendFloatSample(fields[field]); };
      const bool abort_now = o.debug_abort_after >= 0 && i == o.debug_abort_after;
      LUMENRIG_RETURN_IF_ERROR(put(0));  // input
      if (abort_now) {
        LUMENRIG_RETURN_IF_ERROR(writer->Flush());
        return io::Status::Internal(fmt::format("stopped after {} complete samples (--debug-abort-after)", i));
      }
      for (int field = 1; field < kImageFields; ++field) LUMENRIG_RETURN_IF_ERROR(put(field));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendStrings("/pairs/subject", {subject}));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendStrings("/pairs/camera", {cc.camera->id}));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendStrings("/pairs/env_name", {envs[so.draw.env_tgt].name}));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendStrings("/pairs/input_env_name", {envs[so.draw.env_in].name}));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendStrings("/pairs/split", {split}));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendDouble("/pairs/rotation_deg", &so.draw.rot_tgt, 1));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendDouble("/pairs/input_rotation_deg", &so.draw.rot_in, 1));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendDouble("/pairs/exposure", &so.draw.cam.exposure, 1));
      LUMENRIG_RETURN_IF_ERROR(writer->AppendInt64("/pairs/sample_index", &i, 1));
      ++sum.samples_written;
    }
    LUMENRIG_RETURN_IF_ERROR(writer->Flush());
  }

  // Split counts over the whole file (sessions map to splits by subject).
  std::vector<std::string> splits;
  LUMENRIG_RETURN_IF_ERROR(writer->ReadStrings("/pairs/split", 0, static_cast<uint64_t>(o.count), &splits));
  for (const auto& s : splits) {
    if (s == "train")
      ++sum.train;
    else if (s == "validation")
      ++sum.validation;
    else
      ++sum.test;
  }
  LUMENRIG_RETURN_IF_ERROR(writer->SetAttribute(
      "/", "split_counts",
      nlohmann::json{{"train", sum.train}, {"validation", sum.validation}, {"test", sum.test}}.dump()));
  LUMENRIG_RETURN_IF_ERROR(writer->Finalize());
  sum.samples_total = o.count;
  sum.seconds = std::chrono::duration<double>(Clock::now() - t_start).count();
  if (summary) *summary = sum;
  return io::Status::Ok();
}

}  // namespace lumenrig::synth
