#include "lumenrig/solvers/normals_stage.h"

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <functional>
#include <memory>
#include <new>

#include <sys/mman.h>

#include <ImfThreading.h>
#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/process_stats.h"
#include "poisson_multigrid.h"

namespace lumenrig::solvers {
namespace {

namespace fs = std::filesystem;
using Clock = std::chrono::steady_clock;

// Pixels per solve task (fixed: output independent of threads). A half
// stack's tile is widened to float in a per-thread scratch of lights x tile
// pixels x channels floats: 256 pixels keep a 156-light RGB tile (480 KiB)
// in a core's L2, where the widening writes it and the solve reads it.
constexpr int64_t kTilePixels = 2048;
constexpr int64_t kHalfTilePixels = 256;
constexpr int64_t kBaselineBytes = 64ll << 20;      // libraries, code, allocator slack
constexpr int64_t kIntegrationBytesPerPixel = 160;  // FC on the 2H x 2W mirror (float complex)
// Masked Poisson by sparse Cholesky, per unknown (mask pixel), with its
// fill-in (measured: about 0.65 GB for a 1.05M-pixel mask; the direct solve
// now runs only up to IntegrationOptions::direct_solver_max_pixels).
constexpr int64_t kLdltBytesPerUnknown = 650;
constexpr int64_t kMaxBandBytes = int64_t{128} << 20;  // band stack cap (see the plan)
constexpr int kPreviewMaxSide = 1024;                  // longest preview panel side, pixels

/// The band stack: 2 MiB aligned, advised for transparent huge pages (Linux).
float* AllocateBand(size_t floats) {
  constexpr size_t kHuge = size_t{2} << 20;
  const size_t bytes = (floats * sizeof(float) + kHuge - 1) / kHuge * kHuge;
  void* p = nullptr;
  if (posix_memalign(&p, kHuge, bytes) != 0) return nullptr;
#ifdef MADV_HUGEPAGE
  madvise(p, bytes, MADV_HUGEPAGE);  // advice only: failure leaves 4 KiB pages
#endif
  return static_cast<float*>(p);
}
struct BandFree {
  void operator()(float* p) const { free(p); }
};

double Seconds(Clock::time_point a, Clock::time_point b) { return std::chrono::duration<double>(b - a).count(); }

std::string Mib(int64_t bytes) { return fmt::format("{:.0f} MiB", bytes / 1048576.0); }

/// Pixel ray r = ((u + 0.5 - cx)/fx, -(v + 0.5 - cy)/fy, -1): X = depth * r.
void PointsFromDepth(const cv::Mat& depth, cv::Size size, const io::Intrinsics& k, double fallback_depth_m,
                     cv::Mat* points) {
  points->create(size, CV_32FC3);
  for (int v = 0; v < size.height; ++v) {
    const float* d = depth.empty() ? nullptr : depth.ptr<float>(v);
    cv::Vec3f* p = points->ptr<cv::Vec3f>(v);
    for (int u = 0; u < size.width; ++u) {
      const double z = (d && d[u] > 0) ? d[u] : fallback_depth_m;
      p[u] = cv::Vec3f(static_cast<float>(z * (u + 0.5 - k.cx) / k.fx),
                       static_cast<float>(-z * (v + 0.5 - k.cy) / k.fy), static_cast<float>(-z));
    }
  }
}

double MeanChangeDeg(const cv::Mat& a, const cv::Mat& b, const cv::Mat& conf_a, const cv::Mat& conf_b) {
  double sum = 0;
  int64_t n = 0;
  for (int v = 0; v < a.rows; ++v) {
    const cv::Vec3f* pa = a.ptr<cv::Vec3f>(v);
    const cv::Vec3f* pb = b.ptr<cv::Vec3f>(v);
    const float* ca = conf_a.ptr<float>(v);
    const float* cb = conf_b.ptr<float>(v);
    for (int u = 0; u < a.cols; ++u) {
      if (!(ca[u] > 0) || !(cb[u] > 0)) continue;
      sum += AngleDeg({pa[u][0], pa[u][1], pa[u][2]}, {pb[u][0], pb[u][1], pb[u][2]});
      ++n;
    }
  }
  return n > 0 ? sum / n : 0.0;
}

}  // namespace

io::Status ValidateNormalsOptions(const NormalsOptions& o) {
  LUMENRIG_RETURN_IF_ERROR(ValidatePsOptions(o.ps));
  if (o.mem_budget_bytes <= 0)
    return io::Status::BadInput(fmt::format("--mem-budget: must be positive (got {})", o.mem_budget_bytes));
  if (!(o.reference_depth_m >= 0))
    return io::Status::BadInput(fmt::format("reference depth: must be >= 0 metres (got {})", o.reference_depth_m));
  if (!(o.near_field_tolerance_deg > 0) || o.near_field_max_iterations < 1)
    return io::Status::BadInput("near-field iteration: tolerance must be > 0 and iterations >= 1");
  return io::Status::Ok();
}

io::Status SolveNormals(const io::Session& session, const std::string& camera_id, const NormalsOptions& options,
                        NormalsResult* out, int threads) {
  LUMENRIG_RETURN_IF_ERROR(ValidateNormalsOptions(options));
  const std::string& where = session.path.empty() ? std::string("session.json") : session.path;
  if (session.cameras.empty()) return io::Status::BadInput(fmt::format("{}: cameras: no camera", where));
  int ci = 0;
  if (!camera_id.empty()) {
    ci = -1;
    for (size_t i = 0; i < session.cameras.size(); ++i)
      if (session.cameras[i].id == camera_id) ci = static_cast<int>(i);
    if (ci < 0) return io::Status::BadInput(fmt::format("{}: cameras: no camera with id '{}'", where, camera_id));
  }
  const io::Camera& cam = session.cameras[static_cast<size_t>(ci)];
  const std::string key = fmt::format("cameras[{}]", ci);
  const int n = static_cast<int>(cam.olat.size());
  if (n < 3)
    return io::Status::BadInput(
        fmt::format("{}: {}.olat: {} frame(s); photometric stereo needs at least 3 lights", where, key, n));

  // Lights in the camera frame.
  const std::string rig_where = session.rig.path.empty() ? std::string("rig.json") : session.rig.path;
  std::vector<const io::Light*> lights;
  bool any_position = false, any_direction = false;
  for (const auto& f : cam.olat) {
    const int idx = session.rig.IndexOfId(f.light);
    if (idx < 0) return io::Status::BadInput(fmt::format("{}: {}.olat: unknown light id {}", where, key, f.light));
    lights.push_back(&session.rig.lights[static_cast<size_t>(idx)]);
    any_position |= lights.back()->position.has_value();
    any_direction |= lights.back()->direction.has_value();
  }
  if (any_position && any_direction)
    return io::Status::BadInput(fmt::format(
        "{}: lights: the lights of {} mix direction and position; the normals stage needs one kind", rig_where, key));
  const bool near = any_position;
  if (near && !cam.intrinsics)
    return io::Status::BadInput(
        fmt::format("{}: {}.intrinsics: required for near-field lights (the rig gives light positions)", where, key));
  double reference_depth_m = options.reference_depth_m;
  if (reference_depth_m <= 0 && cam.has_camera_from_rig)
    reference_depth_m = cam.camera_from_rig.block<3, 1>(0, 3).norm();
  if (near && !(reference_depth_m > 0))
    return io::Status::BadInput(fmt::format(
        "{}: {}.camera_from_rig: required for near-field lights (it places the subject at a reference depth)", where,
        key));
  BlockLights block_lights;
  if (near) {
    block_lights.positions_m.resize(n, 3);
    for (int i = 0; i < n; ++i) {
      const Eigen::Vector4d p(lights[i]->position->x(), lights[i]->position->y(), lights[i]->position->z(), 1.0);
      block_lights.positions_m.row(i) = (cam.camera_from_rig * p).head<3>().cast<float>().transpose();
    }
  } else {
    block_lights.directions.resize(n, 3);
    for (int i = 0; i < n; ++i)
      block_lights.directions.row(i) = io::LightDirectionInCamera(*lights[i], cam).cast<float>().transpose();
  }
  auto solver = PsSolver::Create(block_lights, options.ps);
  if (!solver.ok()) return solver.status().WithPrefix(fmt::format("{}: lights of {}", rig_where, key));
  // Coplanarity of near-field lights: check the directions from the subject centre.
  if (near) {
    BlockLights from_centre;
    from_centre.directions.resize(n, 3);
    const Eigen::Vector3f centre(0, 0, static_cast<float>(-reference_depth_m));
    for (int i = 0; i < n; ++i)
      from_centre.directions.row(i) = (block_lights.positions_m.row(i).transpose() - centre).normalized().transpose();
    auto check = PsSolver::Create(from_centre, options.ps);
    if (!check.ok()) return check.status().WithPrefix(fmt::format("{}: lights of {}", rig_where, key));
  }

  // Frame geometry from the first frame; readers stay open for block-based
  // formats (OpenEXR) and are reopened per band for whole-image formats.
  const io::DecodeOptions decode = io::DecodeOptionsFor(session);
  auto first = io::BandReader::Open(cam.olat[0].path, decode);
  if (!first.ok()) return first.status();
  const io::ImageInfo info = (*first)->info();
  const int width = info.width, height = info.height, channels = info.channels;
  const bool keep_open = info.lines_per_block < height;
  std::vector<std::unique_ptr<io::BandReader>> readers(static_cast<size_t>(n));
  if (keep_open) {
    readers[0] = std::move(first).value();
    for (int i = 1; i < n; ++i) {
      auto r = io::BandReader::Open(cam.olat[static_cast<size_t>(i)].path, decode);
      if (!r.ok()) return r.status();
      const io::ImageInfo& fi = (*r)->info();
      if (fi.width != width || fi.height != height || fi.channels != channels)
        return io::Status::BadInput(fmt::format("{}: {}x{} with {} channel(s), but {} is {}x{} with {}",
                                                cam.olat[static_cast<size_t>(i)].path, fi.width, fi.height, fi.channels,
                                                cam.olat[0].path, width, height, channels));
      readers[static_cast<size_t>(i)] = std::move(r).value();
    }
  } else {
    first = io::Status::Ok();  // release the decoded frame
  }

  cv::Mat mask;
  if (!cam.mask.empty()) {
    auto m = io::ReadImage(cam.mask, {});
    if (!m.ok()) return m.status();
    if (m->cols != width || m->rows != height)
      return io::Status::BadInput(
          fmt::format("{}: mask is {}x{}, frames are {}x{}", cam.mask, m->cols, m->rows, width, height));
    cv::Mat first_channel;
    cv::extractChannel(*m, first_channel, 0);
    mask = first_channel > 0.0f;
  }
  std::unique_ptr<io::BandReader> dark_reader;
  if (!cam.dark.empty()) {
    auto r = io::BandReader::Open(cam.dark, decode);
    if (!r.ok()) return r.status();
    if ((*r)->info().width != width || (*r)->info().height != height || (*r)->info().channels != channels)
      return io::Status::BadInput(fmt::format("{}: dark frame size or channels differ from the OLAT frames", cam.dark));
    dark_reader = std::move(r).value();
  }

  // Memory plan (bytes). Band height depends on the budget and the view only,
  // never on the thread count.
  const int64_t px = static_cast<int64_t>(width) * height;
  // The band stack keeps the stored half floats when every frame stores half
  // (OpenEXR) and decoding is linear: half the bytes to write while decoding
  // and to read while solving. Each solve tile then widens its rows to float,
  // subtracts the black level and normalises them in a per-thread scratch;
  // that gives the very floats of decoding to float first (half to float is
  // exact, and the arithmetic is the same), so the outputs do not change.
  bool half_stack = keep_open && decode.encoding == io::Encoding::kLinear;
  for (const auto& r : readers) half_stack = half_stack && r != nullptr && r->StoresHalf();
  const int64_t elem_bytes = half_stack ? 2 : 4;
  const int64_t tile_px = half_stack ? kHalfTilePixels : kTilePixels;
  const int64_t tile_bytes = tile_px * channels * 4 * static_cast<int64_t>(n);
  const int64_t fixed = kBaselineBytes + px * (7 * 4 + 1 + (near ? 12 + 12 : 0)) +
                        std::max<int64_t>(0, options.observer_bytes) +
                        (half_stack ? static_cast<int64_t>(io::ResolveThreads(0)) * tile_bytes : 0);
  const int64_t lpb = std::max(1, std::min(info.lines_per_block, height));
  const int64_t reader_bytes = keep_open ? static_cast<int64_t>(n) * (4 * lpb * width * channels * 2 + (64 << 10))
                                         : static_cast<int64_t>(io::ResolveThreads(0)) * px * channels * 6;
  const int64_t row_bytes = static_cast<int64_t>(n) * width * channels * elem_bytes +
                            (dark_reader ? static_cast<int64_t>(width) * channels * 4 : 0);
  // Depth: Frankot-Chellappa over the frame without a mask; with one, masked
  // Poisson, by sparse Cholesky up to IntegrationOptions'
  // direct_solver_max_pixels mask pixels, multigrid-preconditioned conjugate
  // gradients above.
  // The choice depends on the mask only (never on the budget, which must not
  // change outputs); a budget too small for it is refused below.
  const int64_t mask_px = mask.empty() ? px : cv::countNonZero(mask);
  const bool poisson = mask_px < px;
  const int64_t direct_max_px = IntegrationOptions{}.direct_solver_max_pixels;
  int64_t integrate_bytes = 0;
  if (options.integrate_depth) {
    if (!poisson) {
      integrate_bytes = fixed + px * kIntegrationBytesPerPixel;
    } else {
      integrate_bytes = fixed + (mask_px <= direct_max_px ? mask_px * kLdltBytesPerUnknown
                                                          : internal::MultigridPlanBytes(mask_px, px));
    }
  }
  // 10% of what is left is kept as slack for allocator and library overheads.
  const int64_t band_budget = (options.mem_budget_bytes - fixed - reader_bytes) / 10 * 9;
  int64_t rows = band_budget > 0 ? band_budget / row_bytes : 0;
  // Bands larger than this gain nothing (per-band costs are small) and read
  // slower: 912-row bands of a 2048x2048 156-light view (4G budget) took
  // 21 s of reading CPU against 15 s for 160-row bands; with the half stack,
  // 32- and 64-row bands read and solved in 17.4-17.6 s of CPU, 128-row in
  // 18.1 s.
  rows = std::min(rows, std::max<int64_t>(lpb, kMaxBandBytes / row_bytes));
  if (keep_open) rows = rows / lpb * lpb;
  rows = std::min<int64_t>(rows, height);
  const int64_t min_rows = keep_open ? lpb : height;
  const int64_t needed = std::max(fixed + reader_bytes + min_rows * row_bytes, integrate_bytes);
  if (rows < min_rows || options.mem_budget_bytes < integrate_bytes)
    return io::Status::BadInput(
        fmt::format("--mem-budget {}: too small for {} frames of {}x{} ({} channel(s)); this view needs at least {}",
                    Mib(options.mem_budget_bytes), n, width, height, channels, Mib(needed)));
  out->band_rows = static_cast<int>(rows);
  out->bands = static_cast<int>((height + rows - 1) / rows);
  out->planned_bytes = std::max(fixed + reader_bytes + rows * row_bytes, integrate_bytes);

  out->session_id = session.Id();
  out->camera_id = cam.id;
  out->method = options.ps.method;
  out->near_field = near;
  out->lights = n;
  out->mask = mask;
  out->normals.create(height, width, CV_32FC3);
  out->albedo.create(height, width, CV_32FC3);
  out->confidence.create(height, width, CV_32FC1);
  out->all_zero_lights.clear();

  const int64_t slot = rows * width * channels;  // elements per frame
  // Left uninitialised: every element the solve reads is written by a band
  // reader first, and zero-filling a multi-GiB stack is a pass over memory.
  // Asked for on 2 MiB transparent huge pages where the kernel offers them:
  // a GiB-sized stack on 4 KiB pages costs hundreds of thousands of page
  // faults on first touch (measured: about a tenth of the reading time).
  std::unique_ptr<float[], BandFree> band(AllocateBand(static_cast<size_t>((slot * n * elem_bytes + 3) / 4)));
  if (!band) return io::Status::Internal(fmt::format("cannot allocate the {} band buffer", Mib(slot * n * elem_bytes)));
  char* const band_bytes = reinterpret_cast<char*>(band.get());
  cv::Mat dark_band;
  std::vector<float> frame_max(static_cast<size_t>(n), 0.0f);
  const int nthreads = io::ResolveThreads(threads);
  std::vector<std::vector<float>> scratch(static_cast<size_t>(nthreads));
  // Half stack: per thread, one solve tile of every frame in float, the
  // largest normalised magnitude per frame, and a chunk widened for the
  // decoded-rows observer.
  std::vector<std::vector<float>> tiles(half_stack ? static_cast<size_t>(nthreads) : 0);
  std::vector<std::vector<float>> tile_max(half_stack ? static_cast<size_t>(nthreads) : 0,
                                           std::vector<float>(static_cast<size_t>(n), 0.0f));
  std::vector<cv::Mat> widened(half_stack ? static_cast<size_t>(nthreads) : 0);
  std::vector<io::Status> errors(static_cast<size_t>(n));

  cv::Mat points, previous_normals, previous_confidence;
  if (near) PointsFromDepth(cv::Mat(), cv::Size(width, height), *cam.intrinsics, reference_depth_m, &points);
  const bool single_band = rows >= height;
  // Rows decoded per reader call: whole line blocks, about 16 rows (a
  // 2048-pixel RGB float chunk of 16 rows is 384 KiB, within a core's L2).
  const int chunk_rows = static_cast<int>(lpb * std::max<int64_t>(1, 16 / lpb));
  const int iterations = near ? options.near_field_max_iterations : 1;
  out->read_seconds = out->solve_seconds = out->integrate_seconds = 0;
  out->read_cpu_seconds = out->solve_cpu_seconds = 0;

  for (int iter = 0; iter < iterations; ++iter) {
    for (int y0 = 0; y0 < height; y0 += static_cast<int>(rows)) {
      const int y1 = std::min(height, y0 + static_cast<int>(rows));
      const int band_rows = y1 - y0;
      // 1. Read and normalise every frame's rows [y0, y1).
      if (iter == 0 || !single_band) {
        const auto t0 = Clock::now();
        const double c0 = io::ProcessCpuSeconds();
        if (dark_reader) LUMENRIG_RETURN_IF_ERROR(dark_reader->ReadRows(y0, y1, &dark_band));
        io::ParallelFor(0, n, 1, nthreads, [&](int64_t b, int64_t e) {
          for (int64_t i = b; i < e; ++i) {
            const auto& frame = cam.olat[static_cast<size_t>(i)];
            char* dst = band_bytes + i * slot * elem_bytes;
            io::BandReader* reader = keep_open ? readers[static_cast<size_t>(i)].get() : nullptr;
            std::unique_ptr<io::BandReader> reopened;
            io::Status s;
            if (!keep_open) {
              auto r = io::BandReader::Open(frame.path, decode);
              if (!r.ok()) {
                s = r.status();
              } else if ((*r)->info().width != width || (*r)->info().height != height ||
                         (*r)->info().channels != channels) {
                s = io::Status::BadInput(fmt::format("{}: {}x{} with {} channel(s), but {} is {}x{} with {}",
                                                     frame.path, (*r)->info().width, (*r)->info().height,
                                                     (*r)->info().channels, cam.olat[0].path, width, height, channels));
              } else {
                reopened = std::move(r).value();
                reader = reopened.get();
              }
            }
            // Decoded (and, for a float stack, normalised) a few line blocks
            // at a time, so the normalisation finds the rows still in cache
            // instead of making a second pass over the band in memory.
            float largest = 0.0f;
            for (int ys = y0; s.ok() && ys < y1; ys += chunk_rows) {
              const int ye = std::min(y1, ys + chunk_rows);
              char* chunk_dst = dst + static_cast<int64_t>(ys - y0) * width * channels * elem_bytes;
              cv::Mat view(ye - ys, width, CV_MAKETYPE(half_stack ? CV_16F : CV_32F, channels), chunk_dst);
              s = half_stack ? reader->ReadRowsHalf(ys, ye, &view) : reader->ReadRows(ys, ye, &view);
              if (s.ok() && view.data != reinterpret_cast<uchar*>(chunk_dst))
                s = io::Status::Internal(fmt::format("{}: band reader reallocated the band buffer", frame.path));
              if (!s.ok()) break;
              if (half_stack) {
                // The observer sees what ReadRows gives: floats, black level off.
                if (iter == 0 && options.on_decoded_rows) {
                  cv::Mat& wide = widened[static_cast<size_t>(io::CurrentThreadIndex())];
                  view.convertTo(wide, CV_32F);
                  io::ApplyDecodeOptions(decode, &wide);
                  options.on_decoded_rows(static_cast<int>(i), reader->info(), ys, ye, wide);
                }
                continue;  // normalised tile by tile in the solve
              }
              if (iter == 0 && options.on_decoded_rows)
                options.on_decoded_rows(static_cast<int>(i), keep_open ? reader->info() : info, ys, ye, view);
              const cv::Mat dark_rows = dark_band.empty() ? cv::Mat() : dark_band.rowRange(ys - y0, ye - y0);
              largest = std::max(largest, NormalizeFrame(&view, dark_rows, lights[static_cast<size_t>(i)]->intensity));
            }
            if (!s.ok()) {
              errors[static_cast<size_t>(i)] = s;
              continue;
            }
            frame_max[static_cast<size_t>(i)] = std::max(frame_max[static_cast<size_t>(i)], largest);
          }
        });
        for (const auto& s : errors) LUMENRIG_RETURN_IF_ERROR(s);
        out->read_seconds += Seconds(t0, Clock::now());
        out->read_cpu_seconds += io::ProcessCpuSeconds() - c0;
      }
      // 2. Solve the band in fixed tiles of pixels.
      const auto t1 = Clock::now();
      const double c1 = io::ProcessCpuSeconds();
      const int64_t band_px = static_cast<int64_t>(band_rows) * width;
      const int64_t offset = static_cast<int64_t>(y0) * width;
      io::ParallelFor(0, band_px, tile_px, nthreads, [&](int64_t b, int64_t e) {
        BlockInput in;
        const size_t t = static_cast<size_t>(io::CurrentThreadIndex());
        if (half_stack) {
          // Widen this tile of every frame to float and normalise it.
          std::vector<float>& tile = tiles[t];
          tile.resize(static_cast<size_t>(n * tile_px * channels));
          const int count = static_cast<int>(e - b);
          const cv::Mat dark_tile = dark_band.empty() ? cv::Mat()
                                                      : cv::Mat(1, count, CV_MAKETYPE(CV_32F, channels),
                                                                dark_band.ptr<float>() + b * channels);
          for (int i = 0; i < n; ++i) {
            const cv::Mat stored(1, count * channels, CV_16F, band_bytes + (i * slot + b * channels) * 2);
            float* wide = tile.data() + static_cast<int64_t>(i) * tile_px * channels;
            cv::Mat flat(1, count * channels, CV_32F, wide);
            stored.convertTo(flat, CV_32F);
            cv::Mat rows_f(1, count, CV_MAKETYPE(CV_32F, channels), wide);
            const float largest =
                NormalizeFrame(&rows_f, dark_tile, lights[static_cast<size_t>(i)]->intensity, decode.black_level);
            tile_max[t][static_cast<size_t>(i)] = std::max(tile_max[t][static_cast<size_t>(i)], largest);
          }
          in.data = tile.data();
          in.light_stride = tile_px * channels;
        } else {
          in.data = band.get() + b * channels;
          in.light_stride = slot;
        }
        in.pixels = e - b;
        in.channels = channels;
        in.mask = mask.empty() ? nullptr : mask.ptr<uint8_t>() + offset + b;
        in.points_m = near ? points.ptr<float>() + 3 * (offset + b) : nullptr;
        BlockOutputs o;
        o.normals = out->normals.ptr<float>() + 3 * (offset + b);
        o.albedo = out->albedo.ptr<float>() + 3 * (offset + b);
        o.confidence = out->confidence.ptr<float>() + offset + b;
        solver->SolveBlock(in, o, &scratch[t]);
      });
      out->solve_seconds += Seconds(t1, Clock::now());
      out->solve_cpu_seconds += io::ProcessCpuSeconds() - c1;
    }
    if (iter == 0) {
      for (const auto& m : tile_max)
        for (int i = 0; i < n; ++i)
          frame_max[static_cast<size_t>(i)] = std::max(frame_max[static_cast<size_t>(i)], m[static_cast<size_t>(i)]);
      bool all_zero = true;
      for (int i = 0; i < n; ++i) {
        if (frame_max[static_cast<size_t>(i)] > 0)
          all_zero = false;
        else
          out->all_zero_lights.push_back(cam.olat[static_cast<size_t>(i)].light);
      }
      if (all_zero)
        return io::Status::BadInput(
            fmt::format("{}: {}.olat: every frame is zero after black-level and dark-frame subtraction", where, key));
    }
    if (!near) break;
    // 3. Near-field: depth from the normals, new surface points, repeat.
    out->near_field_iterations = iter + 1;
    if (iter > 0) {
      out->near_field_change_deg = MeanChangeDeg(out->normals, previous_normals, out->confidence, previous_confidence);
      if (out->near_field_change_deg < options.near_field_tolerance_deg) break;
    }
    if (iter + 1 == iterations) break;
    const auto t2 = Clock::now();
    IntegrationOptions io_opts;
    io_opts.intrinsics = cam.intrinsics;
    io_opts.reference_depth_m = reference_depth_m;
    DepthMap depth;
    LUMENRIG_RETURN_IF_ERROR(IntegrateNormals(out->normals, mask, io_opts, &depth, nthreads));
    PointsFromDepth(depth.depth, cv::Size(width, height), *cam.intrinsics, reference_depth_m, &points);
    out->normals.copyTo(previous_normals);
    out->confidence.copyTo(previous_confidence);
    out->integrate_seconds += Seconds(t2, Clock::now());
  }
  band.reset();
  readers.clear();
  points.release();
  previous_normals.release();
  previous_confidence.release();

  if (options.integrate_depth) {
    const auto t3 = Clock::now();
    IntegrationOptions io_opts;
    if (cam.intrinsics && reference_depth_m > 0) {
      io_opts.intrinsics = cam.intrinsics;
      io_opts.reference_depth_m = reference_depth_m;
    }
    out->depth_options = io_opts;
    out->depth_bytes = integrate_bytes;
    out->depth_pending = true;
    if (!options.defer_depth) {
      LUMENRIG_RETURN_IF_ERROR(IntegrateDepth(out, nthreads));
      out->integrate_seconds += Seconds(t3, Clock::now());
    }
  }
  return io::Status::Ok();
}

io::Status IntegrateDepth(NormalsResult* result, int threads) {
  if (!result->depth_pending) return io::Status::Ok();
  LUMENRIG_RETURN_IF_ERROR(
      IntegrateNormals(result->normals, result->mask, result->depth_options, &result->depth, threads));
  result->depth_pending = false;
  return io::Status::Ok();
}

std::vector<std::string> NormalsOutputNames(const NormalsResult& result) {
  std::vector<std::string> names = {"normals.exr", "albedo.exr", "confidence.exr"};
  if (!result.depth.depth.empty() || result.depth_pending) names.push_back("depth.exr");
  names.push_back("normals_preview.png");
  return names;
}

cv::Mat NormalsPreview(const NormalsResult& r) {
  cv::Mat n8(r.normals.size(), CV_8UC3);
  for (int v = 0; v < r.normals.rows; ++v) {
    const cv::Vec3f* p = r.normals.ptr<cv::Vec3f>(v);
    cv::Vec3b* q = n8.ptr<cv::Vec3b>(v);
    for (int u = 0; u < r.normals.cols; ++u) {
      const bool zero = p[u][0] == 0 && p[u][1] == 0 && p[u][2] == 0;
      for (int c = 0; c < 3; ++c) {
        const float x = zero ? 0.0f : std::clamp((p[u][c] + 1.0f) * 0.5f, 0.0f, 1.0f);
        q[u][2 - c] = static_cast<uint8_t>(std::lround(x * 255.0f));  // RGB -> BGR
      }
    }
  }
  cv::Mat a8 = io::ToPreview8(r.albedo);
  cv::Mat d8 = cv::Mat::zeros(r.normals.size(), CV_8UC3);
  if (!r.depth.depth.empty()) {
    cv::Mat valid = r.confidence > 0;
    if (!r.mask.empty()) valid &= r.mask;
    double lo = 0, hi = 0;
    cv::minMaxLoc(r.depth.depth, &lo, &hi, nullptr, nullptr, valid);
    if (hi > lo) {
      cv::Mat g;
      r.depth.depth.convertTo(g, CV_8U, -255.0 / (hi - lo), 255.0 * hi / (hi - lo));  // near = bright
      g.setTo(0, valid == 0);
      cv::cvtColor(g, d8, cv::COLOR_GRAY2BGR);
    }
  }
  // A picture to look at, not data: panels of large views are area-averaged
  // down to kPreviewMaxSide on their long side (a 2048x2048 view's
  // 6144-pixel-wide PNG took 0.73 s to encode, after the depth).
  const double scale = std::min(1.0, static_cast<double>(kPreviewMaxSide) / std::max(n8.rows, n8.cols));
  std::vector<cv::Mat> panels = {n8, a8, d8};
  if (scale < 1.0)
    for (cv::Mat& panel : panels) cv::resize(panel, panel, cv::Size(), scale, scale, cv::INTER_AREA);
  cv::Mat out;
  cv::hconcat(panels, out);
  return out;
}

namespace {

// Writes the files of `names` (a subset of NormalsOutputNames) concurrently,
// each to a temporary name renamed when complete. Statuses per name.
std::vector<io::Status> WriteNormalsFiles(const NormalsResult& result, const std::string& out_dir,
                                          const std::map<std::string, std::string>& provenance, bool overwrite,
                                          int threads, const std::vector<std::string>& names) {
  io::ExrWriteOptions o;
  o.pixel_type = io::PixelType::kFloat;
  o.overwrite = overwrite;
  o.attributes = provenance;
  o.attributes["lumenrig.camera"] = result.camera_id;
  o.attributes["lumenrig.session"] = result.session_id;
  o.attributes["lumenrig.method"] = PsMethodName(result.method);
  o.attributes["lumenrig.lights"] = std::to_string(result.lights);
  o.attributes["lumenrig.frame"] = "camera: +x right, +y up, +z toward the viewer";
  auto path = [&](const std::string& name) { return (fs::path(out_dir) / name).string(); };
  std::map<std::string, std::function<io::Status()>> writers;
  writers["normals.exr"] = [&] {
    io::ExrWriteOptions on = o;
    on.channel_names = {"R", "G", "B"};
    on.attributes["lumenrig.content"] = "unit normal nx,ny,nz in R,G,B; 0 where unsolved or outside the mask";
    return io::WriteExr(path("normals.exr"), result.normals, on);
  };
  writers["albedo.exr"] = [&] {
    io::ExrWriteOptions oa = o;
    oa.attributes["lumenrig.content"] = "diffuse albedo, linear RGB (Lambertian reflectance 0..1)";
    return io::WriteExr(path("albedo.exr"), result.albedo, oa);
  };
  writers["confidence.exr"] = [&] {
    io::ExrWriteOptions oc = o;
    oc.attributes["lumenrig.content"] =
        "confidence 0..1 from inlier count, light-matrix conditioning and residual; 0 where the solve failed";
    return io::WriteExr(path("confidence.exr"), result.confidence, oc);
  };
  writers["depth.exr"] = [&] {
    io::ExrWriteOptions od = o;
    od.attributes["lumenrig.depth_unit"] = result.depth.unit;
    od.attributes["lumenrig.depth_method"] = result.depth.method;
    if (result.depth.iterations > 0)
      od.attributes["lumenrig.depth_solver"] =
          fmt::format("conjugate gradients: {} iterations, relative residual {:.3g}", result.depth.iterations,
                      result.depth.residual);
    od.attributes["lumenrig.content"] =
        result.depth.unit == "metres"
            ? "depth along the view axis (metres, perspective; geometric mean over the subject = reference depth)"
            : "relative depth, pixels (orthographic; grows away from the camera; zero mean over the subject)";
    return io::WriteExr(path("depth.exr"), result.depth.depth, od);
  };
  writers["normals_preview.png"] = [&] {
    return io::WritePng(path("normals_preview.png"), NormalsPreview(result), overwrite);
  };
  // OpenEXR compresses the line blocks of each file on its own pool too, so
  // the two large RGB files do not leave a core idle at the end; the bytes
  // written do not depend on it. Restored afterwards (process-wide setting).
  const int exr_threads_before = Imf::globalThreadCount();
  const int exr_threads = io::ResolveThreads(threads);
  if (exr_threads > 1) Imf::setGlobalThreadCount(exr_threads);
  std::vector<io::Status> status(names.size());
  io::ParallelFor(0, static_cast<int64_t>(names.size()), 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t j = b; j < e; ++j) status[static_cast<size_t>(j)] = writers.at(names[static_cast<size_t>(j)])();
  });
  if (exr_threads > 1) Imf::setGlobalThreadCount(exr_threads_before);
  return status;
}

