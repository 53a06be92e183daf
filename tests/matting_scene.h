#pragma once
// Synthetic matting scenes shared by the matting tests: a known alpha (disc
// with a soft edge and a hairy fringe), textured clean plates and a textured
// foreground, composited with the compositing equation.
#include <algorithm>
#include <cmath>
#include <vector>

#include <opencv2/core.hpp>

namespace lumenrig::test {

struct Scene {
  cv::Mat alpha;       // truth, CV_32FC1
  cv::Mat foreground;  // un-premultiplied, CV_32FC3
  cv::Mat plate1, plate2;
};

// A disc (radius 0.3 * size) with a 3-pixel smoothstep edge and a fringe of
// thin wavy strands of fractional alpha fading outward over ~10 pixels.
inline cv::Mat TruthAlpha(int size) {
  cv::Mat a(size, size, CV_32FC1);
  const double cx = 0.5 * size, cy = 0.55 * size, radius = 0.3 * size;
  for (int y = 0; y < size; ++y) {
    for (int x = 0; x < size; ++x) {
      const double dx = x + 0.5 - cx, dy = y + 0.5 - cy;
      const double r = std::sqrt(dx * dx + dy * dy), theta = std::atan2(dy, dx);
      const double t = std::clamp((radius - r) / 3.0 + 0.5, 0.0, 1.0);
      const double disc = t * t * (3 - 2 * t);
      double hair = 0.0;
      if (r > radius - 2 && dy < 0.2 * size) {
        const double s = 0.5 + 0.5 * std::cos(36 * theta + 2.0 * std::sin(0.25 * r));
        hair = 0.8 * std::pow(s, 12.0) * std::exp(-(r - radius) / 6.0);
      }
      a.at<float>(y, x) = static_cast<float>(std::clamp(std::max(disc, hair), 0.0, 1.0));
    }
  }
  return a;
}

inline cv::Mat Texture(int size, const cv::Vec3d& base, const cv::Vec3d& amp, double fx, double fy, double phase) {
  cv::Mat t(size, size, CV_32FC3);
  for (int y = 0; y < size; ++y) {
    for (int x = 0; x < size; ++x) {
      const double u = std::sin(fx * x + phase) * std::cos(fy * y - 0.5 * phase);
      const double v = std::sin(0.37 * fx * x + 1.3 * fy * y + phase);
      cv::Vec3f& p = t.at<cv::Vec3f>(y, x);
      for (int c = 0; c < 3; ++c) p[c] = static_cast<float>(base[c] + amp[c] * (0.6 * u + 0.4 * v));
    }
  }
  return t;
}

inline Scene MakeScene(int size) {
  Scene s;
  s.alpha = TruthAlpha(size);
  s.foreground = Texture(size, {0.55, 0.42, 0.33}, {0.15, 0.1, 0.08}, 0.21, 0.17, 0.3);
  // Hair darker and browner than the skin-like interior.
  for (int y = 0; y < size; ++y) {
    for (int x = 0; x < size; ++x) {
      const float a = s.alpha.at<float>(y, x);
      if (a < 0.999f) s.foreground.at<cv::Vec3f>(y, x) = cv::Vec3f(0.25f, 0.15f, 0.08f);
    }
  }
  s.plate1 = Texture(size, {0.35, 0.6, 0.3}, {0.12, 0.15, 0.1}, 0.09, 0.13, 1.1);
  s.plate2 = Texture(size, {0.7, 0.3, 0.75}, {0.15, 0.1, 0.12}, 0.11, 0.07, 2.3);
  return s;
}

inline cv::Mat Alpha3(const cv::Mat& a) {
  cv::Mat a3;
  cv::merge(std::vector<cv::Mat>{a, a, a}, a3);
  return a3;
}

// I = a F + (1 - a) B (the compositing equation, Porter and Duff 1984).
inline cv::Mat Composite(const Scene& s, const cv::Mat& plate) {
  const cv::Mat a3 = Alpha3(s.alpha);
  return s.foreground.mul(a3) + plate.mul(cv::Scalar::all(1.0) - a3);
}

inline cv::Mat AddNoise(const cv::Mat& image, double sigma, uint64_t seed) {
  cv::Mat noise(image.size(), image.type());
  cv::RNG rng(seed);
  rng.fill(noise, cv::RNG::NORMAL, 0.0, sigma);
  return image + noise;
}

}  // namespace lumenrig::test
