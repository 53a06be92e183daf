// The matte stage on a session: frame loading, method selection, outputs
// (docs/matting.md).
#include "lumenrig/solvers/matte_stage.h"

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <functional>

#include <fmt/format.h>
#include <opencv2/imgproc.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"

namespace lumenrig::solvers {

namespace {

namespace fs = std::filesystem;

struct FrameLoader {
  const io::Session& session;
  int camera_index;
  io::DecodeOptions decode;
  cv::Size size;            // size of the first frame loaded
  std::string size_source;  // its key

  std::string Key(const std::string& name) const { return fmt::format("cameras[{}].{}", camera_index, name); }

  struct Wanted {
    std::string path, key;
    cv::Mat* out;
  };

  /// Decodes every frame of `wanted` (a few at once), then checks them in
  /// list order, so the error reported is the first in that order whatever
  /// the scheduling. Frames come back with 3 channels and one size.
  io::Status LoadAll(const std::vector<Wanted>& wanted, int threads) {
    std::vector<io::Status> status(wanted.size());
    io::ParallelFor(0, static_cast<int64_t>(wanted.size()), 1, threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) status[static_cast<size_t>(i)] = Read(wanted[static_cast<size_t>(i)]);
    });
    for (size_t i = 0; i < wanted.size(); ++i) {
      LUMENRIG_RETURN_IF_ERROR(status[i]);
      const cv::Mat& m = *wanted[i].out;
      if (size.area() == 0) {
        size = m.size();
        size_source = wanted[i].key;
      } else if (m.size() != size) {
        return io::Status::BadInput(fmt::format("{}: {}: size {}x{} differs from {} ({}x{})", wanted[i].path,
                                                wanted[i].key, m.cols, m.rows, size_source, size.width, size.height));
      }
    }
    return io::Status::Ok();
  }

  io::Status Read(const Wanted& w) const {
    io::Expected<cv::Mat> image = io::ReadImage(w.path, decode);
    if (!image.ok()) return image.status().WithPrefix(w.key);
    cv::Mat m = std::move(image).value();
    if (m.channels() == 1) cv::merge(std::vector<cv::Mat>{m, m, m}, m);
    if (m.channels() != 3) {
      return io::Status::BadInput(
          fmt::format("{}: {}: expected 1 or 3 channels, found {}", w.path, w.key, m.channels()));
    }
    *w.out = std::move(m);
    return io::Status::Ok();
  }

  io::Status Missing(const std::string& name, MatteMethod method) const {
    return io::Status::BadInput(fmt::format("{}: {}: missing (needed by the {} matte method)", session.path, Key(name),
                                            MatteMethodName(method)));
  }
};

cv::Mat TrimapFromAlpha(const cv::Mat& alpha) {
  cv::Mat trimap(alpha.size(), CV_8UC1, cv::Scalar(kTrimapUnknown));
  trimap.setTo(kTrimapBackground, alpha <= 0.0f);
  trimap.setTo(kTrimapForeground, alpha >= 1.0f);
  return trimap;
}

// Known labels of a user trimap force alpha (methods that do not use a trimap).
void ApplyTrimap(const cv::Mat& trimap, cv::Mat* alpha) {
  alpha->setTo(0.0f, trimap == kTrimapBackground);
  alpha->setTo(1.0f, trimap == kTrimapForeground);
}

