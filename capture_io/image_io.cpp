#include "lumenrig/capture_io/image_io.h"

#include <algorithm>
#include <cctype>
#include <cstdlib>
#include <filesystem>
#include <fstream>

#include <ImfChannelList.h>
#include <ImfFrameBuffer.h>
#include <ImfHeader.h>
#include <ImfInputFile.h>
#include <ImfOutputFile.h>
#include <ImfStringAttribute.h>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "band_readers_internal.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/zlib_libdeflate.h"

namespace fs = std::filesystem;

namespace lumenrig::io {

DecodeOptions DecodeOptionsFor(const Session& session) {
  DecodeOptions o;
  o.encoding = session.encoding;
  o.black_level = static_cast<float>(session.black_level);
  return o;
}

FileFormat FormatFromPath(const std::string& path) {
  std::string ext = fs::path(path).extension().string();
  std::transform(ext.begin(), ext.end(), ext.begin(), [](unsigned char c) { return std::tolower(c); });
  if (ext == ".exr") return FileFormat::kExr;
  if (ext == ".png") return FileFormat::kPng;
  if (ext == ".tif" || ext == ".tiff") return FileFormat::kTiff;
  if (ext == ".hdr" || ext == ".pic") return FileFormat::kHdr;
  return FileFormat::kUnknown;
}

const char* FormatName(FileFormat format) {
  switch (format) {
    case FileFormat::kExr: return "OpenEXR";
    case FileFormat::kPng: return "PNG";
    case FileFormat::kTiff: return "TIFF";
    case FileFormat::kHdr: return "Radiance HDR";
    default: return "unknown";
  }
}

namespace {

// Links zlib_libdeflate.o into every program that reads or writes images, so
// OpenEXR's uncompress() and compress2() calls bind to the libdeflate ones
// (zlib_libdeflate.h).
[[maybe_unused]] const bool kLibdeflateEnabled = LibdeflateEnabled();

Status FileMissing(const std::string& path) {
  std::error_code ec;
  if (!fs::exists(path, ec)) return Status::BadInput(fmt::format("{}: file not found", path));
  if (fs::is_directory(path, ec)) return Status::BadInput(fmt::format("{}: is a folder, expected an image file", path));
  return Status::Ok();
}

int LinesPerBlock(Imf::Compression c) {
  // Scan lines per compressed block, from the OpenEXR file layout
  // documentation ("Technical Introduction to OpenEXR", compression table).
  switch (c) {
    case Imf::NO_COMPRESSION:
    case Imf::RLE_COMPRESSION:
    case Imf::ZIPS_COMPRESSION: return 1;
    case Imf::ZIP_COMPRESSION:
    case Imf::PXR24_COMPRESSION: return 16;
    case Imf::PIZ_COMPRESSION:
    case Imf::B44_COMPRESSION:
    case Imf::B44A_COMPRESSION:
    case Imf::DWAA_COMPRESSION: return 32;
    case Imf::DWAB_COMPRESSION: return 256;
    default: return 16;
  }
}

/// Which stored EXR channels feed our 1 or 3 output channels.
struct ExrChannelMap {
  std::vector<std::string> sources;  // 1 or 3 names
  std::vector<std::string> all;
  std::string pixel_type;
  bool all_half = false;  // every source channel is HALF
};

Expected<ExrChannelMap> MapExrChannels(const Imf::Header& header, const std::string& path) {
  ExrChannelMap map;
  const Imf::ChannelList& channels = header.channels();
  std::map<std::string, Imf::PixelType> types;
  for (auto it = channels.begin(); it != channels.end(); ++it) {
    map.all.emplace_back(it.name());
    types[it.name()] = it.channel().type;
  }
  auto has = [&](const std::string& n) { return types.count(n) > 0; };
  if (has("R") && has("G") && has("B")) {
    map.sources = {"R", "G", "B"};
  } else {
    // A layer prefix ("diffuse.R"): take the first layer (sorted) with R,G,B.
    for (const auto& name : map.all) {
      if (name.size() > 2 && name.compare(name.size() - 2, 2, ".R") == 0) {
        const std::string prefix = name.substr(0, name.size() - 1);
        if (has(prefix + "G") && has(prefix + "B")) {
          map.sources = {prefix + "R", prefix + "G", prefix + "B"};
          break;
        }
      }
    }
  }
  if (map.sources.empty()) {
    if (has("Y")) {
      map.sources = {"Y"};
    } else {
      std::vector<std::string> non_alpha;
      for (const auto& n : map.all)
        if (n != "A" && !(n.size() > 2 && n.compare(n.size() - 2, 2, ".A") == 0)) non_alpha.push_back(n);
      if (non_alpha.size() == 1) map.sources = {non_alpha[0]};
    }
  }
  if (map.sources.empty()) {
    std::string list;
    for (const auto& n : map.all) list += (list.empty() ? "" : ",") + n;
    return Status::BadInput(fmt::format("{}: no R,G,B or Y channels (found: {})", path, list.empty() ? "none" : list));
  }
  map.all_half =
      std::all_of(map.sources.begin(), map.sources.end(), [&](const std::string& n) { return types[n] == Imf::HALF; });
  switch (types[map.sources[0]]) {
    case Imf::HALF: map.pixel_type = "half"; break;
    case Imf::FLOAT: map.pixel_type = "float"; break;
    default: map.pixel_type = "uint32"; break;
  }
  return map;
}

class ExrBandReader : public BandReader {
 public:
  static Expected<std::unique_ptr<BandReader>> Open(const std::string& path, const DecodeOptions& options) {
    auto reader = std::unique_ptr<ExrBandReader>(new ExrBandReader());
    reader->path_ = path;
    reader->options_ = options;
    try {
      reader->file_ = std::make_unique<Imf::InputFile>(path.c_str());
    } catch (const std::exception& e) {
      return Status::BadInput(fmt::format("{}: not a readable OpenEXR file ({})", path, FirstLine(e.what())));
    }
    // A file cut short still opens (OpenEXR rebuilds the offset table);
    // isComplete() says whether every scan line block is present.
    if (!reader->file_->isComplete())
      return Status::BadInput(fmt::format("{}: truncated OpenEXR file (not all scan lines are present)", path));
    const Imf::Header& header = reader->file_->header();
    auto map = MapExrChannels(header, path);
    if (!map.ok()) return map.status();
    reader->map_ = *map;
    const Imath::Box2i dw = header.dataWindow();
    reader->min_x_ = dw.min.x;
    reader->min_y_ = dw.min.y;
    ImageInfo& info = reader->info_;
    info.format = FileFormat::kExr;
    info.width = dw.max.x - dw.min.x + 1;
    info.height = dw.max.y - dw.min.y + 1;
    info.channels = static_cast<int>(map->sources.size());
    info.pixel_type = map->pixel_type;
    info.channel_names = map->all;
    info.lines_per_block = LinesPerBlock(header.compression());
    if (info.width <= 0 || info.height <= 0) return Status::BadInput(fmt::format("{}: empty data window", path));
    return std::unique_ptr<BandReader>(std::move(reader));
  }

