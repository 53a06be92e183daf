#include "lumenrig/synth/relight.h"

#include <algorithm>
#include <chrono>
#include <cmath>

#include <fmt/format.h>
#include <Eigen/Dense>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/sh.h"

namespace lumenrig::synth {

io::Expected<std::vector<Eigen::Vector3d>> RigLightDirections(const io::Rig& rig, const std::string& source) {
  if (rig.lights.empty()) return io::Status::BadInput(fmt::format("{}: lights: rig has no lights", source));
  std::vector<Eigen::Vector3d> dirs;
  dirs.reserve(rig.lights.size());
  for (size_t i = 0; i < rig.lights.size(); ++i) {
    const io::Light& l = rig.lights[i];
    Eigen::Vector3d d;
    if (l.direction) {
      d = *l.direction;
    } else if (l.position) {
      d = *l.position;  // near-field: direction from the rig origin
    } else {
      return io::Status::BadInput(
          fmt::format("{}: lights[{}] (id {}): has neither direction nor position", source, i, l.id));
    }
    const double n = d.norm();
    if (!(n > 1e-12) || !std::isfinite(n)) {
      return io::Status::BadInput(
          fmt::format("{}: lights[{}] (id {}): direction/position is zero or not finite", source, i, l.id));
    }
    dirs.push_back(d / n);
  }
  return dirs;
}

io::Expected<LightCells> BuildLightCells(const io::Rig& rig, int height, const LightWeightOptions& options,
                                         const std::string& source) {
  auto dirs_or = RigLightDirections(rig, source);
  if (!dirs_or.ok()) return dirs_or.status();
  const auto& dirs = *dirs_or;
  if (height < 2) return io::Status::BadInput(fmt::format("{}: lat-long height {} too small", source, height));
  const int n = static_cast<int>(dirs.size());
  LightCells cells;
  cells.width = 2 * height;
  cells.height = height;
  // Coverage angle: automatic = the dome's largest nearest-neighbour spacing.
  double coverage = options.coverage_angle_deg;
  if (coverage <= 0.0) {
    if (n == 1) {
      coverage = 90.0;
    } else {
      double worst = 0.0;
      for (int i = 0; i < n; ++i) {
        double best = -1.0;
        for (int j = 0; j < n; ++j) {
          if (j != i) best = std::max(best, dirs[i].dot(dirs[j]));
        }
        worst = std::max(worst, std::acos(std::clamp(best, -1.0, 1.0)));
      }
      coverage = worst * 180.0 / M_PI;
    }
  }
  cells.coverage_angle_deg = coverage;
  const double cos_cover = std::cos(coverage * M_PI / 180.0);
  Eigen::MatrixXd light_matrix(n, 3);
  for (int i = 0; i < n; ++i) light_matrix.row(i) = dirs[i].transpose();
  cells.cell.assign(static_cast<size_t>(cells.width) * height, -1);
  cells.cell_solid_angle_sr.assign(n, 0.0);
  for (int v = 0; v < height; ++v) {
    const double dw = TexelSolidAngle(v, cells.width, height);
    for (int u = 0; u < cells.width; ++u) {
      const Eigen::Vector3d d = LatLongDirection(u, v, cells.width, height);
      Eigen::Index best = 0;
      const double best_dot = (light_matrix * d).maxCoeff(&best);
      if (best_dot < cos_cover) continue;
      cells.cell[static_cast<size_t>(v) * cells.width + u] = static_cast<int32_t>(best);
      cells.cell_solid_angle_sr[best] += dw;
    }
  }
  return cells;
}

LightWeights ComputeLightWeights(const cv::Mat& latlong, const io::Rig& rig, const LightCells& cells) {
  CV_Assert(latlong.type() == CV_32FC3 && latlong.rows == cells.height && latlong.cols == cells.width);
  const int n = static_cast<int>(rig.lights.size());
  LightWeights out;
  out.weights = Eigen::MatrixXd::Zero(n, 3);
  double uncovered = 0.0, total = 0.0;
  for (int v = 0; v < cells.height; ++v) {
    const double dw = TexelSolidAngle(v, cells.width, cells.height);
    const cv::Vec3f* row = latlong.ptr<cv::Vec3f>(v);
    for (int u = 0; u < cells.width; ++u) {
      const cv::Vec3f l = row[u];
      const double y = io::Bt709Luminance(l[0], l[1], l[2]) * dw;
      total += y;
      const int c = cells.cell[static_cast<size_t>(v) * cells.width + u];
      if (c < 0) {
        uncovered += y;
        continue;
      }
      out.weights.row(c) += Eigen::RowVector3d(l[0], l[1], l[2]) * dw;
    }
  }
  for (int i = 0; i < n; ++i) {
    const io::Light& light = rig.lights[i];
    if (light.solid_angle_sr) {
      if (cells.cell_solid_angle_sr[i] > 0) {
        out.weights.row(i) *= *light.solid_angle_sr / cells.cell_solid_angle_sr[i];
      } else {
        const Eigen::Vector3d d = light.direction ? *light.direction : *light.position;
        const Eigen::Vector3f l = SampleLatLong(latlong, d.normalized());
        out.weights.row(i) = l.cast<double>().transpose() * *light.solid_angle_sr;
      }
    }
    // Near-field light: its frame is albedo/pi cos / d^2 per unit intensity
    // (docs/formats.md), so the weight carries d^2 (subject at the rig origin).
    if (!light.direction && light.position) out.weights.row(i) *= light.position->squaredNorm();
    for (int c = 0; c < 3; ++c) {
      const double intensity = light.intensity(c);
      out.weights(i, c) = intensity > 0 ? out.weights(i, c) / intensity : 0.0;
    }
  }
  out.total_energy = total;
  out.uncovered_energy_fraction = total > 0 ? uncovered / total : 0.0;
  return out;
}

io::Expected<LightWeights> ComputeLightWeights(const cv::Mat& latlong, const io::Rig& rig,
                                               const LightWeightOptions& options) {
  LUMENRIG_RETURN_IF_ERROR(ValidateLatLong(latlong, "environment map"));
  const int h = std::min(latlong.rows, std::max(2, options.integration_height));
  auto cells = BuildLightCells(rig, h, options, rig.path.empty() ? "rig" : rig.path);
  if (!cells.ok()) return cells.status();
  const cv::Mat map = h == latlong.rows ? latlong : ResampleLatLong(latlong, h);
  return ComputeLightWeights(map, rig, *cells);
}

// ---- in-memory stack ----

namespace {
class MemoryOlatSource : public OlatSource {
 public:
  MemoryOlatSource(std::vector<cv::Mat> frames, std::vector<int> light_index)
      : frames_(std::move(frames)), light_index_(std::move(light_index)) {}
  int width() const override { return frames_.empty() ? 0 : frames_[0].cols; }
  int height() const override { return frames_.empty() ? 0 : frames_[0].rows; }
  const std::vector<int>& light_index() const override { return light_index_; }
  io::Status ReadBand(int y0, int y1, int /*threads*/, std::vector<cv::Mat>* bands) override {
    bands->resize(frames_.size());
    for (size_t i = 0; i < frames_.size(); ++i) (*bands)[i] = frames_[i].rowRange(y0, y1);
    return io::Status::Ok();
  }

