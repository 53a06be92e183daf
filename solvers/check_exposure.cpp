// Exposure inside the subject mask: clipping, level (expose to the right),
// noise / SNR, residual black level from the dark frame.
#include <algorithm>
#include <cmath>
#include <limits>

#include "check_internal.h"
#include "lumenrig/capture_io/color.h"

namespace lumenrig::solvers::check_detail {

void CheckExposure(const io::Session& session, const CheckOptions& options, CheckResult* result,
                   std::vector<CheckLine>* lines) {
  const double nan = std::numeric_limits<double>::quiet_NaN();
  double saturation = options.saturation_level;
  if (session.encoding == io::Encoding::kSrgb) saturation = io::SrgbToLinear(static_cast<float>(saturation));
  saturation -= session.black_level;

  CheckLine clip = MakeLine("exposure.clipping", "No clipped subject pixels (over-exposure)", "% of mask",
                            options.clipped_warn_pct, options.clipped_fail_pct);
  CheckLine level = MakeLine("exposure.level", "Brightest OLAT frame uses the sensor range", "of full scale",
                             options.underexposed_warn, options.underexposed_fail);
  CheckLine snr = MakeLine("exposure.snr", "Signal-to-noise of front-lit frames", "dB", options.snr_warn_db, nan);
  CheckLine black = MakeLine("exposure.black", "Dark frame matches the session black level", "of full scale",
                             options.black_residual_warn, nan);
  level.value = std::numeric_limits<double>::infinity();
  snr.value = std::numeric_limits<double>::infinity();
  black.verdict = Verdict::kSkip;
  std::string worst_clip_where, level_where, snr_where, black_parts;

  for (size_t c = 0; c < result->cameras.size(); ++c) {
    const std::string& cam = result->cameras[c].id;
    double peak = 0.0, max_mean = 0.0;
    int peak_light = -1;
    for (const auto& s : result->frames) {
      if (s.camera != static_cast<int>(c) || s.kind != FrameKind::kOlat || !s.readable || s.grid.empty()) continue;
      max_mean = std::max(max_mean, s.mean);
      if (s.p99 > peak) {
        peak = s.p99;
        peak_light = s.light;
      }
      if (s.clipped_pct > clip.value) {
        clip.value = s.clipped_pct;
        worst_clip_where = fmt::format("camera {} light {}", cam, s.light);
      }
      if (s.clipped_pct > options.clipped_warn_pct) {
        Finding f;
        f.verdict = s.clipped_pct > options.clipped_fail_pct ? Verdict::kFail : Verdict::kWarn;
        f.camera = cam;
        f.lights = {s.light};
        f.frame = s.path;
        f.value = s.clipped_pct;
        f.message = fmt::format(
            "camera {} light {}: {}% of subject pixels clipped (over-exposed; lower the light "
            "or the exposure)",
            cam, s.light, Num(s.clipped_pct, 2));
        AddFinding(&clip, std::move(f));
      }
    }
    if (peak_light < 0) continue;
    const double peak_fs = peak / saturation;
    if (peak_fs < level.value) {
      level.value = peak_fs;
      level_where = fmt::format("camera {} light {}", cam, peak_light);
    }
    if (peak_fs < options.underexposed_warn) {
      Finding f;
      f.verdict = peak_fs < options.underexposed_fail ? Verdict::kFail : Verdict::kWarn;
      f.camera = cam;
      f.value = peak_fs;
      f.message = fmt::format(
          "camera {}: the brightest OLAT frame (light {}) reaches only {}% of full scale at its "
          "99th percentile (under-exposed)",
          cam, peak_light, Num(100 * peak_fs, 1));
      AddFinding(&level, std::move(f));
    }
    // SNR: median over front-lit frames (mean at least a quarter of the brightest).
    std::vector<double> snrs;
    for (const auto& s : result->frames)
      if (s.camera == static_cast<int>(c) && s.kind == FrameKind::kOlat && s.readable && !s.grid.empty() &&
          s.mean >= 0.25 * max_mean && s.noise_sigma > 0)
        snrs.push_back(s.snr_db);
    if (!snrs.empty()) {
      std::nth_element(snrs.begin(), snrs.begin() + snrs.size() / 2, snrs.end());
      const double med = snrs[snrs.size() / 2];
      if (med < snr.value) {
        snr.value = med;
        snr_where = "camera " + cam;
      }
      if (med < options.snr_warn_db) {
        Finding f;
        f.verdict = Verdict::kWarn;
        f.camera = cam;
        f.value = med;
        f.message = fmt::format(
            "camera {}: median SNR of front-lit OLAT frames is {} dB (noisy; raise exposure or "
            "light output)",
            cam, Num(med, 1));
        AddFinding(&snr, std::move(f));
      }
    }
    // Black level.
    const CameraSummary& cs = result->cameras[c];
    if (cs.has_dark) {
      if (black.verdict == Verdict::kSkip) black.verdict = Verdict::kPass;
      const double residual = cs.dark_mean.cwiseAbs().maxCoeff();
      black.value = std::max(black.value, residual);
      black_parts += fmt::format("{}camera {} dark mean {} (noise {})", black_parts.empty() ? "" : ", ", cam,
                                 Num(cs.dark_mean.mean(), 5), Num(cs.dark_noise, 5));
      if (residual > options.black_residual_warn) {
        Finding f;
        f.verdict = Verdict::kWarn;
        f.camera = cam;
        f.frame = session.cameras[c].dark;
        f.value = residual;
        f.message = fmt::format(
            "camera {}: dark frame mean is {} of full scale after the session black_level {} "
            "(wrong black level or light leak); stats are corrected by it",
            cam, Num(residual, 5), Num(session.black_level, 5));
        AddFinding(&black, std::move(f));
      }
    }
  }
  clip.summary = clip.findings.empty()
                     ? fmt::format("worst OLAT frame has {}% clipped subject pixels", Num(clip.value, 3))
                     : fmt::format("{} frame(s) clipped; worst {}% ({})", clip.findings.size(), Num(clip.value, 2),
                                   worst_clip_where);
  if (!std::isfinite(level.value)) {
    level.value = nan;
    level.verdict = Verdict::kSkip;
    level.summary = "no readable OLAT frame";
  } else {
    level.summary =
        fmt::format("brightest OLAT frame p99 at {}% of full scale ({})", Num(100 * level.value, 1), level_where);
  }
  if (!std::isfinite(snr.value)) {
    snr.value = nan;
    snr.verdict = Verdict::kSkip;
    snr.summary = "no front-lit frame to measure";
  } else {
    snr.summary = fmt::format("median SNR of front-lit frames {} dB ({})", Num(snr.value, 1), snr_where);
  }
  black.summary = black.verdict == Verdict::kSkip ? "no dark frame listed" : black_parts;
  lines->push_back(std::move(clip));
  lines->push_back(std::move(level));
  lines->push_back(std::move(snr));
  lines->push_back(std::move(black));
}

}  // namespace lumenrig::solvers::check_detail
