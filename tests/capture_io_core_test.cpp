// Core capture_io checks: sRGB against IEC 61966-2-1, EXR round trips and
// band reading, session/rig loading, atomic output, ParallelFor chunking.
#include <atomic>
#include <cmath>
#include <filesystem>
#include <fstream>

#include <gtest/gtest.h>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"
#include "lumenrig/capture_io/session.h"
#include "test_support.h"

namespace fs = std::filesystem;
using namespace lumenrig;

namespace {

TEST(Srgb, ReferencePointsOfIec61966_2_1) {
  // IEC 61966-2-1:1999, section 5.2: linear segment 12.92*L below 0.0031308,
  // 1.055 L^(1/2.4) - 0.055 above; the encoded breakpoint is 0.04045.
  EXPECT_NEAR(io::LinearToSrgb(0.0031308f), 0.04045f, 2e-6f);
  EXPECT_NEAR(io::SrgbToLinear(0.04045f), 0.0031308f, 2e-7f);
  EXPECT_FLOAT_EQ(io::LinearToSrgb(0.001f), 0.01292f);  // on the linear segment
  EXPECT_FLOAT_EQ(io::SrgbToLinear(0.0f), 0.0f);
  EXPECT_FLOAT_EQ(io::SrgbToLinear(1.0f), 1.0f);
  // Mid grey: encoded 0.5 decodes to 0.21404 (closed form ((0.5+0.055)/1.055)^2.4).
  EXPECT_NEAR(io::SrgbToLinear(0.5f), std::pow((0.5 + 0.055) / 1.055, 2.4), 1e-6);
  for (int i = 0; i <= 100; ++i) {
    const float l = i / 100.0f;
    EXPECT_NEAR(io::SrgbToLinear(io::LinearToSrgb(l)), l, 1e-5f) << "round trip at " << l;
  }
}

TEST(Bt709, LumaWeightsSumToOne) {
  // ITU-R BT.709-6, item 3.2: Y = 0.2126 R + 0.7152 G + 0.0722 B.
  EXPECT_FLOAT_EQ(io::kBt709R + io::kBt709G + io::kBt709B, 1.0f);
  EXPECT_FLOAT_EQ(io::Bt709Luminance(1, 1, 1), 1.0f);
  EXPECT_FLOAT_EQ(io::Bt709Luminance(0, 1, 0), 0.7152f);
}

cv::Mat Ramp(int w, int h, int channels) {
  cv::Mat m(h, w, CV_MAKETYPE(CV_32F, channels));
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x)
      for (int c = 0; c < channels; ++c) m.ptr<float>(y)[x * channels + c] = 0.001f * x + 0.01f * y + 0.3f * c;
  return m;
}

TEST(Exr, FloatRoundTripIsExactAndBandsMatchWholeImage) {
  test::TempDir dir;
  const cv::Mat img = Ramp(67, 45, 3);
  io::ExrWriteOptions opt;
  opt.pixel_type = io::PixelType::kFloat;
  opt.attributes["lumenrig.source"] = "unit-test";
  ASSERT_TRUE(io::WriteExr(dir / "a.exr", img, opt).ok());
  auto back = io::ReadImage(dir / "a.exr");
  ASSERT_TRUE(back.ok()) << back.status().message();
  EXPECT_EQ(cv::norm(*back, img, cv::NORM_INF), 0.0);
  auto attrs = io::ReadExrAttributes(dir / "a.exr");
  ASSERT_TRUE(attrs.ok());
  EXPECT_EQ(attrs->at("lumenrig.source"), "unit-test");

  auto reader = io::BandReader::Open(dir / "a.exr");
  ASSERT_TRUE(reader.ok());
  EXPECT_EQ((*reader)->info().lines_per_block, 16);  // ZIP: 16 lines a block
  for (int band : {1, 7, 16, 45}) {
    for (int y0 = 0; y0 < img.rows; y0 += band) {
      const int y1 = std::min(img.rows, y0 + band);
      cv::Mat rows;
      ASSERT_TRUE((*reader)->ReadRows(y0, y1, &rows).ok());
      EXPECT_EQ(cv::norm(rows, img.rowRange(y0, y1), cv::NORM_INF), 0.0) << "band " << band << " at " << y0;
    }
  }
}

