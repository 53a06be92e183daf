#include "lumenrig/solvers/photometric_stereo.h"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <limits>
#include <type_traits>
#include <vector>

#include <fmt/format.h>
#include <Eigen/Dense>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/solvers/light_matrix.h"

namespace lumenrig::solvers {
namespace {

constexpr float kPi = 3.14159265358979323846f;
constexpr double kMaxCondition = 1e6;  // coplanar-light error threshold
constexpr int kSubTile = 32;           // pixels processed together by the per-pixel path

/// kLanes pixels of the per-pixel path as one vector (GCC/Clang vector
/// extensions: the compiler emits the target's SIMD instructions). The
/// path is built for AVX2 and for the baseline (target_clones below); these
/// helpers are inlined into both and never cross a call, so GCC's note that
/// 32-byte vectors pass differently without AVX does not apply.
#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC diagnostic ignored "-Wpsabi"
#endif
// LUMENRIG_SIMD_CLONES=OFF (CMake) builds the baseline version alone, so the
// path an older CPU takes can be tested on any machine.
#if LUMENRIG_SIMD_CLONES_ON && defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
#define LUMENRIG_SIMD_CLONES __attribute__((target_clones("avx2", "default")))
#else
#define LUMENRIG_SIMD_CLONES
#endif
constexpr int kLanes = 8;
using Lanes = float __attribute__((vector_size(4 * kLanes)));
using LaneMask = int32_t __attribute__((vector_size(4 * kLanes)));  // comparison result: -1 or 0 per lane
static_assert(kSubTile % kLanes == 0, "the sub-tile is whole vectors");
[[gnu::always_inline]] inline Lanes Load(const float* p) {
  Lanes v;
  std::memcpy(&v, p, sizeof(v));
  return v;
}
[[gnu::always_inline]] inline void Store(float* p, const Lanes& v) { std::memcpy(p, &v, sizeof(v)); }
[[gnu::always_inline]] inline Lanes Splat(float x) { return Lanes{} + x; }
/// `value` where `mask` holds, +0 elsewhere (bitwise, no branch).
[[gnu::always_inline]] inline Lanes Select(const LaneMask& mask, const Lanes& value) {
  LaneMask bits;
  std::memcpy(&bits, &value, sizeof(bits));
  bits &= mask;
  Lanes out;
  std::memcpy(&out, &bits, sizeof(out));
  return out;
}

/// Gray value of a normalised RGB sample (BT.709 luminance weights).
inline float Gray3(const float* rgb) { return io::kBt709R * rgb[0] + io::kBt709G * rgb[1] + io::kBt709B * rgb[2]; }

/// Solves the symmetric 3x3 system A g = b (A given by its 6 upper entries
/// a00 a01 a02 a11 a12 a22) by the adjugate in double precision. Returns
/// false when A is singular relative to its scale.
bool Solve3(const double a[6], const double b[3], double g[3]) {
  const double c00 = a[3] * a[5] - a[4] * a[4];
  const double c01 = a[2] * a[4] - a[1] * a[5];
  const double c02 = a[1] * a[4] - a[2] * a[3];
  const double det = a[0] * c00 + a[1] * c01 + a[2] * c02;
  const double scale = a[0] + a[3] + a[5];
  if (!(std::abs(det) > 1e-12 * scale * scale * scale)) return false;
  const double c11 = a[0] * a[5] - a[2] * a[2];
  const double c12 = a[1] * a[2] - a[0] * a[4];
  const double c22 = a[0] * a[3] - a[1] * a[1];
  const double inv = 1.0 / det;
  g[0] = (c00 * b[0] + c01 * b[1] + c02 * b[2]) * inv;
  g[1] = (c01 * b[0] + c11 * b[1] + c12 * b[2]) * inv;
  g[2] = (c02 * b[0] + c12 * b[1] + c22 * b[2]) * inv;
  return std::isfinite(g[0]) && std::isfinite(g[1]) && std::isfinite(g[2]);
}

/// 2-norm condition number of a matrix V whose Gram matrix V^T V is `a`.
double ConditionFromGram(const double a[6]) {
  Eigen::Matrix3d m;
  m << a[0], a[1], a[2], a[1], a[3], a[4], a[2], a[4], a[5];
  Eigen::SelfAdjointEigenSolver<Eigen::Matrix3d> es;
  es.computeDirect(m, Eigen::EigenvaluesOnly);
  const double lo = es.eigenvalues()(0), hi = es.eigenvalues()(2);
  if (!(lo > 1e-12 * hi)) return std::numeric_limits<double>::infinity();
  return std::sqrt(hi / lo);
}

void WriteZero(const BlockOutputs& out, int64_t k) {
  for (int c = 0; c < 3; ++c) {
    out.normals[3 * k + c] = 0.0f;
    if (out.albedo) out.albedo[3 * k + c] = 0.0f;
  }
  if (out.confidence) out.confidence[k] = 0.0f;
}

}  // namespace

io::Expected<PsMethod> ParsePsMethod(const std::string& name) {
  if (name == "lsq") return PsMethod::kLeastSquares;
  if (name == "robust") return PsMethod::kRobust;
  return io::Status::BadInput(fmt::format("--method: unknown method '{}' (expected lsq or robust)", name));
}

const char* PsMethodName(PsMethod method) { return method == PsMethod::kLeastSquares ? "lsq" : "robust"; }

io::Status ValidatePsOptions(const PsOptions& o) {
  auto bad = [](const char* what, double v) {
    return io::Status::BadInput(fmt::format("photometric stereo option {}: invalid value {}", what, v));
  };
  if (!(o.dark_fraction >= 0 && o.dark_fraction <= 0.9)) return bad("dark_fraction", o.dark_fraction);
  if (!(o.bright_fraction >= 0 && o.bright_fraction <= 0.9)) return bad("bright_fraction", o.bright_fraction);
  if (!(o.dark_fraction + o.bright_fraction < 0.9))
    return bad("dark_fraction + bright_fraction", o.dark_fraction + o.bright_fraction);
  if (o.irls_iterations < 0 || o.irls_iterations > 50) return bad("irls_iterations", o.irls_iterations);
  if (!(o.tukey_c > 0)) return bad("tukey_c", o.tukey_c);
  if (!(o.shadow_floor >= 0 && o.shadow_floor < 1)) return bad("shadow_floor", o.shadow_floor);
  if (!(o.min_relative_scale > 0)) return bad("min_relative_scale", o.min_relative_scale);
  if (!(o.min_signal >= 0)) return bad("min_signal", o.min_signal);
  return io::Status::Ok();
}

float PsConfidence(int inliers, double condition, double relative_residual) {
  if (inliers < 3 || !std::isfinite(condition) || !std::isfinite(relative_residual)) return 0.0f;
  const double c_count = std::clamp((inliers - 2) / 4.0, 0.0, 1.0);
  const double c_cond = std::clamp(std::log(1e3 / condition) / std::log(1e3 / 5.0), 0.0, 1.0);
  const double r = relative_residual / 0.1;
  const double c_res = 1.0 / (1.0 + r * r);
  return static_cast<float>(c_count * c_cond * c_res);
}

io::Expected<PsSolver> PsSolver::Create(const BlockLights& lights, const PsOptions& options) {
  LUMENRIG_RETURN_IF_ERROR(ValidatePsOptions(options));
  PsSolver s;
  s.options_ = options;
  s.lights_ = lights;
  const int n = lights.count();
  if (n < 3) return io::Status::BadInput(fmt::format("photometric stereo needs at least 3 lights, got {}", n));
  if (!lights.near_field()) {
    const Eigen::MatrixXd l = lights.directions.cast<double>();
    s.condition_ = ConditionNumber(l);
    if (!(s.condition_ < kMaxCondition))
      return io::Status::BadInput(fmt::format(
          "light directions are coplanar or degenerate (condition number {:.3g} of the {} x 3 light matrix)",
          s.condition_, n));
    const Eigen::MatrixXd pinv = l.completeOrthogonalDecomposition().pseudoInverse();
    s.pinv_ = pinv.cast<float>();
    s.gram_ = (l.transpose() * l).cast<float>();
  }
  return s;
}

namespace {
/// Column sums of squares, sums and lit counts of an n x cols block
/// (contiguous rows, vectorised), for AVX2 and the baseline (same bits).
LUMENRIG_SIMD_CLONES void ColumnSums(const float* data, int64_t stride, int n, int64_t cols, float floor, float* energy,
                                     float* sum, float* lit) {
  std::fill(energy, energy + cols, 0.0f);
  std::fill(sum, sum + cols, 0.0f);
  std::fill(lit, lit + cols, 0.0f);
  for (int i = 0; i < n; ++i) {
    const float* row = data + i * stride;
    for (int64_t j = 0; j < cols; ++j) {
      const float x = row[j];
      energy[j] += x * x;
      sum[j] += x;
      lit[j] += x > floor ? 1.0f : 0.0f;
    }
  }
}
}  // namespace

void PsSolver::SolveBlock(const BlockInput& in, const BlockOutputs& out, std::vector<float>* scratch) const {
  if (in.pixels <= 0) return;
  if (options_.method == PsMethod::kLeastSquares && !lights_.near_field()) {
    SolveLeastSquaresDistant(in, out, scratch);
  } else {
    SolvePerPixel(in, out, scratch);
  }
}

// Least squares for distant lights: G (3 x K*C) = pinv(L) (3 x N) * I (N x K*C),
// one GEMM for every channel of every pixel of a sub-block; the gray scaled
// normal is the BT.709 combination of the channel columns (the product is
// linear). Residual per channel from |I_c|^2 - g_c^T (L^T L) g_c (least-squares
// identity), with the column sums of squares taken while the sub-block is
// still in cache.
void PsSolver::SolveLeastSquaresDistant(const BlockInput& in, const BlockOutputs& out,
                                        std::vector<float>* scratch) const {
  // Eigen's GEMM kernel takes a different summation path for the last
  // (n mod 4) columns, so products are formed for multiples of kGemmPixels
  // pixels and a tail is padded with zeros to that width: every column goes
  // through the same path and a pixel's result does not depend on where a
  // band or tile boundary falls.
  constexpr int64_t kGemmPixels = 4;
  constexpr int64_t kSubBlock = 256;  // pixels per GEMM (multiple of kGemmPixels)
  const int n = lights_.count();
  const int c_count = in.channels;
  scratch->resize(static_cast<size_t>(kSubBlock * c_count * 6 + n * kGemmPixels * c_count));
  float* g_data = scratch->data();
  float* energy = g_data + 3 * kSubBlock * c_count;
  float* sum = energy + kSubBlock * c_count;
  float* lit = sum + kSubBlock * c_count;
  float* pad_data = lit + kSubBlock * c_count;
  const float floor = static_cast<float>(options_.min_signal);
  using RowMajor = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
  using RowMajorMap = Eigen::Map<const RowMajor, 0, Eigen::OuterStride<>>;

  for (int64_t k0 = 0; k0 < in.pixels; k0 += kSubBlock) {
    const int64_t k_count = std::min(kSubBlock, in.pixels - k0);
    const int64_t cols = k_count * c_count;
    const float* data = in.data + k0 * c_count;
    Eigen::Map<Eigen::MatrixXf> g(g_data, 3, cols);
    const int64_t main_pixels = k_count / kGemmPixels * kGemmPixels;
    if (main_pixels > 0) {
      RowMajorMap stack(data, n, main_pixels * c_count, Eigen::OuterStride<>(in.light_stride));
      g.leftCols(main_pixels * c_count).noalias() = pinv_ * stack;
    }
    if (main_pixels < k_count) {
      const int64_t tail = (k_count - main_pixels) * c_count;
      Eigen::Map<RowMajor> pad(pad_data, n, kGemmPixels * c_count);
      pad.setZero();
      for (int i = 0; i < n; ++i)
        std::copy(data + i * in.light_stride + main_pixels * c_count, data + i * in.light_stride + cols,
                  pad.row(i).data());
      const Eigen::MatrixXf g_pad = pinv_ * pad;
      g.rightCols(tail) = g_pad.leftCols(tail);
    }

    ColumnSums(data, in.light_stride, n, cols, floor, energy, sum, lit);

    for (int64_t kk = 0; kk < k_count; ++kk) {
      const int64_t k = k0 + kk;
      if (in.mask && in.mask[k] == 0) {
        WriteZero(out, k);
        continue;
      }
      Eigen::Vector3f gg;
      float e_total = 0, s_total = 0, r2_total = 0, lit_max = 0;
      for (int c = 0; c < c_count; ++c) {
        const int64_t j = kk * c_count + c;
        const Eigen::Vector3f gc = g.col(j);
        e_total += energy[j];
        s_total += sum[j];
        lit_max = std::max(lit_max, lit[j]);
        r2_total += std::max(0.0f, energy[j] - gc.dot(gram_ * gc));
      }
      if (c_count == 3) {
        gg = io::kBt709R * g.col(3 * kk) + io::kBt709G * g.col(3 * kk + 1) + io::kBt709B * g.col(3 * kk + 2);
      } else {
        gg = g.col(kk);
      }
      const float norm = gg.norm();
      if (!std::isfinite(norm) || !std::isfinite(e_total) || !(norm > 0.0f) || !(s_total > floor)) {
        WriteZero(out, k);
        continue;
      }
      const Eigen::Vector3f nrm = gg / norm;
      for (int c = 0; c < 3; ++c) out.normals[3 * k + c] = nrm[c];
      if (out.albedo) {
        for (int c = 0; c < 3; ++c) {
          const float a = c_count == 3 ? kPi * nrm.dot(g.col(3 * kk + c)) : kPi * norm;
          out.albedo[3 * k + c] = a;
        }
      }
      if (out.confidence) {
        // RMS residual over lights and channels relative to the mean intensity.
        const double rel = std::sqrt(static_cast<double>(c_count) * n * r2_total) / s_total;
        out.confidence[k] = PsConfidence(static_cast<int>(lit_max), condition_, rel);
      }
    }
  }
}

// Per-pixel path (robust; near-field least squares and robust). Pixels are
// processed kSubTile at a time in structure-of-arrays form so the loops over
// pixels vectorise; every pixel's arithmetic is independent of its neighbours.
namespace {
template <bool near>
[[gnu::always_inline]] inline void SolvePerPixelImpl(const PsOptions& options_, const BlockLights& lights_,
                                                     const BlockInput& in, const BlockOutputs& out,
                                                     std::vector<float>* scratch) {
  constexpr int T = kSubTile;
  const int n = lights_.count();
  const int c_count = in.channels;
  const bool robust = options_.method == PsMethod::kRobust;
  const size_t nt = static_cast<size_t>(n) * T;
  // y (gray), valid/weight, each channel as stored (for the albedo), and
  // vx, vy, vz (near-field only); light i's kSubTile values contiguous.
  scratch->resize(nt * (2 + c_count + (near ? 3 : 0)));
  (void)robust;
  float* y = scratch->data();
  float* w = y + nt;
  float* channel[3] = {w + nt, w + nt + (c_count > 1 ? nt : 0), w + nt + (c_count > 2 ? 2 * nt : 0)};
  float* vx = w + nt * (1 + c_count);
  float* vy = vx + nt;
  float* vz = vy + nt;

  const float shadow_floor = static_cast<float>(options_.shadow_floor);
  const float min_signal = static_cast<float>(options_.min_signal);
  const float* lx = nullptr;
  Eigen::Matrix<float, Eigen::Dynamic, 3, Eigen::ColMajor> dirs;
  if constexpr (!near) {
    dirs = lights_.directions;
    lx = dirs.data();
  }
  const float* ly = lx ? lx + n : nullptr;
  const float* lz = lx ? lx + 2 * n : nullptr;

  for (int64_t k0 = 0; k0 < in.pixels; k0 += T) {
    const int tn = static_cast<int>(std::min<int64_t>(T, in.pixels - k0));
    bool any = in.mask == nullptr;
    for (int t = 0; t < tn && !any; ++t) any = in.mask[k0 + t] != 0;
    if (!any) {
      for (int t = 0; t < tn; ++t) WriteZero(out, k0 + t);
      continue;
    }
    // 1. Gather gray values and the channels; non-finite samples get
    // validity 0. Lanes past the last pixel hold zeros.
    float ymax[T];
    for (int i = 0; i < n; ++i) {
      const float* row = in.data + i * in.light_stride + k0 * c_count;
      float* yi = y + static_cast<size_t>(i) * T;
      for (int c = 0; c < c_count; ++c) {
        float* ci = channel[c] + static_cast<size_t>(i) * T;
        for (int t = 0; t < tn; ++t) ci[t] = row[c_count * t + c];
        std::fill(ci + tn, ci + T, 0.0f);
      }
      if (c_count == 3) {
        for (int t = 0; t < tn; ++t) yi[t] = Gray3(row + 3 * t);
      } else {
        for (int t = 0; t < tn; ++t) yi[t] = row[t];
      }
      std::fill(yi + tn, yi + T, 0.0f);
    }
    for (int c0 = 0; c0 < T; c0 += kLanes) {
      Lanes ymax_v = Splat(0.0f);
      const Lanes one = Splat(1.0f);
      for (int i = 0; i < n; ++i) {
        const Lanes v = Load(y + i * T + c0);
        // |v| <= FLT_MAX compared as bits: NaN and +-Inf fail (no branch).
        LaneMask bits;
        std::memcpy(&bits, &v, sizeof(bits));
        const LaneMask ok = (bits & 0x7fffffff) <= 0x7f7fffff;
        const Lanes yv = Select(ok, v), ok_v = Select(ok, one);
        Store(y + i * T + c0, yv);
        Store(w + i * T + c0, ok_v);
        ymax_v = ymax_v < yv ? yv : ymax_v;
      }
      Store(ymax + c0, ymax_v);
    }
    // 2. Light vectors per pixel (near-field): v = (p - x) / |p - x|^3.
    if constexpr (near) {
      for (int i = 0; i < n; ++i) {
        const float px = lights_.positions_m(i, 0), py = lights_.positions_m(i, 1), pz = lights_.positions_m(i, 2);
        for (int t = 0; t < tn; ++t) {
          const float* x = in.points_m + 3 * (k0 + t);
          const float dx = px - x[0], dy = py - x[1], dz = pz - x[2];
          const float r2 = dx * dx + dy * dy + dz * dz;
          const float inv = 1.0f / (r2 * std::sqrt(r2));
          vx[i * T + t] = dx * inv;
          vy[i * T + t] = dy * inv;
          vz[i * T + t] = dz * inv;
        }
      }
    }
    // 3. Initial inlier set. Steps 3 and 4 run on kLanes pixels at a time as
    // vectors (GCC/Clang vector extensions) whose sums stay in registers
    // while the loop walks the lights; each pixel's arithmetic is that of a
    // scalar loop over the lights, in the same order.
    float floor_abs[T], lo_a[T], hi_b[T];
    for (int t = 0; t < T; ++t) {
      floor_abs[t] = std::max(min_signal, shadow_floor * ymax[t]);
      lo_a[t] = -1.0f;
      hi_b[t] = std::numeric_limits<float>::infinity();
    }
    auto light_x = [&](int i, int c0) {
      if constexpr (near)
        return Load(vx + i * T + c0);
      else
        return Splat(lx[i]);
    };
    auto light_y = [&](int i, int c0) {
      if constexpr (near)
        return Load(vy + i * T + c0);
      else
        return Splat(ly[i]);
    };
    auto light_z = [&](int i, int c0) {
      if constexpr (near)
        return Load(vz + i * T + c0);
      else
        return Splat(lz[i]);
    };
    if (robust) {
      // Order statistics over the lit samples (above the shadow floor):
      // thresholds at the dark_fraction and (1 - bright_fraction) ranks,
      // found by bisection on the value (resolution ymax / 2^kBisections).
      constexpr int kBisections = 7;
      const float dark_fraction = static_cast<float>(options_.dark_fraction);
      const float bright_fraction = static_cast<float>(options_.bright_fraction);
      for (int c0 = 0; c0 < T; c0 += kLanes) {
        const Lanes floor_v = Load(floor_abs + c0), one = Splat(1.0f);
        Lanes nlit = Splat(0.0f);
        for (int i = 0; i < n; ++i) nlit += Select(Load(y + i * T + c0) > floor_v, one);
        const Lanes ymax_v = Load(ymax + c0);
        Lanes lo_a_v = Splat(0.0f), hi_a_v = ymax_v, lo_b_v = Splat(0.0f), hi_b_v = ymax_v;
        Lanes target_dark, target_bright;
        for (int q = 0; q < kLanes; ++q) {
          target_dark[q] = std::floor(dark_fraction * nlit[q]);
          target_bright[q] = std::floor(bright_fraction * nlit[q]);
        }
        const Lanes half = Splat(0.5f);
        for (int it = 0; it < kBisections; ++it) {
          const Lanes mid_a = half * (lo_a_v + hi_a_v), mid_b = half * (lo_b_v + hi_b_v);
          Lanes below = Splat(0.0f), above = Splat(0.0f);
          for (int i = 0; i < n; ++i) {
            const Lanes yv = Load(y + i * T + c0);
            const LaneMask lit = yv > floor_v;
            below += Select((yv < mid_a) & lit, one);
            above += Select((yv > mid_b) & lit, one);
          }
          // Dark threshold: the largest value with at most target samples
          // below; bright: the smallest with at most target samples above.
          const LaneMask dark_ok = below <= target_dark, bright_ok = above <= target_bright;
          lo_a_v = dark_ok ? mid_a : lo_a_v;
          hi_a_v = dark_ok ? hi_a_v : mid_a;
          hi_b_v = bright_ok ? mid_b : hi_b_v;
          lo_b_v = bright_ok ? lo_b_v : mid_b;
        }
        Store(lo_a + c0, lo_a_v);
        Store(hi_b + c0, hi_b_v);
      }
    }

    // 4. Weighted fits. kMode 0: weights as stored (validity); 1: the
    // order-statistics inlier set; 2: Tukey biweight of the residual under
    // the current fit with the current scale, samples in attached shadow
    // (n.v <= 0) or under the shadow floor at 0. Mode 2 also accumulates the
    // residual of the previous weights for the next scale (one pass).
    float a[6][T], b[3][T], gx[T], gy[T], gz[T], scale[T], se[T], sw[T], sy[T];
    bool solved[T];
    const float c_tukey = static_cast<float>(options_.tukey_c);
    const float min_rel = static_cast<float>(options_.min_relative_scale);
    auto fit = [&](auto mode) {
      constexpr int kMode = decltype(mode)::value;
      for (int c0 = 0; c0 < T; c0 += kLanes) {
        const Lanes zero = Splat(0.0f), one = Splat(1.0f);
        Lanes a0 = zero, a1 = zero, a2 = zero, a3 = zero, a4 = zero, a5 = zero, b0 = zero, b1 = zero, b2 = zero;
        Lanes se_v = zero, sw_v = zero, sy_v = zero;
        const Lanes floor_v = Load(floor_abs + c0), lo_v = Load(lo_a + c0), hi_v = Load(hi_b + c0);
        const Lanes gx_v = Load(gx + c0), gy_v = Load(gy + c0), gz_v = Load(gz + c0);
        const Lanes cs_v = Splat(c_tukey) * Load(scale + c0);
        for (int i = 0; i < n; ++i) {
          const Lanes x = light_x(i, c0), yv = light_y(i, c0), z = light_z(i, c0);
          const Lanes yy = Load(y + i * T + c0);
          Lanes ww = Load(w + i * T + c0);
          if constexpr (kMode == 1) {
            ww *= Select((yy >= lo_v) & (yy <= hi_v) & (yy > floor_v), one);
            Store(w + i * T + c0, ww);
          } else if constexpr (kMode == 2) {
            const Lanes pred = x * gx_v + yv * gy_v + z * gz_v;
            const Lanes e = yy - pred;
            se_v += ww * e * e;
            sw_v += ww;
            sy_v += ww * yy;
            const Lanes u = e / cs_v;
            const Lanes tw = one - u * u;
            // Non-finite samples were stored as 0, so the floor test drops them.
            const Lanes usable = Select((yy > floor_v) & (pred > zero) & (u * u < one), one);
            ww = usable * tw * tw;
            Store(w + i * T + c0, ww);
          }
          const Lanes wx = ww * x, wy = ww * yv, wz = ww * z;
          a0 += wx * x;
          a1 += wx * yv;
          a2 += wx * z;
          a3 += wy * yv;
          a4 += wy * z;
          a5 += wz * z;
          b0 += wx * yy;
          b1 += wy * yy;
          b2 += wz * yy;
        }
        Store(a[0] + c0, a0), Store(a[1] + c0, a1), Store(a[2] + c0, a2);
        Store(a[3] + c0, a3), Store(a[4] + c0, a4), Store(a[5] + c0, a5);
        Store(b[0] + c0, b0), Store(b[1] + c0, b1), Store(b[2] + c0, b2);
        if constexpr (kMode == 2) Store(se + c0, se_v), Store(sw + c0, sw_v), Store(sy + c0, sy_v);
      }
      for (int t = 0; t < tn; ++t) {
        double ad[6], bd[3], gd[3];
        for (int j = 0; j < 6; ++j) ad[j] = a[j][t];
        for (int j = 0; j < 3; ++j) bd[j] = b[j][t];
        solved[t] = Solve3(ad, bd, gd);
        gx[t] = solved[t] ? static_cast<float>(gd[0]) : 0.0f;
        gy[t] = solved[t] ? static_cast<float>(gd[1]) : 0.0f;
        gz[t] = solved[t] ? static_cast<float>(gd[2]) : 0.0f;
      }
    };
    auto update_scale = [&]() {
      for (int t = 0; t < T; ++t) {
        const float rms = sw[t] > 0 ? std::sqrt(se[t] / sw[t]) : 0.0f;
        const float mean = sw[t] > 0 ? sy[t] / sw[t] : 0.0f;
        scale[t] = std::max(rms, min_rel * mean);
      }
    };
    if (!robust) {
      fit(std::integral_constant<int, 0>());
    } else {
      fit(std::integral_constant<int, 1>());
      // Initial scale: weighted RMS residual of the order-statistics fit.
      for (int c0 = 0; c0 < T; c0 += kLanes) {
        Lanes se_v = Splat(0.0f), sw_v = Splat(0.0f), sy_v = Splat(0.0f);
        const Lanes gx_v = Load(gx + c0), gy_v = Load(gy + c0), gz_v = Load(gz + c0);
        for (int i = 0; i < n; ++i) {
          const Lanes yi = Load(y + i * T + c0), wi = Load(w + i * T + c0);
          const Lanes e = yi - (light_x(i, c0) * gx_v + light_y(i, c0) * gy_v + light_z(i, c0) * gz_v);
          se_v += wi * e * e;
          sw_v += wi;
          sy_v += wi * yi;
        }
        Store(se + c0, se_v), Store(sw + c0, sw_v), Store(sy + c0, sy_v);
      }
      update_scale();
      for (int iter = 0; iter < options_.irls_iterations; ++iter) {
        fit(std::integral_constant<int, 2>());
        // Scale for the next pass: residual of the weights just replaced
        // under the fit they were computed from (lagged by one pass).
        update_scale();
      }
    }

    // 5. Normal, per-channel albedo a_c = pi * sum w s y_c / sum w s^2 with
    // s = n.v, inlier count, conditioning and residual. Each pixel sums its
    // lights' terms (rounded to float, as a scalar loop does) in double;
    // lights of weight 0 add nothing (their terms are selected away, so a
    // non-finite sample cannot leak in).
    float nx[T], ny[T], nz[T], gn[T];
    for (int t = 0; t < T; ++t) {
      gn[t] = std::sqrt(gx[t] * gx[t] + gy[t] * gy[t] + gz[t] * gz[t]);
      nx[t] = gx[t] / gn[t];
      ny[t] = gy[t] / gn[t];
      nz[t] = gz[t] / gn[t];
    }
    using Doubles = double __attribute__((vector_size(4 * kLanes)));  // kLanes / 2 doubles
    using HalfLanes = float __attribute__((vector_size(2 * kLanes)));
    constexpr int kHalf = kLanes / 2;
    struct Sum2 {
      Doubles lo, hi;  // lanes [0, kHalf) and [kHalf, kLanes)
    };
    auto add = [](Sum2* sum, const Lanes& v) {
      HalfLanes lo, hi;
      std::memcpy(&lo, &v, sizeof(lo));
      std::memcpy(&hi, reinterpret_cast<const char*>(&v) + sizeof(lo), sizeof(hi));
      sum->lo += __builtin_convertvector(lo, Doubles);
      sum->hi += __builtin_convertvector(hi, Doubles);
    };
    auto lane = [](const Sum2& sum, int q) { return q < kHalf ? sum.lo[q] : sum.hi[q - kHalf]; };
    for (int c0 = 0; c0 < tn; c0 += kLanes) {
      const Doubles dzero = {};
      Sum2 ss{dzero, dzero}, sc[3] = {{dzero, dzero}, {dzero, dzero}, {dzero, dzero}};
      Sum2 se_d{dzero, dzero}, sw_d{dzero, dzero}, sy_d{dzero, dzero};
      Lanes inliers = Splat(0.0f);
      const Lanes nx_v = Load(nx + c0), ny_v = Load(ny + c0), nz_v = Load(nz + c0), gn_v = Load(gn + c0);
      const Lanes zero = Splat(0.0f), one = Splat(1.0f), half = Splat(0.5f), min_signal_v = Splat(min_signal);
      for (int i = 0; i < n; ++i) {
        const Lanes ww = Load(w + i * T + c0), yv = Load(y + i * T + c0);
        const LaneMask use = ww > zero;
        const Lanes s = light_x(i, c0) * nx_v + light_y(i, c0) * ny_v + light_z(i, c0) * nz_v;
        add(&ss, Select(use, ww * s * s));
        for (int c = 0; c < c_count; ++c) add(&sc[c], Select(use, ww * s * Load(channel[c] + i * T + c0)));
        const Lanes e = yv - s * gn_v;
        add(&se_d, Select(use, ww * e * e));
        add(&sw_d, Select(use, ww));
        add(&sy_d, Select(use, ww * yv));
        inliers += Select((ww > half) & (yv > min_signal_v), one);
      }
      for (int q = 0; q < kLanes && c0 + q < tn; ++q) {
        const int t = c0 + q;
        const int64_t k = k0 + t;
        const bool masked_out = in.mask && in.mask[k] == 0;
        if (masked_out || !solved[t] || !(gn[t] > 0.0f) || !std::isfinite(gn[t]) || !(ymax[t] > min_signal)) {
          WriteZero(out, k);
          continue;
        }
        out.normals[3 * k] = nx[t];
        out.normals[3 * k + 1] = ny[t];
        out.normals[3 * k + 2] = nz[t];
        const double ss_t = lane(ss, q), sw_t = lane(sw_d, q), sy_t = lane(sy_d, q), se_t = lane(se_d, q);
        if (out.albedo) {
          for (int c = 0; c < 3; ++c) {
            const double num = lane(sc[c_count == 3 ? c : 0], q);
            out.albedo[3 * k + c] = ss_t > 0 ? static_cast<float>(kPi * num / ss_t) : 0.0f;
          }
        }
        if (out.confidence) {
          double ad[6];
          for (int j = 0; j < 6; ++j) ad[j] = a[j][t];
          const double cond = ConditionFromGram(ad);
          const double rel =
              sy_t > 0 ? std::sqrt(se_t / sw_t) / (sy_t / sw_t) : std::numeric_limits<double>::infinity();
          out.confidence[k] = PsConfidence(static_cast<int>(inliers[q]), cond, rel);
        }
      }
    }
  }
}

}  // namespace

namespace {
// The per-pixel path built twice, for AVX2 and for the x86-64 baseline
// (GCC/Clang function multi-versioning; the loader picks one per CPU). AVX2
// brings no FMA, so both versions round every operation alike and give the
// same bits.
LUMENRIG_SIMD_CLONES void SolvePerPixelFar(const PsOptions& options, const BlockLights& lights, const BlockInput& in,
                                           const BlockOutputs& out, std::vector<float>* scratch) {
  SolvePerPixelImpl<false>(options, lights, in, out, scratch);
}
LUMENRIG_SIMD_CLONES void SolvePerPixelNear(const PsOptions& options, const BlockLights& lights, const BlockInput& in,
                                            const BlockOutputs& out, std::vector<float>* scratch) {
  SolvePerPixelImpl<true>(options, lights, in, out, scratch);
}
}  // namespace

void PsSolver::SolvePerPixel(const BlockInput& in, const BlockOutputs& out, std::vector<float>* scratch) const {
  if (lights_.near_field()) {
    SolvePerPixelNear(options_, lights_, in, out, scratch);
  } else {
    SolvePerPixelFar(options_, lights_, in, out, scratch);
  }
}

namespace {
// Bits of |v| as an integer (ordered like |v|), 0 for NaN.
inline int32_t MagnitudeBits(float v) {
  int32_t bits;
  std::memcpy(&bits, &v, sizeof(bits));
  bits &= 0x7fffffff;
  return bits > 0x7f800000 ? 0 : bits;
}
}  // namespace

// Built for AVX2 and the baseline, like the per-pixel path (same bits).
LUMENRIG_SIMD_CLONES float NormalizeFrame(cv::Mat* frame, const cv::Mat& dark, const Eigen::Vector3d& intensity,
                                          float black_level) {
  const int c = frame->channels();
  float scale[3];
  if (c == 3) {
    for (int k = 0; k < 3; ++k) scale[k] = static_cast<float>(1.0 / intensity[k]);
  } else {
    scale[0] =
        static_cast<float>(1.0 / io::Bt709Luminance(static_cast<float>(intensity[0]), static_cast<float>(intensity[1]),
                                                    static_cast<float>(intensity[2])));
  }
  // One pass per row: subtract, scale, and track the largest magnitude (NaN
  // is skipped). The magnitude is compared as the bits of |v|, which order
  // like the values for non-negative floats; NaN's bits (above +Inf's) count
  // as 0. x - 0 is x for every float (-0 stays -0), so subtracting a zero
  // black level or dark frame changes nothing.
  const int n = frame->cols * c;
  const float black = black_level;
  int32_t largest_bits = 0;
  for (int r = 0; r < frame->rows; ++r) {
    float* p = frame->ptr<float>(r);
    const float* d = dark.empty() ? nullptr : dark.ptr<float>(r);
    int j = 0;
#if defined(__GNUC__)
    // kLanes RGB pixels (or 3 kLanes gray ones) per step as three vectors
    // (GCC/Clang vector extensions), whose scale patterns are fixed.
    constexpr int kStep = 3 * kLanes;
    float pattern_values[kStep];
    for (int k = 0; k < kStep; ++k) pattern_values[k] = scale[k % c];
    Lanes pattern[3];
    std::memcpy(pattern, pattern_values, sizeof(pattern));
    const Lanes black_v = Splat(black);
    const LaneMask zero = {};
    LaneMask m = zero;
    for (; j + kStep <= n; j += kStep) {
      for (int q = 0; q < 3; ++q) {
        const Lanes dk = d != nullptr ? Load(d + j + kLanes * q) : Splat(0.0f);
        const Lanes v = ((Load(p + j + kLanes * q) - black_v) - dk) * pattern[q];
        Store(p + j + kLanes * q, v);
        LaneMask bits;
        std::memcpy(&bits, &v, sizeof(bits));
        bits &= 0x7fffffff;
        bits = bits > 0x7f800000 ? zero : bits;
        m = m > bits ? m : bits;
      }
    }
    for (int k = 0; k < kLanes; ++k) largest_bits = std::max(largest_bits, static_cast<int32_t>(m[k]));
#endif
    for (; j < n; ++j) {
      const float v = ((p[j] - black) - (d != nullptr ? d[j] : 0.0f)) * scale[(j % c)];
      p[j] = v;
      largest_bits = std::max(largest_bits, MagnitudeBits(v));
    }
  }
  float largest;
  std::memcpy(&largest, &largest_bits, sizeof(largest));
  return largest;
}

io::Status SolvePhotometricStereo(const std::vector<cv::Mat>& frames, const BlockLights& lights,
                                  const PsOptions& options, const cv::Mat& mask, const cv::Mat& points_m, PsMaps* out,
                                  int threads) {
  auto solver = PsSolver::Create(lights, options);
  if (!solver.ok()) return solver.status();
  if (static_cast<int>(frames.size()) != lights.count())
    return io::Status::BadInput(fmt::format("{} frames for {} lights", frames.size(), lights.count()));
  const int rows = frames[0].rows, cols = frames[0].cols, channels = frames[0].channels();
  for (const auto& f : frames) {
    if (f.rows != rows || f.cols != cols || f.type() != frames[0].type() || f.depth() != CV_32F)
      return io::Status::BadInput("frames differ in size or type (expected CV_32F, all alike)");
  }
  if (lights.near_field() && (points_m.rows != rows || points_m.cols != cols || points_m.type() != CV_32FC3))
    return io::Status::BadInput("near-field solve needs a CV_32FC3 map of surface points the size of the frames");
  // Stack frames: light i's pixels contiguous.
  const int64_t k_count = static_cast<int64_t>(rows) * cols;
  std::vector<float> stack(static_cast<size_t>(k_count * channels * lights.count()));
  for (int i = 0; i < lights.count(); ++i) {
    cv::Mat dst(rows, cols, frames[i].type(), stack.data() + i * k_count * channels);
    frames[i].copyTo(dst);
  }
  cv::Mat mask8;
  if (!mask.empty()) {
    mask8 = mask.isContinuous() ? mask : mask.clone();
  }
  cv::Mat points = points_m.empty() ? points_m : (points_m.isContinuous() ? points_m : points_m.clone());
  out->normals.create(rows, cols, CV_32FC3);
  out->albedo.create(rows, cols, CV_32FC3);
  out->confidence.create(rows, cols, CV_32FC1);
  constexpr int64_t kTile = 4096;
  const int nthreads = io::ResolveThreads(threads);
  std::vector<std::vector<float>> scratch(static_cast<size_t>(nthreads));
  io::ParallelFor(0, k_count, kTile, nthreads, [&](int64_t b, int64_t e) {
    BlockInput in;
    in.data = stack.data() + b * channels;
    in.light_stride = k_count * channels;
    in.pixels = e - b;
    in.channels = channels;
    in.mask = mask8.empty() ? nullptr : mask8.ptr<uint8_t>() + b;
    in.points_m = points.empty() ? nullptr : points.ptr<float>() + 3 * b;
    BlockOutputs o;
    o.normals = out->normals.ptr<float>() + 3 * b;
    o.albedo = out->albedo.ptr<float>() + 3 * b;
    o.confidence = out->confidence.ptr<float>() + b;
    solver->SolveBlock(in, o, &scratch[static_cast<size_t>(io::CurrentThreadIndex())]);
  });
  return io::Status::Ok();
}

double AngleDeg(const Eigen::Vector3f& a, const Eigen::Vector3f& b) {
  const double d = std::clamp(static_cast<double>(a.dot(b)), -1.0, 1.0);
  return std::acos(d) * 180.0 / M_PI;
}

}  // namespace lumenrig::solvers