// Difference-method confidence: 1 at trimap-known pixels; in the band, the
// colour separation |F - B|^2 / (|F - B|^2 + 27 sigma^2) times 0.8 (an
// inferred, not measured, value).
cv::Mat DifferenceConfidence(const cv::Mat& trimap, const cv::Mat& foreground, const cv::Mat& plate, double sigma) {
  cv::Mat conf(trimap.size(), CV_32FC1);
  const double noise2 = 27.0 * sigma * sigma + 1e-12;
  for (int y = 0; y < trimap.rows; ++y) {
    const uint8_t* t = trimap.ptr<uint8_t>(y);
    const float* f = foreground.ptr<float>(y);
    const float* b = plate.ptr<float>(y);
    float* c = conf.ptr<float>(y);
    for (int x = 0; x < trimap.cols; ++x) {
      if (t[x] == kTrimapBackground || t[x] == kTrimapForeground) {
        c[x] = 1.0f;
        continue;
      }
      double sep = 0.0;
      for (int ch = 0; ch < 3; ++ch) sep += (f[3 * x + ch] - b[3 * x + ch]) * double(f[3 * x + ch] - b[3 * x + ch]);
      c[x] = static_cast<float>(0.8 * sep / (sep + noise2));
    }
  }
  return conf;
}

}  // namespace

const char* MatteMethodName(MatteMethod method) {
  switch (method) {
    case MatteMethod::kAuto: return "auto";
    case MatteMethod::kBacklit: return "backlit";
    case MatteMethod::kTriangulation: return "triangulation";
    case MatteMethod::kDifference: return "difference";
  }
  return "?";
}

io::Status ParseMatteMethod(const std::string& text, MatteMethod* method) {
  for (MatteMethod m :
       {MatteMethod::kAuto, MatteMethod::kBacklit, MatteMethod::kTriangulation, MatteMethod::kDifference}) {
    if (text == MatteMethodName(m)) {
      *method = m;
      return io::Status::Ok();
    }
  }
  return io::Status::BadInput(
      fmt::format("--method: unknown matte method \"{}\" (choose auto, backlit, triangulation, difference)", text));
}

io::Status MatteOptionsFromJson(const nlohmann::json& j, const std::string& source, MatteOptions* options) {
  if (!j.is_object()) return io::Status::BadInput(source + ": matte options must be a JSON object");
  for (const auto& [key, value] : j.items()) {
    const std::string at = source + ": " + key;
    if (key == "method") {
      if (!value.is_string()) return io::Status::BadInput(at + ": expected a string");
      LUMENRIG_RETURN_IF_ERROR(ParseMatteMethod(value.get<std::string>(), &options->method).WithPrefix(source));
    } else if (key == "trimap") {
      if (!value.is_string()) return io::Status::BadInput(at + ": expected a string");
      options->trimap_path = value.get<std::string>();
    } else if (key == "band_px") {
      if (!value.is_number_integer() || value.get<int>() < 0) {
        return io::Status::BadInput(at + ": expected a non-negative integer");
      }
      options->trimap.band_px = value.get<int>();
    } else if (key == "noise_sigma" || key == "epsilon") {
      if (!value.is_number() || value.get<double>() < 0) return io::Status::BadInput(at + ": expected a number >= 0");
      (key == "epsilon" ? options->closed_form.epsilon : options->noise_sigma) = value.get<double>();
    } else {
      return io::Status::BadInput(at + ": unknown matte option (known: method, trimap, band_px, noise_sigma, epsilon)");
    }
  }
  return io::Status::Ok();
}

nlohmann::json MatteOptionsToJson(const MatteOptions& o) {
  return {{"method", MatteMethodName(o.method)},  {"trimap", o.trimap_path},
          {"band_px", o.trimap.band_px},          {"noise_sigma", o.noise_sigma},
          {"epsilon", o.closed_form.epsilon},     {"background_prior_weight", o.closed_form.background_prior_weight},
          {"snap_sigmas", o.backlit.snap_sigmas}, {"correct_spill", o.backlit.correct_spill},
          {"bg_sigmas", o.trimap.bg_sigmas},      {"fg_sigmas", o.trimap.fg_sigmas}};
}