 private:
  std::vector<cv::Mat> frames_;
  std::vector<int> light_index_;
};
}  // namespace

std::unique_ptr<OlatSource> MakeMemoryOlatSource(std::vector<cv::Mat> frames, std::vector<int> light_index) {
  return std::make_unique<MemoryOlatSource>(std::move(frames), std::move(light_index));
}

// ---- batched relighting ----

io::Status RelightBatch(OlatSource* stack, const std::vector<Eigen::MatrixXd>& weights, const RelightOptions& options,
                        std::vector<cv::Mat>* relit, RelightStats* stats) {
  using Clock = std::chrono::steady_clock;
  const int n = stack->count();
  const int k = static_cast<int>(weights.size());
  const int w = stack->width(), h = stack->height();
  if (n == 0) return io::Status::BadInput("relight: the camera has no OLAT frames");
  if (k == 0) return io::Status::BadInput("relight: no environment maps given");
  for (const auto& wk : weights) {
    for (int i = 0; i < n; ++i) {
      const int li = stack->light_index()[i];
      if (li < 0 || li >= wk.rows() || wk.cols() != 3) {
        return io::Status::Internal(
            fmt::format("relight: weights have {} rows, frame {} uses light {}", wk.rows(), i, li));
      }
    }
  }
  const int threads = io::ResolveThreads(options.threads);
  // Per channel: W_c (N frames x K maps), float.
  Eigen::MatrixXf wc[3];
  for (int c = 0; c < 3; ++c) {
    wc[c].resize(n, k);
    for (int j = 0; j < k; ++j) {
      for (int i = 0; i < n; ++i) wc[c](i, j) = static_cast<float>(weights[j](stack->light_index()[i], c));
    }
  }
  // Band height from the budget: the band of N frames (+ the same again for
  // decoding buffers) and per-thread scratch (N + K floats per pixel of a chunk).
  const int64_t row_bytes = int64_t{2} * n * w * 3 * 4;
  const int64_t scratch = int64_t{threads} * kRowsPerChunk * w * (n + k) * 4 * 2;
  int64_t rows = (options.mem_budget_bytes - scratch - stack->overhead_bytes()) / std::max<int64_t>(1, row_bytes);
  rows = std::max<int64_t>(kRowsPerChunk, rows / kRowsPerChunk * kRowsPerChunk);
  const int band_rows =
      static_cast<int>(std::min<int64_t>(rows, (h + kRowsPerChunk - 1) / kRowsPerChunk * kRowsPerChunk));
  relit->assign(k, cv::Mat());
  for (auto& m : *relit) m.create(h, w, CV_32FC3);
  if (stats) *stats = RelightStats{0, band_rows, 0, 0};
  std::vector<cv::Mat> bands;
  for (int y0 = 0; y0 < h; y0 += band_rows) {
    const int y1 = std::min(h, y0 + band_rows);
    const auto t0 = Clock::now();
    LUMENRIG_RETURN_IF_ERROR(stack->ReadBand(y0, y1, options.threads, &bands));
    const auto t1 = Clock::now();
    io::ParallelFor(y0, y1, kRowsPerChunk, options.threads, [&](int64_t r0, int64_t r1) {
      const int m = static_cast<int>(r1 - r0) * w;
      // Per-thread scratch reused across chunks and bands (no fresh pages).
      thread_local std::vector<float> a_buf, r_buf;
      if (a_buf.size() < static_cast<size_t>(m) * n) a_buf.resize(static_cast<size_t>(m) * n);
      if (r_buf.size() < static_cast<size_t>(m) * k) r_buf.resize(static_cast<size_t>(m) * k);
      Eigen::Map<Eigen::MatrixXf> a(a_buf.data(), m, n);
      Eigen::Map<Eigen::MatrixXf> result(r_buf.data(), m, k);
      for (int c = 0; c < 3; ++c) {
        for (int i = 0; i < n; ++i) {
          float* col = a.col(i).data();
          for (int64_t y = r0; y < r1; ++y) {
            const float* src = bands[i].ptr<float>(static_cast<int>(y - y0));
            float* dst = col + (y - r0) * w;
            for (int x = 0; x < w; ++x) dst[x] = src[3 * x + c];
          }
        }
        result.noalias() = a * wc[c];
        for (int j = 0; j < k; ++j) {
          const float* src = result.col(j).data();
          for (int64_t y = r0; y < r1; ++y) {
            float* dst = (*relit)[j].ptr<float>(static_cast<int>(y));
            const float* s = src + (y - r0) * w;
            for (int x = 0; x < w; ++x) dst[3 * x + c] = s[x];
          }
        }
      }
    });
    const auto t2 = Clock::now();
    if (stats) {
      stats->bands++;
      stats->read_seconds += std::chrono::duration<double>(t1 - t0).count();
      stats->gemm_seconds += std::chrono::duration<double>(t2 - t1).count();
    }
  }
  return io::Status::Ok();
}

}  // namespace lumenrig::synth
