#include "lumenrig/synth/sh.h"

#include <cmath>

#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/envmap.h"

namespace lumenrig::synth {

Eigen::Matrix<double, 9, 1> ShBasis9(const Eigen::Vector3d& d) {
  const double x = d.x(), y = d.y(), z = d.z();
  Eigen::Matrix<double, 9, 1> b;
  b << kShY00, kShY1 * y, kShY1 * z, kShY1 * x, kShY2xy * x * y, kShY2xy * y * z, kShY20 * (3.0 * z * z - 1.0),
      kShY2xy * x * z, kShY22 * (x * x - y * y);
  return b;
}

ShCoeffs ProjectSh9(const cv::Mat& latlong) {
  CV_Assert(latlong.type() == CV_32FC3);
  const int w = latlong.cols, h = latlong.rows;
  ShCoeffs c = ShCoeffs::Zero();
  for (int v = 0; v < h; ++v) {
    const double dw = TexelSolidAngle(v, w, h);
    const cv::Vec3f* row = latlong.ptr<cv::Vec3f>(v);
    ShCoeffs row_sum = ShCoeffs::Zero();
    for (int u = 0; u < w; ++u) {
      const Eigen::Matrix<double, 9, 1> b = ShBasis9(LatLongDirection(u, v, w, h));
      const Eigen::RowVector3d l(row[u][0], row[u][1], row[u][2]);
      row_sum += b * l;
    }
    c += row_sum * dw;
  }
  return c;
}

Eigen::Vector3d ShIrradiance(const ShCoeffs& coeffs, const Eigen::Vector3d& n) {
  Eigen::Matrix<double, 9, 1> b = ShBasis9(n);
  b(0) *= kShA0;
  b.segment<3>(1) *= kShA1;
  b.segment<5>(4) *= kShA2;
  return coeffs.transpose() * b;
}

cv::Mat ResampleLatLong(const cv::Mat& latlong, int height) {
  if (latlong.rows == height) return latlong.clone();
  cv::Mat out;
  cv::resize(latlong, out, cv::Size(2 * height, height), 0, 0,
             height < latlong.rows ? cv::INTER_AREA : cv::INTER_LINEAR);
  return out;
}

io::Status PrefilterPhong(const cv::Mat& latlong, const std::vector<double>& exponents, PhongPrefiltered* out,
                          int out_height, int source_height, int threads) {
  if (exponents.empty()) return io::Status::BadInput("specular exponents: list is empty");
  for (double s : exponents) {
    if (!(s > 0.0) || !std::isfinite(s)) {
      return io::Status::BadInput(fmt::format("specular exponents: {} is not a positive number", s));
    }
  }
  if (out_height < 2 || source_height < 2) return io::Status::BadInput("prefilter resolution must be >= 2");
  const cv::Mat src = ResampleLatLong(latlong, source_height);
  const int sw = src.cols, sh = src.rows;
  // Source directions and radiance * solid angle.
  std::vector<Eigen::Vector3d> dirs(static_cast<size_t>(sw) * sh);
  std::vector<Eigen::Vector3d> rad(dirs.size());
  for (int v = 0; v < sh; ++v) {
    const double dw = TexelSolidAngle(v, sw, sh);
    for (int u = 0; u < sw; ++u) {
      const size_t i = static_cast<size_t>(v) * sw + u;
      dirs[i] = LatLongDirection(u, v, sw, sh);
      const cv::Vec3f l = src.at<cv::Vec3f>(v, u);
      rad[i] = Eigen::Vector3d(l[0], l[1], l[2]) * dw;
    }
  }
  const int ow = 2 * out_height, oh = out_height;
  const size_t ns = exponents.size();
  // Integer exponents (the usual 1, 16, 32, 64) by repeated squaring; others
  // through exp(s log c).
  std::vector<int> int_exp(ns, -1);
  for (size_t k = 0; k < ns; ++k) {
    if (exponents[k] == std::floor(exponents[k]) && exponents[k] <= 1024) int_exp[k] = static_cast<int>(exponents[k]);
  }
  auto power = [&](double c, double log_c, size_t k) {
    if (int_exp[k] < 0) return std::exp(exponents[k] * log_c);
    double result = 1.0, base = c;
    for (int e = int_exp[k]; e > 0; e >>= 1) {
      if (e & 1) result *= base;
      base *= base;
    }
    return result;
  };
  bool any_fractional = false;
  for (int e : int_exp) any_fractional |= e < 0;
  out->exponents = exponents;
  out->maps.assign(ns, cv::Mat());
  for (auto& m : out->maps) m.create(oh, ow, CV_32FC3);
  io::ParallelFor(0, oh, 1, threads, [&](int64_t v0, int64_t v1) {
    std::vector<Eigen::Vector3d> acc(ns);
    for (int64_t v = v0; v < v1; ++v) {
      for (int u = 0; u < ow; ++u) {
        const Eigen::Vector3d r = LatLongDirection(u, static_cast<double>(v), ow, oh);
        for (auto& a : acc) a.setZero();
        for (size_t i = 0; i < dirs.size(); ++i) {
          const double c = r.dot(dirs[i]);
          if (c <= 0.0) continue;
          const double log_c = any_fractional ? std::log(c) : 0.0;
          for (size_t k = 0; k < ns; ++k) acc[k] += power(c, log_c, k) * rad[i];
        }
        for (size_t k = 0; k < ns; ++k) {
          const Eigen::Vector3d p = acc[k] * (exponents[k] + 1.0) / (2.0 * M_PI);
          out->maps[k].at<cv::Vec3f>(static_cast<int>(v), u) =
              cv::Vec3f(static_cast<float>(p.x()), static_cast<float>(p.y()), static_cast<float>(p.z()));
        }
      }
    }
  });
  return io::Status::Ok();
}

}  // namespace lumenrig::synth
