// Lat-long maps, spherical harmonics and Phong prefiltering against closed
// forms and published constants.
#include <cmath>
#include <limits>

#include <gtest/gtest.h>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/synth/envmap.h"
#include "lumenrig/synth/lightmaps.h"
#include "lumenrig/synth/sh.h"

namespace lumenrig::synth {
namespace {

cv::Mat ConstantMap(int h, float r, float g, float b) { return cv::Mat(h, 2 * h, CV_32FC3, cv::Scalar(r, g, b)); }

TEST(LatLong, SolidAnglesSumTo4Pi) {
  // Closed form: integral of sin(theta) dtheta dphi over the sphere = 4 pi.
  // The midpoint rule in theta overestimates by a factor
  // (pi/2H)/sin(pi/2H) ~ 1 + pi^2/(24 H^2) (Taylor expansion), our bound.
  for (int h : {8, 32, 128}) {
    double sum = 0;
    for (int v = 0; v < h; ++v) sum += TexelSolidAngle(v, 2 * h, h) * (2 * h);
    const double rel = std::abs(sum - 4 * M_PI) / (4 * M_PI);
    EXPECT_LT(rel, 1.01 * M_PI * M_PI / (24.0 * h * h)) << "H=" << h << " sum=" << sum;
  }
}

TEST(LatLong, DirectionConventionOfDesign) {
  // shared DESIGN.md: row 0 is the zenith; the centre column looks along -z,
  // u = W/4 along -x, u = 3W/4 along +x.
  const int h = 64, w = 128;
  EXPECT_GT(LatLongDirection(10, 0, w, h).y(), 0.99);
  const Eigen::Vector3d centre = LatLongDirection(w / 2.0 - 0.5, h / 2.0 - 0.5, w, h);
  EXPECT_NEAR(centre.z(), -1.0, 1e-9);
  EXPECT_NEAR(LatLongDirection(w / 4.0 - 0.5, h / 2.0 - 0.5, w, h).x(), -1.0, 1e-9);
  EXPECT_NEAR(LatLongDirection(3 * w / 4.0 - 0.5, h / 2.0 - 0.5, w, h).x(), 1.0, 1e-9);
  // Inverse round trip.
  for (double x : {0.0, 17.3, 100.0, 127.0}) {
    for (double y : {0.2, 31.5, 62.7}) {
      const Eigen::Vector2d p = LatLongCoordinates(LatLongDirection(x, y, w, h), w, h);
      EXPECT_NEAR(p.x(), x, 1e-9);
      EXPECT_NEAR(p.y(), y, 1e-9);
    }
  }
}

TEST(LatLong, RejectsNon2To1AndClampsBadTexels) {
  cv::Mat square(32, 32, CV_32FC3, cv::Scalar(1, 1, 1));
  io::Status st = ValidateLatLong(square, "studio.exr");
  ASSERT_FALSE(st.ok());
  EXPECT_EQ(st.code(), io::StatusCode::kBadInput);
  EXPECT_NE(st.message().find("studio.exr"), std::string::npos) << st.message();
  EXPECT_NE(st.message().find("32x32"), std::string::npos) << st.message();
  cv::Mat m = ConstantMap(8, 1, 1, 1);
  m.at<cv::Vec3f>(1, 1)[0] = std::numeric_limits<float>::quiet_NaN();
  m.at<cv::Vec3f>(2, 3)[1] = std::numeric_limits<float>::infinity();
  m.at<cv::Vec3f>(4, 5)[2] = -2.0f;
  m.at<cv::Vec3f>(4, 6) = cv::Vec3f(-1, -1, std::numeric_limits<float>::quiet_NaN());
  EXPECT_EQ(SanitizeRadiance(&m), 4);
  EXPECT_EQ(m.at<cv::Vec3f>(1, 1)[0], 0.0f);
  EXPECT_EQ(m.at<cv::Vec3f>(4, 6)[2], 0.0f);
  EXPECT_EQ(m.at<cv::Vec3f>(4, 6)[0], 0.0f);
}

TEST(LatLong, Rotate360IsIdentityAndRotationMovesDirections) {
  const cv::Mat map = MakeStudioMap(32);
  const cv::Mat r360 = RotateLatLong(map, 360.0);
  EXPECT_EQ(cv::norm(r360, map, cv::NORM_INF), 0.0);  // exactly the identity
  EXPECT_EQ(cv::norm(RotateLatLong(map, -720.0), map, cv::NORM_INF), 0.0);
  // rotated(d) = original(R^T d): check at texel centres for an exact shift
  // (90 deg = W/4 texels) and a fractional one against bilinear lookups.
  const cv::Mat smooth = MakeSmoothMap(32);
  for (double deg : {90.0, 33.0}) {
    const cv::Mat rot = RotateLatLong(smooth, deg);
    const Eigen::Matrix3d r = RotationAboutY(deg);
    double worst = 0;
    for (int v = 2; v < 30; v += 5) {
      for (int u = 0; u < 64; u += 7) {
        const Eigen::Vector3d d = LatLongDirection(u, v, 64, 32);
        const Eigen::Vector3f expect = SampleLatLong(smooth, r.transpose() * d);
        const cv::Vec3f got = rot.at<cv::Vec3f>(v, u);
        for (int c = 0; c < 3; ++c) worst = std::max(worst, static_cast<double>(std::abs(got[c] - expect(c))));
      }
    }
    // Exact shift: identical to float precision; fractional: both are linear
    // interpolations of the same two columns.
    EXPECT_LT(worst, 1e-5) << "deg=" << deg;
  }
}

TEST(LatLong, ExposureNormalisationHitsTargetLuminance) {
  // ITU-R BT.709-6 item 3.2: Y = 0.2126 R + 0.7152 G + 0.0722 B.
  EXPECT_FLOAT_EQ(io::kBt709R, 0.2126f);
  EXPECT_FLOAT_EQ(io::kBt709G, 0.7152f);
  EXPECT_FLOAT_EQ(io::kBt709B, 0.0722f);
  EnvMap env;
  env.name = "const";
  env.radiance = ConstantMap(64, 2.0f, 1.0f, 4.0f);
  const double y = 0.2126 * 2 + 0.7152 * 1 + 0.0722 * 4;
  // Mean over the sphere of a constant = the constant (up to the midpoint
  // solid-angle error bounded in SolidAnglesSumTo4Pi).
  EXPECT_NEAR(MeanLuminance(env.radiance), y, y * 1e-3);
  ASSERT_TRUE(NormaliseExposure(&env, 0.5).ok());
  EXPECT_NEAR(MeanLuminance(env.radiance), 0.5, 1e-6);
  EXPECT_NEAR(env.exposure_scale, 0.5 / MeanLuminance(ConstantMap(64, 2, 1, 4)), 1e-6);
  EnvMap black;
  black.name = "black";
  black.radiance = ConstantMap(8, 0, 0, 0);
  EXPECT_FALSE(NormaliseExposure(&black, 1.0).ok());
}

TEST(Srgb, ReferencePoints) {
  // IEC 61966-2-1: linear segment 12.92 l below 0.0031308; the two segments
  // meet at encoded 0.04045; 1 maps to 1.
  EXPECT_NEAR(io::LinearToSrgb(0.0031308f), 0.04045f, 2e-5f);
  EXPECT_NEAR(io::LinearToSrgb(0.001f), 0.01292f, 1e-6f);
  EXPECT_NEAR(io::LinearToSrgb(1.0f), 1.0f, 1e-6f);
  // 1.055 * 0.5^(1/2.4) - 0.055 = 0.735357 (formula of the standard).
  EXPECT_NEAR(io::LinearToSrgb(0.5f), 0.735357f, 1e-5f);
}

TEST(Sh, BasisConstantsMatchRamamoorthiHanrahan) {
  // Ramamoorthi and Hanrahan 2001, eq. 3: 0.282095 = 1/(2 sqrt(pi)),
  // 0.488603 = sqrt(3)/(2 sqrt(pi)), 1.092548 = sqrt(15)/(2 sqrt(pi)),
  // 0.315392 = sqrt(5)/(4 sqrt(pi)), 0.546274 = sqrt(15)/(4 sqrt(pi)).
  const double sp = std::sqrt(M_PI);
  EXPECT_NEAR(kShY00, 1.0 / (2 * sp), 1e-6);
  EXPECT_NEAR(kShY1, std::sqrt(3.0) / (2 * sp), 1e-6);
  EXPECT_NEAR(kShY2xy, std::sqrt(15.0) / (2 * sp), 1e-6);
  EXPECT_NEAR(kShY20, std::sqrt(5.0) / (4 * sp), 1e-6);
  EXPECT_NEAR(kShY22, std::sqrt(15.0) / (4 * sp), 1e-6);
  // Orthonormality over the sphere (numeric quadrature, 256 x 512 texels).
  const int h = 256, w = 512;
  Eigen::Matrix<double, 9, 9> gram = Eigen::Matrix<double, 9, 9>::Zero();
  for (int v = 0; v < h; ++v) {
    for (int u = 0; u < w; ++u) {
      const auto b = ShBasis9(LatLongDirection(u, v, w, h));
      gram += b * b.transpose() * TexelSolidAngle(v, w, h);
    }
  }
  EXPECT_LT((gram - Eigen::Matrix<double, 9, 9>::Identity()).cwiseAbs().maxCoeff(), 1e-4);
}

TEST(Sh, ClampedCosineConstants) {
  // Ramamoorthi and Hanrahan 2001, eq. 8-9: A_l = 2 pi int_0^1 t P_l(t) dt
  // gives A0 = pi, A1 = 2 pi / 3, A2 = pi / 4. Numeric integration here.
  const int n = 100000;
  double a0 = 0, a1 = 0, a2 = 0;
  for (int i = 0; i < n; ++i) {
    const double t = (i + 0.5) / n;
    a0 += t / n;
    a1 += t * t / n;
    a2 += t * 0.5 * (3 * t * t - 1) / n;
  }
  EXPECT_NEAR(kShA0, 2 * M_PI * a0, 1e-6);
  EXPECT_NEAR(kShA1, 2 * M_PI * a1, 1e-6);
  EXPECT_NEAR(kShA2, 2 * M_PI * a2, 1e-6);
  EXPECT_NEAR(kShA0, M_PI, 1e-12);
  EXPECT_NEAR(kShA1, 2 * M_PI / 3, 1e-12);
  EXPECT_NEAR(kShA2, M_PI / 4, 1e-12);
}

Eigen::Vector3d BruteForceIrradiance(const cv::Mat& map, const Eigen::Vector3d& n) {
  Eigen::Vector3d e = Eigen::Vector3d::Zero();
  for (int v = 0; v < map.rows; ++v) {
    const double dw = TexelSolidAngle(v, map.cols, map.rows);
    for (int u = 0; u < map.cols; ++u) {
      const double c = n.dot(LatLongDirection(u, v, map.cols, map.rows));
      if (c <= 0) continue;
      const cv::Vec3f l = map.at<cv::Vec3f>(v, u);
      e += Eigen::Vector3d(l[0], l[1], l[2]) * c * dw;
    }
  }
  return e;
}

TEST(Sh, IrradianceOfConstantMapIsPiL) {
  // Closed form: E = integral over the hemisphere of L cos = pi L.
  const ShCoeffs c = ProjectSh9(ConstantMap(64, 1.5f, 0.5f, 2.0f));
  // Tolerance: relative 1e-3 for the O(1/H^2) midpoint quadrature of the
  // projection at H = 64 (common practice).
  for (const Eigen::Vector3d& n : {Eigen::Vector3d(0, 1, 0), Eigen::Vector3d(0.6, 0, -0.8), Eigen::Vector3d(0, 0, 1)}) {
    const Eigen::Vector3d e = ShIrradiance(c, n);
    EXPECT_NEAR(e.x(), M_PI * 1.5, M_PI * 1.5e-3);
    EXPECT_NEAR(e.y(), M_PI * 0.5, M_PI * 0.5e-3);
    EXPECT_NEAR(e.z(), M_PI * 2.0, M_PI * 2.0e-3);
  }
}

TEST(Sh, IrradianceOfBandLimitedMapMatchesNumericIntegration) {
  // A map with SH content only up to l = 2 has an exact 9-term irradiance
  // (Ramamoorthi and Hanrahan 2001, sec. 3); compare with brute-force
  // integration of L max(0, n.w) over the sphere.
  const cv::Mat map = MakeSmoothMap(128);
  const ShCoeffs c = ProjectSh9(map);
  for (int k = 0; k < 12; ++k) {
    const Eigen::Vector3d n = LatLongDirection(7.0 + 19 * k, 5.0 + 10 * k, 256, 128);
    const Eigen::Vector3d sh = ShIrradiance(c, n);
    const Eigen::Vector3d bf = BruteForceIrradiance(map, n);
    EXPECT_LT((sh - bf).norm() / bf.norm(), 2e-3)
        << "n=" << n.transpose() << " sh=" << sh.transpose() << " brute=" << bf.transpose();
  }
}

TEST(Sh, PhongPrefilterIsNormalised) {
  // A normalised lobe (s+1)/(2 pi) cos^s integrates to 1 over the hemisphere
  // (closed form), so a constant map stays constant; tolerance: quadrature of
  // the narrowest lobe on 64 x 128 texels (common practice, 2%).
  PhongPrefiltered out;
  ASSERT_TRUE(PrefilterPhong(ConstantMap(32, 1, 2, 3), {1, 16, 64}, &out, 16, 64).ok());
  for (size_t k = 0; k < 3; ++k) {
    cv::Scalar mean = cv::mean(out.maps[k]);
    double lo, hi;
    cv::minMaxLoc(out.maps[k].reshape(1), &lo, &hi);
    EXPECT_NEAR(mean[1], 2.0, 0.04) << "exponent " << out.exponents[k];
    EXPECT_GT(lo, 0.98 * 1.0) << "exponent " << out.exponents[k];
    EXPECT_LT(hi, 1.02 * 3.0) << "exponent " << out.exponents[k];
  }
  EXPECT_FALSE(PrefilterPhong(ConstantMap(8, 1, 1, 1), {}, &out).ok());
  EXPECT_FALSE(PrefilterPhong(ConstantMap(8, 1, 1, 1), {-1.0}, &out).ok());
}

TEST(LightMaps, ConstantMapGivesAlbedoOneShadingAndConstantSpecular) {
  // Under a constant map L, E(n)/pi = L for every normal (closed form) and
  // every normalised Phong-filtered lookup is L.
  const cv::Mat map = ConstantMap(32, 0.5f, 1.0f, 2.0f);
  const ShCoeffs sh = ProjectSh9(map);
  PhongPrefiltered spec;
  ASSERT_TRUE(PrefilterPhong(map, {1, 32}, &spec, 16, 32).ok());
  cv::Mat normals(8, 8, CV_32FC3, cv::Scalar(0, 0, 0));
  normals.at<cv::Vec3f>(3, 3) = cv::Vec3f(0, 0, 1);
  normals.at<cv::Vec3f>(4, 5) = cv::Vec3f(0.6f, 0.0f, 0.8f);
  cv::Mat diffuse;
  std::vector<cv::Mat> specular;
  ASSERT_TRUE(
      RenderLightMaps(normals, IntrinsicsFromFov(8, 8, 40), Eigen::Matrix3d::Identity(), sh, spec, &diffuse, &specular)
          .ok());
  EXPECT_NEAR(diffuse.at<cv::Vec3f>(3, 3)[2], 2.0f, 2e-3f);
  EXPECT_NEAR(diffuse.at<cv::Vec3f>(4, 5)[0], 0.5f, 2e-3f);
  EXPECT_EQ(diffuse.at<cv::Vec3f>(0, 0)[0], 0.0f);  // background pixel
  EXPECT_NEAR(specular[1].at<cv::Vec3f>(4, 5)[1], 1.0f, 0.03f);
}

TEST(Background, CentrePixelLooksAtMapCentreColumn) {
  // DESIGN.md: the map's centre column looks along -z, which is where an
  // identity-posed camera looks; yaw +90 deg about +y turns the view to -x
  // (u = W/4).
  cv::Mat map(16, 32, CV_32FC3, cv::Scalar(0, 0, 0));
  for (int v = 0; v < 16; ++v) {
    map.at<cv::Vec3f>(v, 15) = map.at<cv::Vec3f>(v, 16) = cv::Vec3f(1, 0, 0);  // around -z
    map.at<cv::Vec3f>(v, 7) = map.at<cv::Vec3f>(v, 8) = cv::Vec3f(0, 1, 0);    // around -x
  }
  const io::Intrinsics k = IntrinsicsFromFov(9, 9, 10);
  const cv::Mat front = RenderBackground(map, k, 9, 9, Eigen::Matrix3d::Identity());
  EXPECT_GT(front.at<cv::Vec3f>(4, 4)[0], 0.9f);
  const cv::Mat left = RenderBackground(map, k, 9, 9, Eigen::Matrix3d::Identity(), 90.0, 0.0);
  EXPECT_GT(left.at<cv::Vec3f>(4, 4)[1], 0.9f);
}

TEST(Composite, PremultipliedOver) {
  cv::Mat relit(1, 3, CV_32FC3, cv::Scalar(0.3, 0.3, 0.3));
  cv::Mat alpha = (cv::Mat_<float>(1, 3) << 1.0f, 0.5f, 0.0f);
  cv::Mat bg(1, 3, CV_32FC3, cv::Scalar(1, 1, 1));
  const cv::Mat out = CompositeOver(relit, alpha, bg);
  EXPECT_FLOAT_EQ(out.at<cv::Vec3f>(0, 0)[0], 0.3f);
  EXPECT_FLOAT_EQ(out.at<cv::Vec3f>(0, 1)[0], 0.3f + 0.5f);
  EXPECT_FLOAT_EQ(out.at<cv::Vec3f>(0, 2)[0], 1.0f);
}

TEST(CameraSim, DeterministicFromSeedAndSrgbWithoutJitter) {
  cv::Mat lin(16, 16, CV_32FC3, cv::Scalar(0.2, 0.5, 0.001));
  CameraSimOptions o;
  const CameraSimDraw a = DrawCameraSim(o, 42), b = DrawCameraSim(o, 42), c = DrawCameraSim(o, 43);
  EXPECT_EQ(cv::norm(SimulateCameraResponse(lin, a), SimulateCameraResponse(lin, b), cv::NORM_INF), 0.0);
  EXPECT_NE(a.exposure, c.exposure);
  CameraSimOptions none;
  none.exposure_sigma_ev = 0;
  none.white_balance_sigma = 0;
  none.read_noise = 0;
  none.shot_noise = 0;
  none.jpeg_probability = 0;
  const cv::Mat enc = SimulateCameraResponse(lin, DrawCameraSim(none, 1));
  EXPECT_FLOAT_EQ(enc.at<cv::Vec3f>(3, 3)[1], io::LinearToSrgb(0.5f));
  EXPECT_FLOAT_EQ(enc.at<cv::Vec3f>(3, 3)[2], 12.92f * 0.001f);  // IEC 61966-2-1 linear segment
  none.jpeg_probability = 1.0;
  const cv::Mat jpg = SimulateCameraResponse(lin, DrawCameraSim(none, 1));
  EXPECT_LT(cv::norm(jpg, enc, cv::NORM_INF), 0.03);  // JPEG of a flat patch: small error (common practice)
}

}  // namespace
}  // namespace lumenrig::synth
