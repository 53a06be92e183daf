// `lumenrig inspect`: summary of a lumenrig HDF5 file and a contact sheet.
#include <algorithm>
#include <chrono>
#include <map>

#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "command.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/hdf5_reader.h"
#include "lumenrig/capture_io/image_io.h"

namespace lumenrig::cli {
namespace {

struct InspectArgs {
  std::string file;
  std::string preview;
  int samples = 4;
  bool force = false;
};

std::string Join(const std::vector<uint64_t>& v) {
  std::string s;
  for (size_t i = 0; i < v.size(); ++i) s += (i ? "," : "") + std::to_string(v[i]);
  return s;
}

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

int Run(const InspectArgs& a) {
  const std::string cmd = "inspect";
  const auto t0 = std::chrono::steady_clock::now();
  if (!a.preview.empty()) {
    io::Status st = io::CheckOutputPath(a.preview, a.force);
    if (!st.ok()) return ReportError(cmd, st);
  }
  auto r = io::H5Reader::Open(a.file);
  if (!r.ok()) return ReportError(cmd, r.status());
  auto list = (*r)->ListDatasets();
  if (!list.ok()) return ReportError(cmd, list.status());
  auto format = (*r)->StringAttribute("/", "format");
  fmt::print("{}: format {}\n", a.file, format.ok() ? *format : "(none)");
  for (const char* key : {"tool_version", "created_utc", "split_rule"}) {
    auto v = (*r)->StringAttribute("/", key);
    if (v.ok()) fmt::print("  {}: {}\n", key, *v);
  }
  auto seed = (*r)->NumericAttribute("/", "seed");
  if (seed.ok() && !seed->empty()) fmt::print("  seed: {}\n", static_cast<uint64_t>((*seed)[0]));
  for (const char* key : {"source_sessions", "env_names"}) {
    auto v = (*r)->StringArrayAttribute("/", key);
    if (v.ok()) fmt::print("  {}: {}\n", key, fmt::join(*v, ", "));
  }
  fmt::print("fields:\n");
  uint64_t samples = 0;
  for (const auto& d : *list) {
    auto enc = (*r)->StringAttribute(d.name, "encoding");
    fmt::print("  {:<28} {:<8} [{}]  chunk [{}]{}{}{}\n", d.name, d.type, Join(d.shape), Join(d.chunk),
               d.gzip ? " gzip" : "", d.shuffle ? "+shuffle" : "", enc.ok() ? "  encoding " + *enc : "");
    if (!d.shape.empty()) samples = std::max<uint64_t>(samples, d.shape[0]);
  }
  fmt::print("samples: {}\n", samples);
  std::map<std::string, std::map<std::string, int64_t>> per_split;  // split -> subject -> count
  std::vector<std::string> splits, subjects;
  if ((*r)->ReadStrings("/pairs/split", 0, samples, &splits).ok() &&
      (*r)->ReadStrings("/pairs/subject", 0, samples, &subjects).ok()) {
    for (size_t i = 0; i < splits.size(); ++i) per_split[splits[i]][subjects[i]]++;
    for (const char* s : {"train", "validation", "test"}) {
      int64_t n = 0;
      std::vector<std::string> who;
      for (const auto& [subject, c] : per_split[s]) {
        n += c;
        who.push_back(fmt::format("{} ({})", subject, c));
      }
      fmt::print("  {:<10} {:>6} sample(s){}{}\n", s, n, who.empty() ? "" : ": ", fmt::join(who, ", "));
    }
  }

  if (!a.preview.empty()) {
    const std::vector<std::string> columns = {"input", "target", "albedo", "normals", "alpha", "light_diffuse"};
    std::vector<io::H5DatasetInfo> infos;
    for (const auto& c : columns) {
      auto info = (*r)->Dataset("/pairs/" + c);
      if (!info.ok()) return ReportError(cmd, info.status());
      infos.push_back(*info);
    }
    const int n = static_cast<int>(std::min<uint64_t>(samples, static_cast<uint64_t>(std::max(1, a.samples))));
    if (n == 0) return ReportError(cmd, io::Status::BadInput(fmt::format("{}: no samples to preview", a.file)));
    std::vector<cv::Mat> rows;
    for (int k = 0; k < n; ++k) {
      const uint64_t i = n == 1 ? 0 : static_cast<uint64_t>(k) * (samples - 1) / (n - 1);
      std::vector<cv::Mat> tiles;
      for (const auto& info : infos) {
        auto t = Tile(**r, info, i, 128);
        if (!t.ok()) return ReportError(cmd, t.status());
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
    io::Status st = io::WritePng(a.preview, sheet, a.force);
    if (!st.ok()) return ReportError(cmd, st);
    fmt::print("preview: {} (rows = samples; columns = {})\n", a.preview, fmt::join(columns, " | "));
  }
  fmt::print("inspect: {}\n",
             TimeAndMemoryLine(std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count()));
  return 0;
}

CommandRegistrar reg({"inspect", "Summarise a lumenrig HDF5 file (fields, shapes, splits, sources) and preview it", 80,
                      [](CLI::App* sub) -> std::function<int()> {
                        auto a = std::make_shared<InspectArgs>();
                        sub->add_option("file", a->file, "HDF5 file (e.g. a lumenrig.pairs/1 file)")->required();
                        sub->add_option("--preview", a->preview,
                                        "Write a contact sheet PNG: input | target | albedo | normals | alpha | "
                                        "diffuse light");
                        sub->add_option("--samples", a->samples, "Samples (rows) in the preview");
                        sub->add_flag("--force", a->force, "Overwrite an existing preview");
                        return [a] { return Run(*a); };
                      }});

}  // namespace
}  // namespace lumenrig::cli
