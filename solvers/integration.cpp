#include "lumenrig/solvers/integration.h"

#include <cmath>
#include <vector>

#include <fmt/format.h>
#include <Eigen/SparseCholesky>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/parallel.h"
#include "poisson_multigrid.h"

namespace lumenrig::solvers {
namespace {

/// Gradient field (p = df/du, q = df/dv) and validity of every pixel.
struct Field {
  cv::Mat p, q;   // CV_32F
  cv::Mat valid;  // CV_8U 0/1
  bool metric = false;
};

Field MakeField(const cv::Mat& normals, const cv::Mat& mask, const IntegrationOptions& o) {
  Field f;
  const int h = normals.rows, w = normals.cols;
  f.p = cv::Mat::zeros(h, w, CV_32F);
  f.q = cv::Mat::zeros(h, w, CV_32F);
  f.valid = cv::Mat::zeros(h, w, CV_8U);
  f.metric = o.intrinsics.has_value() && o.reference_depth_m > 0;
  const double min_nz = o.min_nz;
  for (int v = 0; v < h; ++v) {
    const cv::Vec3f* n = normals.ptr<cv::Vec3f>(v);
    const uint8_t* m = mask.empty() ? nullptr : mask.ptr<uint8_t>(v);
    float* p = f.p.ptr<float>(v);
    float* q = f.q.ptr<float>(v);
    uint8_t* ok = f.valid.ptr<uint8_t>(v);
    for (int u = 0; u < w; ++u) {
      const double nx = n[u][0], ny = n[u][1], nz = n[u][2];
      if ((m && m[u] == 0) || !std::isfinite(nx) || !std::isfinite(ny) || !std::isfinite(nz) ||
          (nx == 0 && ny == 0 && nz == 0))
        continue;
      ok[u] = 1;
      if (!f.metric) {
        const double z = std::max(nz, min_nz);
        p[u] = static_cast<float>(nx / z);
        q[u] = static_cast<float>(-ny / z);
      } else {
        const io::Intrinsics& k = *o.intrinsics;
        const double rx = (u + 0.5 - k.cx) / k.fx, ry = -(v + 0.5 - k.cy) / k.fy;
        const double rnorm = std::sqrt(rx * rx + ry * ry + 1.0);
        // n.r is negative for surfaces facing the camera; clamp its magnitude.
        const double nr = std::min(nx * rx + ny * ry - nz, -min_nz * rnorm);
        p[u] = static_cast<float>(-(nx / k.fx) / nr);
        q[u] = static_cast<float>((ny / k.fy) / nr);
      }
    }
  }
  return f;
}

/// Frankot-Chellappa on the even extension: p is odd under the u-mirror and
/// even under the v-mirror, q the reverse, so the 2H x 2W field is periodic.
cv::Mat FrankotChellappa(const Field& f, int threads) {
  const int h = f.p.rows, w = f.p.cols;
  const int eh = 2 * h, ew = 2 * w;
  cv::Mat pe(eh, ew, CV_32F), qe(eh, ew, CV_32F);
  for (int v = 0; v < eh; ++v) {
    const int sv = v < h ? v : eh - 1 - v;
    const float sign_v = v < h ? 1.0f : -1.0f;
    const float* p = f.p.ptr<float>(sv);
    const float* q = f.q.ptr<float>(sv);
    float* po = pe.ptr<float>(v);
    float* qo = qe.ptr<float>(v);
    for (int u = 0; u < ew; ++u) {
      const int su = u < w ? u : ew - 1 - u;
      const float sign_u = u < w ? 1.0f : -1.0f;
      po[u] = sign_u * p[su];
      qo[u] = sign_v * q[su];
    }
  }
  // The two forward transforms are independent (same result whichever runs
  // where); each job releases its input as soon as it is transformed.
  cv::Mat pf, qf;
  io::ParallelFor(0, 2, 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t j = b; j < e; ++j) {
      cv::Mat& in = j == 0 ? pe : qe;
      cv::dft(in, j == 0 ? pf : qf, cv::DFT_COMPLEX_OUTPUT);
      in.release();
    }
  });
  // F = (-i wu P - i wv Q) / (wu^2 + wv^2), F(0) = 0 (mean fixed later).
  for (int v = 0; v < eh; ++v) {
    const double wv = 2.0 * M_PI * (v <= eh / 2 ? v : v - eh) / eh;
    cv::Vec2f* pp = pf.ptr<cv::Vec2f>(v);
    const cv::Vec2f* qq = qf.ptr<cv::Vec2f>(v);
    for (int u = 0; u < ew; ++u) {
      const double wu = 2.0 * M_PI * (u <= ew / 2 ? u : u - ew) / ew;
      const double d = wu * wu + wv * wv;
      if (d == 0) {
        pp[u] = cv::Vec2f(0, 0);
        continue;
      }
      // -i * (a + ib) = b - ia
      const double re = wu * pp[u][1] + wv * qq[u][1];
      const double im = -(wu * pp[u][0] + wv * qq[u][0]);
      pp[u] = cv::Vec2f(static_cast<float>(re / d), static_cast<float>(im / d));
    }
  }
  qf.release();
  cv::Mat z;
  cv::dft(pf, z, cv::DFT_INVERSE | cv::DFT_SCALE | cv::DFT_REAL_OUTPUT);
  return z(cv::Rect(0, 0, w, h)).clone();
}

