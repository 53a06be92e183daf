#include "lumenrig/synth/envmap.h"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>
#include <Eigen/Geometry>

#include "lumenrig/capture_io/color.h"

namespace lumenrig::synth {

Eigen::Vector3d LatLongDirection(double x, double y, int width, int height) {
  const double theta = M_PI * (y + 0.5) / height;
  const double phi = 2.0 * M_PI * (x + 0.5) / width;
  const double s = std::sin(theta);
  return {-s * std::sin(phi), std::cos(theta), s * std::cos(phi)};
}

Eigen::Vector2d LatLongCoordinates(const Eigen::Vector3d& d, int width, int height) {
  const double theta = std::acos(std::clamp(d.y() / d.norm(), -1.0, 1.0));
  // d.x = -sin(theta) sin(phi), d.z = sin(theta) cos(phi).
  double phi = std::atan2(-d.x(), d.z());
  if (phi < 0) phi += 2.0 * M_PI;
  double x = phi * width / (2.0 * M_PI) - 0.5;
  if (x < -0.5) x += width;
  if (x >= width - 0.5) x -= width;
  const double y = theta * height / M_PI - 0.5;
  return {x, y};
}

double TexelSolidAngle(int v, int width, int height) {
  const double theta = M_PI * (v + 0.5) / height;
  return (2.0 * M_PI / width) * (M_PI / height) * std::sin(theta);
}

io::Status ValidateLatLong(const cv::Mat& image, const std::string& source) {
  if (image.empty()) return io::Status::BadInput(fmt::format("{}: environment map is empty", source));
  if (image.type() != CV_32FC3) {
    return io::Status::BadInput(
        fmt::format("{}: environment map must have 3 channels (RGB), found {}", source, image.channels()));
  }
  if (image.cols != 2 * image.rows) {
    return io::Status::BadInput(fmt::format("{}: not a lat-long map: size {}x{} but width must be exactly 2 x height",
                                            source, image.cols, image.rows));
  }
  return io::Status::Ok();
}

int64_t SanitizeRadiance(cv::Mat* image) {
  CV_Assert(image->depth() == CV_32F);
  const int ch = image->channels();
  int64_t clamped = 0;
  for (int y = 0; y < image->rows; ++y) {
    float* row = image->ptr<float>(y);
    for (int x = 0; x < image->cols; ++x) {
      bool bad = false;
      for (int c = 0; c < ch; ++c) {
        float& v = row[x * ch + c];
        if (!std::isfinite(v) || v < 0.0f) {
          v = 0.0f;
          bad = true;
        }
      }
      clamped += bad ? 1 : 0;
    }
  }
  return clamped;
}

Eigen::Matrix3d RotationAboutY(double degrees) {
  return Eigen::AngleAxisd(degrees * M_PI / 180.0, Eigen::Vector3d::UnitY()).toRotationMatrix();
}

cv::Mat RotateLatLong(const cv::Mat& image, double degrees) {
  CV_Assert(image.type() == CV_32FC3);
  const int w = image.cols;
  double turns = std::fmod(degrees, 360.0);
  if (turns < 0) turns += 360.0;
  const double shift = turns * w / 360.0;  // rotated[u] = original[u + shift]
  const double shift_floor = std::floor(shift);
  const int s0 = static_cast<int>(shift_floor) % w;
  const float t = static_cast<float>(shift - shift_floor);
  cv::Mat out(image.size(), image.type());
  for (int y = 0; y < image.rows; ++y) {
    const cv::Vec3f* src = image.ptr<cv::Vec3f>(y);
    cv::Vec3f* dst = out.ptr<cv::Vec3f>(y);
    if (t == 0.0f) {
      for (int u = 0; u < w; ++u) dst[u] = src[(u + s0) % w];
    } else {
      for (int u = 0; u < w; ++u) {
        dst[u] = (1.0f - t) * src[(u + s0) % w] + t * src[(u + s0 + 1) % w];
      }
    }
  }
  return out;
}

double MeanLuminance(const cv::Mat& image) {
  CV_Assert(image.type() == CV_32FC3);
  double sum = 0.0;
  for (int y = 0; y < image.rows; ++y) {
    const cv::Vec3f* row = image.ptr<cv::Vec3f>(y);
    double row_sum = 0.0;
    for (int x = 0; x < image.cols; ++x) row_sum += io::Bt709Luminance(row[x][0], row[x][1], row[x][2]);
    sum += row_sum * TexelSolidAngle(y, image.cols, image.rows);
  }
  return sum / (4.0 * M_PI);
}

io::Status NormaliseExposure(EnvMap* env, double target_luminance) {
  if (!(target_luminance > 0.0) || !std::isfinite(target_luminance)) {
    return io::Status::BadInput(fmt::format("exposure target luminance must be > 0, got {}", target_luminance));
  }
  const double mean = MeanLuminance(env->radiance);
  if (!(mean > 0.0)) {
    return io::Status::BadInput(
        fmt::format("{}: environment map is black (mean BT.709 luminance 0), cannot normalise exposure",
                    env->path.empty() ? env->name : env->path));
  }
  const double scale = target_luminance / mean;
  env->radiance *= scale;
  env->exposure_scale *= scale;
  return io::Status::Ok();
}

Eigen::Vector3f SampleLatLong(const cv::Mat& image, const Eigen::Vector3d& d) {
  const int w = image.cols, h = image.rows;
  const Eigen::Vector2d p = LatLongCoordinates(d, w, h);
  const double x = p.x();
  const double y = std::clamp(p.y(), 0.0, static_cast<double>(h - 1));
  const double xf = std::floor(x), yf = std::floor(y);
  const float tx = static_cast<float>(x - xf), ty = static_cast<float>(y - yf);
  const int x0 = ((static_cast<int>(xf) % w) + w) % w, x1 = (x0 + 1) % w;
  const int y0 = static_cast<int>(yf), y1 = std::min(y0 + 1, h - 1);
  const cv::Vec3f a = image.at<cv::Vec3f>(y0, x0), b = image.at<cv::Vec3f>(y0, x1);
  const cv::Vec3f c = image.at<cv::Vec3f>(y1, x0), e = image.at<cv::Vec3f>(y1, x1);
  const cv::Vec3f v = (1 - ty) * ((1 - tx) * a + tx * b) + ty * ((1 - tx) * c + tx * e);
  return {v[0], v[1], v[2]};
}

// ---- procedural maps ----

cv::Mat MakeSkyMap(int height, const Eigen::Vector3d& sun_dir, double sun_radius_deg, float sun_radiance) {
  const int width = 2 * height;
  const Eigen::Vector3d sun = sun_dir.normalized();
  const double cos_sun = std::cos(sun_radius_deg * M_PI / 180.0);
  cv::Mat out(height, width, CV_32FC3);
  for (int v = 0; v < height; ++v) {
    for (int u = 0; u < width; ++u) {
      const Eigen::Vector3d d = LatLongDirection(u, v, width, height);
      cv::Vec3f c;
      if (d.y() >= 0) {
        const float t = static_cast<float>(std::pow(1.0 - d.y(), 3.0));  // 0 at zenith, 1 at horizon
        c = (1 - t) * cv::Vec3f(0.25f, 0.45f, 1.0f) + t * cv::Vec3f(0.9f, 0.9f, 0.95f);
      } else {
        c = cv::Vec3f(0.18f, 0.15f, 0.12f);  // ground
      }
      if (d.dot(sun) >= cos_sun) c += cv::Vec3f(1.0f, 0.95f, 0.85f) * sun_radiance;
      out.at<cv::Vec3f>(v, u) = c;
    }
  }
  return out;
}

cv::Mat MakeStudioMap(int height) {
  const int width = 2 * height;
  struct Box {
    Eigen::Vector3d centre;
    double half_width_deg, half_height_deg;
    cv::Vec3f radiance;
  };
  // Key light front-left and above, fill front-right, rim behind.
  const Box boxes[] = {
      {Eigen::Vector3d(-0.6, 0.5, 0.6).normalized(), 18, 12, cv::Vec3f(40, 38, 35)},
      {Eigen::Vector3d(0.7, 0.2, 0.7).normalized(), 22, 16, cv::Vec3f(8, 8, 9)},
      {Eigen::Vector3d(0.2, 0.6, -0.8).normalized(), 10, 20, cv::Vec3f(25, 25, 28)},
  };
  cv::Mat out(height, width, CV_32FC3);
  for (int v = 0; v < height; ++v) {
    for (int u = 0; u < width; ++u) {
      const Eigen::Vector3d d = LatLongDirection(u, v, width, height);
      cv::Vec3f c = d.y() < 0 ? cv::Vec3f(0.05f, 0.05f, 0.05f) : cv::Vec3f(0.12f, 0.12f, 0.13f);
      for (const Box& b : boxes) {
        // Box in the tangent plane of its centre: local axes right/up.
        const Eigen::Vector3d right = Eigen::Vector3d::UnitY().cross(b.centre).normalized();
        const Eigen::Vector3d up = b.centre.cross(right);
        const double along = d.dot(b.centre);
        if (along <= 0) continue;
        const double ax = std::atan2(d.dot(right), along) * 180.0 / M_PI;
        const double ay = std::atan2(d.dot(up), along) * 180.0 / M_PI;
        if (std::abs(ax) <= b.half_width_deg && std::abs(ay) <= b.half_height_deg) c = b.radiance;
      }
      out.at<cv::Vec3f>(v, u) = c;
    }
  }
  return out;
}

cv::Mat MakeSmoothMap(int height) {
  const int width = 2 * height;
  // Per channel: c0 + c1 . d + d^T Q d with Q symmetric; chosen so the value
  // stays positive (c0 > |c1| + ||Q||).
  const double c0[3] = {1.0, 0.9, 0.8};
  const Eigen::Vector3d c1[3] = {{0.3, 0.4, 0.2}, {-0.2, 0.35, 0.25}, {0.1, 0.3, -0.3}};
  Eigen::Matrix3d q[3];
  q[0] << 0.15, 0.05, 0.0, 0.05, -0.1, 0.08, 0.0, 0.08, 0.05;
  q[1] << -0.05, 0.0, 0.06, 0.0, 0.12, -0.04, 0.06, -0.04, 0.02;
  q[2] << 0.08, -0.06, 0.0, -0.06, 0.0, 0.05, 0.0, 0.05, -0.1;
  cv::Mat out(height, width, CV_32FC3);
  for (int v = 0; v < height; ++v) {
    for (int u = 0; u < width; ++u) {
      const Eigen::Vector3d d = LatLongDirection(u, v, width, height);
      cv::Vec3f c;
      for (int k = 0; k < 3; ++k) c[k] = static_cast<float>(c0[k] + c1[k].dot(d) + d.dot(q[k] * d));
      out.at<cv::Vec3f>(v, u) = c;
    }
  }
  return out;
}

}  // namespace lumenrig::synth
