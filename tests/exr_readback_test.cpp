// EXR files written by io::WriteExr are read back by two outside readers:
// OpenCV's EXR decoder (cv::imread, IMREAD_UNCHANGED) for the values, and
// `exrheader` (Debian package openexr) for channel names, pixel types,
// compression and header attributes.
#include <cstdlib>
#include <filesystem>

#include <gtest/gtest.h>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "test_support.h"

namespace fs = std::filesystem;
using lumenrig::test::TempDir;

namespace {

constexpr const char* kExrHeader = "/usr/bin/exrheader";

// Values exactly representable in binary16 (k/1024 in [0, 2): 10 mantissa bits; and a few
// larger powers of two), so half files must read back bit-exact.
cv::Mat HalfExactImage(int w, int h, int channels) {
  cv::Mat m(h, w, CV_MAKETYPE(CV_32F, channels));
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x)
      for (int c = 0; c < channels; ++c)
        m.ptr<float>(y)[x * channels + c] = static_cast<float>((x * 37 + y * 11 + c * 301) % 2048) / 1024.0f;
  m.at<float>(0, 0) = 1024.0f;
  return m;
}

cv::Mat RandomFloatImage(int w, int h, int channels) {
  cv::Mat m(h, w, CV_MAKETYPE(CV_32F, channels));
  cv::RNG rng(42);
  rng.fill(m, cv::RNG::UNIFORM, -2.0, 50.0);
  return m;
}

cv::Mat OpenCvRead(const std::string& path) {
  // OpenCV 4.6 disables its EXR codec unless asked (CVE hardening).
  setenv("OPENCV_IO_ENABLE_OPENEXR", "1", 1);
  cv::Mat m = cv::imread(path, cv::IMREAD_UNCHANGED);
  if (m.channels() == 3) cv::cvtColor(m, m, cv::COLOR_BGR2RGB);
  return m;
}

std::string ExrHeader(const std::string& path) {
  const auto r = lumenrig::test::RunShell(std::string(kExrHeader) + " " + path);
  EXPECT_EQ(r.exit_code, 0) << r.err;
  return r.out;
}

class ExrReadback : public ::testing::TestWithParam<lumenrig::io::PixelType> {};

TEST_P(ExrReadback, OpenCvReadsSameValuesRgbAndY) {
  if (!fs::exists(kExrHeader)) GTEST_SKIP() << kExrHeader << " not installed (Debian package openexr)";
  TempDir dir;
  const auto type = GetParam();
  const bool half = type == lumenrig::io::PixelType::kHalf;
  for (int channels : {3, 1}) {
    const cv::Mat image = half ? HalfExactImage(61, 37, channels) : RandomFloatImage(61, 37, channels);
    const std::string path = dir / fmt::format("img{}.exr", channels);
    lumenrig::io::ExrWriteOptions options;
    options.pixel_type = type;
    options.attributes["lumenrig.tool"] = "lumenrig test";
    options.attributes["lumenrig.session"] = "kh-bust-03";
    ASSERT_TRUE(lumenrig::io::WriteExr(path, image, options).ok());

    // Source: OpenCV's EXR decoder (reads half and float to CV_32F).
    const cv::Mat back = OpenCvRead(path);
    ASSERT_FALSE(back.empty()) << "OpenCV cannot read " << path;
    ASSERT_EQ(back.type(), image.type());
    EXPECT_EQ(cv::norm(back, image, cv::NORM_INF), 0.0) << "values differ, " << channels << " channels";

    // Source: exrheader (OpenEXR's own tool).
    const std::string header = ExrHeader(path);
    const std::string type_text = half ? "16-bit floating-point" : "32-bit floating-point";
    const std::vector<std::string> names =
        channels == 3 ? std::vector<std::string>{"R", "G", "B"} : std::vector<std::string>{"Y"};
    for (const auto& n : names)
      EXPECT_NE(header.find(n + ", " + type_text), std::string::npos) << n << " missing in\n" << header;
    EXPECT_NE(header.find("zip, multi-scanline blocks"), std::string::npos) << header;
    EXPECT_NE(header.find("dataWindow (type box2i): (0 0) - (60 36)"), std::string::npos) << header;
    EXPECT_NE(header.find("lumenrig.tool (type string): \"lumenrig test\""), std::string::npos) << header;
    EXPECT_NE(header.find("lumenrig.session (type string): \"kh-bust-03\""), std::string::npos) << header;
  }
}

INSTANTIATE_TEST_SUITE_P(PixelTypes, ExrReadback,
                         ::testing::Values(lumenrig::io::PixelType::kHalf, lumenrig::io::PixelType::kFloat),
                         [](const auto& info) {
                           return info.param == lumenrig::io::PixelType::kHalf ? std::string("half")
                                                                               : std::string("float");
                         });

TEST(ExrReadback, NamedChannelsListedByExrHeaderAndReadByOurReader) {
  if (!fs::exists(kExrHeader)) GTEST_SKIP() << kExrHeader << " not installed (Debian package openexr)";
  TempDir dir;
  const cv::Mat image = HalfExactImage(40, 24, 3);
  lumenrig::io::ExrWriteOptions options;
  options.channel_names = {"normal.R", "normal.G", "normal.B"};
  const std::string path = dir / "normals.exr";
  ASSERT_TRUE(lumenrig::io::WriteExr(path, image, options).ok());
  const std::string header = ExrHeader(path);
  for (const char* n : {"normal.R", "normal.G", "normal.B"})
    EXPECT_NE(header.find(std::string(n) + ", 16-bit floating-point"), std::string::npos) << header;
  // Our reader maps a layer prefix to RGB.
  auto back = lumenrig::io::ReadImage(path);
  ASSERT_TRUE(back.ok()) << back.status().message();
  EXPECT_EQ(cv::norm(*back, image, cv::NORM_INF), 0.0);
}

TEST(ExrReadback, HalfRoundingMatchesOpenCvFloat16) {
  // Values not representable in binary16 are rounded to nearest even; the
  // reference is OpenCV's own float -> CV_16F conversion (IEEE 754).
  TempDir dir;
  const cv::Mat image = RandomFloatImage(33, 17, 3);
  const std::string path = dir / "r.exr";
  ASSERT_TRUE(lumenrig::io::WriteExr(path, image).ok());
  cv::Mat h, expected;
  image.convertTo(h, CV_16FC3);
  h.convertTo(expected, CV_32FC3);
  const cv::Mat back = OpenCvRead(path);
  ASSERT_FALSE(back.empty());
  EXPECT_EQ(cv::norm(back, expected, cv::NORM_INF), 0.0);
}

}  // namespace
