// Difference trimap, plain difference matte and user trimaps (docs/matting.md).
#include <algorithm>
#include <cmath>
#include <vector>

#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/solvers/matting.h"
#include "matting_internal.h"

namespace lumenrig::solvers {

namespace {

struct Difference {
  cv::Mat norm;  // |frame - plate| over RGB, CV_32FC1
  TrimapStats stats;
};

io::Status ComputeDifference(const cv::Mat& plate, const cv::Mat& frame, const TrimapOptions& options,
                             Difference* out) {
  if (!(options.difference_sigma >= 0) || !(options.bg_sigmas > 0) || !(options.fg_sigmas > 0) ||
      !(options.bg_floor >= 0) || !(options.fg_floor >= 0) || options.band_px < 0) {
    return io::Status::BadInput("trimap options: sigmas must be positive, floors and band_px non-negative");
  }
  if (plate.empty() || plate.type() != CV_32FC3) return io::Status::BadInput("clean plate: expected CV_32FC3 RGB");
  if (frame.type() != CV_32FC3 || frame.size() != plate.size()) {
    return io::Status::BadInput(fmt::format("frame: size {}x{} differs from the clean plate's {}x{}", frame.cols,
                                            frame.rows, plate.cols, plate.rows));
  }
  cv::Mat diff = frame - plate;
  double sigma = options.difference_sigma;
  if (sigma == 0.0) sigma = EstimateDifferenceNoise(diff);
  const double level = internal::SampledQuantile(plate, 0.5, true);
  cv::Mat sq = diff.mul(diff);
  cv::transform(sq, sq, cv::Matx13f(1.0f, 1.0f, 1.0f));
  cv::sqrt(sq, out->norm);
  out->stats.difference_sigma = sigma;
  out->stats.bg_threshold = std::max(options.bg_sigmas * sigma, options.bg_floor * level);
  out->stats.fg_threshold =
      std::max({options.fg_sigmas * sigma, options.fg_floor * level, 2.0 * out->stats.bg_threshold});
  return io::Status::Ok();
}

constexpr int kMinSpeckPixels = 6;

void RemoveSpecks(cv::Mat* mask) {
  cv::Mat labels, stats, centroids;
  const int n = cv::connectedComponentsWithStats(*mask, labels, stats, centroids, 8, CV_32S);
  std::vector<uint8_t> keep(static_cast<size_t>(n), 255);
  bool any = false;
  for (int i = 1; i < n; ++i) {
    if (stats.at<int>(i, cv::CC_STAT_AREA) < kMinSpeckPixels) {
      keep[i] = 0;
      any = true;
    }
  }
  if (!any) return;
  for (int y = 0; y < mask->rows; ++y) {
    const int* l = labels.ptr<int>(y);
    uint8_t* m = mask->ptr<uint8_t>(y);
    for (int x = 0; x < mask->cols; ++x) m[x] = l[x] == 0 ? 0 : keep[l[x]];
  }
}

// Background regions not connected to the image border become subject.
void FillHoles(cv::Mat* mask) {
  cv::Mat background = *mask == 0;
  cv::Mat labels, stats, centroids;
  const int n = cv::connectedComponentsWithStats(background, labels, stats, centroids, 4, CV_32S);
  std::vector<uint8_t> hole(static_cast<size_t>(n), 0);
  bool any = false;
  for (int i = 1; i < n; ++i) {
    const int x = stats.at<int>(i, cv::CC_STAT_LEFT), y = stats.at<int>(i, cv::CC_STAT_TOP);
    const int w = stats.at<int>(i, cv::CC_STAT_WIDTH), h = stats.at<int>(i, cv::CC_STAT_HEIGHT);
    if (x > 0 && y > 0 && x + w < mask->cols && y + h < mask->rows) {
      hole[i] = 255;
      any = true;
    }
  }
  if (!any) return;
  for (int y = 0; y < mask->rows; ++y) {
    const int* l = labels.ptr<int>(y);
    uint8_t* m = mask->ptr<uint8_t>(y);
    for (int x = 0; x < mask->cols; ++x) m[x] |= hole[l[x]];
  }
}

cv::Mat Disk(int radius) {
  return cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(2 * radius + 1, 2 * radius + 1));
}

}  // namespace

io::Status DifferenceTrimap(const cv::Mat& plate, const cv::Mat& frame, const TrimapOptions& options, cv::Mat* trimap,
                            TrimapStats* stats) {
  Difference d;
  LUMENRIG_RETURN_IF_ERROR(ComputeDifference(plate, frame, options, &d));
  // Subject evidence: |frame - plate| above the background threshold, minus
  // noise specks (components under kMinSpeckPixels), with enclosed holes
  // filled (interior parts whose colour matches the plate are still subject).
  cv::Mat not_bg = d.norm > d.stats.bg_threshold;
  RemoveSpecks(&not_bg);
  FillHoles(&not_bg);
  // Band: foreground = subject eroded by band_px/2 (a 3x3 opening when 0, so
  // thin strands stay unknown); background = outside the subject dilated by
  // the rest of the band.
  const int inner = options.band_px / 2, outer = options.band_px - options.band_px / 2;
  cv::Mat fg;
  if (inner > 0) {
    cv::erode(not_bg, fg, Disk(inner));
  } else {
    cv::morphologyEx(not_bg, fg, cv::MORPH_OPEN, cv::getStructuringElement(cv::MORPH_RECT, cv::Size(3, 3)));
  }
  if (outer > 0) cv::dilate(not_bg, not_bg, Disk(outer));
  trimap->create(plate.size(), CV_8UC1);
  trimap->setTo(kTrimapUnknown);
  trimap->setTo(kTrimapBackground, ~not_bg);
  trimap->setTo(kTrimapForeground, fg);
  d.stats.unknown_pixels = cv::countNonZero(*trimap == kTrimapUnknown);
  if (stats != nullptr) *stats = d.stats;
  return io::Status::Ok();
}

io::Status PlainDifferenceMatte(const cv::Mat& plate, const cv::Mat& frame, const TrimapOptions& options,
                                cv::Mat* alpha) {
  Difference d;
  LUMENRIG_RETURN_IF_ERROR(ComputeDifference(plate, frame, options, &d));
  const double t0 = d.stats.bg_threshold, t1 = d.stats.fg_threshold;
  cv::Mat a = (d.norm - t0) / (t1 - t0);
  cv::min(cv::max(a, 0.0), 1.0, *alpha);
  return io::Status::Ok();
}

io::Status TrimapFromImage(const cv::Mat& image, cv::Size expected, const std::string& source, cv::Mat* trimap) {
  if (image.empty() || image.depth() != CV_32F) return io::Status::BadInput(source + ": trimap could not be decoded");
  if (image.size() != expected) {
    return io::Status::BadInput(fmt::format("{}: trimap is {}x{} but the frame is {}x{}", source, image.cols,
                                            image.rows, expected.width, expected.height));
  }
  trimap->create(expected, CV_8UC1);
  const int c = image.channels();
  for (int y = 0; y < image.rows; ++y) {
    const float* p = image.ptr<float>(y);
    uint8_t* t = trimap->ptr<uint8_t>(y);
    for (int x = 0; x < image.cols; ++x) {
      const float v = p[x * c];  // first channel; an 8-bit PNG reads as x / 255
      t[x] = v <= 0.5f / 255.0f ? kTrimapBackground : (v >= 254.5f / 255.0f ? kTrimapForeground : kTrimapUnknown);
    }
  }
  return io::Status::Ok();
}

}  // namespace lumenrig::solvers
