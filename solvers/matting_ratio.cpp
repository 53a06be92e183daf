// Backlit-ratio and Smith-Blinn triangulation mattes, noise estimation and
// foreground un-premultiplication (docs/matting.md).
#include <algorithm>
#include <cmath>
#include <vector>

#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/solvers/matting.h"

namespace lumenrig::solvers {

namespace {

constexpr int64_t kRowGrain = 16;

// Replaces pixels where `valid` is 0 by the Gaussian-weighted mean of valid
// neighbours (normalised convolution, sigma in pixels); 0 when none is near.
void FillInvalid(const cv::Mat& valid, double sigma_px, cv::Mat* alpha) {
  if (static_cast<size_t>(cv::countNonZero(valid)) == valid.total()) return;
  cv::Mat weight;
  valid.convertTo(weight, CV_32F, 1.0 / 255.0);
  cv::Mat num = alpha->mul(weight);
  cv::GaussianBlur(num, num, cv::Size(), sigma_px);
  cv::GaussianBlur(weight, weight, cv::Size(), sigma_px);
  for (int y = 0; y < alpha->rows; ++y) {
    float* a = alpha->ptr<float>(y);
    const uint8_t* v = valid.ptr<uint8_t>(y);
    const float* n = num.ptr<float>(y);
    const float* w = weight.ptr<float>(y);
    for (int x = 0; x < alpha->cols; ++x) {
      if (v[x]) continue;
      a[x] = w[x] > 1e-4f ? std::clamp(n[x] / w[x], 0.0f, 1.0f) : 0.0f;
    }
  }
}

// Confidence from the alpha standard deviation and a chi-square-like residual
// ratio (residual^2 / expected residual^2, mean 1 under the noise). The fit
// term stays 1 up to 3, the 95% point of chi^2_2 / 2 (a residual that noise
// explains), and decays beyond.
constexpr double kResidualRatio95 = 3.0;
float ConfidenceFrom(double sigma_alpha, double residual_ratio, double alpha_tolerance) {
  const double precision = 1.0 / (1.0 + (sigma_alpha / alpha_tolerance) * (sigma_alpha / alpha_tolerance));
  const double fit = std::exp(-0.5 * std::max(0.0, residual_ratio - kResidualRatio95));
  return static_cast<float>(precision * fit);
}

// Snaps values within k sigma of 0 or 1 and clamps to [0, 1].
double SnapAlpha(double a, double sigma_alpha, double k) {
  if (a < k * sigma_alpha) return 0.0;
  if (a > 1.0 - k * sigma_alpha) return 1.0;
  return std::clamp(a, 0.0, 1.0);
}

io::Status CheckRgb(const cv::Mat& m, const char* what, cv::Size size) {
  if (m.empty()) return io::Status::BadInput(fmt::format("{}: image is empty", what));
  if (m.type() != CV_32FC3) return io::Status::BadInput(fmt::format("{}: expected a CV_32FC3 RGB image", what));
  if (m.size() != size) {
    return io::Status::BadInput(
        fmt::format("{}: size {}x{} differs from {}x{}", what, m.cols, m.rows, size.width, size.height));
  }
  return io::Status::Ok();
}

}  // namespace

namespace {

// Immerkaer's estimate over d(y, x) = a - b (or a alone when b is empty).
double DifferenceNoise(const cv::Mat& a, const cv::Mat& b) {
  CV_Assert(a.depth() == CV_32F && (b.empty() || (b.type() == a.type() && b.size() == a.size())));
  const int h = a.rows, w = a.cols, c = a.channels();
  if (h < 3 || w < 3) return 0.0;
  const int64_t interior = static_cast<int64_t>(h - 2) * (w - 2);
  const int stride = std::max<int>(1, static_cast<int>(std::ceil(std::sqrt(static_cast<double>(interior) / 1e6))));
  std::vector<float> responses;
  responses.reserve(static_cast<size_t>(interior / (int64_t(stride) * stride) + 1) * c);
  const bool pair = !b.empty();
  for (int y = 1; y + 1 < h; y += stride) {
    const float* a0 = a.ptr<float>(y - 1);
    const float* a1 = a.ptr<float>(y);
    const float* a2 = a.ptr<float>(y + 1);
    const float* b0 = pair ? b.ptr<float>(y - 1) : nullptr;
    const float* b1 = pair ? b.ptr<float>(y) : nullptr;
    const float* b2 = pair ? b.ptr<float>(y + 1) : nullptr;
    for (int x = 1; x + 1 < w; x += stride) {
      for (int ch = 0; ch < c; ++ch) {
        // The float difference, rounded as a - b stored in an image would be.
        auto at = [&](const float* ra, const float* rb, int xx) -> float {
          return pair ? ra[xx * c + ch] - rb[xx * c + ch] : ra[xx * c + ch];
        };
        // Immerkaer 1996 operator [1 -2 1; -2 4 -2; 1 -2 1] (squared weights sum to 36).
        const float r = at(a0, b0, x - 1) - 2 * at(a0, b0, x) + at(a0, b0, x + 1) - 2 * at(a1, b1, x - 1) +
                        4 * at(a1, b1, x) - 2 * at(a1, b1, x + 1) + at(a2, b2, x - 1) - 2 * at(a2, b2, x) +
                        at(a2, b2, x + 1);
        responses.push_back(std::fabs(r));
      }
    }
  }
  if (responses.empty()) return 0.0;
  auto mid = responses.begin() + responses.size() / 2;
  std::nth_element(responses.begin(), mid, responses.end());
  // median |N(0, 36 sigma^2)| = 0.67449 * 6 sigma.
  return static_cast<double>(*mid) / (0.67449 * 6.0);
}

}  // namespace

double EstimateDifferenceNoise(const cv::Mat& difference) { return DifferenceNoise(difference, cv::Mat()); }

double EstimateDifferenceNoise(const cv::Mat& a, const cv::Mat& b) { return DifferenceNoise(a, b); }

io::Status BacklitMatte(const cv::Mat& plate, const cv::Mat& backlit, const cv::Mat& dark,
                        const BacklitOptions& options, cv::Mat* alpha, cv::Mat* confidence, BacklitStats* stats,
                        int threads) {
  if (!(options.noise_sigma >= 0) || !(options.snap_sigmas >= 0) || !(options.min_plate_snr >= 0) ||
      !(options.spill_blur_px > 0) || options.spill_erode_px < 0 || !(options.alpha_tolerance > 0)) {
    return io::Status::BadInput("backlit matte options: sigmas, snr and blur must be non-negative (blur > 0)");
  }
  LUMENRIG_RETURN_IF_ERROR(CheckRgb(plate, "clean plate", plate.size()));
  LUMENRIG_RETURN_IF_ERROR(CheckRgb(backlit, "backlit frame", plate.size()));
  if (!dark.empty()) LUMENRIG_RETURN_IF_ERROR(CheckRgb(dark, "dark frame", plate.size()));

  // Dark-frame subtraction.
  cv::Mat p = plate.clone(), k = backlit.clone();
  if (!dark.empty()) {
    p -= dark;
    k -= dark;
  }
  double sigma = options.noise_sigma;
  if (sigma == 0.0) sigma = EstimateDifferenceNoise(k - p) / std::sqrt(2.0);

  const int h = p.rows, w = p.cols;
  alpha->create(h, w, CV_32FC1);
  confidence->create(h, w, CV_32FC1);
  cv::Mat valid(h, w, CV_8UC1);
  cv::Mat spill = cv::Mat::zeros(h, w, CV_32FC3);

  // Per pixel least squares of K = (1 - a) P + a S over the channels.
  auto solve = [&](bool final_pass) {
    io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
      for (int64_t y = y0; y < y1; ++y) {
        const float* pr = p.ptr<float>(static_cast<int>(y));
        const float* kr = k.ptr<float>(static_cast<int>(y));
        const float* sr = spill.ptr<float>(static_cast<int>(y));
        float* ar = alpha->ptr<float>(static_cast<int>(y));
        float* cr = confidence->ptr<float>(static_cast<int>(y));
        uint8_t* vr = valid.ptr<uint8_t>(static_cast<int>(y));
        for (int x = 0; x < w; ++x) {
          double v[3], d[3], n2 = 0.0, dv = 0.0;
          for (int c = 0; c < 3; ++c) {
            v[c] = double(pr[3 * x + c]) - sr[3 * x + c];
            d[c] = double(pr[3 * x + c]) - kr[3 * x + c];
            n2 += v[c] * v[c];
            dv += d[c] * v[c];
          }
          const double snr_floor = options.min_plate_snr * sigma;
          if (!(n2 > 1e-20) || n2 < snr_floor * snr_floor) {
            ar[x] = 0.0f;
            cr[x] = 0.0f;
            vr[x] = 0;
            continue;
          }
          const double a = dv / n2;
          const double ac = std::clamp(a, 0.0, 1.0);
          double r2 = 0.0;
          for (int c = 0; c < 3; ++c) r2 += (d[c] - a * v[c]) * (d[c] - a * v[c]);
          // Var(K_c - (1-a) P_c) = sigma^2 (1 + (1-a)^2); 3 equations, 1 unknown.
          const double var = sigma * sigma * (1.0 + (1.0 - ac) * (1.0 - ac));
          const double sigma_alpha = std::sqrt(var / n2);
          ar[x] = static_cast<float>(final_pass ? SnapAlpha(a, sigma_alpha, options.snap_sigmas) : a);
          const double expected = std::max(2.0 * var, 1e-12 * n2);
          cr[x] = ConfidenceFrom(sigma_alpha, r2 / expected, options.alpha_tolerance);
          vr[x] = 255;
        }
      }
    });
  };

  solve(false);
  BacklitStats local;
  local.noise_sigma = sigma;
  if (options.correct_spill) {
    // Spill field: normalised convolution of K over confident foreground.
    cv::Mat fg = (*alpha > options.spill_fg_alpha) & valid;
    if (options.spill_erode_px > 0) {
      const int r = options.spill_erode_px;
      cv::erode(fg, fg, cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(2 * r + 1, 2 * r + 1)));
    }
    local.spill_pixels = cv::countNonZero(fg);
    if (local.spill_pixels > 0) {
      const cv::Scalar mean = cv::mean(k, fg);
      for (int c = 0; c < 3; ++c) local.mean_spill_rgb[c] = mean[c];
      cv::Mat weight;
      fg.convertTo(weight, CV_32F, 1.0 / 255.0);
      cv::Mat weighted_k;
      cv::Mat weight3;
      cv::merge(std::vector<cv::Mat>{weight, weight, weight}, weight3);
      weighted_k = k.mul(weight3);
      cv::GaussianBlur(weighted_k, weighted_k, cv::Size(), options.spill_blur_px);
      cv::GaussianBlur(weight, weight, cv::Size(), options.spill_blur_px);
      for (int y = 0; y < h; ++y) {
        const float* wk = weighted_k.ptr<float>(y);
        const float* ww = weight.ptr<float>(y);
        float* s = spill.ptr<float>(y);
        for (int x = 0; x < w; ++x) {
          for (int c = 0; c < 3; ++c) {
            s[3 * x + c] = ww[x] > 1e-3f ? wk[3 * x + c] / ww[x] : static_cast<float>(mean[c]);
          }
        }
      }
    }
  }
  solve(true);
  local.plate_zero_pixels = static_cast<int64_t>(valid.total()) - cv::countNonZero(valid);
  FillInvalid(valid, 2.0, alpha);
  if (stats != nullptr) *stats = local;
  return io::Status::Ok();
}

