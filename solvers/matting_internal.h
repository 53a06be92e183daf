#pragma once
// Helpers shared by the matting sources (not a public header).
#include <opencv2/core.hpp>

namespace lumenrig::solvers::internal {

/// The q-quantile (0..1) of the per-pixel RGB norm (norm = false: BT.709
/// luminance) of a CV_32FC3 image, from at most ~1e5 strided samples.
double SampledQuantile(const cv::Mat& rgb, double q, bool norm);

}  // namespace lumenrig::solvers::internal