io::Status ComputeMatte(const io::Session& session, const std::string& camera_id, const MatteOptions& options,
                        MatteResult* out, int threads) {
  // Camera.
  int index = 0;
  if (!camera_id.empty()) {
    index = -1;
    for (size_t i = 0; i < session.cameras.size(); ++i) {
      if (session.cameras[i].id == camera_id) index = static_cast<int>(i);
    }
    if (index < 0) return io::Status::BadInput(fmt::format("{}: no camera with id \"{}\"", session.path, camera_id));
  }
  if (session.cameras.empty()) return io::Status::BadInput(fmt::format("{}: cameras: empty", session.path));
  const io::Camera& cam = session.cameras[static_cast<size_t>(index)];
  FrameLoader loader{session, index, io::DecodeOptionsFor(session), cv::Size(), ""};

  MatteMethod method = options.method;
  if (method == MatteMethod::kAuto) {
    if (cam.matte_pairs.size() >= 2) {
      method = MatteMethod::kTriangulation;
    } else if (!cam.clean_plate.empty() && !cam.backlit.empty()) {
      method = MatteMethod::kBacklit;
    } else if (!cam.clean_plate.empty() && !cam.lit.empty()) {
      method = MatteMethod::kDifference;
    } else {
      return io::Status::BadInput(
          fmt::format("{}: {}: no matting inputs (need 2+ matte_pairs, clean_plate + backlit, or clean_plate + lit)",
                      session.path, fmt::format("cameras[{}]", index)));
    }
  }
  MatteResult result;
  result.camera_id = cam.id;
  result.method = method;
  result.options = MatteOptionsToJson(options);
  result.options["method"] = MatteMethodName(method);

  // Required keys first, so a missing one is reported before any decoding.
  if (method == MatteMethod::kTriangulation) {
    if (cam.matte_pairs.size() < 2) {
      return io::Status::BadInput(fmt::format("{}: {}: needs at least 2 pairs, found {}", session.path,
                                              loader.Key("matte_pairs"), cam.matte_pairs.size()));
    }
  } else {
    if (cam.clean_plate.empty()) return loader.Missing("clean_plate", method);
    if (method == MatteMethod::kBacklit && cam.backlit.empty()) return loader.Missing("backlit", method);
    if (method == MatteMethod::kDifference && cam.lit.empty()) return loader.Missing("lit", method);
  }

  // Every frame the method reads, decoded a few at once; the dark frame is
  // then subtracted from the others.
  std::vector<FrameLoader::Wanted> wanted;
  cv::Mat dark, plate, lit, backlit;
  std::vector<cv::Mat> plates(cam.matte_pairs.size()), frames(cam.matte_pairs.size());
  if (!cam.dark.empty()) wanted.push_back({cam.dark, loader.Key("dark"), &dark});
  if (method == MatteMethod::kTriangulation) {
    for (size_t k = 0; k < cam.matte_pairs.size(); ++k) {
      const std::string key = fmt::format("{}[{}]", loader.Key("matte_pairs"), k);
      wanted.push_back({cam.matte_pairs[k].plate, key + ".plate", &plates[k]});
      wanted.push_back({cam.matte_pairs[k].frame, key + ".frame", &frames[k]});
    }
  } else {
    wanted.push_back({cam.clean_plate, loader.Key("clean_plate"), &plate});
    if (!cam.lit.empty()) wanted.push_back({cam.lit, loader.Key("lit"), &lit});
    if (method == MatteMethod::kBacklit) wanted.push_back({cam.backlit, loader.Key("backlit"), &backlit});
  }
  LUMENRIG_RETURN_IF_ERROR(loader.LoadAll(wanted, threads));
  if (!dark.empty()) {
    io::ParallelFor(1, static_cast<int64_t>(wanted.size()), 1, threads, [&](int64_t b, int64_t e) {
      for (int64_t i = b; i < e; ++i) *wanted[static_cast<size_t>(i)].out -= dark;
    });
  }
  for (const auto& w : wanted) result.inputs.push_back(w.key);

  cv::Mat user_trimap;
  auto load_user_trimap = [&]() -> io::Status {
    if (options.trimap_path.empty()) return io::Status::Ok();
    io::Expected<cv::Mat> image = io::ReadImage(options.trimap_path);
    if (!image.ok()) return image.status();
    return TrimapFromImage(*image, loader.size, options.trimap_path, &user_trimap);
  };

  if (method == MatteMethod::kTriangulation) {
    LUMENRIG_RETURN_IF_ERROR(load_user_trimap());
    TriangulationOptions to = options.triangulation;
    to.noise_sigma = options.noise_sigma;
    LUMENRIG_RETURN_IF_ERROR(TriangulationMatte(plates, frames, to, &result.alpha, &result.foreground,
                                                &result.confidence, &result.noise_sigma, threads));
  } else {
    if (method == MatteMethod::kBacklit) {
      LUMENRIG_RETURN_IF_ERROR(load_user_trimap());
      BacklitOptions bo = options.backlit;
      bo.noise_sigma = options.noise_sigma;
      BacklitStats stats;
      // Frames are already dark-subtracted.
      LUMENRIG_RETURN_IF_ERROR(
          BacklitMatte(plate, backlit, cv::Mat(), bo, &result.alpha, &result.confidence, &stats, threads));
      result.noise_sigma = stats.noise_sigma;
      if (stats.plate_zero_pixels > 0) {
        result.notes.push_back(
            fmt::format("{} pixels where the clean plate is ~0 (confidence 0, alpha filled)", stats.plate_zero_pixels));
      }
      if (!user_trimap.empty()) ApplyTrimap(user_trimap, &result.alpha);
      if (!lit.empty()) {
        LUMENRIG_RETURN_IF_ERROR(
            EstimateForeground(lit, plate, result.alpha, options.foreground, &result.foreground, threads));
      } else {
        result.notes.push_back(loader.Key("lit") + " absent: foreground.exr not written");
      }
    } else {
      LUMENRIG_RETURN_IF_ERROR(load_user_trimap());
      TrimapOptions tro = options.trimap;
      tro.difference_sigma = options.noise_sigma * std::sqrt(2.0);
      TrimapStats tstats;
      if (user_trimap.empty()) {
        LUMENRIG_RETURN_IF_ERROR(DifferenceTrimap(plate, lit, tro, &result.trimap, &tstats));
      } else {
        cv::Mat scratch;
        LUMENRIG_RETURN_IF_ERROR(DifferenceTrimap(plate, lit, tro, &scratch, &tstats));
        result.trimap = user_trimap;
      }
      ClosedFormOptions co = options.closed_form;
      co.difference_sigma = tstats.difference_sigma;
      ClosedFormStats cstats;
      LUMENRIG_RETURN_IF_ERROR(RefineClosedForm(lit, plate, result.trimap, co, &result.alpha, &cstats, threads));
      result.noise_sigma = tstats.difference_sigma / std::sqrt(2.0);
      result.unknown_pixels = cstats.unknown_pixels;
      result.direct_solve = cstats.direct;
      result.cg_iterations = cstats.iterations;
      if (!cstats.converged) {
        result.notes.push_back(
            cstats.direct ? fmt::format("band solve left relative residual {:.2g}", cstats.relative_residual)
                          : fmt::format("conjugate gradient stopped at relative residual {:.2g} after {} iterations",
                                        cstats.relative_residual, cstats.iterations));
      }
      LUMENRIG_RETURN_IF_ERROR(
          EstimateForeground(lit, plate, result.alpha, options.foreground, &result.foreground, threads));
      result.confidence = DifferenceConfidence(result.trimap, result.foreground, plate, tstats.difference_sigma);
    }
  }
  if (method == MatteMethod::kTriangulation && !user_trimap.empty()) ApplyTrimap(user_trimap, &result.alpha);
  if (result.trimap.empty()) result.trimap = user_trimap.empty() ? TrimapFromAlpha(result.alpha) : user_trimap;
  if (!user_trimap.empty()) result.inputs.push_back(options.trimap_path);
  *out = std::move(result);
  return io::Status::Ok();
}