io::Status TriangulationMatte(const std::vector<cv::Mat>& plates, const std::vector<cv::Mat>& frames,
                              const TriangulationOptions& options, cv::Mat* alpha, cv::Mat* foreground,
                              cv::Mat* confidence, double* noise_sigma_used, int threads) {
  if (!(options.noise_sigma >= 0) || !(options.snap_sigmas >= 0) || !(options.min_plate_separation_snr >= 0) ||
      !(options.alpha_tolerance > 0) || !(options.colour_lambda > 0) || !(options.colour_blur_px > 0)) {
    return io::Status::BadInput("triangulation options: sigmas must be non-negative, lambda and blur positive");
  }
  if (plates.size() != frames.size() || plates.size() < 2) {
    return io::Status::BadInput(
        fmt::format("triangulation needs at least 2 (plate, frame) pairs, got {} plates and {} frames", plates.size(),
                    frames.size()));
  }
  const cv::Size size = plates[0].size();
  for (size_t i = 0; i < plates.size(); ++i) {
    LUMENRIG_RETURN_IF_ERROR(CheckRgb(plates[i], fmt::format("matte_pairs[{}].plate", i).c_str(), size));
    LUMENRIG_RETURN_IF_ERROR(CheckRgb(frames[i], fmt::format("matte_pairs[{}].frame", i).c_str(), size));
  }
  const int n = static_cast<int>(plates.size());
  double sigma = options.noise_sigma;
  if (sigma == 0.0) sigma = EstimateDifferenceNoise(frames[0], plates[0]) / std::sqrt(2.0);
  if (noise_sigma_used != nullptr) *noise_sigma_used = sigma;

  const int h = size.height, w = size.width;
  alpha->create(h, w, CV_32FC1);
  confidence->create(h, w, CV_32FC1);
  cv::Mat premult(h, w, CV_32FC3);
  cv::Mat valid(h, w, CV_8UC1);
  io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    std::vector<const float*> pr(n), fr(n);
    for (int64_t yy = y0; yy < y1; ++yy) {
      const int y = static_cast<int>(yy);
      for (int i = 0; i < n; ++i) {
        pr[i] = plates[i].ptr<float>(y);
        fr[i] = frames[i].ptr<float>(y);
      }
      float* ar = alpha->ptr<float>(y);
      float* cr = confidence->ptr<float>(y);
      float* fp = premult.ptr<float>(y);
      uint8_t* vr = valid.ptr<uint8_t>(y);
      for (int x = 0; x < w; ++x) {
        double mean_b[3] = {0, 0, 0}, mean_d[3] = {0, 0, 0};
        for (int i = 0; i < n; ++i) {
          for (int c = 0; c < 3; ++c) {
            const double b = pr[i][3 * x + c];
            mean_b[c] += b;
            mean_d[c] += fr[i][3 * x + c] - b;
          }
        }
        for (int c = 0; c < 3; ++c) {
          mean_b[c] /= n;
          mean_d[c] /= n;
        }
        // Eliminating Fp leaves D~ + a B~ = 0 (mean-removed over the pairs).
        double sbb = 0.0, sdb = 0.0, sdd = 0.0;
        for (int i = 0; i < n; ++i) {
          for (int c = 0; c < 3; ++c) {
            const double b = pr[i][3 * x + c];
            const double bt = b - mean_b[c];
            const double dt = fr[i][3 * x + c] - b - mean_d[c];
            sbb += bt * bt;
            sdb += dt * bt;
            sdd += dt * dt;
          }
        }
        const double floor = options.min_plate_separation_snr * sigma;
        if (!(sbb > 1e-20) || sbb < floor * floor) {
          ar[x] = 0.0f;
          cr[x] = 0.0f;
          vr[x] = 0;
          for (int c = 0; c < 3; ++c) fp[3 * x + c] = 0.0f;
          continue;
        }
        const double a = -sdb / sbb;
        const double r2 = std::max(0.0, sdd - sdb * sdb / sbb);
        const double ac = std::clamp(a, 0.0, 1.0);
        // Noise in frame and plate: Var(D + a B) per equation ~ sigma^2 (1 + (1-a)^2).
        const double var = sigma * sigma * (1.0 + (1.0 - ac) * (1.0 - ac));
        const double sigma_alpha = std::sqrt(var / sbb);
        const double as = SnapAlpha(a, sigma_alpha, options.snap_sigmas);
        ar[x] = static_cast<float>(as);
        const int dof = 3 * n - 4;
        const double expected = std::max(dof * var, 1e-12 * sbb);
        cr[x] = dof > 0 ? ConfidenceFrom(sigma_alpha, r2 / expected, options.alpha_tolerance)
                        : ConfidenceFrom(sigma_alpha, 0.0, options.alpha_tolerance);
        vr[x] = 255;
        for (int c = 0; c < 3; ++c) fp[3 * x + c] = static_cast<float>(mean_d[c] + as * mean_b[c]);
      }
    }
  });
  FillInvalid(valid, 2.0, alpha);
  if (foreground != nullptr) {
    ForegroundOptions fo;
    fo.lambda = options.colour_lambda;
    fo.blur_px = options.colour_blur_px;
    UnpremultiplyForeground(premult, *alpha, fo, foreground, threads);
  }
  return io::Status::Ok();
}

