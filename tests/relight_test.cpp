// Image-based relighting (Debevec et al. 2000) of a Lambertian sphere against
// the closed-form SH irradiance rendering (Ramamoorthi and Hanrahan 2001),
// plus the identities relighting must satisfy.
#include <cmath>
#include <cstdio>

#include <gtest/gtest.h>

#include "lumenrig/synth/dome_layout.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/relight.h"
#include "lumenrig/synth/sh.h"

namespace lumenrig::synth {
namespace {

struct SphereScene {
  io::Rig rig;
  std::vector<cv::Mat> frames;  // frame i = intensity_i * a/pi * max(0, n.l_i)
  cv::Mat normals;              // camera = rig frame, orthographic view along -z
  cv::Mat mask;
  Eigen::Vector3d albedo{0.8, 0.6, 0.4};
};

// Lambertian sphere seen orthographically (closed form of DESIGN.md: a frame
// divided by intensity is a/pi max(0, n.l)); no shadows on a convex sphere.
SphereScene MakeSphere(int size, const std::vector<Eigen::Vector3d>& dirs) {
  SphereScene s;
  s.rig.name = "test";
  for (size_t i = 0; i < dirs.size(); ++i) {
    io::Light l;
    l.id = static_cast<int>(i);
    l.direction = dirs[i];
    l.intensity = Eigen::Vector3d(1.0 + 0.1 * (i % 3), 0.9 + 0.05 * (i % 5), 1.1);
    s.rig.lights.push_back(l);
  }
  s.normals = cv::Mat::zeros(size, size, CV_32FC3);
  s.mask = cv::Mat::zeros(size, size, CV_8U);
  const double r = 0.5 * size - 1.0;
  for (int y = 0; y < size; ++y) {
    for (int x = 0; x < size; ++x) {
      const double nx = (x + 0.5 - 0.5 * size) / r, ny = -(y + 0.5 - 0.5 * size) / r;
      const double q = 1.0 - nx * nx - ny * ny;
      if (q <= 0) continue;
      s.normals.at<cv::Vec3f>(y, x) = cv::Vec3f(nx, ny, std::sqrt(q));
      s.mask.at<uint8_t>(y, x) = 255;
    }
  }
  for (size_t i = 0; i < dirs.size(); ++i) {
    cv::Mat f = cv::Mat::zeros(size, size, CV_32FC3);
    for (int y = 0; y < size; ++y) {
      for (int x = 0; x < size; ++x) {
        const cv::Vec3f n = s.normals.at<cv::Vec3f>(y, x);
        const double c = std::max(0.0, n[0] * dirs[i].x() + n[1] * dirs[i].y() + n[2] * dirs[i].z());
        for (int k = 0; k < 3; ++k) {
          f.at<cv::Vec3f>(y, x)[k] = static_cast<float>(s.rig.lights[i].intensity(k) * s.albedo(k) / M_PI * c);
        }
      }
    }
    s.frames.push_back(f);
  }
  return s;
}

std::vector<int> Iota(int n) {
  std::vector<int> v(n);
  for (int i = 0; i < n; ++i) v[i] = i;
  return v;
}

cv::Mat RelightOne(const SphereScene& s, const cv::Mat& map, int threads = 1) {
  auto w = ComputeLightWeights(map, s.rig, LightWeightOptions{});
  EXPECT_TRUE(w.ok()) << w.status().message();
  auto src = MakeMemoryOlatSource(s.frames, Iota(static_cast<int>(s.frames.size())));
  std::vector<cv::Mat> out;
  RelightOptions o;
  o.threads = threads;
  EXPECT_TRUE(RelightBatch(src.get(), {w->weights}, o, &out).ok());
  return out[0];
}

double RelativeRmse(const SphereScene& s, const cv::Mat& relit, const ShCoeffs& sh) {
  double num = 0, den = 0;
  for (int y = 0; y < relit.rows; ++y) {
    for (int x = 0; x < relit.cols; ++x) {
      if (!s.mask.at<uint8_t>(y, x)) continue;
      const cv::Vec3f n = s.normals.at<cv::Vec3f>(y, x);
      const Eigen::Vector3d e = ShIrradiance(sh, Eigen::Vector3d(n[0], n[1], n[2]));
      for (int k = 0; k < 3; ++k) {
        const double ref = s.albedo(k) / M_PI * e(k);  // DESIGN.md: a/pi * E(n)
        const double d = relit.at<cv::Vec3f>(y, x)[k] - ref;
        num += d * d;
        den += ref * ref;
      }
    }
  }
  return std::sqrt(num / den);
}

TEST(Relight, LambertianSphereMatchesShIrradianceAndErrorFallsWithLights) {
  // Reference: the closed-form SH irradiance rendering a/pi E(n) of the same
  // sphere (Ramamoorthi and Hanrahan 2001); the map is band-limited to l <= 2
  // so the 9-term E is exact. Lights: Fibonacci dome over the whole sphere
  // (the map has energy everywhere). Requirement of issue 6: < 2% relative
  // RMSE with 156 lights.
  const cv::Mat map = MakeSmoothMap(128);
  const ShCoeffs sh = ProjectSh9(map);
  std::printf("lights  relative_rmse\n");
  double err156 = 1, err40 = 0;
  for (int n : {20, 40, 80, 156, 320}) {
    const SphereScene s = MakeSphere(96, FibonacciDome(n, -90.0));
    const double e = RelativeRmse(s, RelightOne(s, map), sh);
    std::printf("%6d  %.4f\n", n, e);
    RecordProperty("rmse_" + std::to_string(n), std::to_string(e));
    if (n == 156) err156 = e;
    if (n == 40) err40 = e;
  }
  EXPECT_LT(err156, 0.02);
  EXPECT_LT(err156, err40);
}

TEST(Relight, SmallSpotAtLightDirectionReproducesItsOlatFrame) {
  // With a map that is a small bright disk around light j's direction (inside
  // its Voronoi cell), w_i = 0 for i != j and relit = (spot integral /
  // intensity_j) * OLAT_j exactly (Debevec et al. 2000, eq. of relighting).
  const auto dirs = FibonacciDome(40, -90.0);
  const SphereScene s = MakeSphere(48, dirs);
  const int j = 17;
  const int h = 256;
  cv::Mat map = cv::Mat::zeros(h, 2 * h, CV_32FC3);
  double spot = 0;
  for (int v = 0; v < h; ++v) {
    for (int u = 0; u < 2 * h; ++u) {
      if (LatLongDirection(u, v, 2 * h, h).dot(dirs[j]) > std::cos(3.0 * M_PI / 180)) {
        map.at<cv::Vec3f>(v, u) = cv::Vec3f(50, 50, 50);
        spot += 50 * TexelSolidAngle(v, 2 * h, h);
      }
    }
  }
  ASSERT_GT(spot, 0);
  const cv::Mat relit = RelightOne(s, map);
  cv::Mat expect = s.frames[j].clone();
  for (int y = 0; y < expect.rows; ++y) {
    for (int x = 0; x < expect.cols; ++x) {
      for (int k = 0; k < 3; ++k)
        expect.at<cv::Vec3f>(y, x)[k] *= static_cast<float>(spot / s.rig.lights[j].intensity(k));
    }
  }
  EXPECT_LT(cv::norm(relit, expect, cv::NORM_INF) / cv::norm(expect, cv::NORM_INF), 1e-5);
}

TEST(Relight, LinearInTheMapAndRotation360IsIdentity) {
  // Relighting is a linear operator on the map (Debevec et al. 2000).
  const SphereScene s = MakeSphere(40, FibonacciDome(60, -90.0));
  const cv::Mat a = MakeStudioMap(64), b = MakeSkyMap(64, Eigen::Vector3d(0.3, 0.8, 0.2), 4.0, 30.0f);
  const cv::Mat ra = RelightOne(s, a), rb = RelightOne(s, b), rab = RelightOne(s, 2.0 * a + 0.5 * b);
  const cv::Mat lin = 2.0 * ra + 0.5 * rb;
  EXPECT_LT(cv::norm(rab, lin, cv::NORM_INF) / cv::norm(lin, cv::NORM_INF), 1e-5);
  EXPECT_EQ(cv::norm(RelightOne(s, RotateLatLong(a, 360.0)), ra, cv::NORM_INF), 0.0);
  EXPECT_GT(cv::norm(RelightOne(s, RotateLatLong(a, 90.0)), ra, cv::NORM_INF), 1e-3);
}

TEST(Relight, BatchEqualsSingleAndIsIdenticalForThreadsAndBudgets) {
  const SphereScene s = MakeSphere(50, FibonacciDome(30, -90.0));
  std::vector<Eigen::MatrixXd> w;
  for (int k = 0; k < 5; ++k) {
    auto lw = ComputeLightWeights(RotateLatLong(MakeStudioMap(32), 40.0 * k), s.rig, LightWeightOptions{});
    ASSERT_TRUE(lw.ok());
    w.push_back(lw->weights);
  }
  auto src = MakeMemoryOlatSource(s.frames, Iota(30));
  std::vector<cv::Mat> batch1, batch2, batch_small;
  RelightOptions o1;
  o1.threads = 1;
  ASSERT_TRUE(RelightBatch(src.get(), w, o1, &batch1).ok());
  RelightOptions o2;
  o2.threads = 2;
  ASSERT_TRUE(RelightBatch(src.get(), w, o2, &batch2).ok());
  RelightOptions small;
  small.threads = 2;
  small.mem_budget_bytes = 1;  // minimum band: kRowsPerChunk rows
  RelightStats stats;
  ASSERT_TRUE(RelightBatch(src.get(), w, small, &batch_small, &stats).ok());
  EXPECT_EQ(stats.band_rows, kRowsPerChunk);
  for (int k = 0; k < 5; ++k) {
    EXPECT_EQ(cv::norm(batch1[k], batch2[k], cv::NORM_INF), 0.0) << "threads changed map " << k;
    EXPECT_EQ(cv::norm(batch1[k], batch_small[k], cv::NORM_INF), 0.0) << "budget changed map " << k;
    std::vector<cv::Mat> single;
    ASSERT_TRUE(RelightBatch(src.get(), {w[k]}, o1, &single).ok());
    EXPECT_LT(cv::norm(single[0], batch1[k], cv::NORM_INF), 1e-5 * cv::norm(single[0], cv::NORM_INF));
  }
}

TEST(LightWeights, UncoveredEnergyBelowAnUpperDome) {
  // A dome over the upper hemisphere cannot reproduce light from below: a map
  // lit only below the horizon is (almost) entirely uncovered, one lit only
  // above is covered.
  io::Rig rig;
  const auto dirs = FibonacciDome(100, 0.0);
  for (size_t i = 0; i < dirs.size(); ++i) {
    io::Light l;
    l.id = static_cast<int>(i);
    l.direction = dirs[i];
    rig.lights.push_back(l);
  }
  cv::Mat below = cv::Mat::zeros(64, 128, CV_32FC3), above = below.clone();
  below.rowRange(48, 64).setTo(cv::Scalar(1, 1, 1));
  above.rowRange(0, 24).setTo(cv::Scalar(1, 1, 1));
  auto wb = ComputeLightWeights(below, rig, LightWeightOptions{});
  auto wa = ComputeLightWeights(above, rig, LightWeightOptions{});
  ASSERT_TRUE(wb.ok() && wa.ok());
  EXPECT_GT(wb->uncovered_energy_fraction, 0.99);
  EXPECT_LT(wa->uncovered_energy_fraction, 0.01);
  // Sum of weights of a covered constant-radiance region = its solid angle.
  EXPECT_NEAR(wa->weights.col(1).sum(), wa->total_energy, 1e-6 * wa->total_energy);
}

TEST(LightWeights, SolidAngleRescalesCells) {
  io::Rig rig;
  for (int i = 0; i < 6; ++i) {
    io::Light l;
    l.id = i;
    Eigen::Vector3d d = Eigen::Vector3d::Zero();
    d(i / 2) = (i % 2) ? -1 : 1;
    l.direction = d;
    l.solid_angle_sr = 1.0;
    rig.lights.push_back(l);
  }
  cv::Mat map(32, 64, CV_32FC3, cv::Scalar(2, 2, 2));
  auto w = ComputeLightWeights(map, rig, LightWeightOptions{});
  ASSERT_TRUE(w.ok());
  // Constant radiance 2 times the given share of 1 sr.
  for (int i = 0; i < 6; ++i) EXPECT_NEAR(w->weights(i, 0), 2.0, 1e-6);
}

TEST(LightWeights, BadRigs) {
  io::Rig empty;
  EXPECT_FALSE(ComputeLightWeights(MakeStudioMap(16), empty, LightWeightOptions{}).ok());
  io::Rig rig;
  rig.path = "/tmp/rig.json";
  io::Light l;
  l.id = 7;
  rig.lights.push_back(l);  // neither direction nor position
  auto w = ComputeLightWeights(MakeStudioMap(16), rig, LightWeightOptions{});
  ASSERT_FALSE(w.ok());
  EXPECT_EQ(w.status().code(), io::StatusCode::kBadInput);
  EXPECT_NE(w.status().message().find("rig.json"), std::string::npos) << w.status().message();
  EXPECT_NE(w.status().message().find("id 7"), std::string::npos) << w.status().message();
  // Near-field rig: direction from the rig origin to the position.
  rig.lights[0].position = Eigen::Vector3d(0, 2, 0);
  auto dirs = RigLightDirections(rig, "rig");
  ASSERT_TRUE(dirs.ok());
  EXPECT_NEAR((*dirs)[0].y(), 1.0, 1e-12);
  EXPECT_FALSE(ComputeLightWeights(cv::Mat(16, 16, CV_32FC3, cv::Scalar(1, 1, 1)), rig, LightWeightOptions{}).ok());
}

}  // namespace
}  // namespace lumenrig::synth
