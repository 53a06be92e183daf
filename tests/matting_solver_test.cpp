// The closed-form band system solved by sparse factorisation (the default)
// must give the conjugate-gradient solution of the same system.
#include <algorithm>
#include <cmath>

#include <gtest/gtest.h>
#include <opencv2/core.hpp>

#include "lumenrig/solvers/matting.h"

namespace lumenrig::solvers {
namespace {

// A textured disc with a soft edge over a textured plate; unknown band of
// `band_px` around the edge.
void MakeDisc(int size, int band_px, cv::Mat* image, cv::Mat* plate, cv::Mat* trimap) {
  image->create(size, size, CV_32FC3);
  plate->create(size, size, CV_32FC3);
  trimap->create(size, size, CV_8UC1);
  const double c = 0.5 * size, radius = 0.3 * size;
  for (int y = 0; y < size; ++y) {
    for (int x = 0; x < size; ++x) {
      const double r = std::hypot(x + 0.5 - c, y + 0.5 - c);
      const double a = std::clamp((radius - r) / band_px + 0.5, 0.0, 1.0);
      const cv::Vec3f b(0.35f + 0.1f * std::sin(0.3f * x), 0.6f + 0.1f * std::cos(0.2f * y), 0.3f);
      const cv::Vec3f f(0.55f + 0.1f * std::sin(0.25f * y), 0.42f, 0.33f + 0.05f * std::cos(0.35f * x));
      plate->at<cv::Vec3f>(y, x) = b;
      image->at<cv::Vec3f>(y, x) = static_cast<float>(a) * f + static_cast<float>(1 - a) * b;
      trimap->at<uint8_t>(y, x) = std::fabs(r - radius) <= 0.5 * band_px
                                      ? kTrimapUnknown
                                      : (r < radius ? kTrimapForeground : kTrimapBackground);
    }
  }
}

TEST(MattingSolver, DirectSolveMatchesConjugateGradient) {
  for (const int band : {4, 12}) {
    cv::Mat image, plate, trimap;
    MakeDisc(128, band, &image, &plate, &trimap);
    ClosedFormOptions direct;
    direct.difference_sigma = 0.005;  // enables the known-background prior and snapping
    ClosedFormOptions iterative = direct;
    iterative.direct_solve = false;
    iterative.cg_tolerance = 1e-12;  // common practice: far below float alpha resolution
    cv::Mat alpha_direct, alpha_cg;
    ClosedFormStats stats_direct, stats_cg;
    ASSERT_TRUE(RefineClosedForm(image, plate, trimap, direct, &alpha_direct, &stats_direct, 1).ok());
    ASSERT_TRUE(RefineClosedForm(image, plate, trimap, iterative, &alpha_cg, &stats_cg, 1).ok());
    EXPECT_TRUE(stats_direct.direct);
    EXPECT_TRUE(stats_direct.converged);
    EXPECT_LT(stats_direct.relative_residual, 1e-9);  // common practice for an LDL^T solve
    EXPECT_FALSE(stats_cg.direct);
    EXPECT_GT(stats_cg.iterations, 0);
    ASSERT_GT(stats_direct.unknown_pixels, 0);
    // Reference: Eigen's conjugate gradient on the same system; 1e-5 is
    // common practice (the CG residual bound and float output).
    EXPECT_LT(cv::norm(alpha_direct, alpha_cg, cv::NORM_INF), 1e-5) << "band " << band;
  }
}

TEST(MattingSolver, DirectSolveIdenticalForAnyThreadCount) {
  cv::Mat image, plate, trimap;
  MakeDisc(160, 8, &image, &plate, &trimap);
  ClosedFormOptions options;
  cv::Mat one, two;
  ASSERT_TRUE(RefineClosedForm(image, plate, trimap, options, &one, nullptr, 1).ok());
  ASSERT_TRUE(RefineClosedForm(image, plate, trimap, options, &two, nullptr, 2).ok());
  EXPECT_EQ(cv::norm(one, two, cv::NORM_INF), 0.0);
}

}  // namespace
}  // namespace lumenrig::solvers