// Removes the files of `names` in `out_dir` whose status is ok (written by
// this call).
void RemoveWritten(const std::string& out_dir, const std::vector<std::string>& names,
                   const std::vector<io::Status>& status) {
  std::vector<std::string> paths;
  for (const auto& name : names) paths.push_back((fs::path(out_dir) / name).string());
  io::RemoveWrittenFiles(paths, status);
}

// Refuses existing outputs (unless `overwrite`) before anything is written,
// and creates the folder.
io::Status PrepareOutputs(const std::vector<std::string>& names, const std::string& out_dir, bool overwrite) {
  for (const auto& name : names)
    LUMENRIG_RETURN_IF_ERROR(io::CheckOutputPath((fs::path(out_dir) / name).string(), overwrite));
  return io::EnsureDirectory(out_dir);
}

}  // namespace

io::Status WriteNormalsOutputs(const NormalsResult& result, const std::string& out_dir,
                               const std::map<std::string, std::string>& provenance, bool overwrite, int threads) {
  if (result.depth_pending)
    return io::Status::Internal("WriteNormalsOutputs: the depth is still pending (use FinishNormalsOutputs)");
  const auto names = NormalsOutputNames(result);
  LUMENRIG_RETURN_IF_ERROR(PrepareOutputs(names, out_dir, overwrite));
  const auto status = WriteNormalsFiles(result, out_dir, provenance, overwrite, threads, names);
  const io::Status first = io::FirstError(status);
  if (!first.ok()) RemoveWritten(out_dir, names, status);  // no partial output
  return first;
}

