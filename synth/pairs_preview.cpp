// Contact sheet of a lumenrig.pairs/1 file (used by `inspect --preview` and the demo).
#include <algorithm>

#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/hdf5_reader.h"
#include "lumenrig/synth/pairs.h"

namespace lumenrig::synth {
namespace {

// One tile (8-bit BGR) of a field of sample i.
io::Expected<cv::Mat> Tile(const io::H5Reader& r, const io::H5DatasetInfo& info, uint64_t i, int tile_h) {
  std::vector<float> data;
  LUMENRIG_RETURN_IF_ERROR(r.ReadFloat(info.name, i, 1, &data));
  const int h = static_cast<int>(info.shape[1]), w = static_cast<int>(info.shape[2]);
  const int ch = static_cast<int>(info.shape.size() == 4 ? info.shape[3] : 3 * info.shape[3]);
  cv::Mat img;
  if (ch == 1) {
    cv::Mat y(h, w, CV_32FC1, data.data());
    cv::cvtColor(y, img, cv::COLOR_GRAY2RGB);
  } else {
    // light_specular [H,W,S,3]: show the first exponent.
    cv::Mat all(h, w, CV_32FC(std::min(ch, 512)), data.data());
    if (ch == 3) {
      img = all.clone();
    } else {
      img.create(h, w, CV_32FC3);
      for (int y = 0; y < h; ++y)
        for (int x = 0; x < w; ++x)
          for (int c = 0; c < 3; ++c) img.at<cv::Vec3f>(y, x)[c] = data[(static_cast<size_t>(y) * w + x) * ch + c];
    }
  }
  const std::string leaf = info.name.substr(info.name.rfind('/') + 1);
  cv::Mat out8;
  if (leaf == "normals") {
    cv::Mat shown = img * 0.5 + cv::Scalar(0.5, 0.5, 0.5);
    cv::Mat rgb8;
    shown.convertTo(rgb8, CV_8UC3, 255.0);
    cv::cvtColor(rgb8, out8, cv::COLOR_RGB2BGR);
  } else if (leaf == "input") {
    cv::Mat rgb8;  // already sRGB-encoded
    img.convertTo(rgb8, CV_8UC3, 255.0);
    cv::cvtColor(rgb8, out8, cv::COLOR_RGB2BGR);
  } else {
    out8 = io::ToPreview8(img);
  }
  const int tile_w = std::max(1, w * tile_h / h);
  cv::resize(out8, out8, cv::Size(tile_w, tile_h), 0, 0, cv::INTER_AREA);
  return out8;
}

}  // namespace

io::Expected<cv::Mat> PairsContactSheet(const std::string& h5_path, int max_samples) {
  auto r = io::H5Reader::Open(h5_path);
  if (!r.ok()) return r.status();
  std::vector<io::H5DatasetInfo> infos;
  for (const auto& c : kPairsPreviewColumns) {
    auto info = (*r)->Dataset(std::string("/pairs/") + c);
    if (!info.ok()) return info.status();
    infos.push_back(*info);
  }
  const uint64_t samples = infos[0].shape.empty() ? 0 : infos[0].shape[0];
  const int n = static_cast<int>(std::min<uint64_t>(samples, static_cast<uint64_t>(std::max(1, max_samples))));
  if (n == 0) return io::Status::BadInput(fmt::format("{}: no samples to preview", h5_path));
  std::vector<cv::Mat> rows;
  for (int k = 0; k < n; ++k) {
    const uint64_t i = n == 1 ? 0 : static_cast<uint64_t>(k) * (samples - 1) / static_cast<uint64_t>(n - 1);
    std::vector<cv::Mat> tiles;
    for (const auto& info : infos) {
      auto t = Tile(**r, info, i, 128);
      if (!t.ok()) return t.status();
      tiles.push_back(*t);
      tiles.push_back(cv::Mat(128, 4, CV_8UC3, cv::Scalar(40, 40, 40)));
    }
    cv::Mat row;
    cv::hconcat(tiles, row);
    rows.push_back(row);
    rows.push_back(cv::Mat(4, row.cols, CV_8UC3, cv::Scalar(40, 40, 40)));
  }
  cv::Mat sheet;
  cv::vconcat(rows, sheet);
  return sheet;
}

}  // namespace lumenrig::synth
