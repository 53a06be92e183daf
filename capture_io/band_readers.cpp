// Streaming PNG (libpng) and TIFF (libtiff) band readers: decode only the
// rows asked for, top to bottom, so a stack of frames streams in bounded
// memory. Formats they cannot stream fall back to whole-image decoding.
#include <csetjmp>
#include <cstdarg>
#include <cstdio>
#include <cstring>

#include <png.h>
#include <tiffio.h>

#include "band_readers_internal.h"
#include "lumenrig/capture_io/color.h"

namespace lumenrig::io {

void ApplyDecodeOptions(const DecodeOptions& options, cv::Mat* band) {
  if (options.encoding == Encoding::kSrgb) SrgbToLinearInPlace(band);
  if (options.black_level != 0.0f) *band -= cv::Scalar::all(options.black_level);
}

namespace {

Status BadBand(const std::string& path, int y0, int y1, int height) {
  return Status::Internal(fmt::format("{}: invalid band [{}, {}) for height {}", path, y0, y1, height));
}

// Integer samples of one row (`channels_in` interleaved, first `channels_out`
// kept) to floats in [0, 1].
template <class T>
void RowToFloat(const T* in, int width, int channels_in, int channels_out, float scale, float* out) {
  for (int x = 0; x < width; ++x) {
    for (int c = 0; c < channels_out; ++c) out[c] = static_cast<float>(in[c]) * scale;
    in += channels_in;
    out += channels_out;
  }
}

// ---------------------------------------------------------------------------
// PNG

// libpng reports errors through png_error -> this handler -> longjmp back to
// the setjmp in the calling member function; nothing is printed.
struct PngErrorState {
  char message[256] = {0};
};

void PngError(png_structp png, png_const_charp msg) {
  auto* state = static_cast<PngErrorState*>(png_get_error_ptr(png));
  std::snprintf(state->message, sizeof(state->message), "%s", msg != nullptr ? msg : "unknown libpng error");
  png_longjmp(png, 1);
}
void PngWarning(png_structp, png_const_charp) {}

class PngBandReader : public BandReader {
 public:
  ~PngBandReader() override { Close(); }

  // Opens the file and reads the header. Returns false with error_ set.
  Status Reopen() {
    Close();
    file_ = std::fopen(path_.c_str(), "rb");
    if (file_ == nullptr) return Status::BadInput(fmt::format("{}: cannot open: {}", path_, std::strerror(errno)));
    png_byte sig[8];
    if (std::fread(sig, 1, 8, file_) != 8 || png_sig_cmp(sig, 0, 8) != 0) {
      return Status::BadInput(fmt::format("{}: not a PNG file (bad signature)", path_));
    }
    png_ = png_create_read_struct(PNG_LIBPNG_VER_STRING, &error_, PngError, PngWarning);
    if (png_ == nullptr) return Status::Internal(fmt::format("{}: libpng initialisation failed", path_));
    info_ptr_ = png_create_info_struct(png_);
    if (info_ptr_ == nullptr) return Status::Internal(fmt::format("{}: libpng initialisation failed", path_));
    if (!ReadHeader()) return Status::BadInput(fmt::format("{}: corrupt PNG header: {}", path_, error_.message));
    next_row_ = 0;
    return Status::Ok();
  }

  // libpng calls; no C++ objects with destructors live across setjmp.
  bool ReadHeader() {
    if (setjmp(png_jmpbuf(png_))) return false;
    png_init_io(png_, file_);
    png_set_sig_bytes(png_, 8);
    png_read_info(png_, info_ptr_);
    const int bit_depth = png_get_bit_depth(png_, info_ptr_);
    const int color_type = png_get_color_type(png_, info_ptr_);
    width_ = static_cast<int>(png_get_image_width(png_, info_ptr_));
    height_ = static_cast<int>(png_get_image_height(png_, info_ptr_));
    interlaced_ = png_get_interlace_type(png_, info_ptr_) != PNG_INTERLACE_NONE;
    // Expand palette to RGB and low-bit gray to 8 bits; drop alpha (tRNS is
    // ignored, as alpha is not part of the radiance).
    if (color_type == PNG_COLOR_TYPE_PALETTE) png_set_palette_to_rgb(png_);
    if (color_type == PNG_COLOR_TYPE_GRAY && bit_depth < 8) png_set_expand_gray_1_2_4_to_8(png_);
    if (color_type & PNG_COLOR_MASK_ALPHA) png_set_strip_alpha(png_);
    // PNG stores 16-bit samples big-endian; ask for host (little-endian) order.
    if (bit_depth == 16) png_set_swap(png_);
    png_read_update_info(png_, info_ptr_);
    bit_depth_ = png_get_bit_depth(png_, info_ptr_);
    channels_ = png_get_channels(png_, info_ptr_);
    row_bytes_ = png_get_rowbytes(png_, info_ptr_);
    return true;
  }

  // Decodes the next row into row_; false on a libpng error.
  bool ReadNextRow() {
    if (setjmp(png_jmpbuf(png_))) return false;
    png_read_row(png_, row_.data(), nullptr);
    return true;
  }

  const ImageInfo& info() const override { return info_; }

