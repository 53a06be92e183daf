// Levin closed-form matting restricted to the trimap's unknown band
// (docs/matting.md). The system is assembled row by row for the unknown
// pixels only; rows are independent, so assembly runs in fixed parallel
// chunks and is identical for any thread count.
#include <algorithm>
#include <array>
#include <cmath>
#include <vector>

#include <fmt/format.h>
#include <Eigen/Dense>
#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCholesky>
#include <Eigen/SparseCore>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/solvers/matting.h"
#include "matting_internal.h"

namespace lumenrig::solvers {

namespace internal {

double SampledQuantile(const cv::Mat& rgb, double q, bool norm) {
  CV_Assert(rgb.type() == CV_32FC3);
  const int64_t total = static_cast<int64_t>(rgb.total());
  if (total == 0) return 0.0;
  const int stride = std::max<int>(1, static_cast<int>(std::sqrt(static_cast<double>(total) / 1e5)));
  std::vector<float> values;
  for (int y = 0; y < rgb.rows; y += stride) {
    const float* r = rgb.ptr<float>(y);
    for (int x = 0; x < rgb.cols; x += stride) {
      const float* p = r + 3 * x;
      values.push_back(norm ? std::sqrt(p[0] * p[0] + p[1] * p[1] + p[2] * p[2])
                            : io::Bt709Luminance(p[0], p[1], p[2]));
    }
  }
  const size_t k = std::min(values.size() - 1, static_cast<size_t>(q * static_cast<double>(values.size())));
  std::nth_element(values.begin(), values.begin() + static_cast<std::ptrdiff_t>(k), values.end());
  return values[k];
}

}  // namespace internal

namespace {

bool IsKnown(uint8_t label) { return label == kTrimapBackground || label == kTrimapForeground; }

// Unknown pixels in raster order with per-row offsets, so a neighbour's
// unknown index is a binary search in its row (memory O(unknown + rows)).
struct BandIndex {
  std::vector<int64_t> pixels;     // y * cols + x
  std::vector<int64_t> row_start;  // rows + 1 offsets into pixels
  int cols = 0;