std::vector<std::string> MatteOutputFiles(const MatteResult& result, const std::string& out_dir) {
  std::vector<std::string> files = {out_dir + "/alpha.exr"};
  if (!result.foreground.empty()) files.push_back(out_dir + "/foreground.exr");
  files.push_back(out_dir + "/trimap.png");
  files.push_back(out_dir + "/confidence.exr");
  return files;
}

io::Status WriteMatteOutputs(const MatteResult& result, const io::Session& session, const std::string& out_dir,
                             bool force, int threads) {
  const std::vector<std::string> files = MatteOutputFiles(result, out_dir);
  for (const std::string& f : files) LUMENRIG_RETURN_IF_ERROR(io::CheckOutputPath(f, force));
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(out_dir));
  io::ExrWriteOptions exr;
  exr.overwrite = force;
  exr.attributes = {{"lumenrig_tool", "lumenrig matte"},
                    {"lumenrig_version", LUMENRIG_VERSION},
                    {"source_session", session.path},
                    {"source_subject", session.Id()},
                    {"camera", result.camera_id},
                    {"matte_method", MatteMethodName(result.method)},
                    {"matte_options", result.options.dump()},
                    {"noise_sigma", fmt::format("{:.6g}", result.noise_sigma)}};
  io::ExrWriteOptions full = exr;
  full.pixel_type = io::PixelType::kFloat;
  // One writer per file of MatteOutputFiles, in its order; the files are
  // written a few at once, each to a temporary name renamed when complete.
  std::vector<std::function<io::Status()>> writers;
  writers.push_back([&] {
    io::ExrWriteOptions a = full;
    a.attributes["meaning"] = "alpha matte 0..1";
    return io::WriteExr(out_dir + "/alpha.exr", result.alpha, a);
  });
  if (!result.foreground.empty()) {
    writers.push_back([&] {
      io::ExrWriteOptions fg = exr;
      fg.attributes["meaning"] = "un-premultiplied foreground colour, linear RGB; 0 where alpha is 0";
      return io::WriteExr(out_dir + "/foreground.exr", result.foreground, fg);
    });
  }
  writers.push_back([&] { return io::WritePng(out_dir + "/trimap.png", result.trimap, force); });
  writers.push_back([&] {
    io::ExrWriteOptions c = full;
    c.attributes["meaning"] = "matte confidence 0..1, 0 where the solve failed";
    return io::WriteExr(out_dir + "/confidence.exr", result.confidence, c);
  });
  std::vector<io::Status> status(writers.size());
  io::ParallelFor(0, static_cast<int64_t>(writers.size()), 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t i = b; i < e; ++i) status[static_cast<size_t>(i)] = writers[static_cast<size_t>(i)]();
  });
  const io::Status first = io::FirstError(status);
  if (!first.ok()) io::RemoveWrittenFiles(files, status);  // no partial set
  return first;
}