  Status ReadRows(int y0, int y1, cv::Mat* out) override {
    if (y0 < 0 || y1 > info_.height || y0 >= y1) return BadBand(path_, y0, y1, info_.height);
    if (y0 < next_row_ || png_ == nullptr) LUMENRIG_RETURN_IF_ERROR(Reopen());
    const int c = info_.channels;
    out->create(y1 - y0, info_.width, CV_MAKETYPE(CV_32F, c));
    row_.resize(row_bytes_);
    for (int y = next_row_; y < y1; ++y) {
      if (!ReadNextRow()) {
        const std::string message = error_.message;
        Close();  // the decoder state is unusable after an error
        return Status::BadInput(fmt::format("{}: truncated or corrupt PNG data at row {}: {}", path_, y, message));
      }
      next_row_ = y + 1;
      if (y < y0) continue;
      float* dst = out->ptr<float>(y - y0);
      if (bit_depth_ == 16) {
        RowToFloat(reinterpret_cast<const uint16_t*>(row_.data()), width_, channels_, c, 1.0f / 65535.0f, dst);
      } else {
        RowToFloat(row_.data(), width_, channels_, c, 1.0f / 255.0f, dst);
      }
    }
    ApplyDecodeOptions(options_, out);
    return Status::Ok();
  }

  std::string path_;
  DecodeOptions options_;
  ImageInfo info_;
  int width_ = 0, height_ = 0, bit_depth_ = 8, channels_ = 1;
  bool interlaced_ = false;
  size_t row_bytes_ = 0;

 private:
  void Close() {
    if (png_ != nullptr) png_destroy_read_struct(&png_, info_ptr_ != nullptr ? &info_ptr_ : nullptr, nullptr);
    png_ = nullptr;
    info_ptr_ = nullptr;
    if (file_ != nullptr) std::fclose(file_);
    file_ = nullptr;
  }

  PngErrorState error_;
  std::FILE* file_ = nullptr;
  png_structp png_ = nullptr;
  png_infop info_ptr_ = nullptr;
  int next_row_ = 0;
  std::vector<png_byte> row_;
};

// ---------------------------------------------------------------------------
// TIFF

// libtiff errors and warnings go to the per-file handler (libtiff >= 4.5),
// which keeps the first error message and prints nothing.
struct TiffErrorState {
  char message[256] = {0};
};

int TiffError(TIFF* tif, void* user_data, const char* module, const char* fmt, va_list ap) {
  auto* state = static_cast<TiffErrorState*>(user_data);
  if (state->message[0] == '\0') {
    // libtiff often passes the file name as the module; our message names it already.
    if (module != nullptr && tif != nullptr && std::strcmp(module, TIFFFileName(tif)) == 0) module = nullptr;
    char text[200];
    std::vsnprintf(text, sizeof(text), fmt, ap);
    std::snprintf(state->message, sizeof(state->message), "%s%s%s", module != nullptr ? module : "",
                  module != nullptr ? ": " : "", text);
  }
  return 1;  // handled: do not call the global handler
}
int TiffWarning(TIFF*, void*, const char*, const char*, va_list) { return 1; }

TIFF* OpenTiff(const std::string& path, TiffErrorState* errors) {
  TIFFOpenOptions* opts = TIFFOpenOptionsAlloc();
  TIFFOpenOptionsSetErrorHandlerExtR(opts, TiffError, errors);
  TIFFOpenOptionsSetWarningHandlerExtR(opts, TiffWarning, nullptr);
  TIFF* tif = TIFFOpenExt(path.c_str(), "r", opts);
  TIFFOpenOptionsFree(opts);
  return tif;
}

class TiffBandReader : public BandReader {
 public:
  ~TiffBandReader() override {
    if (tif_ != nullptr) TIFFClose(tif_);
  }
  const ImageInfo& info() const override { return info_; }

  Status ReadRows(int y0, int y1, cv::Mat* out) override {
    if (y0 < 0 || y1 > info_.height || y0 >= y1) return BadBand(path_, y0, y1, info_.height);
    const int c = info_.channels;
    out->create(y1 - y0, info_.width, CV_MAKETYPE(CV_32F, c));
    // Compressed strips decode forward only (libtiff refuses to seek back):
    // an earlier row reopens the file.
    if (y0 < next_row_ || tif_ == nullptr) {
      if (tif_ != nullptr) TIFFClose(tif_);
      errors_ = TiffErrorState();
      tif_ = OpenTiff(path_, &errors_);
      next_row_ = 0;
      if (tif_ == nullptr) return Status::BadInput(fmt::format("{}: cannot reopen TIFF: {}", path_, errors_.message));
    }
    row_.resize(static_cast<size_t>(TIFFScanlineSize(tif_)));
    // Rows before y0 are decoded and dropped: compressed strips cannot skip.
    for (int y = next_row_; y < y1; ++y) {
      if (TIFFReadScanline(tif_, row_.data(), static_cast<uint32_t>(y), 0) < 0) {
        return Status::BadInput(fmt::format("{}: truncated or corrupt TIFF data at row {}: {}", path_, y,
                                            errors_.message[0] != '\0' ? errors_.message : "read failed"));
      }
      next_row_ = y + 1;
      if (y < y0) continue;
      float* dst = out->ptr<float>(y - y0);
      if (bits_ == 16) {
        RowToFloat(reinterpret_cast<const uint16_t*>(row_.data()), info_.width, samples_, c, 1.0f / 65535.0f, dst);
      } else {
        RowToFloat(row_.data(), info_.width, samples_, c, 1.0f / 255.0f, dst);
      }
    }
    ApplyDecodeOptions(options_, out);
    return Status::Ok();
  }

