// Tests of the capture simulator's rendering (in memory): radiometry against
// the closed form, determinism across thread counts, faults.
#include <cmath>
#include <cstring>

#include <gtest/gtest.h>

#include "lumenrig/synth/simulator.h"

namespace lumenrig::synth {
namespace {

SimOptions PlainOptions() {
  SimOptions o;
  o.width = 96;
  o.height = 72;
  o.num_lights = 12;
  o.noise = false;
  o.black_level = 0.0;
  o.specular = SpecularModel::kNone;
  o.shadows = false;
  o.tracking_every = 0;
  o.threads = 2;
  return o;
}

struct SpherePixel {
  int x, y;
  Eigen::Vector3d point_cam, normal_cam;
};

// Pixels whose centre ray hits the grey sphere first, found independently of
// the renderer by intersecting the pinhole ray with the sphere, keeping only
// pixels whose 3x3 neighbourhood is sphere too (no silhouette).
std::vector<SpherePixel> InteriorSpherePixels(const io::Camera& cam, const TruthMaps& truth) {
  const io::Intrinsics k = *cam.intrinsics;
  const Eigen::Matrix3d r = cam.RotationCameraFromRig();
  const Eigen::Vector3d centre = r * kGreySphereCentre + cam.camera_from_rig.topRightCorner<3, 1>();
  const int w = truth.alpha.cols, h = truth.alpha.rows;
  cv::Mat on_sphere = cv::Mat::zeros(h, w, CV_8U);
  std::vector<SpherePixel> hits(static_cast<size_t>(w) * h);
  for (int y = 0; y < h; ++y) {
    for (int x = 0; x < w; ++x) {
      const Eigen::Vector3d d = Eigen::Vector3d((x + 0.5 - k.cx) / k.fx, -(y + 0.5 - k.cy) / k.fy, -1.0).normalized();
      const double b = d.dot(centre);
      const double disc = b * b - (centre.squaredNorm() - kGreySphereRadius_m * kGreySphereRadius_m);
      if (disc <= 0) continue;
      const double t = b - std::sqrt(disc);
      const Eigen::Vector3d p = t * d;
      // Visible only if the truth depth is the sphere's (nothing in front).
      if (std::abs(truth.depth.at<float>(y, x) - (-p.z())) > 1e-4) continue;
      on_sphere.at<uint8_t>(y, x) = 1;
      hits[static_cast<size_t>(y) * w + x] = {x, y, p, (p - centre) / kGreySphereRadius_m};
    }
  }
  std::vector<SpherePixel> out;
  for (int y = 1; y < h - 1; ++y) {
    for (int x = 1; x < w - 1; ++x) {
      bool all = true;
      for (int dy = -1; dy <= 1; ++dy)
        for (int dx = -1; dx <= 1; ++dx) all = all && on_sphere.at<uint8_t>(y + dy, x + dx);
      if (all) out.push_back(hits[static_cast<size_t>(y) * w + x]);
    }
  }
  return out;
}

// Source: DESIGN.md radiometry and Lambert's cosine law: under a distant
// light of intensity I a Lambertian surface of albedo a gives
// a/pi * I * max(0, n.l); a near-field light at distance d adds 1/d^2
// (inverse-square law). Tolerance 2e-6 absolute on values <= 1: float32
// rounding of the stored result (eps 6e-8) with margin (common practice).
void ExpectClosedForm(SimOptions o) {
  o.width = 160;
  o.height = 120;
  auto sim = SimulateCamera(o, 0);
  ASSERT_TRUE(sim.ok()) << sim.status().message();
  const std::vector<SpherePixel> pixels = InteriorSpherePixels(sim->camera, sim->truth);
  ASSERT_GT(pixels.size(), 100u) << "grey sphere too small in the test image";
  const Eigen::Matrix3d r = sim->camera.RotationCameraFromRig();
  const Eigen::Vector3d t = sim->camera.camera_from_rig.topRightCorner<3, 1>();
  int lit = 0, unlit = 0;
  for (size_t k = 0; k < sim->rig.lights.size(); ++k) {
    const io::Light& light = sim->rig.lights[k];
    for (const SpherePixel& px : pixels) {
      Eigen::Vector3d l;
      double inv_d2 = 1.0;
      if (light.position) {
        const Eigen::Vector3d lv = r * *light.position + t - px.point_cam;
        inv_d2 = 1.0 / lv.squaredNorm();
        l = lv.normalized();
      } else {
        l = r * *light.direction;
      }
      const double cosine = std::max(0.0, px.normal_cam.dot(l));
      (cosine > 0 ? lit : unlit)++;
      const cv::Vec3f got = sim->olat[k].at<cv::Vec3f>(px.y, px.x);
      for (int c = 0; c < 3; ++c) {
        const double expected = kGreySphereAlbedo / M_PI * light.intensity[c] * cosine * inv_d2;
        ASSERT_NEAR(got[c], expected, 2e-6)
            << "light " << light.id << " pixel (" << px.x << "," << px.y << ") channel " << c;
      }
    }
  }
  EXPECT_GT(lit, 0);
  EXPECT_GT(unlit, 0);
}

TEST(SimulatorRadiometry, DistantLightsLambertianSphereMatchesClosedForm) { ExpectClosedForm(PlainOptions()); }

TEST(SimulatorRadiometry, NearFieldLambertianSphereMatchesClosedForm) {
  SimOptions o = PlainOptions();
  o.near_field = true;
  ExpectClosedForm(o);
}

TEST(SimulatorRadiometry, TruthNormalsAreUnitAndFaceTheCamera) {
  auto sim = SimulateCamera(PlainOptions(), 0);
  ASSERT_TRUE(sim.ok());
  int n = 0;
  for (int y = 0; y < sim->truth.alpha.rows; ++y) {
    for (int x = 0; x < sim->truth.alpha.cols; ++x) {
      if (sim->truth.alpha.at<float>(y, x) < 1.0f) continue;
      const cv::Vec3f nv = sim->truth.normals.at<cv::Vec3f>(y, x);
      EXPECT_NEAR(cv::norm(nv), 1.0, 1e-5);
      EXPECT_GT(nv[2], -0.05f);  // visible surfaces face the viewer (+z), up to pixel smear at grazing angles
      ++n;
    }
  }
  EXPECT_GT(n, 500);
}

TEST(SimulatorRadiometry, SingleLightFramesDoNotClipAndPeakInRange) {
  SimOptions o;
  o.width = 80;
  o.height = 60;
  o.num_lights = 24;
  o.threads = 2;
  auto sim = SimulateCamera(o, 0);
  ASSERT_TRUE(sim.ok());
  double brightest = 0;
  for (const cv::Mat& f : sim->olat) {
    double mx;
    cv::minMaxLoc(f.reshape(1), nullptr, &mx);
    brightest = std::max(brightest, mx);
  }
  // Design target of the simulator (see simulator.h): 0.5..0.8, never 1.
  EXPECT_GT(brightest, 0.5);
  EXPECT_LT(brightest, 0.95);
}

TEST(SimulatorAlpha, SilhouetteAndHairHaveFractionalCoverage) {
  SimOptions o = PlainOptions();
  o.width = 160;
  o.height = 120;
  auto sim = SimulateCamera(o, 0);
  ASSERT_TRUE(sim.ok());
  int fractional = 0, full = 0;
  for (int y = 0; y < sim->truth.alpha.rows; ++y) {
    for (int x = 0; x < sim->truth.alpha.cols; ++x) {
      const float a = sim->truth.alpha.at<float>(y, x);
      if (a > 0.02f && a < 0.98f) ++fractional;
      if (a >= 1.0f) ++full;
      EXPECT_GE(a, 0.0f);
      EXPECT_LE(a, 1.0f);
    }
  }
  EXPECT_GT(fractional, 200);  // silhouette ring plus the hair fringe
  EXPECT_GT(full, 2000);
}

TEST(SimulatorShading, SpecularAddsEnergyAndIsFinite) {
  SimOptions o = PlainOptions();
  auto diffuse = SimulateCamera(o, 0);
  ASSERT_TRUE(diffuse.ok());
  for (SpecularModel model : {SpecularModel::kBlinnPhong, SpecularModel::kGgx}) {
    o.specular = model;
    auto spec = SimulateCamera(o, 0);
    ASSERT_TRUE(spec.ok());
    int brighter = 0;
    for (size_t k = 0; k < spec->olat.size(); ++k) {
      cv::Mat diff = spec->olat[k] - diffuse->olat[k];
      ASSERT_TRUE(cv::checkRange(spec->olat[k])) << "NaN or Inf, light " << k;
      double mn;
      cv::minMaxLoc(diff.reshape(1), &mn, nullptr);
      EXPECT_GE(mn, -1e-6) << "a specular lobe never removes light (light " << k << ")";
      brighter += cv::countNonZero(diff.reshape(1) > 1e-4);
    }
    EXPECT_GT(brighter, 100) << "model " << static_cast<int>(model);
  }
}

TEST(SimulatorShading, CastShadowsOnlyRemoveLight) {
  SimOptions o = PlainOptions();
  o.min_elevation_deg = 50;  // high lights: the head shadows the shoulders
  auto open = SimulateCamera(o, 0);
  o.shadows = true;
  auto shadowed = SimulateCamera(o, 0);
  ASSERT_TRUE(open.ok() && shadowed.ok());
  int darker = 0;
  for (size_t k = 0; k < open->olat.size(); ++k) {
    cv::Mat diff = open->olat[k] - shadowed->olat[k];
    double mn;
    cv::minMaxLoc(diff.reshape(1), &mn, nullptr);
    EXPECT_GE(mn, 0.0) << "light " << k;
    darker += cv::countNonZero(diff.reshape(1) > 1e-3);
  }
  EXPECT_GT(darker, 100);
}

// Superposition: light transport is linear in the sources (the basis of
// Debevec reflectance-field relighting), so a frame with every light on is
// the sum of the single-light frames. Tolerance: float summation of <= 12
// terms of values <= 1 (common practice).
TEST(SimulatorShading, FullyLitFrameIsTheSumOfSingleLightFrames) {
  SimOptions o = PlainOptions();
  o.specular = SpecularModel::kBlinnPhong;
  o.shadows = true;
  const io::Rig rig = MakeSimRig(o);
  const CameraView view = CameraView::Build(o, MakeSimCameras(o)[0], 0.0, 0.0, 2);
  std::vector<LitLight> all;
  cv::Mat sum = cv::Mat::zeros(o.height, o.width, CV_32FC3);
  for (const io::Light& l : rig.lights) {
    all.push_back({l, 0.5});
    sum += view.Render({{l, 0.5}}, Backdrop::kBlack, true, 2);
  }
  const cv::Mat together = view.Render(all, Backdrop::kBlack, true, 2);
  EXPECT_LE(cv::norm(together, sum, cv::NORM_INF), 1e-5);
  EXPECT_GT(cv::norm(together, cv::NORM_INF), 0.1);
  // Composite scales a render and adds the backdrop behind fractional alpha.
  const cv::Mat lit = view.Composite(view.Render(all, Backdrop::kBlack, true, 2), 2.0, Backdrop::kMatteA);
  const cv::Mat direct = view.Render(
      [&] {
        std::vector<LitLight> twice = all;
        for (auto& l : twice) l.gain = 1.0;
        return twice;
      }(),
      Backdrop::kMatteA, true, 2);
  EXPECT_LE(cv::norm(lit, direct, cv::NORM_INF), 1e-5);
}

bool SameBytes(const cv::Mat& a, const cv::Mat& b) {
  if (a.size() != b.size() || a.type() != b.type()) return false;
  for (int y = 0; y < a.rows; ++y)
    if (std::memcmp(a.ptr(y), b.ptr(y), a.cols * a.elemSize()) != 0) return false;
  return true;
}

TEST(SimulatorDeterminism, InMemoryFramesIdenticalForOneAndTwoThreads) {
  SimOptions o;
  o.width = 64;
  o.height = 48;
  o.num_lights = 6;
  o.threads = 1;
  auto one = SimulateCamera(o, 0);
  o.threads = 2;
  auto two = SimulateCamera(o, 0);
  ASSERT_TRUE(one.ok() && two.ok());
  for (size_t k = 0; k < one->olat.size(); ++k) EXPECT_TRUE(SameBytes(one->olat[k], two->olat[k])) << "light " << k;
  EXPECT_TRUE(SameBytes(one->truth.alpha, two->truth.alpha));
  o.seed = 2;
  auto other = SimulateCamera(o, 0);
  ASSERT_TRUE(other.ok());
  EXPECT_FALSE(SameBytes(one->olat[0], other->olat[0])) << "a different seed must change the noise";
}

TEST(SimulatorFaults, DeadLightFrameHoldsOnlyBlackLevelAndNoise) {
  SimOptions o = PlainOptions();
  o.noise = true;
  o.black_level = 0.01;
  o.faults.dead_light = CameraLightTarget{"cam00", 3};
  auto sim = SimulateCamera(o, 0);
  ASSERT_TRUE(sim.ok());
  const cv::Scalar dead_mean = cv::mean(sim->olat[3]);
  const cv::Scalar live_mean = cv::mean(sim->olat[2]);
  for (int c = 0; c < 3; ++c) {
    EXPECT_NEAR(dead_mean[c], o.black_level, 4 * o.read_noise);
    EXPECT_GT(live_mean[c], o.black_level + 0.01);
  }
}

TEST(SimulatorFaults, SaturatedLightClipsAtOne) {
  SimOptions o = PlainOptions();
  o.faults.saturated_light = CameraLightTarget{"cam00", 0};
  auto sim = SimulateCamera(o, 0);
  ASSERT_TRUE(sim.ok());
  double mx0, mx1;
  cv::minMaxLoc(sim->olat[0].reshape(1), nullptr, &mx0);
  cv::minMaxLoc(sim->olat[1].reshape(1), nullptr, &mx1);
  EXPECT_EQ(mx0, 1.0);
  EXPECT_LT(mx1, 1.0);
}

TEST(SimulatorFaults, DriftScalesFramesLinearlyOverTheTake) {
  SimOptions o = PlainOptions();
  auto clean = SimulateCamera(o, 0);
  o.faults.drift_percent = 10.0;
  auto drift = SimulateCamera(o, 0);
  ASSERT_TRUE(clean.ok() && drift.ok());
  const int last = o.num_lights - 1;
  const double first_ratio = cv::sum(drift->olat[0])[1] / cv::sum(clean->olat[0])[1];
  const double last_ratio = cv::sum(drift->olat[last])[1] / cv::sum(clean->olat[last])[1];
  EXPECT_NEAR(first_ratio, 1.0, 1e-6);
  EXPECT_NEAR(last_ratio, 1.10, 1e-4);
}

// Centroid x of pixels brighter than a threshold.
double CentroidX(const cv::Mat& rgb) {
  double sx = 0, n = 0;
  for (int y = 0; y < rgb.rows; ++y)
    for (int x = 0; x < rgb.cols; ++x)
      if (rgb.at<cv::Vec3f>(y, x)[1] > 0.02f) {
        sx += x;
        n += 1;
      }
  return sx / std::max(1.0, n);
}

TEST(SimulatorFaults, MotionShiftsTheSubjectProgressively) {
  SimOptions o = PlainOptions();
  o.num_lights = 5;
  o.min_elevation_deg = 60;  // lights near the zenith: every frame lights the top of the bust
  auto clean = SimulateCamera(o, 0);
  o.faults.motion_px = 8.0;
  auto moved = SimulateCamera(o, 0);
  ASSERT_TRUE(clean.ok() && moved.ok());
  EXPECT_TRUE(SameBytes(clean->olat[0], moved->olat[0])) << "t = 0: no motion yet";
  const double shift_mid = CentroidX(moved->olat[2]) - CentroidX(clean->olat[2]);
  const double shift_end = CentroidX(moved->olat[4]) - CentroidX(clean->olat[4]);
  // Subject depth varies by ~+-7 % around the camera distance, so the image
  // shift is within ~1 px of the nominal one (common practice tolerance).
  EXPECT_NEAR(shift_mid, 4.0, 1.0);
  EXPECT_NEAR(shift_end, 8.0, 1.0);
}

TEST(SimulatorOptions, BadFaultTargetsAreRejectedNamingThem) {
  SimOptions o = PlainOptions();
  o.faults.dead_light = CameraLightTarget{"cam07", 1};
  io::Status st = ValidateSimOptions(o);
  EXPECT_EQ(st.code(), io::StatusCode::kBadInput);
  EXPECT_NE(st.message().find("cam07"), std::string::npos) << st.message();
  o.faults.dead_light = CameraLightTarget{"cam00", 99};
  st = ValidateSimOptions(o);
  EXPECT_NE(st.message().find("99"), std::string::npos) << st.message();
  o = PlainOptions();
  o.width = 2;
  EXPECT_FALSE(ValidateSimOptions(o).ok());
}

TEST(SimulatorRig, LayoutsAndIntensities) {
  SimOptions o;
  o.num_lights = 64;
  o.layout = LightLayout::kTwoRing;
  o.near_field = true;
  const io::Rig ring = MakeSimRig(o);
  ASSERT_EQ(ring.lights.size(), 64u);
  for (const io::Light& l : ring.lights) {
    ASSERT_TRUE(l.position.has_value());
    EXPECT_FALSE(l.direction.has_value());
    EXPECT_NEAR(l.position->norm(), o.rig_radius_m, 1e-3);
    for (int c = 0; c < 3; ++c) EXPECT_GT(l.intensity[c], 0.0);
  }
  o = SimOptions();
  o.num_lights = 156;
  const io::Rig dome = MakeSimRig(o);
  ASSERT_EQ(dome.lights.size(), 156u);
  double min_y = 1;
  for (const io::Light& l : dome.lights) {
    ASSERT_TRUE(l.direction.has_value());
    EXPECT_NEAR(l.direction->norm(), 1.0, 1e-12);
    min_y = std::min(min_y, l.direction->y());
  }
  EXPECT_GT(min_y, std::sin(-20.0 * M_PI / 180.0));
}

}  // namespace
}  // namespace lumenrig::synth
