#include "lumenrig/capture_io/color.h"

#include <algorithm>
#include <cmath>

#include <opencv2/imgproc.hpp>

namespace lumenrig::io {

float SrgbToLinear(float encoded) {
  const float c = std::clamp(encoded, 0.0f, 1.0f);
  return c <= 0.04045f ? c / 12.92f : std::pow((c + 0.055f) / 1.055f, 2.4f);
}

float LinearToSrgb(float linear) {
  const float l = std::clamp(linear, 0.0f, 1.0f);
  return l <= 0.0031308f ? 12.92f * l : 1.055f * std::pow(l, 1.0f / 2.4f) - 0.055f;
}

namespace {
template <class F>
void ApplyInPlace(cv::Mat* image, F f) {
  CV_Assert(image->depth() == CV_32F);
  const int cols = image->cols * image->channels();
  for (int y = 0; y < image->rows; ++y) {
    float* row = image->ptr<float>(y);
    for (int x = 0; x < cols; ++x) row[x] = f(row[x]);
  }
}
}  // namespace

void SrgbToLinearInPlace(cv::Mat* image) { ApplyInPlace(image, SrgbToLinear); }
void LinearToSrgbInPlace(cv::Mat* image) { ApplyInPlace(image, LinearToSrgb); }

cv::Mat ToPreview8(const cv::Mat& linear, float exposure) {
  CV_Assert(linear.depth() == CV_32F && (linear.channels() == 1 || linear.channels() == 3));
  cv::Mat scaled = linear * exposure;
  cv::patchNaNs(scaled, 0.0);
  LinearToSrgbInPlace(&scaled);
  cv::Mat out;
  scaled.convertTo(out, CV_8U, 255.0, 0.0);  // saturate_cast rounds and clamps
  if (out.channels() == 3) cv::cvtColor(out, out, cv::COLOR_RGB2BGR);
  return out;
}

}  // namespace lumenrig::io