  const ImageInfo& info() const override { return info_; }

  Status ReadRows(int y0, int y1, cv::Mat* out) override {
    LUMENRIG_RETURN_IF_ERROR(Read(y0, y1, Imf::FLOAT, out));
    ApplyDecodeOptions(options_, out);
    return Status::Ok();
  }

  bool StoresHalf() const override { return map_.all_half; }

  Status ReadRowsHalf(int y0, int y1, cv::Mat* out) override {
    if (!map_.all_half) return Status::Internal(fmt::format("{}: channels are not all stored as half floats", path_));
    return Read(y0, y1, Imf::HALF, out);
  }

 private:
  // Rows [y0, y1) of the mapped channels as `type` (FLOAT or HALF).
  Status Read(int y0, int y1, Imf::PixelType type, cv::Mat* out) {
    if (y0 < 0 || y1 > info_.height || y0 >= y1)
      return Status::Internal(fmt::format("{}: invalid band [{}, {}) for height {}", path_, y0, y1, info_.height));
    const int c = info_.channels;
    const size_t elem = type == Imf::HALF ? 2 : 4;
    out->create(y1 - y0, info_.width, CV_MAKETYPE(type == Imf::HALF ? CV_16F : CV_32F, c));
    const size_t x_stride = elem * static_cast<size_t>(c);
    const size_t y_stride = x_stride * static_cast<size_t>(info_.width);
    char* base = reinterpret_cast<char*>(out->data) -
                 static_cast<ptrdiff_t>(min_x_) * static_cast<ptrdiff_t>(x_stride) -
                 static_cast<ptrdiff_t>(min_y_ + y0) * static_cast<ptrdiff_t>(y_stride);
    Imf::FrameBuffer fb;
    for (int k = 0; k < c; ++k) {
      fb.insert(map_.sources[static_cast<size_t>(k)],
                Imf::Slice(type, base + elem * static_cast<size_t>(k), x_stride, y_stride, 1, 1, 0.0));
    }
    try {
      file_->setFrameBuffer(fb);
      file_->readPixels(min_y_ + y0, min_y_ + y1 - 1);
    } catch (const std::exception& e) {
      return Status::BadInput(fmt::format("{}: corrupt or truncated OpenEXR data in rows {}..{} ({})", path_, y0,
                                          y1 - 1, FirstLine(e.what())));
    }
    return Status::Ok();
  }