void UnpremultiplyForeground(const cv::Mat& premultiplied, const cv::Mat& alpha, const ForegroundOptions& options,
                             cv::Mat* foreground, int threads) {
  CV_Assert(premultiplied.type() == CV_32FC3 && alpha.type() == CV_32FC1 && premultiplied.size() == alpha.size());
  // Local colour F^ = G*(a Fp) / G*(a^2): the alpha^2-weighted mean of F.
  const int h = alpha.rows, w = alpha.cols;
  cv::Mat num(h, w, CV_32FC3), den(h, w, CV_32FC1);
  io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int y = static_cast<int>(y0); y < y1; ++y) {
      const float* fp = premultiplied.ptr<float>(y);
      const float* a = alpha.ptr<float>(y);
      float* nr = num.ptr<float>(y);
      float* dr = den.ptr<float>(y);
      for (int x = 0; x < w; ++x) {
        for (int c = 0; c < 3; ++c) nr[3 * x + c] = fp[3 * x + c] * a[x];
        dr[x] = a[x] * a[x];
      }
    }
  });
  cv::GaussianBlur(num, num, cv::Size(), options.blur_px);
  cv::GaussianBlur(den, den, cv::Size(), options.blur_px);
  foreground->create(alpha.size(), CV_32FC3);
  const double lambda = options.lambda;
  io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int y = static_cast<int>(y0); y < y1; ++y) {
      const float* fp = premultiplied.ptr<float>(y);
      const float* a = alpha.ptr<float>(y);
      const float* nr = num.ptr<float>(y);
      const float* dr = den.ptr<float>(y);
      float* out = foreground->ptr<float>(y);
      for (int x = 0; x < w; ++x) {
        for (int c = 0; c < 3; ++c) {
          if (!(a[x] > 0.0f)) {
            out[3 * x + c] = 0.0f;
            continue;
          }
          const double local = dr[x] > 1e-6f ? nr[3 * x + c] / dr[x] : 0.0;
          const double f = (a[x] * double(fp[3 * x + c]) + lambda * local) / (double(a[x]) * a[x] + lambda);
          out[3 * x + c] = static_cast<float>(std::max(0.0, f));
        }
      }
    }
  });
}