/// The masked Poisson system: least-squares fit of forward differences on
/// edges between valid pixels to the mean of the two pixels' gradients, plus a
/// tiny ridge (1e-9) that makes the normal equations definite (each connected
/// part floats freely).
struct PoissonSystem {
  cv::Mat index;  // CV_32S, unknown of each valid pixel, -1 elsewhere
  int count = 0;
  Eigen::SparseMatrix<double> a;  // assembled for the direct solve only
  Eigen::VectorXd rhs;
};

PoissonSystem BuildPoisson(const Field& f, bool with_matrix) {
  PoissonSystem sys;
  const int h = f.p.rows, w = f.p.cols;
  sys.index = cv::Mat(h, w, CV_32S, cv::Scalar(-1));
  int count = 0;
  for (int v = 0; v < h; ++v) {
    const uint8_t* ok = f.valid.ptr<uint8_t>(v);
    int* id = sys.index.ptr<int>(v);
    for (int u = 0; u < w; ++u)
      if (ok[u]) id[u] = count++;
  }
  sys.count = count;
  if (count == 0) return sys;
  const cv::Mat& index = sys.index;
  sys.rhs = Eigen::VectorXd::Zero(count);
  Eigen::VectorXd& rhs = sys.rhs;
  // Right-hand side: per edge f[b] - f[a] = g (forward difference, mean
  // gradient), summed in the order above, left, right, below.
  auto rhs_row = [&](int v) {
    const int* id = index.ptr<int>(v);
    const int* above = v > 0 ? index.ptr<int>(v - 1) : nullptr;
    const int* below = v + 1 < h ? index.ptr<int>(v + 1) : nullptr;
    const float* p = f.p.ptr<float>(v);
    const float* q = f.q.ptr<float>(v);
    const float* q_above = v > 0 ? f.q.ptr<float>(v - 1) : nullptr;
    const float* q_below = v + 1 < h ? f.q.ptr<float>(v + 1) : nullptr;
    for (int u = 0; u < w; ++u) {
      const int i = id[u];
      if (i < 0) continue;
      double r = 0;
      if (above && above[u] >= 0) r += 0.5 * (q_above[u] + q[u]);
      if (u > 0 && id[u - 1] >= 0) r += 0.5 * (p[u - 1] + p[u]);
      if (u + 1 < w && id[u + 1] >= 0) r -= 0.5 * (p[u] + p[u + 1]);
      if (below && below[u] >= 0) r -= 0.5 * (q[u] + q_below[u]);
      rhs[i] = r;
    }
  };
  for (int v = 0; v < h; ++v) rhs_row(v);
  if (!with_matrix) return sys;
  // Column a of the (symmetric) matrix holds, in increasing row order, the
  // unknowns above, left, a itself, right and below: written straight into
  // Eigen's compressed storage.
  int64_t nnz = count;
  for (int v = 0; v < h; ++v) {
    const int* id = index.ptr<int>(v);
    const int* below = v + 1 < h ? index.ptr<int>(v + 1) : nullptr;
    for (int u = 0; u < w; ++u) {
      if (id[u] < 0) continue;
      nnz += 2 * ((u + 1 < w && id[u + 1] >= 0) + (below && below[u] >= 0));
    }
  }
  Eigen::SparseMatrix<double>& a = sys.a;
  a.resize(count, count);
  a.resizeNonZeros(nnz);
  int* outer = a.outerIndexPtr();
  int* inner = a.innerIndexPtr();
  double* value = a.valuePtr();
  int64_t k = 0;
  for (int v = 0; v < h; ++v) {
    const int* id = index.ptr<int>(v);
    const int* above = v > 0 ? index.ptr<int>(v - 1) : nullptr;
    const int* below = v + 1 < h ? index.ptr<int>(v + 1) : nullptr;
    for (int u = 0; u < w; ++u) {
      const int i = id[u];
      if (i < 0) continue;
      outer[i] = static_cast<int>(k);
      double diag = 1e-9;
      auto edge = [&](int j) {
        inner[k] = j;
        value[k++] = -1.0;
        diag += 1;
      };
      if (above && above[u] >= 0) edge(above[u]);
      if (u > 0 && id[u - 1] >= 0) edge(id[u - 1]);
      const int64_t self = k++;
      if (u + 1 < w && id[u + 1] >= 0) edge(id[u + 1]);
      if (below && below[u] >= 0) edge(below[u]);
      inner[self] = i;
      value[self] = diag;
    }
  }
  outer[count] = static_cast<int>(k);
  return sys;
}