  int64_t Find(int y, int x) const {
    const int64_t key = static_cast<int64_t>(y) * cols + x;
    auto begin = pixels.begin() + row_start[y];
    auto end = pixels.begin() + row_start[y + 1];
    auto it = std::lower_bound(begin, end, key);
    return (it != end && *it == key) ? static_cast<int64_t>(it - pixels.begin()) : -1;
  }
};

BandIndex IndexUnknown(const cv::Mat& trimap) {
  BandIndex index;
  index.cols = trimap.cols;
  index.row_start.resize(static_cast<size_t>(trimap.rows) + 1);
  for (int y = 0; y < trimap.rows; ++y) {
    index.row_start[y] = static_cast<int64_t>(index.pixels.size());
    const uint8_t* t = trimap.ptr<uint8_t>(y);
    for (int x = 0; x < trimap.cols; ++x) {
      if (!IsKnown(t[x])) index.pixels.push_back(static_cast<int64_t>(y) * trimap.cols + x);
    }
  }
  index.row_start[trimap.rows] = static_cast<int64_t>(index.pixels.size());
  return index;
}

constexpr int kSlots = 25;  // 5x5 neighbourhood reached by 3x3 windows

struct Row {
  std::array<int32_t, kSlots> col;  // unknown index, -1 = none
  std::array<double, kSlots> val;
  double rhs = 0.0;
};

io::Status BuildBand(const cv::Mat& image, const cv::Mat& trimap, double epsilon, double colour_level,
                     const BandIndex& index, Eigen::SparseMatrix<double>* laplacian, Eigen::VectorXd* rhs,
                     int threads) {
  const int h = image.rows, w = image.cols;
  const int64_t n = static_cast<int64_t>(index.pixels.size());
  const double scale = 1.0 / colour_level;
  std::vector<Row> rows(static_cast<size_t>(n));
  io::ParallelFor(0, n, 2048, threads, [&](int64_t i0, int64_t i1) {
    for (int64_t i = i0; i < i1; ++i) {
      Row& row = rows[static_cast<size_t>(i)];
      row.val.fill(0.0);
      row.col.fill(-1);
      std::array<bool, kSlots> touched{};
      const int y = static_cast<int>(index.pixels[i] / w);
      const int x = static_cast<int>(index.pixels[i] % w);
      auto colour = [&](int yy, int xx) {
        const float* p = image.ptr<float>(yy) + 3 * xx;
        return Eigen::Vector3d(p[0] * scale, p[1] * scale, p[2] * scale);
      };
      const Eigen::Vector3d ci = colour(y, x);
      // Every 3x3 window (fully inside the image) that contains pixel i.
      for (int wy = y - 1; wy <= y + 1; ++wy) {
        if (wy < 1 || wy > h - 2) continue;
        for (int wx = x - 1; wx <= x + 1; ++wx) {
          if (wx < 1 || wx > w - 2) continue;
          std::array<Eigen::Vector3d, 9> c;
          Eigen::Vector3d mu = Eigen::Vector3d::Zero();
          for (int k = 0; k < 9; ++k) {
            c[k] = colour(wy - 1 + k / 3, wx - 1 + k % 3);
            mu += c[k];
          }
          mu /= 9.0;
          Eigen::Matrix3d cov = Eigen::Matrix3d::Zero();
          for (int k = 0; k < 9; ++k) cov += (c[k] - mu) * (c[k] - mu).transpose();
          cov /= 9.0;
          cov += (epsilon / 9.0) * Eigen::Matrix3d::Identity();
          const Eigen::Vector3d g = cov.inverse() * (ci - mu);
          for (int k = 0; k < 9; ++k) {
            const int jy = wy - 1 + k / 3, jx = wx - 1 + k % 3;
            const int slot = (jy - y + 2) * 5 + (jx - x + 2);
            const double delta = (jy == y && jx == x) ? 1.0 : 0.0;
            row.val[slot] += delta - (1.0 + g.dot(c[k] - mu)) / 9.0;
            touched[slot] = true;
          }
        }
      }
      for (int slot = 0; slot < kSlots; ++slot) {
        if (!touched[slot]) continue;
        const int jy = y + slot / 5 - 2, jx = x + slot % 5 - 2;
        const uint8_t label = trimap.ptr<uint8_t>(jy)[jx];
        if (IsKnown(label)) {
          if (label == kTrimapForeground) row.rhs -= row.val[slot];
        } else {
          row.col[slot] = static_cast<int32_t>(index.Find(jy, jx));
        }
      }
    }
  });

  // Column i holds row i's entries (L is symmetric); slots are in raster
  // order, so row indices within a column arrive sorted.
  Eigen::VectorXi counts(n);
  for (int64_t i = 0; i < n; ++i) {
    int count = 0;
    for (int s = 0; s < kSlots; ++s) count += rows[i].col[s] >= 0 ? 1 : 0;
    counts[i] = count;
  }
  laplacian->resize(n, n);
  laplacian->setZero();
  laplacian->reserve(counts);
  rhs->resize(n);
  for (int64_t i = 0; i < n; ++i) {
    const Row& row = rows[static_cast<size_t>(i)];
    for (int s = 0; s < kSlots; ++s) {
      if (row.col[s] >= 0) laplacian->insert(row.col[s], i) = row.val[s];
    }
    (*rhs)[i] = row.rhs;
  }
  laplacian->makeCompressed();
  return io::Status::Ok();
}

io::Status CheckInputs(const cv::Mat& image, const cv::Mat& trimap) {
  if (image.empty() || image.type() != CV_32FC3) return io::Status::BadInput("matting: image must be CV_32FC3 RGB");
  if (trimap.type() != CV_8UC1 || trimap.size() != image.size()) {
    return io::Status::BadInput(fmt::format("matting: trimap must be CV_8UC1 of size {}x{}", image.cols, image.rows));
  }
  return io::Status::Ok();
}

// Local foreground colour F^ at the band pixels: a Gaussian-weighted mean of
// the known-foreground colours, computed on a block-averaged grid so memory is
// O(pixels / block^2). Returns weights (0 = no foreground nearby).
void LocalForeground(const cv::Mat& image, const cv::Mat& trimap, const BandIndex& index, double blur_px,
                     std::vector<Eigen::Vector3d>* colour, std::vector<double>* weight) {
  const int block = std::max(1, static_cast<int>(blur_px / 2.0));
  const int gh = (image.rows + block - 1) / block, gw = (image.cols + block - 1) / block;
  const double sigma = blur_px / block;
  // Only blocks within 3 sigma of a band pixel are summed, so the cost
  // follows the band, not the image.
  cv::Mat needed = cv::Mat::zeros(gh, gw, CV_8UC1);
  for (const int64_t p : index.pixels) {
    needed.at<uint8_t>(static_cast<int>(p / index.cols / block), static_cast<int>(p % index.cols / block)) = 255;
  }
  const int reach = static_cast<int>(std::ceil(3.0 * sigma)) + 1;
  cv::dilate(needed, needed, cv::getStructuringElement(cv::MORPH_RECT, cv::Size(2 * reach + 1, 2 * reach + 1)));
  cv::Mat sum = cv::Mat::zeros(gh, gw, CV_32FC3);
  cv::Mat count = cv::Mat::zeros(gh, gw, CV_32FC1);
  for (int by = 0; by < gh; ++by) {
    const uint8_t* nr = needed.ptr<uint8_t>(by);
    float* s = sum.ptr<float>(by);
    float* c = count.ptr<float>(by);
    for (int bx = 0; bx < gw; ++bx) {
      if (!nr[bx]) continue;
      for (int y = by * block; y < std::min(image.rows, (by + 1) * block); ++y) {
        const uint8_t* t = trimap.ptr<uint8_t>(y);
        const float* p = image.ptr<float>(y);
        for (int x = bx * block; x < std::min(image.cols, (bx + 1) * block); ++x) {
          if (t[x] != kTrimapForeground) continue;
          for (int ch = 0; ch < 3; ++ch) s[3 * bx + ch] += p[3 * x + ch];
          c[bx] += 1.0f;
        }
      }
    }
  }
  cv::GaussianBlur(sum, sum, cv::Size(), sigma, sigma, cv::BORDER_CONSTANT);
  cv::GaussianBlur(count, count, cv::Size(), sigma, sigma, cv::BORDER_CONSTANT);
  const size_t n = index.pixels.size();
  colour->assign(n, Eigen::Vector3d::Zero());
  weight->assign(n, 0.0);
  for (size_t i = 0; i < n; ++i) {
    // Bilinear lookup at the pixel centre in grid coordinates.
    const double gy = (static_cast<double>(index.pixels[i] / index.cols) + 0.5) / block - 0.5;
    const double gx = (static_cast<double>(index.pixels[i] % index.cols) + 0.5) / block - 0.5;
    const int y0 = std::clamp(static_cast<int>(std::floor(gy)), 0, gh - 1), y1 = std::min(y0 + 1, gh - 1);
    const int x0 = std::clamp(static_cast<int>(std::floor(gx)), 0, gw - 1), x1 = std::min(x0 + 1, gw - 1);
    const double fy = std::clamp(gy - y0, 0.0, 1.0), fx = std::clamp(gx - x0, 0.0, 1.0);
    Eigen::Vector3d s = Eigen::Vector3d::Zero();
    double c = 0.0;
    const int ys[2] = {y0, y1}, xs[2] = {x0, x1};
    const double wy[2] = {1 - fy, fy}, wx[2] = {1 - fx, fx};
    for (int a = 0; a < 2; ++a) {
      for (int b = 0; b < 2; ++b) {
        const double wgt = wy[a] * wx[b];
        const float* sp = sum.ptr<float>(ys[a]) + 3 * xs[b];
        s += wgt * Eigen::Vector3d(sp[0], sp[1], sp[2]);
        c += wgt * count.ptr<float>(ys[a])[xs[b]];
      }
    }
    if (c > 1e-3) {
      (*colour)[i] = s / c;
      (*weight)[i] = std::min(1.0, c);
    }
  }
}

}  // namespace

io::Status MattingLaplacianBand(const cv::Mat& image, const cv::Mat& trimap, double epsilon, double colour_level,
                                Eigen::SparseMatrix<double>* laplacian, Eigen::VectorXd* rhs,
                                std::vector<int64_t>* pixels, int threads) {
  LUMENRIG_RETURN_IF_ERROR(CheckInputs(image, trimap));
  if (!(epsilon > 0) || !(colour_level > 0)) {
    return io::Status::BadInput("matting Laplacian: epsilon and colour_level must be positive");
  }
  BandIndex index = IndexUnknown(trimap);
  LUMENRIG_RETURN_IF_ERROR(BuildBand(image, trimap, epsilon, colour_level, index, laplacian, rhs, threads));
  if (pixels != nullptr) *pixels = std::move(index.pixels);
  return io::Status::Ok();
}

io::Status RefineClosedForm(const cv::Mat& image, const cv::Mat& plate, const cv::Mat& trimap,
                            const ClosedFormOptions& options, cv::Mat* alpha, ClosedFormStats* stats, int threads) {
  if (!(options.epsilon > 0) || !(options.colour_level >= 0) || !(options.background_prior_weight >= 0) ||
      !(options.colour_prior_weight >= 0) || !(options.difference_sigma >= 0) || !(options.snap_sigmas >= 0) ||
      !(options.foreground_blur_px > 0) || !(options.cg_tolerance > 0) || options.max_iterations < 1) {
    return io::Status::BadInput(
        "closed-form matting options: epsilon, blur, tolerance, iterations must be positive; weights >= 0");
  }
  LUMENRIG_RETURN_IF_ERROR(CheckInputs(image, trimap));
  if (!plate.empty() && (plate.type() != CV_32FC3 || plate.size() != image.size())) {
    return io::Status::BadInput("closed-form matting: plate must be CV_32FC3 of the image's size");
  }
  double level = options.colour_level;
  if (level == 0.0) level = internal::SampledQuantile(plate.empty() ? image : plate, 0.99, false);
  if (!(level > 0)) level = 1.0;

  BandIndex index = IndexUnknown(trimap);
  const int64_t n = static_cast<int64_t>(index.pixels.size());
  const int w = image.cols;

  // Known pixels: trimap 255 -> 1, else 0 (band pixels are overwritten below).
  trimap.convertTo(*alpha, CV_32F, 1.0 / 255.0);
  cv::threshold(*alpha, *alpha, 254.5 / 255.0, 1.0, cv::THRESH_BINARY);
  ClosedFormStats local;
  local.unknown_pixels = n;
  if (n == 0) {
    local.converged = true;
    if (stats != nullptr) *stats = local;
    return io::Status::Ok();
  }

  Eigen::SparseMatrix<double> a_matrix;
  Eigen::VectorXd rhs;
  LUMENRIG_RETURN_IF_ERROR(BuildBand(image, trimap, options.epsilon, level, index, &a_matrix, &rhs, threads));

  // Known-background constraint: a band pixel whose colour matches the plate
  // within the noise (|I - B|^2 <= 3 sigma_d^2) is pulled to alpha 0.
  // Optional colour prior: a_hat = (I - B).(F^ - B) / |F^ - B|^2 with F^ the
  // local known-foreground colour (also the CG starting guess and the snap scale).
  Eigen::VectorXd guess = Eigen::VectorXd::Constant(n, 0.5);
  Eigen::VectorXd prior_weight = Eigen::VectorXd::Zero(n);
  std::vector<double> sigma_alpha(static_cast<size_t>(n), 0.0);  // sigma_d / |F^ - B|; 0 = unknown
  if (!plate.empty()) {
    std::vector<Eigen::Vector3d> fg_colour;
    std::vector<double> fg_weight;
    LocalForeground(image, trimap, index, options.foreground_blur_px, &fg_colour, &fg_weight);
    const double noise2 = 9.0 * options.difference_sigma * options.difference_sigma;
    for (int64_t i = 0; i < n; ++i) {
      const int y = static_cast<int>(index.pixels[i] / w), x = static_cast<int>(index.pixels[i] % w);
      const float* ip = image.ptr<float>(y) + 3 * x;
      const float* bp = plate.ptr<float>(y) + 3 * x;
      const Eigen::Vector3d ib(ip[0] - bp[0], ip[1] - bp[1], ip[2] - bp[2]);
      if (fg_weight[i] > 0.0) {
        const Eigen::Vector3d fb = fg_colour[i] - Eigen::Vector3d(bp[0], bp[1], bp[2]);
        if (fb.squaredNorm() > 0) {
          const double sep = fb.squaredNorm();
          guess[i] = std::clamp(ib.dot(fb) / sep, 0.0, 1.0);
          prior_weight[i] = options.colour_prior_weight * fg_weight[i] * sep / (sep + noise2 + 1e-30);
          sigma_alpha[i] = options.difference_sigma / fb.norm();
        }
      }
      if (options.difference_sigma > 0 && ib.squaredNorm() <= noise2 / 3.0) {
        guess[i] = 0.0;
        prior_weight[i] = options.background_prior_weight;
      }
    }
  }
  for (int64_t i = 0; i < n; ++i) {
    const double wgt = prior_weight[i] + 1e-9;  // ridge keeps isolated components definite
    a_matrix.coeffRef(i, i) += wgt;
    rhs[i] += wgt * guess[i];
  }
  local.nonzeros = a_matrix.nonZeros();

  Eigen::VectorXd solution;
  if (options.direct_solve) {
    // The band is a thin strip: with a fill-reducing ordering the factor stays
    // sparse and one factorisation replaces the CG iterations, whose number
    // grows with the band's width (docs/matting.md, Cost).
    Eigen::SimplicialLDLT<Eigen::SparseMatrix<double>, Eigen::Lower, Eigen::AMDOrdering<int>> ldlt;
    ldlt.compute(a_matrix);
    if (ldlt.info() == Eigen::Success && (ldlt.vectorD().array() > 0).all()) {
      solution = ldlt.solve(rhs);
      if (ldlt.info() != Eigen::Success || !solution.allFinite()) solution.resize(0);
    }
    if (solution.size() == n) {
      local.direct = true;
      local.iterations = 0;
      const double rhs_norm = rhs.norm();
      local.relative_residual = rhs_norm > 0 ? (a_matrix * solution - rhs).norm() / rhs_norm : 0.0;
      local.converged = local.relative_residual <= options.cg_tolerance;
    }
  }
  if (solution.size() != n) {
    Eigen::ConjugateGradient<Eigen::SparseMatrix<double>, Eigen::Lower | Eigen::Upper,
                             Eigen::IncompleteCholesky<double, Eigen::Lower, Eigen::AMDOrdering<int>>>
        cg;
    cg.setTolerance(options.cg_tolerance);
    cg.setMaxIterations(options.max_iterations);
    cg.compute(a_matrix);
    if (cg.preconditioner().info() == Eigen::Success) {
      solution = cg.solveWithGuess(rhs, guess);
      local.iterations = static_cast<int>(cg.iterations());
      local.relative_residual = cg.error();
      local.converged = cg.info() == Eigen::Success;
    }
  }
  if (solution.size() != n) {
    // Incomplete Cholesky broke down: fall back to the Jacobi preconditioner.
    Eigen::ConjugateGradient<Eigen::SparseMatrix<double>, Eigen::Lower | Eigen::Upper> cg;
    cg.setTolerance(options.cg_tolerance);
    cg.setMaxIterations(options.max_iterations);
    cg.compute(a_matrix);
    solution = cg.solveWithGuess(rhs, guess);
    local.iterations = static_cast<int>(cg.iterations());
    local.relative_residual = cg.error();
    local.converged = cg.info() == Eigen::Success;
  }
  for (int64_t i = 0; i < n; ++i) {
    const int y = static_cast<int>(index.pixels[i] / w), x = static_cast<int>(index.pixels[i] % w);
    double a = solution[i];
    // Noise-aware snapping, as for the ratio methods.
    const double snap = options.snap_sigmas * sigma_alpha[i];
    if (a < snap) a = 0.0;
    if (a > 1.0 - snap) a = 1.0;
    alpha->ptr<float>(y)[x] = static_cast<float>(std::clamp(a, 0.0, 1.0));
  }
  if (stats != nullptr) *stats = local;
  return io::Status::Ok();
}

}  // namespace lumenrig::solvers
