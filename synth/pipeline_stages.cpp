// Stage adapters of the pipeline: each wraps one stage's library call and
// says which inputs and options its outputs depend on.
#include "pipeline_stages.h"

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <map>
#include <memory>
#include <mutex>

#include <tbb/parallel_pipeline.h>
#include <tbb/task_group.h>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/content_hash.h"
#include "lumenrig/capture_io/hdf5_writer.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/process_stats.h"
#include "lumenrig/solvers/matte_stage.h"
#include "lumenrig/solvers/normals_stage.h"
#include "lumenrig/solvers/session_check.h"
#include "lumenrig/synth/pairs.h"

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
    {"normals", "normals.exr", "normals"},
    {"normals", "albedo.exr", "albedo"},
    {"normals", "confidence.exr", "normals_confidence"},
    {"normals", "depth.exr", "depth"},
    {"matte", "alpha.exr", "alpha"},
    {"matte", "foreground.exr", "foreground"},
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
  // The maps present, in dataset order.
  struct MapItem {
    std::string file, name;
    io::H5Type type;
  };
  std::vector<MapItem> items;
  for (const auto& cam : s.cameras) {
    const std::string cam_dir = Join(ctx.session_out_dir, cam.id);
    for (const auto& m : kCameraMaps) {
      const std::string file = Join(Join(cam_dir, m.stage_dir), m.file);
      if (!fs::exists(file)) continue;
      // Depth keeps float32: half precision is too coarse for metres at range.
      items.push_back({file, "/cameras/" + cam.id + "/" + m.dataset,
                       std::string(m.dataset) == "depth" ? io::H5Type::kFloat32 : io::H5Type::kFloat16});
    }
  }
  // A TBB pipeline: the maps' EXRs are decoded on all threads (a few files
  // at once, in any order), and written in dataset order, each one's chunks
  // deflated on all threads (H5Writer::WriteImage). At most `tokens` decoded
  // maps are held at once; their buffers are reused, as fresh pages for
  // tens of megabytes per map cost more than decoding into warm ones.
  // Deflate level 1: level 4 took 6.5 s of the 2048x2048 two-camera
  // assembly for a file only 6% smaller (measured).
  constexpr int kGzipLevel = 1;
  io::Status status = io::Status::Ok();
  std::mutex pool_mutex;
  std::vector<cv::Mat> pool;  // decoded-map buffers free for reuse
  struct Decoded {
    size_t k = 0;
    io::Status status = io::Status::Ok();
    cv::Mat image;
  };
  const int tokens = std::max(2, io::ResolveThreads(ctx.threads));
  io::RunCapped(ctx.threads, [&] {
    size_t next = 0;
    tbb::parallel_pipeline(
        static_cast<size_t>(tokens),
        tbb::make_filter<void, size_t>(tbb::filter_mode::serial_in_order,
                                       [&](tbb::flow_control& fc) -> size_t {
                                         if (next >= items.size()) {
                                           fc.stop();
                                           return 0;
                                         }
                                         return next++;
                                       }) &
            tbb::make_filter<size_t, std::shared_ptr<Decoded>>(
                tbb::filter_mode::parallel,
                [&](size_t k) {
                  auto d = std::make_shared<Decoded>();
                  d->k = k;
                  auto reader = io::BandReader::Open(items[k].file);
                  if (!reader.ok()) {
                    d->status = reader.status();
                    return d;
                  }
                  const io::ImageInfo& info = (*reader)->info();
                  {
                    std::lock_guard<std::mutex> lock(pool_mutex);
                    for (auto it = pool.begin(); it != pool.end(); ++it) {
                      if (it->rows == info.height && it->cols == info.width && it->channels() == info.channels) {
                        d->image = std::move(*it);
                        pool.erase(it);
                        break;
                      }
                    }
                  }
                  d->status = (*reader)->ReadRows(0, info.height, &d->image);
                  return d;
                }) &
            tbb::make_filter<std::shared_ptr<Decoded>, void>(
                tbb::filter_mode::serial_in_order, [&](const std::shared_ptr<Decoded>& d) {
                  if (!status.ok()) return;
                  const size_t k = d->k;
                  status = [&]() -> io::Status {
                    LUMENRIG_RETURN_IF_ERROR(d->status);
                    LUMENRIG_RETURN_IF_ERROR(w.WriteImage(items[k].name, d->image, items[k].type, kGzipLevel));
                    auto attrs = io::ReadExrAttributes(items[k].file);
                    if (attrs.ok()) {
                      for (const auto& [key, v] : *attrs)
                        if (key.rfind("lumenrig.", 0) == 0)
                          LUMENRIG_RETURN_IF_ERROR(w.SetAttribute(items[k].name, key, v));
                    }
                    if (k == 0) {
                      LUMENRIG_RETURN_IF_ERROR(w.Flush());
                      MaybeKillAt("assemble:mid_write");
                    }
                    return io::Status::Ok();
                  }();
                  std::lock_guard<std::mutex> lock(pool_mutex);
                  pool.push_back(std::move(d->image));
                }));
  });
  LUMENRIG_RETURN_IF_ERROR(status);
  const int written = static_cast<int>(items.size());
  const std::string qa = Join(Join(ctx.session_out_dir, "check"), "check.json");
  if (fs::exists(qa)) {
    std::ifstream in(qa);
    json j = json::parse(in, nullptr, /*allow_exceptions=*/false);
    if (j.is_discarded()) return io::Status::BadInput(qa + ": not valid JSON");
    // The check's wall time is not content: leaving it out keeps the file
    // byte-identical across runs and thread counts.
    j.erase("seconds");
    LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "qa_json", j.dump()));
    if (j.contains("verdict")) LUMENRIG_RETURN_IF_ERROR(w.SetAttribute("/", "qa_verdict", j["verdict"].dump()));
  }
  LUMENRIG_RETURN_IF_ERROR(w.Finalize());
  outputs->push_back(final_path);
  (*extra)["datasets"] = written;
  return io::Status::Ok();
}

