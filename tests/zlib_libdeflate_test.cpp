// The uncompress() and compress2() that OpenEXR binds to
// (capture_io/zlib_libdeflate.cpp) are checked against zlib's own functions
// (reached with dlsym RTLD_NEXT, the reference library), as the zlib 1.2.13
// manual (zlib.h, "uncompress", "compress2") defines them: same return codes
// and bytes for whole, corrupt, truncated and too-large streams, and zlib's
// exact bytes for compress2 callers outside OpenEXR (HDF5). Then an OpenEXR
// ZIP file goes through both, and a separate Python/OpenCV process, whose
// OpenEXR uses the stock zlib, reads it back bit-exact.
#include <cstdio>
#include <random>
#include <vector>

#include <dlfcn.h>
#include <gtest/gtest.h>
#include <zlib.h>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/zlib_libdeflate.h"
#include "test_support.h"

namespace {

using UncompressFn = int (*)(Bytef*, uLongf*, const Bytef*, uLong);
using Compress2Fn = int (*)(Bytef*, uLongf*, const Bytef*, uLong, int);

UncompressFn ZlibOwnUncompress() { return reinterpret_cast<UncompressFn>(dlsym(RTLD_NEXT, "uncompress")); }
Compress2Fn ZlibOwnCompress2() { return reinterpret_cast<Compress2Fn>(dlsym(RTLD_NEXT, "compress2")); }

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

TEST(ZlibLibdeflate, WholeStreamsInflateToTheSameBytesAsZlib) {
  const UncompressFn zlib_own = ZlibOwnUncompress();
  ASSERT_NE(zlib_own, nullptr);
  ASSERT_NE(zlib_own, &uncompress) << "uncompress() is zlib's own: lumenrig's definition is not linked in";
  const auto before = lumenrig::io::ZlibLibdeflateCounts();
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
  const auto after = lumenrig::io::ZlibLibdeflateCounts();
  if (lumenrig::io::LibdeflateEnabled()) {
    EXPECT_EQ(after.inflated - before.inflated, static_cast<uint64_t>(calls));
  }
}

TEST(ZlibLibdeflate, BadStreamsGetZlibsOwnAnswer) {
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

  const auto before = lumenrig::io::ZlibLibdeflateCounts();
  for (const auto& [what, c] : cases) {
    const Result ours = Inflate(&uncompress, c.first, c.second);
    const Result theirs = Inflate(zlib_own, c.first, c.second);
    EXPECT_NE(ours.rc, Z_OK) << what;
    EXPECT_EQ(ours.rc, theirs.rc) << what;
    EXPECT_EQ(ours.len, theirs.len) << what;
    EXPECT_EQ(ours.out, theirs.out) << what;
  }
  // Every rejected stream was answered by zlib itself.
  EXPECT_EQ(lumenrig::io::ZlibLibdeflateCounts().inflate_to_zlib - before.inflate_to_zlib, cases.size());
}

// HDF5's deflate filter and lumenrig's chunk packer call compress2() from
// outside OpenEXR: they must get zlib's own bytes (files then match what
// HDF5 itself writes, hdf5_writer_test).
TEST(ZlibLibdeflate, CompressOutsideOpenExrGivesZlibsOwnBytes) {
  const Compress2Fn zlib_own = ZlibOwnCompress2();
  ASSERT_NE(zlib_own, nullptr);
  ASSERT_NE(zlib_own, &compress2) << "compress2() is zlib's own: lumenrig's definition is not linked in";
  const auto before = lumenrig::io::ZlibLibdeflateCounts();
  for (int level : {1, 4, 9}) {
    const std::vector<Bytef> raw = FrameLikeBytes(300000, static_cast<unsigned>(level));
    uLongf n_ours = compressBound(static_cast<uLong>(raw.size())), n_zlib = n_ours;
    std::vector<Bytef> ours(n_ours), theirs(n_zlib);
    ASSERT_EQ(compress2(ours.data(), &n_ours, raw.data(), static_cast<uLong>(raw.size()), level), Z_OK);
    ASSERT_EQ(zlib_own(theirs.data(), &n_zlib, raw.data(), static_cast<uLong>(raw.size()), level), Z_OK);
    ours.resize(n_ours);
    theirs.resize(n_zlib);
    EXPECT_EQ(ours, theirs) << "level " << level;
  }
  const auto after = lumenrig::io::ZlibLibdeflateCounts();
  EXPECT_EQ(after.deflate_to_zlib - before.deflate_to_zlib, 3u);
  EXPECT_EQ(after.deflated, before.deflated);
}

TEST(ZlibLibdeflate, OpenExrZipBlocksGoThroughItAndReadBackWithStockZlib) {
  if (!lumenrig::io::LibdeflateEnabled()) GTEST_SKIP() << "LUMENRIG_LIBDEFLATE=0 is set";
  lumenrig::test::TempDir dir;
  // A smooth ramp: it compresses, so OpenEXR stores deflated blocks (a block
  // that would not shrink is stored raw and never inflated).
  const int w = 40, h = 64;
  cv::Mat image(h, w, CV_32FC3);
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x)
      image.at<cv::Vec3f>(y, x) = cv::Vec3f(static_cast<float>(x) / w, static_cast<float>(y) / h, 0.5f);
  lumenrig::io::ExrWriteOptions options;
  options.pixel_type = lumenrig::io::PixelType::kFloat;  // float: read back bit-exact
  const std::string path = dir / "zip.exr";
  const auto before = lumenrig::io::ZlibLibdeflateCounts();
  ASSERT_TRUE(lumenrig::io::WriteExr(path, image, options).ok());
  const auto written = lumenrig::io::ZlibLibdeflateCounts();
  auto back = lumenrig::io::ReadImage(path);
  ASSERT_TRUE(back.ok()) << back.status().message();
  const auto read = lumenrig::io::ZlibLibdeflateCounts();
  // 64 rows in 16-row ZIP blocks ("Technical Introduction to OpenEXR").
  EXPECT_EQ(written.deflated - before.deflated, 4u);
  EXPECT_EQ(read.inflated - written.inflated, 4u);
  EXPECT_EQ(cv::norm(*back, image, cv::NORM_INF), 0.0);

  // Outside reader: OpenCV's EXR codec in a separate Python process, where
  // OpenEXR inflates with the stock zlib. Same ramp, computed in float32.
  const std::string script =
      "import os, sys, numpy as np\n"
      "os.environ['OPENCV_IO_ENABLE_OPENEXR'] = '1'\n"
      "import cv2\n"
      "m = cv2.imread(sys.argv[1], cv2.IMREAD_UNCHANGED)[:, :, ::-1]\n"
      "y, x = np.mgrid[0:64, 0:40].astype(np.float32)\n"
      "ref = np.dstack([x / np.float32(40), y / np.float32(64), np.full_like(x, 0.5)])\n"
      "print(float(np.abs(m - ref).max()))\n";
  const std::string script_path = dir / "read.py";
  {
    std::FILE* f = std::fopen(script_path.c_str(), "w");
    ASSERT_NE(f, nullptr);
    std::fputs(script.c_str(), f);
    std::fclose(f);
  }
  const auto r = lumenrig::test::RunShell(std::string(LUMENRIG_PYTHON) + " " + script_path + " " + path);
  ASSERT_EQ(r.exit_code, 0) << r.err;
  EXPECT_EQ(std::stod(r.out), 0.0) << r.out;
}

}  // namespace
