// Ray casting of one camera view into a G-buffer of surface samples, shading
// under sets of lights, and the sensor model.
#include <algorithm>
#include <cmath>
#include <limits>
#include <random>

#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/synth/simulator.h"

namespace lumenrig::synth {
namespace {

constexpr double kInvPi = 1.0 / M_PI;
constexpr int kRowGrain = 8;
/// The backdrop plane lies this far behind the subject (camera frame).
constexpr double kBackdropBehind_m = 0.9;
/// Shadow rays start this far along the ray (metres) to leave their own surface.
constexpr double kShadowEpsilon_m = 1e-6;

struct SpecularParams {
  double ks = 0.0;         // Blinn-Phong lobe weight; GGX: Schlick F0
  double exponent = 1.0;   // Blinn-Phong exponent
  double roughness = 1.0;  // GGX alpha
};

SpecularParams SpecularFor(Material m) {
  switch (m) {
    case Material::kPlaster: return {0.05, 30.0, 0.35};
    case Material::kGreySphere: return {0.06, 80.0, 0.15};
    case Material::kHair: return {0.0, 1.0, 1.0};
  }
  return {};
}

/// Specular radiance factor (times light intensity) including the n.l term.
double SpecularTerm(SpecularModel model, const SpecularParams& sp, const Eigen::Vector3d& n, const Eigen::Vector3d& l,
                    const Eigen::Vector3d& v, double n_dot_l) {
  if (model == SpecularModel::kNone || sp.ks <= 0.0) return 0.0;
  const Eigen::Vector3d h = (l + v).normalized();
  const double n_dot_h = std::max(0.0, n.dot(h));
  if (model == SpecularModel::kBlinnPhong) {
    return sp.ks * (sp.exponent + 8.0) / (8.0 * M_PI) * std::pow(n_dot_h, sp.exponent) * n_dot_l;
  }
  // Cook-Torrance: D G F / (4 n.l n.v) * n.l.
  const double n_dot_v = std::max(1e-3, n.dot(v));
  const double a2 = sp.roughness * sp.roughness;
  const double denom = n_dot_h * n_dot_h * (a2 - 1.0) + 1.0;
  const double d = a2 / (M_PI * denom * denom);
  const double k = sp.roughness / 2.0;
  const double g = (n_dot_l / (n_dot_l * (1.0 - k) + k)) * (n_dot_v / (n_dot_v * (1.0 - k) + k));
  const double f0 = sp.ks;  // Schlick: reflectance at normal incidence
  const double f = f0 + (1.0 - f0) * std::pow(1.0 - std::max(0.0, h.dot(v)), 5.0);
  return d * g * f / (4.0 * n_dot_v);
}

}  // namespace

CameraView CameraView::Build(const SimOptions& options, const io::Camera& camera, double subject_shift_px,
                             double principal_shift_px, int threads) {
  CameraView view;
  view.width_ = options.width;
  view.height_ = options.height;
  view.options_ = options;
  const io::Intrinsics k = camera.intrinsics.value_or(io::Intrinsics{});
  const Eigen::Matrix3d r = camera.RotationCameraFromRig();
  const Eigen::Vector3d t = camera.camera_from_rig.topRightCorner<3, 1>();
  view.camera_from_rig_r_ = r;
  view.centre_rig_ = -r.transpose() * t;
  const Eigen::Vector3d right_rig = r.row(0).transpose();
  const Eigen::Vector3d offset = right_rig * (subject_shift_px * options.camera_distance_m / k.fx);
  view.scene_ = Scene(offset, options.hair);

  const int w = options.width, h = options.height;
  const double cx = k.cx + principal_shift_px;
  const double backdrop_z_m = options.camera_distance_m + kBackdropBehind_m;
  const Scene& scene = view.scene_;
  const Eigen::Vector3d origin = view.centre_rig_;
  const Eigen::Matrix3d rig_from_camera = r.transpose();

  auto camera_ray = [&](double px, double py, Eigen::Vector3d* dir_cam) {
    *dir_cam = Eigen::Vector3d((px - cx) / k.fx, -(py - k.cy) / k.fy, -1.0).normalized();
    return Eigen::Vector3d(rig_from_camera * *dir_cam);
  };

  // Pass 1: what the pixel centre sees (solid id and hair flag).
  std::vector<int> signature(static_cast<size_t>(w) * h);
  view.backdrop_xy_.assign(static_cast<size_t>(w) * h, Eigen::Vector3f::Zero());
  io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int64_t y = y0; y < y1; ++y) {
      for (int x = 0; x < w; ++x) {
        Eigen::Vector3d dc;
        const Eigen::Vector3d d = camera_ray(x + 0.5, y + 0.5, &dc);
        SurfaceHit hit;
        const bool solid = scene.Intersect(origin, d, 0.0, std::numeric_limits<double>::infinity(), &hit);
        HairHit hair;
        const bool has_hair =
            scene.IntersectHair(origin, d, solid ? hit.t : std::numeric_limits<double>::infinity(), &hair);
        const size_t i = static_cast<size_t>(y) * w + x;
        signature[i] = (solid ? hit.primitive + 1 : 0) * 2 + (has_hair ? 1 : 0);
        const double s = backdrop_z_m / -dc.z();
        view.backdrop_xy_[i] = Eigen::Vector3f(static_cast<float>(dc.x() * s), static_cast<float>(dc.y() * s), 0.f);
      }
    }
  });

  // Pass 2: surface samples, supersampled where the 3x3 neighbourhood is not uniform.
  const int ss = std::max(1, options.supersample);
  std::vector<std::vector<Sample>> row_samples(h);
  std::vector<std::vector<int>> row_counts(h, std::vector<int>(w, 0));
  io::ParallelFor(0, h, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int64_t y = y0; y < y1; ++y) {
      auto& out = row_samples[y];
      for (int x = 0; x < w; ++x) {
        const int sig = signature[static_cast<size_t>(y) * w + x];
        bool uniform = (sig & 1) == 0;
        for (int dy = -1; dy <= 1 && uniform; ++dy) {
          for (int dx = -1; dx <= 1; ++dx) {
            const int xx = std::clamp(x + dx, 0, w - 1);
            const int yy = std::clamp(static_cast<int>(y) + dy, 0, h - 1);
            if (signature[static_cast<size_t>(yy) * w + xx] != sig) {
              uniform = false;
              break;
            }
          }
        }
        if (uniform && sig == 0) continue;  // backdrop only
        const int n = uniform ? 1 : ss;
        const double weight = 1.0 / (static_cast<double>(n) * n);
        const size_t before = out.size();
        for (int sy = 0; sy < n; ++sy) {
          for (int sx = 0; sx < n; ++sx) {
            Eigen::Vector3d dc;
            const Eigen::Vector3d d = camera_ray(x + (sx + 0.5) / n, y + (sy + 0.5) / n, &dc);
            SurfaceHit hit;
            const bool solid = scene.Intersect(origin, d, 0.0, std::numeric_limits<double>::infinity(), &hit);
            HairHit hair;
            double hair_cov = 0.0;
            if (scene.IntersectHair(origin, d, solid ? hit.t : std::numeric_limits<double>::infinity(), &hair)) {
              hair_cov = hair.coverage;
              Sample s;
              s.position = hair.position;
              s.normal = hair.normal;
              s.material = Material::kHair;
              s.albedo = scene.Albedo(Material::kHair, hair.position);
              s.weight = static_cast<float>(weight * hair_cov);
              s.depth_m = static_cast<float>(hair.t * -dc.z());
              out.push_back(s);
            }
            if (solid) {
              Sample s;
              s.position = hit.position;
              s.normal = hit.normal;
              s.material = hit.material;
              s.albedo = scene.Albedo(hit.material, hit.position);
              s.weight = static_cast<float>(weight * (1.0 - hair_cov));
              s.depth_m = static_cast<float>(hit.t * -dc.z());
              out.push_back(s);
            }
          }
        }
        row_counts[y][x] = static_cast<int>(out.size() - before);
      }
    }
  });

  view.offsets_.assign(static_cast<size_t>(w) * h + 1, 0);
  size_t total = 0;
  for (int y = 0; y < h; ++y) total += row_samples[y].size();
  view.samples_.reserve(total);
  int running = 0;
  for (int y = 0; y < h; ++y) {
    for (int x = 0; x < w; ++x) {
      view.offsets_[static_cast<size_t>(y) * w + x] = running;
      running += row_counts[y][x];
    }
    view.samples_.insert(view.samples_.end(), row_samples[y].begin(), row_samples[y].end());
  }
  view.offsets_[static_cast<size_t>(w) * h] = running;
  view.alpha_.assign(static_cast<size_t>(w) * h, 0.0f);
  for (size_t i = 0; i + 1 < view.offsets_.size(); ++i) {
    double a = 0.0;
    for (int k = view.offsets_[i]; k < view.offsets_[i + 1]; ++k) a += view.samples_[k].weight;
    view.alpha_[i] = static_cast<float>(std::min(1.0, a));
  }
  return view;
}

