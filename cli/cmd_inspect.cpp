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
#include "lumenrig/synth/pairs.h"

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
  size_t name_width = 0;
  for (const auto& d : *list) name_width = std::max(name_width, d.name.size());
  for (const auto& d : *list) {
    auto enc = (*r)->StringAttribute(d.name, "encoding");
    fmt::print("  {:<{}} {:<8} [{}]  chunk [{}]{}{}{}\n", d.name, name_width, d.type, Join(d.shape), Join(d.chunk),
               d.gzip ? " gzip" : "", d.shuffle ? "+shuffle" : "", enc.ok() ? "  encoding " + *enc : "");
    if (!d.shape.empty() && d.name.rfind("/pairs/", 0) == 0) samples = std::max<uint64_t>(samples, d.shape[0]);
  }
  // Training pairs: one sample per row of the /pairs datasets.
  if (samples > 0) fmt::print("samples: {}\n", samples);
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
    auto sheet = synth::PairsContactSheet(a.file, a.samples);
    if (!sheet.ok()) return ReportError(cmd, sheet.status());
    io::Status st = io::WritePng(a.preview, *sheet, a.force);
    if (!st.ok()) return ReportError(cmd, st);
    fmt::print("preview: {} (rows = samples; columns = {})\n", a.preview,
               fmt::join(synth::kPairsPreviewColumns, " | "));
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
