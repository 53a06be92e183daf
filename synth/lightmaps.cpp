#include "lumenrig/synth/lightmaps.h"

#include <algorithm>
#include <cmath>
#include <random>

#include <Eigen/Geometry>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/synth/envmap.h"

namespace lumenrig::synth {

Eigen::Vector3d CameraRay(const io::Intrinsics& k, int x, int y) {
  return Eigen::Vector3d((x + 0.5 - k.cx) / k.fx, -(y + 0.5 - k.cy) / k.fy, -1.0).normalized();
}

io::Intrinsics IntrinsicsFromFov(int width, int height, double fov_deg) {
  io::Intrinsics k;
  k.fx = k.fy = 0.5 * width / std::tan(0.5 * fov_deg * M_PI / 180.0);
  k.cx = 0.5 * width;
  k.cy = 0.5 * height;
  return k;
}

io::Intrinsics ScaleIntrinsics(const io::Intrinsics& in, double sx, double sy) {
  io::Intrinsics k;
  k.fx = in.fx * sx;
  k.fy = in.fy * sy;
  k.cx = in.cx * sx;
  k.cy = in.cy * sy;
  return k;
}

io::Status RenderLightMaps(const cv::Mat& normals_camera, const io::Intrinsics& intrinsics,
                           const Eigen::Matrix3d& camera_from_rig, const ShCoeffs& sh,
                           const PhongPrefiltered& specular_maps, cv::Mat* diffuse, std::vector<cv::Mat>* specular) {
  if (normals_camera.type() != CV_32FC3) return io::Status::BadInput("light maps: normals must be CV_32FC3");
  if (!(intrinsics.fx > 0 && intrinsics.fy > 0))
    return io::Status::BadInput("light maps: intrinsics fx/fy must be > 0");
  const int w = normals_camera.cols, h = normals_camera.rows;
  const Eigen::Matrix3d rig_from_camera = camera_from_rig.transpose();
  *diffuse = cv::Mat::zeros(h, w, CV_32FC3);
  specular->assign(specular_maps.maps.size(), cv::Mat());
  for (auto& m : *specular) m = cv::Mat::zeros(h, w, CV_32FC3);
  for (int y = 0; y < h; ++y) {
    const cv::Vec3f* nrow = normals_camera.ptr<cv::Vec3f>(y);
    for (int x = 0; x < w; ++x) {
      Eigen::Vector3d n(nrow[x][0], nrow[x][1], nrow[x][2]);
      const double len = n.norm();
      if (!(len >= 0.5) || !std::isfinite(len)) continue;
      n /= len;
      const Eigen::Vector3d e = ShIrradiance(sh, rig_from_camera * n) / M_PI;
      diffuse->at<cv::Vec3f>(y, x) =
          cv::Vec3f(static_cast<float>(std::max(0.0, e.x())), static_cast<float>(std::max(0.0, e.y())),
                    static_cast<float>(std::max(0.0, e.z())));
      const Eigen::Vector3d v = CameraRay(intrinsics, x, y);
      const Eigen::Vector3d r = rig_from_camera * (v - 2.0 * v.dot(n) * n);
      for (size_t s = 0; s < specular_maps.maps.size(); ++s) {
        const Eigen::Vector3f l = SampleLatLong(specular_maps.maps[s], r);
        (*specular)[s].at<cv::Vec3f>(y, x) = cv::Vec3f(l.x(), l.y(), l.z());
      }
    }
  }
  return io::Status::Ok();
}

cv::Mat RenderBackground(const cv::Mat& latlong, const io::Intrinsics& intrinsics, int width, int height,
                         const Eigen::Matrix3d& camera_from_rig, double yaw_deg, double pitch_deg) {
  const Eigen::Matrix3d view = (Eigen::AngleAxisd(yaw_deg * M_PI / 180.0, Eigen::Vector3d::UnitY()) *
                                Eigen::AngleAxisd(pitch_deg * M_PI / 180.0, Eigen::Vector3d::UnitX()))
                                   .toRotationMatrix();
  const Eigen::Matrix3d rig_from_view = camera_from_rig.transpose() * view;
  cv::Mat out(height, width, CV_32FC3);
  for (int y = 0; y < height; ++y) {
    cv::Vec3f* row = out.ptr<cv::Vec3f>(y);
    for (int x = 0; x < width; ++x) {
      const Eigen::Vector3f l = SampleLatLong(latlong, rig_from_view * CameraRay(intrinsics, x, y));
      row[x] = cv::Vec3f(l.x(), l.y(), l.z());
    }
  }
  return out;
}

cv::Mat CompositeOver(const cv::Mat& relit, const cv::Mat& alpha, const cv::Mat& background) {
  CV_Assert(relit.size() == alpha.size() && relit.size() == background.size());
  CV_Assert(relit.type() == CV_32FC3 && background.type() == CV_32FC3 && alpha.type() == CV_32FC1);
  cv::Mat out(relit.size(), CV_32FC3);
  for (int y = 0; y < relit.rows; ++y) {
    const cv::Vec3f* f = relit.ptr<cv::Vec3f>(y);
    const cv::Vec3f* b = background.ptr<cv::Vec3f>(y);
    const float* a = alpha.ptr<float>(y);
    cv::Vec3f* o = out.ptr<cv::Vec3f>(y);
    for (int x = 0; x < relit.cols; ++x) {
      const float al = std::clamp(a[x], 0.0f, 1.0f);
      o[x] = al > 0.0f ? f[x] + (1.0f - al) * b[x] : b[x];
    }
  }
  return out;
}

CameraSimDraw DrawCameraSim(const CameraSimOptions& options, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::normal_distribution<double> normal(0.0, 1.0);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  CameraSimDraw d;
  d.exposure = std::exp2(options.exposure_sigma_ev * normal(rng));
  const double wr = std::exp(options.white_balance_sigma * normal(rng));
  const double wb = std::exp(options.white_balance_sigma * normal(rng));
  d.white_balance = Eigen::Vector3d(wr, 1.0, wb);
  d.jpeg = uniform(rng) < options.jpeg_probability;
  const int span = std::max(0, options.jpeg_quality_max - options.jpeg_quality_min);
  d.jpeg_quality = options.jpeg_quality_min + static_cast<int>(uniform(rng) * (span + 1)) % (span + 1);
  d.read_noise = options.read_noise;
  d.shot_noise = options.shot_noise;
  d.noise_seed = rng();
  return d;
}

cv::Mat SimulateCameraResponse(const cv::Mat& linear, const CameraSimDraw& draw) {
  CV_Assert(linear.type() == CV_32FC3);
  std::mt19937_64 rng(draw.noise_seed);
  std::normal_distribution<float> normal(0.0f, 1.0f);
  cv::Mat out(linear.size(), CV_32FC3);
  for (int y = 0; y < linear.rows; ++y) {
    const cv::Vec3f* src = linear.ptr<cv::Vec3f>(y);
    cv::Vec3f* dst = out.ptr<cv::Vec3f>(y);
    for (int x = 0; x < linear.cols; ++x) {
      for (int c = 0; c < 3; ++c) {
        const double s = std::max(0.0, src[x][c] * draw.exposure * draw.white_balance(c));
        const double sigma = std::sqrt(draw.read_noise * draw.read_noise + draw.shot_noise * s);
        const double noisy = s + sigma * normal(rng);
        dst[x][c] = io::LinearToSrgb(static_cast<float>(std::clamp(noisy, 0.0, 1.0)));
      }
    }
  }
  if (draw.jpeg) {
    cv::Mat bgr8, rgb8;
    out.convertTo(rgb8, CV_8UC3, 255.0);
    cv::cvtColor(rgb8, bgr8, cv::COLOR_RGB2BGR);
    std::vector<uchar> buffer;
    cv::imencode(".jpg", bgr8, buffer, {cv::IMWRITE_JPEG_QUALITY, draw.jpeg_quality});
    cv::Mat decoded = cv::imdecode(buffer, cv::IMREAD_COLOR);
    cv::cvtColor(decoded, rgb8, cv::COLOR_BGR2RGB);
    rgb8.convertTo(out, CV_32FC3, 1.0 / 255.0);
  }
  return out;
}

}  // namespace lumenrig::synth