TruthMaps CameraView::Truth() const {
  TruthMaps t;
  t.normals = cv::Mat::zeros(height_, width_, CV_32FC3);
  t.albedo = cv::Mat::zeros(height_, width_, CV_32FC3);
  t.alpha = cv::Mat::zeros(height_, width_, CV_32FC1);
  t.depth = cv::Mat::zeros(height_, width_, CV_32FC1);
  t.mask = cv::Mat::zeros(height_, width_, CV_8UC1);
  for (int y = 0; y < height_; ++y) {
    for (int x = 0; x < width_; ++x) {
      const size_t i = static_cast<size_t>(y) * width_ + x;
      double alpha = 0.0, depth = 0.0;
      Eigen::Vector3d n = Eigen::Vector3d::Zero(), a = Eigen::Vector3d::Zero();
      for (int k = offsets_[i]; k < offsets_[i + 1]; ++k) {
        const Sample& s = samples_[k];
        alpha += s.weight;
        n += s.weight * (camera_from_rig_r_ * s.normal);
        a += s.weight * s.albedo.cast<double>();
        depth += s.weight * s.depth_m;
      }
      if (alpha <= 0.0) continue;
      const double len = n.norm();
      if (len > 0.0) n /= len;
      a /= alpha;
      t.normals.at<cv::Vec3f>(y, x) =
          cv::Vec3f(static_cast<float>(n.x()), static_cast<float>(n.y()), static_cast<float>(n.z()));
      t.albedo.at<cv::Vec3f>(y, x) =
          cv::Vec3f(static_cast<float>(a.x()), static_cast<float>(a.y()), static_cast<float>(a.z()));
      const float alpha_f = alpha_[i];
      t.alpha.at<float>(y, x) = alpha_f;
      t.depth.at<float>(y, x) = static_cast<float>(depth / alpha);
      t.mask.at<uint8_t>(y, x) = alpha_f > 0.5f ? 255 : 0;
    }
  }
  return t;
}