  static std::string FirstLine(const std::string& s) { return s.substr(0, s.find('\n')); }
  std::string path_;
  DecodeOptions options_;
  std::unique_ptr<Imf::InputFile> file_;
  ExrChannelMap map_;
  int min_x_ = 0, min_y_ = 0;
  ImageInfo info_;
};

/// Converts an OpenCV-decoded image (8U/16U/32F, 1-4 channels, BGR order) to
/// our convention (CV_32F, Y or RGB).
Expected<cv::Mat> ToLinearFloat(const cv::Mat& raw, const std::string& path, std::string* pixel_type) {
  cv::Mat f;
  switch (raw.depth()) {
    case CV_8U:
      raw.convertTo(f, CV_32F, 1.0 / 255.0);
      *pixel_type = "uint8";
      break;
    case CV_16U:
      raw.convertTo(f, CV_32F, 1.0 / 65535.0);
      *pixel_type = "uint16";
      break;
    case CV_32F:
      f = raw;
      *pixel_type = "float";
      break;
    default:
      return Status::BadInput(fmt::format("{}: unsupported pixel depth (expected 8/16-bit integer or float)", path));
  }
  cv::Mat out;
  switch (f.channels()) {
    case 1: out = f; break;
    case 2: cv::extractChannel(f, out, 0); break;
    case 3: cv::cvtColor(f, out, cv::COLOR_BGR2RGB); break;
    case 4: cv::cvtColor(f, out, cv::COLOR_BGRA2RGB); break;
    default: return Status::BadInput(fmt::format("{}: unsupported channel count {}", path, f.channels()));
  }
  if (!out.isContinuous() || out.data == raw.data) out = out.clone();
  return out;
}

/// Decodes the whole file with OpenCV once and serves bands from memory.
class WholeImageBandReader : public BandReader {
 public:
  static Expected<std::unique_ptr<BandReader>> Open(const std::string& path, FileFormat format,
                                                    const DecodeOptions& options) {
    cv::Mat raw = cv::imread(path, cv::IMREAD_UNCHANGED | cv::IMREAD_ANYDEPTH | cv::IMREAD_ANYCOLOR);
    if (raw.empty())
      return Status::BadInput(
          fmt::format("{}: cannot decode as {} (corrupt, truncated or unsupported)", path, FormatName(format)));
    auto reader = std::unique_ptr<WholeImageBandReader>(new WholeImageBandReader());
    std::string pixel_type;
    auto image = ToLinearFloat(raw, path, &pixel_type);
    if (!image.ok()) return image.status();
    reader->image_ = std::move(image).value();
    ApplyDecodeOptions(options, &reader->image_);
    ImageInfo& info = reader->info_;
    info.format = format;
    info.width = reader->image_.cols;
    info.height = reader->image_.rows;
    info.channels = reader->image_.channels();
    info.pixel_type = pixel_type;
    info.channel_names = info.channels == 3 ? std::vector<std::string>{"R", "G", "B"} : std::vector<std::string>{"Y"};
    info.lines_per_block = info.height;
    reader->path_ = path;
    return std::unique_ptr<BandReader>(std::move(reader));
  }
  const ImageInfo& info() const override { return info_; }
  Status ReadRows(int y0, int y1, cv::Mat* out) override {
    if (y0 < 0 || y1 > info_.height || y0 >= y1)
      return Status::Internal(fmt::format("{}: invalid band [{}, {}) for height {}", path_, y0, y1, info_.height));
    image_.rowRange(y0, y1).copyTo(*out);
    return Status::Ok();
  }