std::map<std::string, std::string> Provenance(const StageUnitContext& ctx, const char* stage) {
  return {{"lumenrig.tool", "lumenrig run"},
          {"lumenrig.version", LUMENRIG_VERSION},
          {"lumenrig.session", ctx.session->Id()},
          {"lumenrig.camera", ctx.camera ? ctx.camera->id : ""},
          {"lumenrig.stage", stage}};
}

/// The session file, its rig and (optionally) frames of one camera or all.
std::vector<std::string> SessionFiles(const io::Session& s) { return {s.path, s.rig.path}; }

void AddIf(std::vector<std::string>* files, const std::string& path) {
  if (!path.empty()) files->push_back(path);
}

std::vector<std::string> OlatFiles(const io::Camera& c) {
  std::vector<std::string> f;
  for (const auto& o : c.olat) f.push_back(o.path);
  AddIf(&f, c.dark);
  AddIf(&f, c.mask);
  return f;
}

// ---- check ------------------------------------------------------------------

io::Status CheckOptionsFromRun(const RunOptions& o, solvers::CheckOptions* options) {
  if (o.check_options.empty()) return io::Status::Ok();
  return solvers::SetThresholds(o.check_options, "--check thresholds", options);
}

io::Status WriteCheckOutputs(const StageUnitContext& ctx, const solvers::CheckResult& result,
                             std::vector<std::string>* outputs, json* extra) {
  const std::string dir = Join(ctx.session_out_dir, "check");
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir));
  const std::string json_path = Join(dir, "check.json");
  LUMENRIG_RETURN_IF_ERROR(solvers::WriteCheckJson(result, json_path, /*overwrite=*/true));
  std::string html;
  LUMENRIG_RETURN_IF_ERROR(solvers::WriteCheckReport(result, dir, /*overwrite=*/true, &html));
  outputs->push_back(json_path);
  outputs->push_back(html);
  (*extra)["verdict"] = solvers::VerdictName(result.verdict);
  return io::Status::Ok();
}

io::Status WriteNormalsResult(const StageUnitContext& ctx, const io::Camera& camera, const std::string& unit_dir,
                              solvers::NormalsResult* result, std::vector<std::string>* outputs, json* extra);
io::Status NormalsOptionsFromRun(const RunOptions& o, solvers::NormalsOptions* options);