  std::string path_;
  DecodeOptions options_;
  ImageInfo info_;
  TiffErrorState errors_;
  TIFF* tif_ = nullptr;
  int bits_ = 8, samples_ = 1;
  int next_row_ = 0;
  std::vector<uint8_t> row_;
};

}  // namespace

Expected<std::unique_ptr<BandReader>> OpenPngBandReader(const std::string& path, const DecodeOptions& options) {
  auto reader = std::make_unique<PngBandReader>();
  reader->path_ = path;
  reader->options_ = options;
  LUMENRIG_RETURN_IF_ERROR(reader->Reopen());
  if (reader->interlaced_) return OpenWholeImageBandReader(path, FileFormat::kPng, options);
  ImageInfo& info = reader->info_;
  info.format = FileFormat::kPng;
  info.width = reader->width_;
  info.height = reader->height_;
  info.channels = reader->channels_ >= 3 ? 3 : 1;
  info.pixel_type = reader->bit_depth_ == 16 ? "uint16" : "uint8";
  info.channel_names = info.channels == 3 ? std::vector<std::string>{"R", "G", "B"} : std::vector<std::string>{"Y"};
  info.lines_per_block = 1;
  if (info.width <= 0 || info.height <= 0) return Status::BadInput(fmt::format("{}: empty PNG", path));
  return std::unique_ptr<BandReader>(std::move(reader));
}

Expected<std::unique_ptr<BandReader>> OpenTiffBandReader(const std::string& path, const DecodeOptions& options) {
  auto reader = std::make_unique<TiffBandReader>();
  reader->path_ = path;
  reader->options_ = options;
  reader->tif_ = OpenTiff(path, &reader->errors_);
  if (reader->tif_ == nullptr) {
    return Status::BadInput(fmt::format("{}: not a readable TIFF file: {}", path,
                                        reader->errors_.message[0] != '\0' ? reader->errors_.message : "open failed"));
  }
  TIFF* tif = reader->tif_;
  uint32_t width = 0, height = 0;
  uint16_t bits = 0, samples = 1, planar = PLANARCONFIG_CONTIG, photometric = PHOTOMETRIC_MINISBLACK;
  uint16_t sample_format = SAMPLEFORMAT_UINT;
  TIFFGetField(tif, TIFFTAG_IMAGEWIDTH, &width);
  TIFFGetField(tif, TIFFTAG_IMAGELENGTH, &height);
  TIFFGetFieldDefaulted(tif, TIFFTAG_BITSPERSAMPLE, &bits);
  TIFFGetFieldDefaulted(tif, TIFFTAG_SAMPLESPERPIXEL, &samples);
  TIFFGetFieldDefaulted(tif, TIFFTAG_PLANARCONFIG, &planar);
  TIFFGetFieldDefaulted(tif, TIFFTAG_SAMPLEFORMAT, &sample_format);
  if (TIFFGetField(tif, TIFFTAG_PHOTOMETRIC, &photometric) == 0) photometric = PHOTOMETRIC_MINISBLACK;
  const bool streamable = !TIFFIsTiled(tif) && planar == PLANARCONFIG_CONTIG && (bits == 8 || bits == 16) &&
                          sample_format == SAMPLEFORMAT_UINT && samples >= 1 && samples <= 4 &&
                          ((photometric == PHOTOMETRIC_MINISBLACK && samples <= 2) ||
                           (photometric == PHOTOMETRIC_RGB && samples >= 3));
  if (!streamable) {
    TIFFClose(reader->tif_);
    reader->tif_ = nullptr;
    return OpenWholeImageBandReader(path, FileFormat::kTiff, options);
  }
  if (width == 0 || height == 0) return Status::BadInput(fmt::format("{}: empty TIFF", path));
  reader->bits_ = bits;
  reader->samples_ = samples;
  ImageInfo& info = reader->info_;
  info.format = FileFormat::kTiff;
  info.width = static_cast<int>(width);
  info.height = static_cast<int>(height);
  info.channels = samples >= 3 ? 3 : 1;
  info.pixel_type = bits == 16 ? "uint16" : "uint8";
  info.channel_names = info.channels == 3 ? std::vector<std::string>{"R", "G", "B"} : std::vector<std::string>{"Y"};
  uint32_t rows_per_strip = 1;
  TIFFGetFieldDefaulted(tif, TIFFTAG_ROWSPERSTRIP, &rows_per_strip);
  info.lines_per_block = static_cast<int>(std::min<uint32_t>(rows_per_strip, height));
  return std::unique_ptr<BandReader>(std::move(reader));
}

}  // namespace lumenrig::io
