#pragma once
// A Lambertian-sphere session on disk for the relight/pairs tests: frames are
// the closed form intensity * a/pi * max(0, n.l) (DESIGN.md), plus truth/
// maps in the simulator's layout (truth/<cam>/{normals,albedo,alpha}.exr).
#include <cmath>
#include <fstream>
#include <string>
#include <vector>

#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/synth/dome_layout.h"

namespace lumenrig::test {

struct SphereSessionSpec {
  int size = 48;
  int lights = 40;
  double min_elevation_deg = -90.0;
  std::string subject = "kh-grey-sphere";
  Eigen::Vector3d albedo{0.7, 0.6, 0.5};
  int cameras = 1;
  float dark_offset = 0.0f;  ///< > 0: added to every OLAT frame and written as cam/dark.exr
  float black_level = 0.0f;  ///< added to every stored frame (OLAT and dark); session black_level
};

inline void WriteJson(const std::string& path, const nlohmann::json& j) {
  std::ofstream out(path);
  out << j.dump(2);
}

/// Writes session.json, rig.json, cam*/olat_*.exr (float) and truth maps.
inline void WriteSphereSession(const std::string& dir, const SphereSessionSpec& spec) {
  (void)io::EnsureDirectory(dir);
  const auto dirs = synth::FibonacciDome(spec.lights, spec.min_elevation_deg);
  nlohmann::json rig = {{"format", "lumenrig.rig/1"}, {"name", "test-dome"}, {"lights", nlohmann::json::array()}};
  std::vector<Eigen::Vector3d> intensity;
  for (int i = 0; i < spec.lights; ++i) {
    intensity.emplace_back(1.0 + 0.1 * (i % 3), 0.95, 1.05);
    rig["lights"].push_back({{"id", i},
                             {"direction", {dirs[i].x(), dirs[i].y(), dirs[i].z()}},
                             {"intensity", {intensity[i].x(), intensity[i].y(), intensity[i].z()}}});
  }
  WriteJson(dir + "/rig.json", rig);
  const int n = spec.size;
  cv::Mat normals = cv::Mat::zeros(n, n, CV_32FC3), alpha = cv::Mat::zeros(n, n, CV_32FC1);
  const double r = 0.5 * n - 1.0;
  for (int y = 0; y < n; ++y) {
    for (int x = 0; x < n; ++x) {
      const double nx = (x + 0.5 - 0.5 * n) / r, ny = -(y + 0.5 - 0.5 * n) / r, q = 1 - nx * nx - ny * ny;
      if (q <= 0) continue;
      normals.at<cv::Vec3f>(y, x) = cv::Vec3f(nx, ny, std::sqrt(q));
      alpha.at<float>(y, x) = 1.0f;
    }
  }
  cv::Mat albedo(n, n, CV_32FC3, cv::Scalar(0, 0, 0));
  albedo.setTo(cv::Scalar(spec.albedo.x(), spec.albedo.y(), spec.albedo.z()), alpha > 0);
  nlohmann::json session = {
      {"format", "lumenrig.session/1"}, {"subject", spec.subject},         {"rig", "rig.json"},
      {"encoding", "linear"},           {"black_level", spec.black_level}, {"cameras", nlohmann::json::array()}};
  io::ExrWriteOptions w;
  w.pixel_type = io::PixelType::kFloat;
  for (int c = 0; c < spec.cameras; ++c) {
    const std::string cam = fmt::format("cam{:02d}", c);
    (void)io::EnsureDirectory(dir + "/" + cam);
    (void)io::EnsureDirectory(dir + "/truth/" + cam);
    nlohmann::json camj = {{"id", cam},
                           {"intrinsics", {{"fx", 2.0 * n}, {"fy", 2.0 * n}, {"cx", 0.5 * n}, {"cy", 0.5 * n}}},
                           {"olat", nlohmann::json::array()}};
    for (int i = 0; i < spec.lights; ++i) {
      cv::Mat f = cv::Mat::zeros(n, n, CV_32FC3);
      for (int y = 0; y < n; ++y) {
        for (int x = 0; x < n; ++x) {
          const cv::Vec3f nn = normals.at<cv::Vec3f>(y, x);
          const double cs = std::max(0.0, nn[0] * dirs[i].x() + nn[1] * dirs[i].y() + nn[2] * dirs[i].z());
          for (int k = 0; k < 3; ++k)
            f.at<cv::Vec3f>(y, x)[k] = static_cast<float>(intensity[i](k) * spec.albedo(k) / M_PI * cs);
        }
      }
      f += cv::Scalar::all(spec.dark_offset + spec.black_level);
      const std::string rel = fmt::format("{}/olat_{:03d}.exr", cam, i);
      (void)io::WriteExr(dir + "/" + rel, f, w);
      camj["olat"].push_back({{"light", i}, {"path", rel}});
    }
    if (spec.dark_offset > 0) {
      cv::Mat dark(n, n, CV_32FC3, cv::Scalar::all(spec.dark_offset + spec.black_level));
      (void)io::WriteExr(dir + "/" + cam + "/dark.exr", dark, w);
      camj["dark"] = cam + "/dark.exr";
    }
    (void)io::WriteExr(dir + "/truth/" + cam + "/normals.exr", normals, w);
    (void)io::WriteExr(dir + "/truth/" + cam + "/albedo.exr", albedo, w);
    (void)io::WriteExr(dir + "/truth/" + cam + "/alpha.exr", alpha, w);
    session["cameras"].push_back(camj);
  }
  WriteJson(dir + "/session.json", session);
}

}  // namespace lumenrig::test
