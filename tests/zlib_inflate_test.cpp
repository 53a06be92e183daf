// The uncompress() that OpenEXR binds to (capture_io/zlib_inflate.cpp) is
// checked against zlib's own uncompress() (reached with dlsym RTLD_NEXT, the
// reference library) on zlib's own compress2() output: same return codes
// and same bytes, as the zlib 1.2.13 manual (zlib.h, "uncompress") defines
// them, for whole, corrupt, truncated and too-large streams. Then an
// OpenEXR ZIP file is decoded through it.
#include <cstring>
#include <random>
#include <vector>

#include <dlfcn.h>
#include <gtest/gtest.h>
#include <zlib.h>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/zlib_inflate.h"
#include "test_support.h"

namespace {

using UncompressFn = int (*)(Bytef*, uLongf*, const Bytef*, uLong);

UncompressFn ZlibOwnUncompress() { return reinterpret_cast<UncompressFn>(dlsym(RTLD_NEXT, "uncompress")); }

std::vector<Bytef> Compress(const std::vector<Bytef>& raw, int level) {
  uLongf n = compressBound(static_cast<uLong>(raw.size()));
  std::vector<Bytef> out(n);
  EXPECT_EQ(compress2(out.data(), &n, raw.data(), static_cast<uLong>(raw.size()), level), Z_OK);
  out.resize(n);
  return out;
}

// Half-float-like data: smooth ramps with noise in the low byte, as in frames.
std::vector<Bytef> FrameLikeBytes(size_t n, unsigned seed) {
  std::mt19937 rng(seed);
  std::vector<Bytef> v(n);
  for (size_t i = 0; i < n; ++i) v[i] = static_cast<Bytef>(i % 2 ? (i / 512) & 0x3f : rng() & 0xff);
  return v;
}

struct Result {
  int rc;
  uLongf len;
  std::vector<Bytef> out;
};

Result Inflate(UncompressFn fn, const std::vector<Bytef>& stream, size_t capacity) {
  Result r{0, static_cast<uLongf>(capacity), std::vector<Bytef>(capacity + 1, 0xA5)};
  r.rc = fn(r.out.data(), &r.len, stream.data(), static_cast<uLong>(stream.size()));
  return r;
}

TEST(ZlibInflate, WholeStreamsInflateToTheSameBytesAsZlib) {
  const UncompressFn zlib_own = ZlibOwnUncompress();
  ASSERT_NE(zlib_own, nullptr);
  ASSERT_NE(zlib_own, &uncompress) << "uncompress() is zlib's own: lumenrig's definition is not linked in";
  const auto before = lumenrig::io::ZlibInflateCounts();
  int calls = 0;
  for (size_t n : {size_t{0}, size_t{1}, size_t{1000}, size_t{196608}, size_t{1} << 20}) {
    for (int level : {1, 6, 9}) {
      const std::vector<Bytef> raw = FrameLikeBytes(n, static_cast<unsigned>(n + level));
      const std::vector<Bytef> stream = Compress(raw, level);
      const Result ours = Inflate(&uncompress, stream, n);
      const Result theirs = Inflate(zlib_own, stream, n);
      ++calls;
      ASSERT_EQ(ours.rc, Z_OK) << n << " bytes, level " << level;
      EXPECT_EQ(ours.rc, theirs.rc);
      ASSERT_EQ(ours.len, n);
      EXPECT_EQ(ours.len, theirs.len);
      EXPECT_TRUE(std::equal(raw.begin(), raw.end(), ours.out.begin())) << n << " bytes, level " << level;
      EXPECT_EQ(ours.out, theirs.out);  // the byte past the end untouched by both
    }
  }
  const auto after = lumenrig::io::ZlibInflateCounts();
  if (std::strcmp(lumenrig::io::ZlibInflateEngine(), "libdeflate") == 0) {
    EXPECT_EQ(after.libdeflate - before.libdeflate, static_cast<uint64_t>(calls));
  }
}

TEST(ZlibInflate, BadStreamsGetZlibsOwnAnswer) {
  const UncompressFn zlib_own = ZlibOwnUncompress();
  ASSERT_NE(zlib_own, nullptr);
  const size_t n = 200000;
  const std::vector<Bytef> raw = FrameLikeBytes(n, 7);
  const std::vector<Bytef> stream = Compress(raw, 6);

  std::vector<std::pair<std::string, std::pair<std::vector<Bytef>, size_t>>> cases;
  cases.push_back({"truncated to half", {std::vector<Bytef>(stream.begin(), stream.begin() + stream.size() / 2), n}});
  cases.push_back({"Adler-32 trailer wrong", {stream, n}});
  cases.back().second.first.back() ^= 0x01;
  cases.push_back({"header check bits wrong", {stream, n}});
  cases.back().second.first[1] ^= 0x01;
  cases.push_back({"output buffer one byte short", {stream, n - 1}});
  cases.push_back({"no input", {{}, n}});

  const auto before = lumenrig::io::ZlibInflateCounts();
  for (const auto& [what, c] : cases) {
    const Result ours = Inflate(&uncompress, c.first, c.second);
    const Result theirs = Inflate(zlib_own, c.first, c.second);
    EXPECT_NE(ours.rc, Z_OK) << what;
    EXPECT_EQ(ours.rc, theirs.rc) << what;
    EXPECT_EQ(ours.len, theirs.len) << what;
    EXPECT_EQ(ours.out, theirs.out) << what;
  }
  // Every rejected stream was answered by zlib itself.
  EXPECT_EQ(lumenrig::io::ZlibInflateCounts().zlib - before.zlib, cases.size());
}

TEST(ZlibInflate, OpenExrZipBlocksGoThroughIt) {
  if (std::strcmp(lumenrig::io::ZlibInflateEngine(), "libdeflate") != 0) GTEST_SKIP() << "LUMENRIG_INFLATE=zlib is set";
  lumenrig::test::TempDir dir;
  // A smooth ramp: it compresses, so OpenEXR stores deflated blocks (a block
  // that would not shrink is stored raw and never inflated).
  cv::Mat image(64, 40, CV_32FC3);
  for (int y = 0; y < image.rows; ++y)
    for (int x = 0; x < image.cols; ++x) image.at<cv::Vec3f>(y, x) = cv::Vec3f(x / 40.0f, y / 64.0f, 0.5f);
  lumenrig::io::ExrWriteOptions options;
  options.pixel_type = lumenrig::io::PixelType::kFloat;  // float: read back bit-exact
  const std::string path = dir / "zip.exr";
  ASSERT_TRUE(lumenrig::io::WriteExr(path, image, options).ok());
  const auto before = lumenrig::io::ZlibInflateCounts();
  auto back = lumenrig::io::ReadImage(path);
  ASSERT_TRUE(back.ok()) << back.status().message();
  // 64 rows in 16-row ZIP blocks ("Technical Introduction to OpenEXR").
  EXPECT_GE(lumenrig::io::ZlibInflateCounts().libdeflate - before.libdeflate, 4u);
  EXPECT_EQ(cv::norm(*back, image, cv::NORM_INF), 0.0);
}

}  // namespace