/// Integrates the field over its valid pixels. Up to
/// direct_solver_max_pixels unknowns: sparse Cholesky (exact). Larger masks:
/// conjugate gradients preconditioned by a multigrid V-cycle
/// (poisson_multigrid.h), whose cost grows linearly with the mask.
cv::Mat Poisson(const Field& f, const IntegrationOptions& o, int threads, DepthMap* out) {
  const int h = f.p.rows, w = f.p.cols;
  cv::Mat z = cv::Mat::zeros(h, w, CV_32F);
  // The iterative solve needs no assembled matrix (it applies the operator
  // from the index map).
  const int valid = cv::countNonZero(f.valid);
  const PoissonSystem sys = BuildPoisson(f, valid <= o.direct_solver_max_pixels);
  if (sys.count == 0) return z;
  Eigen::VectorXd x;
  if (sys.count <= o.direct_solver_max_pixels) {
    Eigen::SimplicialLDLT<Eigen::SparseMatrix<double>> ldlt(sys.a);
    x = ldlt.solve(sys.rhs);
    out->method = "poisson-ldlt";
  } else {
    internal::MultigridReport report;
    x = internal::SolvePoissonMultigrid(sys.index, sys.rhs, o.cg_tolerance, o.cg_max_iterations, threads, &report);
    out->method = "poisson-multigrid-cg";
    out->iterations = report.iterations;
    out->residual = report.residual;
  }
  for (int v = 0; v < h; ++v)
    for (int u = 0; u < w; ++u) {
      const int i = sys.index.at<int>(v, u);
      if (i >= 0) z.at<float>(v, u) = static_cast<float>(x[i]);
    }
  return z;
}

}  // namespace

io::Status IntegrateNormals(const cv::Mat& normals, const cv::Mat& mask, const IntegrationOptions& options,
                            DepthMap* out, int threads) {
  if (normals.empty() || normals.type() != CV_32FC3)
    return io::Status::Internal("IntegrateNormals: normals must be a non-empty CV_32FC3 image");
  if (!mask.empty() && (mask.type() != CV_8U || mask.size() != normals.size()))
    return io::Status::Internal("IntegrateNormals: mask must be CV_8U of the normals' size");
  if (options.intrinsics && (!(options.intrinsics->fx > 0) || !(options.intrinsics->fy > 0)))
    return io::Status::BadInput(fmt::format("intrinsics: focal lengths must be positive (fx {}, fy {})",
                                            options.intrinsics->fx, options.intrinsics->fy));
  const Field field = MakeField(normals, mask, options);
  IntegrationMethod method = options.method;
  if (method == IntegrationMethod::kAuto) {
    method = (!mask.empty() && cv::countNonZero(mask) < mask.rows * mask.cols) ? IntegrationMethod::kPoisson
                                                                               : IntegrationMethod::kFrankotChellappa;
  }
  cv::Mat z;
  out->iterations = 0;  // set by the iterative solver only
  out->residual = 0.0;
  if (method == IntegrationMethod::kPoisson) {
    z = Poisson(field, options, threads, out);
  } else {
    z = FrankotChellappa(field, threads);
    out->method = "frankot-chellappa";
  }
  // Fix the free constant: zero mean (pixels) / geometric mean = reference (metres).
  const double mean = cv::mean(z, field.valid)[0];
  z -= mean;
  if (field.metric) {
    cv::exp(z, z);
    z *= options.reference_depth_m;
    out->unit = "metres";
  } else {
    out->unit = "pixels";
  }
  z.setTo(0.0f, field.valid == 0);
  out->depth = z;
  return io::Status::Ok();
}

}  // namespace lumenrig::solvers