io::Status FinishNormalsOutputs(NormalsResult* result, const std::string& out_dir,
                                const std::map<std::string, std::string>& provenance, bool overwrite, int threads) {
  if (!result->depth_pending) return WriteNormalsOutputs(*result, out_dir, provenance, overwrite, threads);
  const auto names = NormalsOutputNames(*result);
  LUMENRIG_RETURN_IF_ERROR(PrepareOutputs(names, out_dir, overwrite));
  // The depth needs only the normals and mask, which are final: it is
  // integrated while the three maps are compressed and written.
  const std::vector<std::string> maps = {"normals.exr", "albedo.exr", "confidence.exr"};
  std::vector<io::Status> map_status;
  io::Status depth_status;
  const auto t0 = Clock::now();
  io::ParallelFor(0, 2, 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t j = b; j < e; ++j) {
      if (j == 0) {
        depth_status = IntegrateDepth(result, threads);
        result->integrate_seconds += Seconds(t0, Clock::now());
      } else {
        map_status = WriteNormalsFiles(*result, out_dir, provenance, overwrite, threads, maps);
      }
    }
  });
  std::vector<std::string> written = maps;
  std::vector<io::Status> status = map_status;
  io::Status first = io::FirstError(map_status);
  if (first.ok()) first = depth_status;
  if (first.ok()) {
    const std::vector<std::string> rest(names.begin() + static_cast<int64_t>(maps.size()), names.end());
    const auto rest_status = WriteNormalsFiles(*result, out_dir, provenance, overwrite, threads, rest);
    written.insert(written.end(), rest.begin(), rest.end());
    status.insert(status.end(), rest_status.begin(), rest_status.end());
    first = io::FirstError(rest_status);
  }
  if (!first.ok()) RemoveWritten(out_dir, written, status);  // no partial output
  return first;
}

}  // namespace lumenrig::solvers