TEST(Exr, HalfRoundTripWithinHalfPrecision) {
  test::TempDir dir;
  const cv::Mat img = Ramp(32, 16, 1);
  {
    auto st = io::WriteExr(dir / "y.exr", img);
    ASSERT_TRUE(st.ok()) << st.message();
  }
  auto back = io::ReadImage(dir / "y.exr");
  ASSERT_TRUE(back.ok());
  ASSERT_EQ(back->channels(), 1);
  // IEEE 754 binary16 has a 10-bit mantissa: relative error <= 2^-11.
  for (int y = 0; y < img.rows; ++y)
    for (int x = 0; x < img.cols; ++x)
      EXPECT_NEAR(back->at<float>(y, x), img.at<float>(y, x), std::abs(img.at<float>(y, x)) * 4.9e-4 + 1e-7);
}

TEST(Exr, RefusesToOverwriteAndLeavesNoTemporary) {
  test::TempDir dir;
  const cv::Mat img = Ramp(8, 8, 3);
  ASSERT_TRUE(io::WriteExr(dir / "x.exr", img).ok());
  io::Status s = io::WriteExr(dir / "x.exr", img);
  EXPECT_EQ(s.code(), io::StatusCode::kBadInput);
  EXPECT_NE(s.message().find("x.exr"), std::string::npos);
  EXPECT_NE(s.message().find("--force"), std::string::npos);
  EXPECT_EQ(test::CountFiles(dir.path()), 1);
}

TEST(Exr, TruncatedFileIsAOneLineErrorNamingIt) {
  test::TempDir dir;
  cv::Mat img(64, 64, CV_32FC3);
  cv::randu(img, 0.0f, 1.0f);
  ASSERT_TRUE(io::WriteExr(dir / "t.exr", img).ok());
  const auto size = fs::file_size(dir / "t.exr");
  fs::resize_file(dir / "t.exr", size / 2);
  auto back = io::ReadImage(dir / "t.exr");
  ASSERT_FALSE(back.ok());
  EXPECT_EQ(back.status().code(), io::StatusCode::kBadInput);
  EXPECT_NE(back.status().message().find("t.exr"), std::string::npos);
  EXPECT_EQ(back.status().message().find('\n'), std::string::npos);
}

TEST(Session, LoadsMinimalSessionAndResolvesPaths) {
  test::TempDir dir;
  fs::create_directories(dir / "cam00");
  ASSERT_TRUE(io::WriteExr(dir / "cam00/olat_000.exr", Ramp(8, 8, 3)).ok());
  std::ofstream(dir / "rig.json") << R"({"format":"lumenrig.rig/1","name":"t","lights":[
      {"id":0,"direction":[0,0,1],"intensity":[1,1,1]}]})";
  std::ofstream(dir / "session.json") << R"({"format":"lumenrig.session/1","rig":"rig.json",
      "cameras":[{"id":"cam00","olat":[{"light":0,"path":"cam00/olat_000.exr"}]}]})";
  auto s = io::LoadSession(dir.path());
  ASSERT_TRUE(s.ok()) << s.status().message();
  ASSERT_EQ(s->cameras.size(), 1u);
  EXPECT_EQ(s->cameras[0].olat[0].path, dir / "cam00/olat_000.exr");
  EXPECT_EQ(s->rig.lights.size(), 1u);
  // Round trip through JSON keeps the relative paths.
  EXPECT_EQ(io::SessionToJson(*s)["cameras"][0]["olat"][0]["path"], "cam00/olat_000.exr");
}

TEST(Parallel, ChunksDoNotDependOnThreadCount) {
  for (int threads : {1, 2, 3}) {
    std::vector<int64_t> starts(10, -1);
    io::ParallelFor(5, 100, 10, threads, [&](int64_t b, int64_t e) {
      EXPECT_EQ(e - b, std::min<int64_t>(10, 100 - b));
      starts[static_cast<size_t>((b - 5) / 10)] = b;
    });
    for (int k = 0; k < 10; ++k) EXPECT_EQ(starts[static_cast<size_t>(k)], 5 + 10 * k);
  }
  EXPECT_NE(io::DeriveSeed(1, 2, 3), io::DeriveSeed(1, 3, 2));
}

}  // namespace