io::Status EstimateForeground(const cv::Mat& frame, const cv::Mat& plate, const cv::Mat& alpha,
                              const ForegroundOptions& options, cv::Mat* foreground, int threads) {
  if (!(options.lambda > 0) || !(options.blur_px > 0)) {
    return io::Status::BadInput("foreground options: lambda and blur_px must be positive");
  }
  LUMENRIG_RETURN_IF_ERROR(CheckRgb(frame, "frame", frame.size()));
  LUMENRIG_RETURN_IF_ERROR(CheckRgb(plate, "clean plate", frame.size()));
  if (alpha.type() != CV_32FC1 || alpha.size() != frame.size()) {
    return io::Status::BadInput("alpha: expected CV_32FC1 of the frame's size");
  }
  cv::Mat one_minus = 1.0 - alpha;
  cv::Mat om3;
  cv::merge(std::vector<cv::Mat>{one_minus, one_minus, one_minus}, om3);
  cv::Mat premult = frame - plate.mul(om3);
  UnpremultiplyForeground(premult, alpha, options, foreground, threads);
  return io::Status::Ok();
}

cv::Mat CompositeOver(const cv::Mat& foreground, const cv::Mat& alpha, const cv::Mat& background) {
  CV_Assert(foreground.type() == CV_32FC3 && background.type() == CV_32FC3 && alpha.type() == CV_32FC1);
  CV_Assert(foreground.size() == alpha.size() && background.size() == alpha.size());
  cv::Mat a3;
  cv::merge(std::vector<cv::Mat>{alpha, alpha, alpha}, a3);
  return foreground.mul(a3) + background.mul(cv::Scalar::all(1.0) - a3);
}

MatteError CompareMattes(const cv::Mat& alpha, const cv::Mat& truth) {
  CV_Assert(alpha.type() == CV_32FC1 && truth.type() == CV_32FC1 && alpha.size() == truth.size());
  MatteError e;
  double sad = 0.0, sse = 0.0;
  for (int y = 0; y < alpha.rows; ++y) {
    const float* a = alpha.ptr<float>(y);
    const float* t = truth.ptr<float>(y);
    for (int x = 0; x < alpha.cols; ++x) {
      const double d = double(a[x]) - t[x];
      sad += std::fabs(d);
      sse += d * d;
    }
  }
  e.sad = sad;
  e.mse = alpha.total() > 0 ? sse / static_cast<double>(alpha.total()) : 0.0;
  return e;
}

}  // namespace lumenrig::solvers