cv::Mat GradientBackground(cv::Size size, const cv::Vec3f& top_rgb, const cv::Vec3f& bottom_rgb) {
  cv::Mat bg(size, CV_32FC3);
  for (int y = 0; y < size.height; ++y) {
    const float t = size.height > 1 ? static_cast<float>(y) / (size.height - 1) : 0.0f;
    bg.row(y).setTo(cv::Scalar(top_rgb[0] * (1 - t) + bottom_rgb[0] * t, top_rgb[1] * (1 - t) + bottom_rgb[1] * t,
                               top_rgb[2] * (1 - t) + bottom_rgb[2] * t));
  }
  return bg;
}

io::Status WriteCompositePng(const MatteResult& result, const cv::Mat& background, float exposure,
                             const std::string& path, bool overwrite) {
  if (result.foreground.empty()) {
    return io::Status::BadInput(path + ": no foreground colour to composite (the session has no lit frame)");
  }
  if (background.type() != CV_32FC3 || background.size() != result.alpha.size()) {
    return io::Status::BadInput(path + ": background must be CV_32FC3 of the matte's size");
  }
  return io::WritePng(path, io::ToPreview8(CompositeOver(result.foreground, result.alpha, background), exposure),
                      overwrite);
}

}  // namespace lumenrig::solvers