io::Status RunCheck(const StageUnitContext& ctx, std::vector<std::string>* outputs, json* extra) {
  solvers::CheckOptions options;
  LUMENRIG_RETURN_IF_ERROR(CheckOptionsFromRun(*ctx.options, &options));
  if (ctx.progress)
    options.progress = [&ctx](int done, int total) { ctx.progress(total > 0 ? double(done) / total : 0.0); };
  auto check = solvers::StreamedCheck::Begin(*ctx.session, options, ctx.threads);
  if (!check.ok()) return check.status();
  // Normals due to run for this session are solved here, each camera's OLAT
  // frames decoded once and streamed to both the solve and the check; their
  // outputs are kept only if the verdict lets later stages run (the executor
  // removes them otherwise). A camera whose solve fails is left to its own
  // unit, which reports the error; the check reads its frames itself.
  //
  // Each camera's depth integration and output writes (overlapping each
  // other) run as a task while the next camera's frames are read, when the
  // unit's budget holds both; otherwise the next camera waits.
  if (ctx.fused_normals != nullptr) {
    std::vector<FusedNormalsUnit>& units = *ctx.fused_normals;
    tbb::task_group finishing;
    int pending = -1;           // unit whose finishing task may still run
    int64_t pending_bytes = 0;  // what that task holds
    auto wait_pending = [&]() {
      if (pending < 0) return;
      finishing.wait();
      MaybeKillAt(
          fmt::format("fused:normals:{}:{}", ctx.session->Id(), units[static_cast<size_t>(pending)].camera->id));
      pending = -1;
      pending_bytes = 0;
    };
    solvers::NormalsOptions base;
    LUMENRIG_RETURN_IF_ERROR(NormalsOptionsFromRun(*ctx.options, &base));
    const auto t0 = std::chrono::steady_clock::now();
    const double c0 = io::ProcessCpuSeconds();
    for (FusedNormalsUnit& unit : units) {
      solvers::NormalsOptions nopt = base;
      nopt.observer_bytes = (*check)->StreamBytes(unit.camera_index);
      solvers::StreamedCheck* sink = check->get();
      const int ci = unit.camera_index;
      nopt.on_decoded_rows = [sink, ci](int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows) {
        sink->Rows(ci, frame, info, y0, y1, rows);
      };
      auto result = std::make_shared<solvers::NormalsResult>();
      io::Status st = io::Status::BadInput("not run");
      if (pending >= 0 && ctx.mem_budget_bytes - pending_bytes > 0) {
        // Overlap with the previous camera's depth when the budget left holds
        // this camera's plan (the stage refuses before reading otherwise).
        nopt.mem_budget_bytes = ctx.mem_budget_bytes - pending_bytes;
        st = solvers::SolveNormals(*ctx.session, unit.camera->id, nopt, result.get(), ctx.threads);
      }
      if (!st.ok()) {
        wait_pending();
        *result = solvers::NormalsResult();
        nopt.mem_budget_bytes = ctx.mem_budget_bytes;
        st = solvers::SolveNormals(*ctx.session, unit.camera->id, nopt, result.get(), ctx.threads);
      }
      wait_pending();
      unit.outputs.clear();
      unit.extra = json::object();
      unit.done = false;
      if (!st.ok()) continue;  // left to the camera's own unit, which reports the error
      pending = static_cast<int>(&unit - units.data());
      pending_bytes = result->depth_bytes;
      finishing.run([&ctx, &unit, result]() {
        unit.done = WriteNormalsResult(ctx, *unit.camera, unit.unit_dir, result.get(), &unit.outputs, &unit.extra).ok();
      });
    }
    wait_pending();
    // The solves' time (reading, shared with the check's statistics, solving,
    // depth, writes) is booked to the normals stage, shared by camera.
    const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    const double cpu = io::ProcessCpuSeconds() - c0;
    for (auto& unit : units) {
      unit.wall_s = wall / static_cast<double>(units.size());
      unit.cpu_s = cpu / static_cast<double>(units.size());
    }
  }
  solvers::CheckResult result;
  LUMENRIG_RETURN_IF_ERROR((*check)->Finish(&result));
  return WriteCheckOutputs(ctx, result, outputs, extra);
}

// ---- normals ----------------------------------------------------------------

io::Status NormalsOptionsFromRun(const RunOptions& o, solvers::NormalsOptions* options) {
  const std::string method = o.normals_options.value("method", "robust");
  auto m = solvers::ParsePsMethod(method);
  if (!m.ok()) return m.status();
  options->ps.method = *m;
  // The depth is integrated while the maps are written (WriteNormalsResult).
  options->defer_depth = true;
  return io::Status::Ok();
}

/// Writes a camera's normals outputs; a deferred depth is integrated while
/// the maps are written (solvers::FinishNormalsOutputs).
io::Status WriteNormalsResult(const StageUnitContext& ctx, const io::Camera& camera, const std::string& unit_dir,
                              solvers::NormalsResult* result, std::vector<std::string>* outputs, json* extra) {
  const std::string dir = Join(unit_dir, "normals");
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir));
  StageUnitContext camera_ctx = ctx;
  camera_ctx.camera = &camera;
  LUMENRIG_RETURN_IF_ERROR(solvers::FinishNormalsOutputs(result, dir, Provenance(camera_ctx, "normals"),
                                                         /*overwrite=*/true, ctx.threads));
  for (const auto& name : solvers::NormalsOutputNames(*result)) outputs->push_back(Join(dir, name));
  (*extra)["bands"] = result->bands;
  (*extra)["band_rows"] = result->band_rows;
  return io::Status::Ok();
}

