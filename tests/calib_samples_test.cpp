// The invented calibrations in calib_samples/ load with io::LoadRig and are
// exactly what the simulator generates for their documented options.
#include <fstream>

#include <gtest/gtest.h>
#include <Eigen/LU>
#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/synth/simulator.h"

namespace lumenrig::synth {
namespace {

std::string SampleDir() { return std::string(LUMENRIG_SOURCE_DIR) + "/calib_samples"; }

void ExpectSameRig(const io::Rig& loaded, const io::Rig& generated) {
  ASSERT_EQ(loaded.lights.size(), generated.lights.size());
  for (size_t i = 0; i < loaded.lights.size(); ++i) {
    const io::Light& a = loaded.lights[i];
    const io::Light& b = generated.lights[i];
    EXPECT_EQ(a.id, b.id);
    EXPECT_EQ(a.direction.has_value(), b.direction.has_value());
    EXPECT_EQ(a.position.has_value(), b.position.has_value());
    if (a.direction && b.direction) {
      EXPECT_LT((*a.direction - *b.direction).norm(), 1e-12) << "light " << a.id;
    }
    if (a.position && b.position) {
      EXPECT_LT((*a.position - *b.position).norm(), 1e-12) << "light " << a.id;
    }
    EXPECT_LT((a.intensity - b.intensity).norm(), 1e-12) << "light " << a.id;
  }
}

TEST(CalibSamples, TwoRingRigLoadsAndMatchesGenerator) {
  auto rig = io::LoadRig(SampleDir() + "/rig_tworing_64.json");
  ASSERT_TRUE(rig.ok()) << rig.status().message();
  EXPECT_EQ(rig->name, "kh-tworing-64");
  ASSERT_EQ(rig->lights.size(), 64u);
  int low = 0, high = 0;
  for (const io::Light& l : rig->lights) {
    ASSERT_TRUE(l.position.has_value());
    EXPECT_NEAR(l.position->norm(), 1.8, 1e-3);
    // Ring elevations 15 and 50 deg: y = 1.8 sin(elevation).
    const double elevation_deg = std::asin(l.position->y() / l.position->norm()) * 180.0 / M_PI;
    if (std::abs(elevation_deg - 15.0) < 0.05) ++low;
    if (std::abs(elevation_deg - 50.0) < 0.05) ++high;
  }
  EXPECT_EQ(low, 32);
  EXPECT_EQ(high, 32);
  SimOptions o;
  o.layout = LightLayout::kTwoRing;
  o.num_lights = 64;
  o.near_field = true;
  ExpectSameRig(*rig, MakeSimRig(o));
}

TEST(CalibSamples, DomeRigLoadsWithPerLightColourAndMatchesGenerator) {
  auto rig = io::LoadRig(SampleDir() + "/rig_dome_156.json");
  ASSERT_TRUE(rig.ok()) << rig.status().message();
  EXPECT_EQ(rig->name, "kh-dome-156");
  ASSERT_EQ(rig->lights.size(), 156u);
  EXPECT_TRUE(rig->AllDirectional());
  int coloured = 0;
  for (const io::Light& l : rig->lights) {
    EXPECT_NEAR(l.direction->norm(), 1.0, 1e-12);
    EXPECT_GE(l.direction->y(), std::sin(-20.0 * M_PI / 180.0));
    if (l.intensity.maxCoeff() - l.intensity.minCoeff() > 1e-3) ++coloured;
  }
  EXPECT_GT(coloured, 140);
  SimOptions o;
  o.num_lights = 156;
  ExpectSameRig(*rig, MakeSimRig(o));
}

TEST(CalibSamples, CameraExampleMatchesSimulatorCameraModel) {
  std::ifstream in(SampleDir() + "/cameras_kh_1024x768.json");
  ASSERT_TRUE(in.good());
  const nlohmann::json j = nlohmann::json::parse(in);
  SimOptions o;
  o.width = j.at("image_size")[0];
  o.height = j.at("image_size")[1];
  o.num_cameras = static_cast<int>(j.at("cameras").size());
  const std::vector<io::Camera> cams = MakeSimCameras(o);
  for (int k = 0; k < o.num_cameras; ++k) {
    const nlohmann::json& jc = j.at("cameras")[k];
    EXPECT_EQ(jc.at("id"), cams[k].id);
    EXPECT_NEAR(jc.at("intrinsics").at("fx").get<double>(), cams[k].intrinsics->fx, 1e-6);
    EXPECT_NEAR(jc.at("intrinsics").at("fy").get<double>(), cams[k].intrinsics->fy, 1e-6);
    EXPECT_DOUBLE_EQ(jc.at("intrinsics").at("cx").get<double>(), cams[k].intrinsics->cx);
    EXPECT_DOUBLE_EQ(jc.at("intrinsics").at("cy").get<double>(), cams[k].intrinsics->cy);
    Eigen::Matrix4d m;
    for (int r = 0; r < 4; ++r)
      for (int c = 0; c < 4; ++c) m(r, c) = jc.at("camera_from_rig")[r][c];
    EXPECT_LT((m - cams[k].camera_from_rig).norm(), 1e-9);
    // Rigid: R^T R = I, det R = +1 (docs/formats.md loading rules).
    const Eigen::Matrix3d rot = m.topLeftCorner<3, 3>();
    EXPECT_LT((rot.transpose() * rot - Eigen::Matrix3d::Identity()).norm(), 1e-9);
    EXPECT_NEAR(rot.determinant(), 1.0, 1e-9);
    // Camera centre at 1.5 m from the rig origin.
    EXPECT_NEAR((-rot.transpose() * m.topRightCorner<3, 1>()).norm(), 1.5, 1e-9);
  }
}

}  // namespace
}  // namespace lumenrig::synth
