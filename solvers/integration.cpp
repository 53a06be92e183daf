#include "lumenrig/solvers/integration.h"

#include <cmath>
#include <vector>

#include <fmt/format.h>
#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCholesky>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/parallel.h"

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
  Eigen::SparseMatrix<double> a;
  Eigen::VectorXd rhs;
};

PoissonSystem BuildPoisson(const Field& f) {
  PoissonSystem sys;
  const int h = f.p.rows, w = f.p.cols;
  sys.index = cv::Mat(h, w, CV_32S, cv::Scalar(-1));
  int count = 0;
  for (int v = 0; v < h; ++v)
    for (int u = 0; u < w; ++u)
      if (f.valid.at<uint8_t>(v, u)) sys.index.at<int>(v, u) = count++;
  sys.count = count;
  if (count == 0) return sys;
  const cv::Mat& index = sys.index;
  std::vector<Eigen::Triplet<double>> triplets;
  triplets.reserve(static_cast<size_t>(count) * 5);
  Eigen::VectorXd& rhs = sys.rhs;
  rhs = Eigen::VectorXd::Zero(count);
  std::vector<double> diag(static_cast<size_t>(count), 1e-9);
  auto edge = [&](int a, int b, double g) {  // f[b] - f[a] = g
    diag[static_cast<size_t>(a)] += 1;
    diag[static_cast<size_t>(b)] += 1;
    triplets.emplace_back(a, b, -1.0);
    triplets.emplace_back(b, a, -1.0);
    rhs[a] -= g;
    rhs[b] += g;
  };
  for (int v = 0; v < h; ++v) {
    for (int u = 0; u < w; ++u) {
      const int a = index.at<int>(v, u);
      if (a < 0) continue;
      if (u + 1 < w && index.at<int>(v, u + 1) >= 0)
        edge(a, index.at<int>(v, u + 1), 0.5 * (f.p.at<float>(v, u) + f.p.at<float>(v, u + 1)));
      if (v + 1 < h && index.at<int>(v + 1, u) >= 0)
        edge(a, index.at<int>(v + 1, u), 0.5 * (f.q.at<float>(v, u) + f.q.at<float>(v + 1, u)));
    }
  }
  for (int i = 0; i < count; ++i) triplets.emplace_back(i, i, diag[static_cast<size_t>(i)]);
  sys.a.resize(count, count);
  sys.a.setFromTriplets(triplets.begin(), triplets.end());
  return sys;
}

/// The field on a grid twice as coarse: a coarse pixel is valid when any of
/// its four fine pixels is, with their mean gradient scaled to the coarse
/// spacing (x2), so depth keeps its unit.
Field Coarsen(const Field& f) {
  Field c;
  const int h = f.p.rows, w = f.p.cols, ch = (h + 1) / 2, cw = (w + 1) / 2;
  c.p = cv::Mat::zeros(ch, cw, CV_32F);
  c.q = cv::Mat::zeros(ch, cw, CV_32F);
  c.valid = cv::Mat::zeros(ch, cw, CV_8U);
  c.metric = f.metric;
  for (int v = 0; v < ch; ++v)
    for (int u = 0; u < cw; ++u) {
      double sp = 0, sq = 0;
      int n = 0;
      for (int dv = 0; dv < 2; ++dv)
        for (int du = 0; du < 2; ++du) {
          const int fv = 2 * v + dv, fu = 2 * u + du;
          if (fv >= h || fu >= w || !f.valid.at<uint8_t>(fv, fu)) continue;
          sp += f.p.at<float>(fv, fu);
          sq += f.q.at<float>(fv, fu);
          ++n;
        }
      if (n < 4) continue;
      c.valid.at<uint8_t>(v, u) = 1;
      c.p.at<float>(v, u) = static_cast<float>(2.0 * sp / n);
      c.q.at<float>(v, u) = static_cast<float>(2.0 * sq / n);
    }
  return c;
}

/// Integrates the field over its valid pixels. Up to
/// direct_solver_max_pixels unknowns: sparse Cholesky (exact). Larger masks:
/// cascadic conjugate gradients (Deuflhard, "Cascadic conjugate gradient
/// methods for elliptic partial differential equations", 1994): the problem
/// is solved on a grid twice as coarse (recursively, down to the direct
/// solver), the coarse depth is carried to this grid to first order (coarse
/// value plus this grid's gradients times the offset from the coarse pixel's
/// centre), and conjugate gradients start from there, so the few iterations
/// left only remove fine-scale error.
cv::Mat Poisson(const Field& f, const IntegrationOptions& o, std::string* method) {
  const int h = f.p.rows, w = f.p.cols;
  cv::Mat z = cv::Mat::zeros(h, w, CV_32F);
  const PoissonSystem sys = BuildPoisson(f);
  if (sys.count == 0) return z;
  Eigen::VectorXd x;
  if (sys.count <= o.direct_solver_max_pixels || std::min(h, w) < 16) {
    Eigen::SimplicialLDLT<Eigen::SparseMatrix<double>> ldlt(sys.a);
    x = ldlt.solve(sys.rhs);
    *method = "poisson-ldlt";
  } else {
    const Field coarse = Coarsen(f);
    std::string coarse_method;
    const cv::Mat zc = Poisson(coarse, o, &coarse_method);
    Eigen::VectorXd guess(sys.count);
    for (int v = 0; v < h; ++v)
      for (int u = 0; u < w; ++u) {
        const int i = sys.index.at<int>(v, u);
        if (i < 0) continue;
        // The nearest valid coarse pixel (its own, else a neighbour's).
        int cv_ = v / 2, cu = u / 2;
        if (!coarse.valid.at<uint8_t>(cv_, cu)) {
          int best = -1;
          double best_d = 1e30;
          for (int dv = -2; dv <= 2; ++dv)
            for (int du = -2; du <= 2; ++du) {
              const int nv = v / 2 + dv, nu = u / 2 + du;
              if (nv < 0 || nu < 0 || nv >= coarse.valid.rows || nu >= coarse.valid.cols ||
                  !coarse.valid.at<uint8_t>(nv, nu))
                continue;
              const double d = (2 * nv + 0.5 - v) * (2 * nv + 0.5 - v) + (2 * nu + 0.5 - u) * (2 * nu + 0.5 - u);
              if (d < best_d) best_d = d, best = nv * coarse.valid.cols + nu;
            }
          if (best < 0) {
            guess[i] = 0.0;
            continue;
          }
          cv_ = best / coarse.valid.cols;
          cu = best % coarse.valid.cols;
        }
        guess[i] = zc.at<float>(cv_, cu) + f.p.at<float>(v, u) * (u - (2 * cu + 0.5)) +
                   f.q.at<float>(v, u) * (v - (2 * cv_ + 0.5));
      }
    Eigen::ConjugateGradient<Eigen::SparseMatrix<double>, Eigen::Lower | Eigen::Upper,
                             Eigen::IncompleteCholesky<double>>
        cg;
    cg.setTolerance(o.cg_tolerance);
    cg.setMaxIterations(o.cg_max_iterations);
    cg.compute(sys.a);
    x = cg.solveWithGuess(sys.rhs, guess);
    *method = "poisson-cascadic-cg";
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
  if (method == IntegrationMethod::kPoisson) {
    z = Poisson(field, options, &out->method);
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