 private:
  std::string path_;
  cv::Mat image_;
  ImageInfo info_;
};

}  // namespace

Expected<std::unique_ptr<BandReader>> OpenWholeImageBandReader(const std::string& path, FileFormat format,
                                                               const DecodeOptions& options) {
  return WholeImageBandReader::Open(path, format, options);
}

Status BandReader::ReadRowsHalf(int, int, cv::Mat*) {
  return Status::Internal("this reader's format does not store half floats");
}

Expected<std::unique_ptr<BandReader>> BandReader::Open(const std::string& path, const DecodeOptions& options) {
  LUMENRIG_RETURN_IF_ERROR(FileMissing(path));
  const FileFormat format = FormatFromPath(path);
  switch (format) {
    case FileFormat::kExr: return ExrBandReader::Open(path, options);
    case FileFormat::kPng: return OpenPngBandReader(path, options);
    case FileFormat::kTiff: return OpenTiffBandReader(path, options);
    case FileFormat::kHdr: return WholeImageBandReader::Open(path, format, options);
    default:
      return Status::BadInput(
          fmt::format("{}: unsupported image format (expected .exr, .png, .tif/.tiff or .hdr)", path));
  }
}

Expected<ImageInfo> ProbeImage(const std::string& path) {
  auto reader = BandReader::Open(path, {});
  if (!reader.ok()) return reader.status();
  const ImageInfo& info = (*reader)->info();
  if (info.format == FileFormat::kExr) {
    // A file cut short keeps a valid offset table pointing past its end:
    // decoding the last line block (written last) finds it at the cost of
    // one block.
    cv::Mat last_row;
    LUMENRIG_RETURN_IF_ERROR((*reader)->ReadRows(info.height - 1, info.height, &last_row));
  }
  return info;
}

Expected<cv::Mat> ReadImage(const std::string& path, const DecodeOptions& options) {
  auto reader = BandReader::Open(path, options);
  if (!reader.ok()) return reader.status();
  cv::Mat image;
  LUMENRIG_RETURN_IF_ERROR((*reader)->ReadRows(0, (*reader)->info().height, &image));
  return image;
}

Status WriteExr(const std::string& path, const cv::Mat& image, const ExrWriteOptions& options) {
  if (image.empty() || image.depth() != CV_32F)
    return Status::Internal(fmt::format("{}: WriteExr needs a non-empty CV_32F image", path));
  const int c = image.channels();
  std::vector<std::string> names = options.channel_names;
  if (names.empty()) {
    if (c == 3)
      names = {"R", "G", "B"};
    else if (c == 1)
      names = {"Y"};
    else
      return Status::Internal(fmt::format("{}: {} channels need explicit channel names", path, c));
  }
  if (static_cast<int>(names.size()) != c)
    return Status::Internal(fmt::format("{}: {} channel names for {} channels", path, names.size(), c));
  LUMENRIG_RETURN_IF_ERROR(CheckOutputPath(path, options.overwrite));
  const cv::Mat src = image.isContinuous() ? image : image.clone();

  AtomicFile file(path);
  try {
    Imf::Header header(src.cols, src.rows);
    header.compression() = Imf::ZIP_COMPRESSION;
    const Imf::PixelType type = options.pixel_type == PixelType::kHalf ? Imf::HALF : Imf::FLOAT;
    for (const auto& n : names) header.channels().insert(n, Imf::Channel(type));
    for (const auto& [key, value] : options.attributes) header.insert(key, Imf::StringAttribute(value));
    // OpenEXR's OutputFile does not convert pixel types: hand it halves
    // (OpenCV's CV_16F conversion is IEEE binary16, round to nearest even).
    cv::Mat pixels = src;
    if (type == Imf::HALF) src.convertTo(pixels, CV_MAKETYPE(CV_16F, c));
    const size_t elem = type == Imf::HALF ? 2 : 4;
    Imf::FrameBuffer fb;
    const size_t x_stride = elem * static_cast<size_t>(c);
    const size_t y_stride = x_stride * static_cast<size_t>(src.cols);
    char* base = reinterpret_cast<char*>(pixels.data);
    for (int k = 0; k < c; ++k)
      fb.insert(names[static_cast<size_t>(k)],
                Imf::Slice(type, base + elem * static_cast<size_t>(k), x_stride, y_stride));
    Imf::OutputFile out(file.temp_path().c_str(), header);
    out.setFrameBuffer(fb);
    out.writePixels(src.rows);
  } catch (const std::exception& e) {
    const std::string what = e.what();
    return Status::BadInput(fmt::format("{}: cannot write OpenEXR ({})", path, what.substr(0, what.find('\n'))));
  }
  return file.Commit();
}

Status WritePng(const std::string& path, const cv::Mat& image8, bool overwrite) {
  if (image8.empty() || (image8.depth() != CV_8U && image8.depth() != CV_16U))
    return Status::Internal(fmt::format("{}: WritePng needs an 8- or 16-bit image", path));
  LUMENRIG_RETURN_IF_ERROR(CheckOutputPath(path, overwrite));
  std::vector<uchar> bytes;
  if (!cv::imencode(".png", image8, bytes)) return Status::Internal(fmt::format("{}: PNG encoding failed", path));
  AtomicFile file(path);
  {
    std::ofstream out(file.temp_path(), std::ios::binary);
    out.write(reinterpret_cast<const char*>(bytes.data()), static_cast<std::streamsize>(bytes.size()));
    out.flush();
    if (!out) return Status::BadInput(fmt::format("{}: cannot write (folder missing or disk full?)", path));
  }
  return file.Commit();
}

Expected<std::map<std::string, std::string>> ReadExrAttributes(const std::string& path) {
  LUMENRIG_RETURN_IF_ERROR(FileMissing(path));
  try {
    Imf::InputFile file(path.c_str());
    std::map<std::string, std::string> attrs;
    for (auto it = file.header().begin(); it != file.header().end(); ++it) {
      if (const auto* s = dynamic_cast<const Imf::StringAttribute*>(&it.attribute())) attrs[it.name()] = s->value();
    }
    return attrs;
  } catch (const std::exception& e) {
    return Status::BadInput(fmt::format("{}: not a readable OpenEXR file ({})", path, e.what()));
  }
}

}  // namespace lumenrig::io
