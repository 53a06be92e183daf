#pragma once
/// \file image_io.h
/// Reading frames (OpenEXR half/float, 8/16-bit PNG and TIFF, Radiance HDR)
/// into linear float images, whole or in row bands, and writing OpenEXR.
///
/// In-memory image convention everywhere in lumenrig: cv::Mat of CV_32F with
/// 1 channel (Y) or 3 channels in **RGB** order (not OpenCV's BGR), linear,
/// rows top to bottom. Integer files scale to [0, 1] (x/255, x/65535).

#include <map>
#include <memory>
#include <string>
#include <vector>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/session.h"
#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

enum class FileFormat { kExr, kPng, kTiff, kHdr, kUnknown };

/// What a file holds, learned from its header without decoding pixels.
struct ImageInfo {
  int width = 0;
  int height = 0;
  int channels = 0;        ///< channels delivered by the readers: 1 or 3
  std::string pixel_type;  ///< "half", "float", "uint32", "uint8", "uint16"
  FileFormat format = FileFormat::kUnknown;
  std::vector<std::string> channel_names;  ///< as stored (EXR), or R,G,B / Y
  int lines_per_block = 1;                 ///< EXR scan lines per compressed block
};

/// How to turn stored values into linear radiance.
struct DecodeOptions {
  Encoding encoding = Encoding::kLinear;  ///< kSrgb: IEC 61966-2-1 decode first
  float black_level = 0.0f;               ///< subtracted after decoding
};
/// The decode options a session asks for.
DecodeOptions DecodeOptionsFor(const Session& session);
/// Applies decode options to decoded values (CV_32F, already scaled to
/// [0, 1] for integer formats): sRGB decode (IEC 61966-2-1) when asked, then
/// black-level subtraction. What every reader applies after decoding.
void ApplyDecodeOptions(const DecodeOptions& options, cv::Mat* band);

FileFormat FormatFromPath(const std::string& path);
const char* FormatName(FileFormat format);

/// Header of an image file. Errors name the file: missing, unreadable,
/// truncated header, unsupported format.
Expected<ImageInfo> ProbeImage(const std::string& path);

/// Decodes a whole image to CV_32FC1 or CV_32FC3 (RGB). EXR channel mapping:
/// R,G,B (any layer prefix) -> 3 channels; Y or a single channel -> 1 channel.
/// Alpha (A) is ignored. A truncated or corrupt file is an error naming it.
Expected<cv::Mat> ReadImage(const std::string& path, const DecodeOptions& options = {});

/// Streams row bands of one frame. For OpenEXR only the line blocks covering
/// the band are decoded (each block once when bands are read top to bottom
/// with heights that are multiples of lines_per_block). PNG and TIFF are
/// decoded row by row with libpng/libtiff, so rows must be requested in
/// increasing order. Radiance HDR is decoded whole on first use (documented
/// memory cost: one frame). Not thread-safe: one reader per thread.
class BandReader {
 public:
  virtual ~BandReader() = default;
  /// Opens `path`. Fails with a message naming the file.
  static Expected<std::unique_ptr<BandReader>> Open(const std::string& path, const DecodeOptions& options = {});
  virtual const ImageInfo& info() const = 0;
  /// Reads rows [y0, y1) into *out (resized to (y1-y0) x width, CV_32FC1/3).
  virtual Status ReadRows(int y0, int y1, cv::Mat* out) = 0;
  /// True when every delivered channel is stored as 16-bit half float
  /// (OpenEXR), so ReadRowsHalf can deliver the stored values.
  virtual bool StoresHalf() const { return false; }
  /// Reads rows [y0, y1) as stored, into *out (resized to (y1-y0) x width,
  /// CV_16FC1/3), without the decode options; only when StoresHalf(). Half
  /// the bytes of ReadRows for callers that keep many rows of many frames
  /// and widen them to float later (converting half to float is exact).
  virtual Status ReadRowsHalf(int y0, int y1, cv::Mat* out);
};

enum class PixelType { kHalf, kFloat };

struct ExrWriteOptions {
  PixelType pixel_type = PixelType::kHalf;
  /// Channel names; empty = "R","G","B" for 3 channels and "Y" for 1.
  std::vector<std::string> channel_names;
  /// String attributes stored in the header (provenance: tool, version,
  /// source session, options...).
  std::map<std::string, std::string> attributes;
  /// Overwrite an existing file. When false an existing file is an error.
  bool overwrite = false;
};

/// Writes a CV_32F image (any channel count >= 1, channel order as given by
/// channel_names) as a ZIP-compressed scanline OpenEXR. Written to a temporary
/// name in the same folder and renamed when complete.
Status WriteExr(const std::string& path, const cv::Mat& image, const ExrWriteOptions& options = {});

/// Writes an 8-bit image (CV_8UC1 or CV_8UC3 in BGR, OpenCV's order) as PNG,
/// atomically (temp then rename). overwrite=false refuses an existing file.
Status WritePng(const std::string& path, const cv::Mat& image8, bool overwrite = false);

/// Reads the string attributes of an EXR header (for provenance checks).
Expected<std::map<std::string, std::string>> ReadExrAttributes(const std::string& path);

}  // namespace lumenrig::io