cv::Mat CameraView::Composite(const cv::Mat& subject_radiance, double scale, Backdrop backdrop) const {
  cv::Mat out(height_, width_, CV_32FC3);
  for (int y = 0; y < height_; ++y) {
    const cv::Vec3f* src = subject_radiance.ptr<cv::Vec3f>(y);
    cv::Vec3f* dst = out.ptr<cv::Vec3f>(y);
    for (int x = 0; x < width_; ++x) {
      Eigen::Vector3d v(src[x][0] * scale, src[x][1] * scale, src[x][2] * scale);
      const double alpha = alpha_[static_cast<size_t>(y) * width_ + x];
      if (backdrop != Backdrop::kBlack && alpha < 1.0) {
        const Eigen::Vector3f& xy = backdrop_xy_[static_cast<size_t>(y) * width_ + x];
        v += (1.0 - alpha) * BackdropRadiance(backdrop, xy.x(), xy.y()).cast<double>();
      }
      dst[x] = cv::Vec3f(static_cast<float>(v.x()), static_cast<float>(v.y()), static_cast<float>(v.z()));
    }
  }
  return out;
}

cv::Mat CameraView::Render(const std::vector<LitLight>& lights, Backdrop backdrop, bool show_subject,
                           int threads) const {
  struct Prepared {
    bool near;
    Eigen::Vector3d vec;  // direction (unit) or position, rig frame
    Eigen::Vector3d rgb;  // intensity * gain
  };
  std::vector<Prepared> prepared;
  prepared.reserve(lights.size());
  for (const LitLight& ll : lights) {
    Prepared p;
    p.near = ll.light.position.has_value();
    p.vec = p.near ? *ll.light.position : ll.light.direction.value_or(Eigen::Vector3d::UnitY()).normalized();
    p.rgb = ll.light.intensity * ll.gain;
    if (p.rgb.isZero(0.0)) continue;
    prepared.push_back(p);
  }
  const SpecularModel model = options_.specular;
  const bool shadows = options_.shadows;
  cv::Mat out(height_, width_, CV_32FC3);
  io::ParallelFor(0, height_, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int64_t y = y0; y < y1; ++y) {
      cv::Vec3f* row = out.ptr<cv::Vec3f>(static_cast<int>(y));
      for (int x = 0; x < width_; ++x) {
        const size_t i = static_cast<size_t>(y) * width_ + x;
        Eigen::Vector3d radiance = Eigen::Vector3d::Zero();
        const double alpha = show_subject ? alpha_[i] : 0.0;
        if (show_subject && !prepared.empty()) {
          for (int k = offsets_[i]; k < offsets_[i + 1]; ++k) {
            const Sample& s = samples_[k];
            const SpecularParams sp = SpecularFor(s.material);
            const Eigen::Vector3d v = (centre_rig_ - s.position).normalized();
            const Eigen::Vector3d albedo = s.albedo.cast<double>();
            Eigen::Vector3d acc = Eigen::Vector3d::Zero();
            for (const Prepared& p : prepared) {
              Eigen::Vector3d l;
              double atten = 1.0, t_max = std::numeric_limits<double>::infinity();
              if (p.near) {
                const Eigen::Vector3d lv = p.vec - s.position;
                const double d2 = lv.squaredNorm();
                const double d = std::sqrt(d2);
                l = lv / d;
                atten = 1.0 / d2;
                t_max = d;
              } else {
                l = p.vec;
              }
              const double n_dot_l = s.normal.dot(l);
              if (n_dot_l <= 0.0) continue;
              if (shadows && scene_.Occluded(s.position, l, kShadowEpsilon_m, t_max)) continue;
              const double spec = SpecularTerm(model, sp, s.normal, l, v, n_dot_l);
              acc += atten * p.rgb.cwiseProduct(albedo * (kInvPi * n_dot_l) + Eigen::Vector3d::Constant(spec));
            }
            radiance += s.weight * acc;
          }
        }
        if (backdrop != Backdrop::kBlack && alpha < 1.0) {
          const Eigen::Vector3f& xy = backdrop_xy_[i];
          radiance += (1.0 - alpha) * BackdropRadiance(backdrop, xy.x(), xy.y()).cast<double>();
        }
        row[x] = cv::Vec3f(static_cast<float>(radiance.x()), static_cast<float>(radiance.y()),
                           static_cast<float>(radiance.z()));
      }
    }
  });
  return out;
}