io::Status RunNormalsInto(const StageUnitContext& ctx, const io::Camera& camera, const std::string& unit_dir,
                          const solvers::NormalsOptions& options, std::vector<std::string>* outputs, json* extra) {
  solvers::NormalsResult result;
  LUMENRIG_RETURN_IF_ERROR(solvers::SolveNormals(*ctx.session, camera.id, options, &result, ctx.threads));
  return WriteNormalsResult(ctx, camera, unit_dir, &result, outputs, extra);
}

io::Status RunNormals(const StageUnitContext& ctx, std::vector<std::string>* outputs, json* extra) {
  solvers::NormalsOptions options;
  LUMENRIG_RETURN_IF_ERROR(NormalsOptionsFromRun(*ctx.options, &options));
  options.mem_budget_bytes = ctx.mem_budget_bytes;
  return RunNormalsInto(ctx, *ctx.camera, ctx.unit_dir, options, outputs, extra);
}

// ---- matte ------------------------------------------------------------------

std::vector<std::string> MatteFiles(const io::Camera& c) {
  std::vector<std::string> f;
  for (const std::string* p : {&c.clean_plate, &c.backlit, &c.lit, &c.dark, &c.mask}) AddIf(&f, *p);
  for (const auto& mp : c.matte_pairs) {
    f.push_back(mp.plate);
    f.push_back(mp.frame);
  }
  return f;
}

io::Status RunMatte(const StageUnitContext& ctx, std::vector<std::string>* outputs, json* extra) {
  solvers::MatteOptions options;
  LUMENRIG_RETURN_IF_ERROR(solvers::MatteOptionsFromJson(ctx.options->matte_options, "--matte options", &options));
  solvers::MatteResult result;
  LUMENRIG_RETURN_IF_ERROR(solvers::ComputeMatte(*ctx.session, ctx.camera->id, options, &result, ctx.threads));
  const std::string dir = Join(ctx.unit_dir, "matte");
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir));
  LUMENRIG_RETURN_IF_ERROR(solvers::WriteMatteOutputs(result, *ctx.session, dir, /*force=*/true, ctx.threads));
  for (const auto& f : solvers::MatteOutputFiles(result, dir)) outputs->push_back(f);
  (*extra)["method"] = solvers::MatteMethodName(result.method);
  return io::Status::Ok();
}

// ---- pairs ------------------------------------------------------------------

/// Auxiliary targets from this run's own normals and matte outputs.
synth::AuxSource PipelineAuxSource(const std::string& session_out_dir) {
  return [session_out_dir](const io::Session&, const io::Camera& camera, AuxMaps* out) -> io::Status {
    const std::string cam_dir = Join(session_out_dir, camera.id);
    auto normals = io::ReadImage(Join(Join(cam_dir, "normals"), "normals.exr"));
    if (!normals.ok()) return normals.status();
    auto albedo = io::ReadImage(Join(Join(cam_dir, "normals"), "albedo.exr"));
    if (!albedo.ok()) return albedo.status();
    auto alpha = io::ReadImage(Join(Join(cam_dir, "matte"), "alpha.exr"));
    if (!alpha.ok()) return alpha.status();
    out->normals = std::move(normals).value();
    out->albedo = std::move(albedo).value();
    out->alpha = std::move(alpha).value();
    out->source = "lumenrig run: " + cam_dir;
    return io::Status::Ok();
  };
}

io::Status PairsOptionsFromRun(const RunOptions& o, synth::PairsOptions* p) {
  p->envs_dir = o.envs_dir;
  p->count = o.pairs_options.value("count", int64_t{16});
  p->seed = o.pairs_options.value("seed", uint64_t{1});
  const std::string size = o.pairs_options.value("size", std::string("256x256"));
  if (std::sscanf(size.c_str(), "%dx%d", &p->width, &p->height) != 2 || p->width <= 0 || p->height <= 0)
    return io::Status::BadInput(fmt::format("--size: \"{}\" is not WxH", size));
  return io::Status::Ok();
}

