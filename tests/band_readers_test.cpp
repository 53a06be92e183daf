// Streaming PNG/TIFF band readers checked against OpenCV's decoders
// (cv::imread IMREAD_UNCHANGED, the reference library) on files written by
// OpenCV, libpng and libtiff.
#include <filesystem>
#include <fstream>

#include <gtest/gtest.h>
#include <png.h>
#include <tiffio.h>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "../capture_io/band_readers_internal.h"
#include "lumenrig/capture_io/image_io.h"
#include "test_support.h"

namespace fs = std::filesystem;
using lumenrig::io::BandReader;
using lumenrig::io::DecodeOptions;
using lumenrig::test::TempDir;

namespace {

constexpr int kWidth = 67;
constexpr int kHeight = 53;

// What OpenCV decodes, in our convention: CV_32F, Y or RGB, [0, 1].
cv::Mat ReferenceDecode(const std::string& path) {
  cv::Mat raw = cv::imread(path, cv::IMREAD_UNCHANGED);
  EXPECT_FALSE(raw.empty()) << "OpenCV cannot read " << path;
  cv::Mat f;
  raw.convertTo(f, CV_32F, raw.depth() == CV_16U ? 1.0 / 65535.0 : 1.0 / 255.0);
  cv::Mat out;
  if (f.channels() == 1) out = f;
  if (f.channels() == 3) cv::cvtColor(f, out, cv::COLOR_BGR2RGB);
  if (f.channels() == 4) cv::cvtColor(f, out, cv::COLOR_BGRA2RGB);
  return out;
}

cv::Mat RandomImage(int depth, int channels, uint64_t seed) {
  cv::Mat m(kHeight, kWidth, CV_MAKETYPE(depth, channels));
  cv::RNG rng(seed);
  rng.fill(m, cv::RNG::UNIFORM, 0, depth == CV_16U ? 65536 : 256);
  return m;
}

// Reads the whole frame as consecutive bands of `band` rows.
cv::Mat ReadInBands(BandReader* reader, int band) {
  cv::Mat all;
  for (int y = 0; y < reader->info().height; y += band) {
    cv::Mat part;
    const int y1 = std::min(reader->info().height, y + band);
    auto status = reader->ReadRows(y, y1, &part);
    EXPECT_TRUE(status.ok()) << status.message();
    if (!status.ok()) return cv::Mat();
    EXPECT_EQ(part.rows, y1 - y);
    all.push_back(part);
  }
  return all;
}

double MaxAbsDiff(const cv::Mat& a, const cv::Mat& b) {
  EXPECT_EQ(a.size(), b.size());
  EXPECT_EQ(a.type(), b.type());
  if (a.size() != b.size() || a.type() != b.type()) return 1e9;
  return cv::norm(a, b, cv::NORM_INF);
}

// Float rounding of x * (1/255) vs OpenCV's convertTo: a few ulp near 1
// (common practice).
constexpr double kTol = 1e-6;

// Writes a PNG with libpng (reference writer) so that we can make layouts
// OpenCV's writer does not produce: palette, Adam7 interlace.
void WritePngWithLibpng(const std::string& path, int color_type, int bit_depth, bool interlace,
                        const std::vector<std::vector<png_byte>>& rows, const std::vector<png_color>& palette = {}) {
  std::FILE* f = std::fopen(path.c_str(), "wb");
  ASSERT_NE(f, nullptr);
  png_structp png = png_create_write_struct(PNG_LIBPNG_VER_STRING, nullptr, nullptr, nullptr);
  png_infop info = png_create_info_struct(png);
  png_init_io(png, f);
  png_set_IHDR(png, info, kWidth, kHeight, bit_depth, color_type, interlace ? PNG_INTERLACE_ADAM7 : PNG_INTERLACE_NONE,
               PNG_COMPRESSION_TYPE_DEFAULT, PNG_FILTER_TYPE_DEFAULT);
  if (!palette.empty()) png_set_PLTE(png, info, palette.data(), static_cast<int>(palette.size()));
  png_write_info(png, info);
  if (bit_depth == 16) png_set_swap(png);
  std::vector<png_bytep> ptrs;
  for (const auto& r : rows) ptrs.push_back(const_cast<png_bytep>(r.data()));
  png_write_image(png, ptrs.data());
  png_write_end(png, nullptr);
  png_destroy_write_struct(&png, &info);
  std::fclose(f);
}

struct Case {
  std::string ext;
  int depth;
  int channels;
};

class BandReaderVsOpenCv : public ::testing::TestWithParam<Case> {};

TEST_P(BandReaderVsOpenCv, BandsMatchWholeDecodeForSeveralHeights) {
  const Case c = GetParam();
  TempDir dir;
  const std::string path = dir / ("frame" + c.ext);
  const cv::Mat image = RandomImage(c.depth, c.channels, 7 + c.depth + c.channels);
  ASSERT_TRUE(cv::imwrite(path, image));
  const cv::Mat reference = ReferenceDecode(path);

  auto open = c.ext == ".png" ? lumenrig::io::OpenPngBandReader : lumenrig::io::OpenTiffBandReader;
  for (int band : {1, 7, 16, kHeight}) {
    auto reader = open(path, {});
    ASSERT_TRUE(reader.ok()) << reader.status().message();
    const auto& info = (*reader)->info();
    EXPECT_EQ(info.width, kWidth);
    EXPECT_EQ(info.height, kHeight);
    EXPECT_EQ(info.channels, c.channels == 1 ? 1 : 3);
    EXPECT_EQ(info.pixel_type, c.depth == CV_16U ? "uint16" : "uint8");
    const cv::Mat got = ReadInBands(reader->get(), band);
    EXPECT_LE(MaxAbsDiff(got, reference), kTol) << "band " << band;
  }

  // Through the public dispatch, with an earlier band after a later one.
  auto reader = BandReader::Open(path);
  ASSERT_TRUE(reader.ok()) << reader.status().message();
  cv::Mat late, early;
  auto s1 = (*reader)->ReadRows(30, 40, &late);
  ASSERT_TRUE(s1.ok()) << s1.message();
  auto s2 = (*reader)->ReadRows(10, 20, &early);
  ASSERT_TRUE(s2.ok()) << s2.message();
  EXPECT_LE(MaxAbsDiff(late, reference.rowRange(30, 40)), kTol);
  EXPECT_LE(MaxAbsDiff(early, reference.rowRange(10, 20)), kTol);
}

INSTANTIATE_TEST_SUITE_P(Formats, BandReaderVsOpenCv,
                         ::testing::Values(Case{".png", CV_8U, 1}, Case{".png", CV_8U, 3}, Case{".png", CV_8U, 4},
                                           Case{".png", CV_16U, 1}, Case{".png", CV_16U, 3}, Case{".tif", CV_8U, 1},
                                           Case{".tif", CV_8U, 3}, Case{".tif", CV_8U, 4}, Case{".tif", CV_16U, 1},
                                           Case{".tif", CV_16U, 3}),
                         [](const auto& info) {
                           return info.param.ext.substr(1) + std::to_string(info.param.depth == CV_16U ? 16 : 8) +
                                  "bit" + std::to_string(info.param.channels) + "ch";
                         });

TEST(BandReaders, SrgbDecodeAndBlackLevelFollowIec61966) {
  TempDir dir;
  const std::string path = dir / "srgb.png";
  ASSERT_TRUE(cv::imwrite(path, RandomImage(CV_8U, 3, 99)));
  const cv::Mat reference = ReferenceDecode(path);
  DecodeOptions options;
  options.encoding = lumenrig::io::Encoding::kSrgb;
  options.black_level = 0.02f;
  auto reader = lumenrig::io::OpenPngBandReader(path, options);
  ASSERT_TRUE(reader.ok()) << reader.status().message();
  const cv::Mat got = ReadInBands(reader->get(), 8);
  ASSERT_EQ(got.size(), reference.size());
  double worst = 0;
  for (int y = 0; y < reference.rows; ++y) {
    for (int x = 0; x < reference.cols * 3; ++x) {
      // Source: IEC 61966-2-1 sRGB decoding, written out here independently.
      const double e = reference.ptr<float>(y)[x];
      const double linear = e <= 0.04045 ? e / 12.92 : std::pow((e + 0.055) / 1.055, 2.4);
      worst = std::max(worst, std::abs(got.ptr<float>(y)[x] - (linear - 0.02)));
    }
  }
  EXPECT_LE(worst, 1e-6);  // float vs double evaluation of the curve (common practice)
}

TEST(BandReaders, PalettePngAndInterlacedPngMatchOpenCv) {
  TempDir dir;
  // Palette, 8-bit indices.
  std::vector<png_color> palette;
  for (int i = 0; i < 256; ++i)
    palette.push_back({static_cast<png_byte>(i), static_cast<png_byte>(255 - i), static_cast<png_byte>(i * 7)});
  std::vector<std::vector<png_byte>> rows(kHeight, std::vector<png_byte>(kWidth));
  for (int y = 0; y < kHeight; ++y)
    for (int x = 0; x < kWidth; ++x) rows[y][x] = static_cast<png_byte>((x * 13 + y * 5) & 255);
  const std::string pal = dir / "palette.png";
  WritePngWithLibpng(pal, PNG_COLOR_TYPE_PALETTE, 8, false, rows, palette);
  auto reader = lumenrig::io::OpenPngBandReader(pal, {});
  ASSERT_TRUE(reader.ok()) << reader.status().message();
  EXPECT_EQ((*reader)->info().channels, 3);
  EXPECT_LE(MaxAbsDiff(ReadInBands(reader->get(), 5), ReferenceDecode(pal)), kTol);

  // Adam7-interlaced 16-bit RGB: decoded whole (cannot stream), same values.
  std::vector<std::vector<png_byte>> rgb16(kHeight, std::vector<png_byte>(kWidth * 6));
  cv::RNG rng(5);
  for (auto& r : rgb16)
    for (auto& b : r) b = static_cast<png_byte>(rng.uniform(0, 256));
  const std::string inter = dir / "interlaced.png";
  WritePngWithLibpng(inter, PNG_COLOR_TYPE_RGB, 16, true, rgb16);
  auto ireader = BandReader::Open(inter);
  ASSERT_TRUE(ireader.ok()) << ireader.status().message();
  EXPECT_EQ((*ireader)->info().pixel_type, "uint16");
  EXPECT_LE(MaxAbsDiff(ReadInBands(ireader->get(), 16), ReferenceDecode(inter)), kTol);
}

TEST(BandReaders, TiledTiffFallsBackToWholeDecode) {
  TempDir dir;
  const std::string path = dir / "tiled.tif";
  // Written with libtiff (reference writer): 16x16 tiles, 8-bit RGB.
  TIFF* tif = TIFFOpen(path.c_str(), "w");
  ASSERT_NE(tif, nullptr);
  TIFFSetField(tif, TIFFTAG_IMAGEWIDTH, kWidth);
  TIFFSetField(tif, TIFFTAG_IMAGELENGTH, kHeight);
  TIFFSetField(tif, TIFFTAG_BITSPERSAMPLE, 8);
  TIFFSetField(tif, TIFFTAG_SAMPLESPERPIXEL, 3);
  TIFFSetField(tif, TIFFTAG_PHOTOMETRIC, PHOTOMETRIC_RGB);
  TIFFSetField(tif, TIFFTAG_PLANARCONFIG, PLANARCONFIG_CONTIG);
  TIFFSetField(tif, TIFFTAG_TILEWIDTH, 16);
  TIFFSetField(tif, TIFFTAG_TILELENGTH, 16);
  std::vector<uint8_t> tile(16 * 16 * 3);
  for (int ty = 0; ty < kHeight; ty += 16) {
    for (int tx = 0; tx < kWidth; tx += 16) {
      for (int y = 0; y < 16; ++y)
        for (int x = 0; x < 16; ++x)
          for (int k = 0; k < 3; ++k)
            tile[(y * 16 + x) * 3 + k] = static_cast<uint8_t>((tx + x) * 3 + (ty + y) * 2 + k * 50);
      ASSERT_GE(TIFFWriteTile(tif, tile.data(), tx, ty, 0, 0), 0);
    }
  }
  TIFFClose(tif);
  auto reader = BandReader::Open(path);
  ASSERT_TRUE(reader.ok()) << reader.status().message();
  EXPECT_LE(MaxAbsDiff(ReadInBands(reader->get(), 10), ReferenceDecode(path)), kTol);
}

TEST(BandReaders, DiligentPngsMatchOpenCv) {
  // Real capture files: DiLiGenT ballPNG (Shi et al., CVPR 2016), 16-bit RGB
  // frames and an 8-bit RGB mask, read with OpenCV as the reference.
  const std::string dir = lumenrig::test::SharedDataDir("diligent");
  if (dir.empty()) GTEST_SKIP() << "../shared/data/diligent absent (open dataset not installed)";
  for (const char* name : {"ballPNG/001.png", "ballPNG/050.png", "ballPNG/mask.png"}) {
    const std::string path = dir + "/" + name;
    if (!fs::exists(path)) GTEST_SKIP() << path << " absent";
    auto reader = BandReader::Open(path);
    ASSERT_TRUE(reader.ok()) << reader.status().message();
    EXPECT_EQ((*reader)->info().width, 612);
    EXPECT_EQ((*reader)->info().height, 512);
    EXPECT_LE(MaxAbsDiff(ReadInBands(reader->get(), 32), ReferenceDecode(path)), kTol) << name;
  }
}

TEST(BandReaders, TruncatedOrCorruptFilesGiveOneLineErrorNamingTheFile) {
  TempDir dir;
  cv::Mat noise(256, 256, CV_8UC3);
  cv::randu(noise, 0, 256);  // incompressible, so truncation cuts pixel data
  testing::internal::CaptureStderr();
  std::vector<std::string> messages;
  for (const std::string ext : {".png", ".tif"}) {
    const std::string path = dir / ("cut" + ext);
    ASSERT_TRUE(cv::imwrite(path, noise));
    fs::resize_file(path, fs::file_size(path) / 2);
    auto reader = BandReader::Open(path);
    lumenrig::io::Status status;
    if (reader.ok()) {
      cv::Mat band;
      for (int y = 0; y < 256 && status.ok(); y += 32) status = (*reader)->ReadRows(y, y + 32, &band);
    } else {
      status = reader.status();
    }
    ASSERT_FALSE(status.ok()) << "truncated " << ext << " read without error";
    EXPECT_EQ(status.code(), lumenrig::io::StatusCode::kBadInput);
    messages.push_back(status.message());
  }
  const std::string garbage = dir / "garbage.png";
  std::ofstream(garbage) << "this is not a png file at all";
  auto g = BandReader::Open(garbage);
  ASSERT_FALSE(g.ok());
  messages.push_back(g.status().message());
  EXPECT_EQ(testing::internal::GetCapturedStderr(), "") << "a decoder printed to stderr";
  const std::vector<std::string> names{"cut.png", "cut.tif", "garbage.png"};
  for (size_t i = 0; i < messages.size(); ++i) {
    EXPECT_NE(messages[i].find(names[i]), std::string::npos) << messages[i];
    EXPECT_EQ(messages[i].find('\n'), std::string::npos) << messages[i];
  }
  EXPECT_NE(messages[0].find("truncated"), std::string::npos) << messages[0];
}

}  // namespace
