// Depth from normals against closed-form surfaces: a paraboloid over the
// full frame, a sphere cap under a mask (orthographic, pixels) and a sphere
// seen through a pinhole camera (metres).
#include <cmath>

#include <gtest/gtest.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/solvers/integration.h"

namespace lumenrig::solvers {
namespace {

// RMS of (a - b) over mask after removing the mean difference (depth in
// pixel units is defined up to a constant).
double RmsAfterOffset(const cv::Mat& a, const cv::Mat& b, const cv::Mat& mask) {
  cv::Mat d = a - b;
  const double mean = cv::mean(d, mask)[0];
  double s = 0;
  int n = 0;
  for (int v = 0; v < d.rows; ++v)
    for (int u = 0; u < d.cols; ++u)
      if (mask.at<uint8_t>(v, u)) {
        const double e = d.at<float>(v, u) - mean;
        s += e * e;
        ++n;
      }
  return std::sqrt(s / n);
}

// D = a ((u - c)^2 + (v - c)^2): dD/du = nx/nz, dD/dv = -ny/nz (camera frame,
// rows down), so n ~ (dD/du, -dD/dv, 1).
void Paraboloid(int size, double a, cv::Mat* depth, cv::Mat* normals) {
  *depth = cv::Mat(size, size, CV_32F);
  *normals = cv::Mat(size, size, CV_32FC3);
  const double c = size / 2.0;
  for (int v = 0; v < size; ++v)
    for (int u = 0; u < size; ++u) {
      const double x = u + 0.5 - c, y = v + 0.5 - c;
      depth->at<float>(v, u) = float(a * (x * x + y * y));
      Eigen::Vector3d n(2 * a * x, -2 * a * y, 1.0);  // (D_u, -D_v, 1)
      n.normalize();
      normals->at<cv::Vec3f>(v, u) = cv::Vec3f(float(n.x()), float(n.y()), float(n.z()));
    }
}

TEST(IntegrationTest, ParaboloidFromExactNormalsBothMethods) {
  cv::Mat truth, normals;
  Paraboloid(96, 0.004, &truth, &normals);  // depth range 0..18 px
  const cv::Mat all(96, 96, CV_8U, cv::Scalar(1));
  double range;
  cv::minMaxLoc(truth, nullptr, &range);
  for (IntegrationMethod m : {IntegrationMethod::kFrankotChellappa, IntegrationMethod::kPoisson}) {
    IntegrationOptions o;
    o.method = m;
    DepthMap d;
    ASSERT_TRUE(IntegrateNormals(normals, {}, o, &d).ok());
    EXPECT_EQ(d.unit, "pixels");
    const double rms = RmsAfterOffset(d.depth, truth, all);
    std::printf("%s paraboloid rms %.4f px of range %.1f px\n", d.method.c_str(), rms, range);
    // Stated tolerance: 0.5% of the depth range (discretisation of exact
    // gradients; common practice).
    EXPECT_LT(rms, 0.005 * range) << d.method;
  }
}

// Orthographic sphere cap of `radius` px centred in a size x size view, up to
// ~63 deg from the view axis (x^2 + y^2 <= 0.8); with `notch`, a slot is cut
// out of one side so the domain is not convex. Depth grows away from the
// camera (nearer at the centre).
struct SphereCap {
  cv::Mat normals, truth, mask;
};
SphereCap MakeSphereCap(int size, double radius, bool notch) {
  SphereCap cap;
  const double c = size / 2.0;
  cap.normals = cv::Mat::zeros(size, size, CV_32FC3);
  cap.truth = cv::Mat::zeros(size, size, CV_32F);
  cap.mask = cv::Mat::zeros(size, size, CV_8U);
  for (int v = 0; v < size; ++v)
    for (int u = 0; u < size; ++u) {
      const double x = (u + 0.5 - c) / radius, y = -(v + 0.5 - c) / radius;
      if (x * x + y * y > 0.8 || (notch && x > 0.2 && std::abs(y) < 0.08)) continue;
      const double z = std::sqrt(1 - x * x - y * y);
      cap.normals.at<cv::Vec3f>(v, u) = cv::Vec3f(float(x), float(y), float(z));
      cap.truth.at<float>(v, u) = float(-radius * z);
      cap.mask.at<uint8_t>(v, u) = 255;
    }
  return cap;
}

TEST(IntegrationTest, MaskedSphereCapPoisson) {
  const double radius = 44;
  const SphereCap cap = MakeSphereCap(96, radius, /*notch=*/false);
  const cv::Mat &normals = cap.normals, &truth = cap.truth, &mask = cap.mask;
  DepthMap d;
  ASSERT_TRUE(IntegrateNormals(normals, mask, IntegrationOptions{}, &d).ok());
  EXPECT_EQ(d.method, "poisson-ldlt");
  const double rms = RmsAfterOffset(d.depth, truth, mask);
  std::printf("%s sphere cap rms %.4f px (cap depth %.1f px)\n", d.method.c_str(), rms, radius * (1 - std::sqrt(0.2)));
  // Stated tolerance: 0.5% of the cap's depth range (common practice).
  EXPECT_LT(rms, 0.005 * radius * (1 - std::sqrt(0.2)));
  EXPECT_EQ(d.depth.at<float>(0, 0), 0.0f);  // outside the mask
}

// Large masks go through multigrid-preconditioned conjugate gradients;
// forced here on a small view, the result must agree with the exact sparse
// Cholesky solve of the same system (absolute depth, no offset fitted: both
// give every connected part zero mean) and with the closed form, and must be
// bit-identical for 1 and 2 threads. The mask has a second, disconnected
// part (a tilted plane in a corner) and an isolated pixel.
TEST(IntegrationTest, MultigridSolveAgreesWithTheDirectSolve) {
  const int size = 256;
  const double radius = 120;
  SphereCap cap = MakeSphereCap(size, radius, /*notch=*/true);
  for (int v = 4; v < 40; ++v)
    for (int u = 4; u < 30; ++u) {
      const cv::Vec3f n = cv::normalize(cv::Vec3f(0.3f, -0.2f, 1.0f));
      cap.normals.at<cv::Vec3f>(v, u) = n;
      cap.mask.at<uint8_t>(v, u) = 255;
    }
  cap.normals.at<cv::Vec3f>(size - 3, 2) = cv::Vec3f(0, 0, 1);
  cap.mask.at<uint8_t>(size - 3, 2) = 255;
  const cv::Mat &normals = cap.normals, &truth = cap.truth, &mask = cap.mask;
  IntegrationOptions direct;
  direct.direct_solver_max_pixels = size * size;
  DepthMap exact;
  ASSERT_TRUE(IntegrateNormals(normals, mask, direct, &exact).ok());
  ASSERT_EQ(exact.method, "poisson-ldlt");
  IntegrationOptions multigrid;
  multigrid.direct_solver_max_pixels = 3000;
  DepthMap d, d1;
  ASSERT_TRUE(IntegrateNormals(normals, mask, multigrid, &d, /*threads=*/2).ok());
  ASSERT_TRUE(IntegrateNormals(normals, mask, multigrid, &d1, /*threads=*/1).ok());
  ASSERT_EQ(d.method, "poisson-multigrid-cg");
  EXPECT_EQ(cv::norm(d.depth, d1.depth, cv::NORM_INF), 0.0) << "depth depends on the thread count";
  EXPECT_GT(d.iterations, 0);
  EXPECT_LE(d.residual, multigrid.cg_tolerance);
  const double range = radius * (1 - std::sqrt(0.2));
  const double vs_exact = cv::norm(d.depth, exact.depth, cv::NORM_INF);
  cv::Mat cap_only = mask.clone();
  cap_only(cv::Rect(0, 0, 40, 40)).setTo(0);
  cap_only.at<uint8_t>(size - 3, 2) = 0;
  const double vs_truth = RmsAfterOffset(d.depth, truth, cap_only);
  std::printf(
      "multigrid: %d iterations, residual %.2e; max |multigrid - direct| %.2e px, vs closed form rms %.4f px "
      "(cap depth %.1f px)\n",
      d.iterations, d.residual, vs_exact, vs_truth, range);
  // Stated tolerances: within 1e-4 px of the exact solve of the same
  // equations everywhere (the CG stopping rule; common practice), and the
  // closed-form tolerance of MaskedSphereCapPoisson (0.5%; common practice).
  EXPECT_LT(vs_exact, 1e-4);
  EXPECT_LT(vs_truth, 0.005 * range);
}

// Thin structures: 1-pixel staircase strands, each 2 px from the next and
// joined to a disc at one end (hair on a head). A coarse grid that lumps
// neighbouring strands together cannot correct them separately and conjugate
// gradients crawl; the multigrid must still agree with the direct solve
// within its usual iteration count.
TEST(IntegrationTest, MultigridKeepsThinStrandsApart) {
  const int size = 320;
  cv::Mat normals = cv::Mat::zeros(size, size, CV_32FC3), mask = cv::Mat::zeros(size, size, CV_8U);
  const cv::Vec3f tilted = cv::normalize(cv::Vec3f(0.2f, 0.1f, 1.0f));
  cv::circle(mask, cv::Point(size / 2, 220), 90, cv::Scalar(255), cv::FILLED);
  for (int s = 0; s < 40; ++s) {
    // Strand s leaves the disc's top edge and climbs up and to the right.
    int v = 140, u = 70 + 5 * s;
    for (int step = 0; step < 120 && v > 0 && u + 1 < size; ++step) {
      mask.at<uint8_t>(v, u) = 255;
      if (step % 2 == 0)
        ++u;
      else
        --v;
    }
  }
  normals.setTo(cv::Scalar(tilted[0], tilted[1], tilted[2]), mask);
  IntegrationOptions direct;
  direct.direct_solver_max_pixels = size * size;
  DepthMap exact, d;
  ASSERT_TRUE(IntegrateNormals(normals, mask, direct, &exact).ok());
  IntegrationOptions multigrid;
  multigrid.direct_solver_max_pixels = 3000;
  ASSERT_TRUE(IntegrateNormals(normals, mask, multigrid, &d).ok());
  ASSERT_EQ(d.method, "poisson-multigrid-cg");
  const double diff = cv::norm(d.depth, exact.depth, cv::NORM_INF);
  std::printf("strands: %d mask pixels, %d iterations, max |multigrid - direct| %.2e px\n", cv::countNonZero(mask),
              d.iterations, diff);
  EXPECT_LT(diff, 1e-4);  // as in MultigridSolveAgreesWithTheDirectSolve (common practice)
  // Common practice for a multigrid preconditioner: tens of iterations,
  // independent of the mask's shape (the whole-grid disc takes about 10).
  EXPECT_LT(d.iterations, 40);
}

TEST(IntegrationTest, PerspectiveSphereInMetres) {
  // Pinhole camera (fx = fy = 400 px, 128 x 128); sphere of radius 0.1 m
  // centred 0.8 m in front of the camera, off-axis; ray-cast closed form.
  const int size = 128;
  io::Intrinsics k{400, 400, 64, 64};
  const Eigen::Vector3d centre(0.03, -0.02, -0.8);
  const double radius = 0.1;
  cv::Mat normals = cv::Mat::zeros(size, size, CV_32FC3), truth = cv::Mat::zeros(size, size, CV_32F);
  cv::Mat mask = cv::Mat::zeros(size, size, CV_8U);
  double log_sum = 0;
  int n = 0;
  for (int v = 0; v < size; ++v)
    for (int u = 0; u < size; ++u) {
      const Eigen::Vector3d r((u + 0.5 - k.cx) / k.fx, -(v + 0.5 - k.cy) / k.fy, -1.0);
      // |t r - C|^2 = R^2, nearest root.
      const double a = r.squaredNorm(), b = -2 * r.dot(centre), cc = centre.squaredNorm() - radius * radius;
      const double disc = b * b - 4 * a * cc;
      if (disc <= 0) continue;
      const double t = (-b - std::sqrt(disc)) / (2 * a);
      const Eigen::Vector3d x = t * r, nrm = (x - centre) / radius;
      if (-nrm.dot(r.normalized()) < 0.4) continue;  // away from the silhouette
      normals.at<cv::Vec3f>(v, u) = cv::Vec3f(float(nrm.x()), float(nrm.y()), float(nrm.z()));
      truth.at<float>(v, u) = float(t);  // depth along -z equals t since r.z = -1
      mask.at<uint8_t>(v, u) = 255;
      log_sum += std::log(t);
      ++n;
    }
  IntegrationOptions o;
  o.intrinsics = k;
  o.reference_depth_m = std::exp(log_sum / n);  // geometric mean of the truth
  DepthMap d;
  ASSERT_TRUE(IntegrateNormals(normals, mask, o, &d).ok());
  EXPECT_EQ(d.unit, "metres");
  double max_err = 0;
  for (int v = 0; v < size; ++v)
    for (int u = 0; u < size; ++u)
      if (mask.at<uint8_t>(v, u))
        max_err = std::max(max_err, double(std::abs(d.depth.at<float>(v, u) - truth.at<float>(v, u))));
  std::printf("perspective sphere max depth error %.3f mm\n", max_err * 1e3);
  // Stated tolerance: 1 mm on a 0.1 m sphere at 0.8 m (1% of its radius;
  // common practice).
  EXPECT_LT(max_err, 1e-3);
}

TEST(IntegrationTest, BadIntrinsicsAreAnError) {
  cv::Mat truth, normals;
  Paraboloid(16, 0.01, &truth, &normals);
  IntegrationOptions o;
  o.intrinsics = io::Intrinsics{0, 100, 8, 8};
  o.reference_depth_m = 1.0;
  DepthMap d;
  const io::Status s = IntegrateNormals(normals, {}, o, &d);
  EXPECT_FALSE(s.ok());
  EXPECT_NE(s.message().find("intrinsics"), std::string::npos);
}

}  // namespace
}  // namespace lumenrig::solvers