std::vector<std::string> EnvFiles(const std::string& dir) {
  std::vector<std::string> files;
  std::error_code ec;
  for (const auto& e : fs::directory_iterator(dir, ec)) {
    const auto f = io::FormatFromPath(e.path().string());
    if (f == io::FileFormat::kExr || f == io::FileFormat::kHdr) files.push_back(e.path().string());
  }
  std::sort(files.begin(), files.end());
  return files;
}

io::Status RunPairs(const StageUnitContext& ctx, std::vector<std::string>* outputs, json* extra) {
  synth::PairsOptions p;
  LUMENRIG_RETURN_IF_ERROR(PairsOptionsFromRun(*ctx.options, &p));
  p.sessions = {ctx.session->path};
  p.out = Join(ctx.final_dir, ctx.session->Id() + ".pairs.h5");
  p.threads = ctx.threads;
  p.mem_budget_bytes = ctx.mem_budget_bytes;
  p.aux_source = PipelineAuxSource(ctx.session_out_dir);
  // Resume an interrupted pairs file only when it was started for this very
  // unit (same key, recorded beside it); otherwise start afresh.
  const std::string partial = io::H5Writer::TempPathFor(p.out);
  const std::string key_file = partial + ".key";
  const std::string key = io::HashHex(ctx.unit_key);
  std::ifstream key_in(key_file);
  std::string started_key;
  key_in >> started_key;
  if (fs::exists(partial) && started_key == key) {
    p.resume = true;
  } else {
    p.force = true;
    LUMENRIG_RETURN_IF_ERROR(io::WriteTextFile(key_file, key, /*overwrite=*/true));
  }
  synth::PairsSummary summary;
  LUMENRIG_RETURN_IF_ERROR(synth::WritePairs(p, &summary));
  std::error_code ec;
  fs::remove(key_file, ec);
  outputs->push_back(p.out);
  (*extra)["samples"] = summary.samples_total;
  (*extra)["resumed_from"] = summary.resumed_from;
  return io::Status::Ok();
}

}  // namespace

const std::vector<StageAdapter>& StageAdapters() {
  static const std::vector<StageAdapter> adapters = [] {
    std::vector<StageAdapter> a;

    StageAdapter check;
    check.kind = StageKind::kCheck;
    check.options_slice = [](const RunOptions& o) { return o.check_options; };
    check.input_files = [](const RunOptions&, const io::Session& s, const io::Camera*) {
      std::vector<std::string> f = SessionFiles(s);
      for (const auto& c : s.cameras) {
        for (const auto& x : OlatFiles(c)) f.push_back(x);
        for (const auto& x : MatteFiles(c)) f.push_back(x);
        for (const auto& t : c.tracking) f.push_back(t.path);
      }
      return f;
    };
    check.run = RunCheck;
    check.blocks_downstream = [](const json& extra) { return extra.value("verdict", "") == "FAIL"; };
    a.push_back(check);

    StageAdapter normals;
    normals.kind = StageKind::kNormals;
    normals.per_camera = true;
    normals.order_upstream = {StageKind::kCheck};
    normals.options_slice = [](const RunOptions& o) { return o.normals_options; };
    normals.input_files = [](const RunOptions&, const io::Session& s, const io::Camera* c) {
      std::vector<std::string> f = SessionFiles(s);
      for (const auto& x : OlatFiles(*c)) f.push_back(x);
      return f;
    };
    normals.run = RunNormals;
    a.push_back(normals);

    StageAdapter matte;
    matte.kind = StageKind::kMatte;
    matte.per_camera = true;
    matte.order_upstream = {StageKind::kCheck};
    matte.options_slice = [](const RunOptions& o) { return o.matte_options; };
    matte.input_files = [](const RunOptions&, const io::Session& s, const io::Camera* c) {
      std::vector<std::string> f = SessionFiles(s);
      for (const auto& x : MatteFiles(*c)) f.push_back(x);
      return f;
    };
    matte.run = RunMatte;
    a.push_back(matte);

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

    StageAdapter pairs;
    pairs.kind = StageKind::kPairs;
    pairs.key_upstream = {StageKind::kAssemble};
    pairs.options_slice = [](const RunOptions& o) { return o.pairs_options; };
    pairs.input_files = [](const RunOptions& o, const io::Session& s, const io::Camera*) {
      std::vector<std::string> f = SessionFiles(s);
      for (const auto& c : s.cameras)
        for (const auto& x : c.olat) f.push_back(x.path);
      for (const auto& e : EnvFiles(o.envs_dir)) f.push_back(e);
      return f;
    };
    pairs.run = RunPairs;
    a.push_back(pairs);
    return a;
  }();
  return adapters;
}

}  // namespace lumenrig::synth::internal