void ApplySensor(const SimOptions& options, int camera_index, uint64_t frame_key, cv::Mat* image, int threads) {
  const int channels = image->channels();
  const float black = static_cast<float>(options.black_level);
  const float inv_full_well = 1.0f / options.full_well_electrons;
  const float read_var = options.read_noise * options.read_noise;
  const int w = image->cols;
  io::ParallelFor(0, image->rows, kRowGrain, threads, [&](int64_t y0, int64_t y1) {
    for (int64_t y = y0; y < y1; ++y) {
      float* row = image->ptr<float>(static_cast<int>(y));
      std::mt19937_64 rng(
          io::DeriveSeed(options.seed, static_cast<uint64_t>(camera_index), frame_key, static_cast<uint64_t>(y)));
      std::normal_distribution<float> gauss(0.0f, 1.0f);
      for (int i = 0; i < w * channels; ++i) {
        float v = row[i];
        if (options.noise) {
          // Shot (variance v / full well) and read noise are independent
          // Gaussians, so their sum is one Gaussian with the summed variance.
          v += std::sqrt(std::max(0.0f, v) * inv_full_well + read_var) * gauss(rng);
        }
        row[i] = std::clamp(v + black, 0.0f, 1.0f);
      }
    }
  });
}

}  // namespace lumenrig::synth
