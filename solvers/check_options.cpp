// Check thresholds: the documented table behind --threshold / --thresholds.
#include <cmath>
#include <cstdlib>

#include "lumenrig/solvers/session_check.h"

namespace lumenrig::solvers {

namespace {
constexpr const char* kPractice = "common practice";
}

const char* VerdictName(Verdict verdict) {
  switch (verdict) {
    case Verdict::kPass: return "PASS";
    case Verdict::kSkip: return "SKIP";
    case Verdict::kWarn: return "WARN";
    case Verdict::kFail: return "FAIL";
  }
  return "?";
}

Verdict Worse(Verdict a, Verdict b) { return static_cast<int>(a) >= static_cast<int>(b) ? a : b; }

const std::vector<ThresholdSpec>& ThresholdTable() {
  using O = CheckOptions;
  static const std::vector<ThresholdSpec> table = {
      {"exposure.saturation_level", &O::saturation_level, "full scale",
       "stored value at which the sensor clips (before black level)",
       "integer files: the largest code (1.0 after scaling); EXR: raw converters normalise white to 1.0 (common "
       "practice)"},
      {"exposure.clipped_warn_pct", &O::clipped_warn_pct, "% of mask", "clipped subject pixels in one OLAT frame: WARN",
       kPractice},
      {"exposure.clipped_fail_pct", &O::clipped_fail_pct, "% of mask", "clipped subject pixels in one OLAT frame: FAIL",
       kPractice},
      {"exposure.underexposed_warn", &O::underexposed_warn, "full scale",
       "p99 of the brightest OLAT frame below this: WARN (expose to the right)", kPractice},
      {"exposure.underexposed_fail", &O::underexposed_fail, "full scale",
       "p99 of the brightest OLAT frame below this: FAIL", kPractice},
      {"exposure.snr_warn_db", &O::snr_warn_db, "dB", "median SNR of the front-lit OLAT frames below this: WARN",
       "noise by Immerkaer, CVIU 64(2) 1996; 20 dB level: common practice"},
      {"exposure.black_residual_warn", &O::black_residual_warn, "full scale",
       "dark frame mean left after the session black_level: WARN", kPractice},
      {"lights.weak_warn_ratio", &O::weak_warn_ratio, "ratio",
       "measured / predicted frame energy below this: WARN (weak light)", kPractice},
      {"lights.weak_fail_ratio", &O::weak_fail_ratio, "ratio",
       "measured / predicted frame energy below this: FAIL (dead light)", kPractice},
      {"lights.hot_warn_ratio", &O::hot_warn_ratio, "ratio",
       "measured / predicted frame energy above this: WARN (hot light)", kPractice},
      {"lights.hot_fail_ratio", &O::hot_fail_ratio, "ratio", "measured / predicted frame energy above this: FAIL",
       kPractice},
      {"lights.min_predicted_fraction", &O::min_predicted_fraction, "ratio",
       "lights predicted dimmer than this fraction of the brightest are not judged (subject barely lit)", kPractice},
      {"lights.swap_gain_fraction", &O::swap_gain_fraction, "ratio",
       "exchanging two frames must cut each one's Lambertian residual by this fraction to report a swap", kPractice},
      {"lights.swap_min_angle_deg", &O::swap_min_angle_deg, "deg",
       "swaps between lights closer than this are not reported", kPractice},
      {"lights.colour_warn_pct", &O::colour_warn_pct, "%", "channel deviation from the camera's typical colour: WARN",
       kPractice},
      {"lights.colour_fail_pct", &O::colour_fail_pct, "%", "channel deviation from the camera's typical colour: FAIL",
       kPractice},
      {"stability.drift_warn_pct", &O::drift_warn_pct, "%", "tracking-frame mean against the first: WARN", kPractice},
      {"stability.drift_fail_pct", &O::drift_fail_pct, "%", "tracking-frame mean against the first: FAIL", kPractice},
      {"stability.motion_warn_px", &O::motion_warn_px, "px", "subject shift against the first tracking frame: WARN",
       kPractice},
      {"stability.motion_fail_px", &O::motion_fail_px, "px", "subject shift against the first tracking frame: FAIL",
       kPractice},
      {"calibration.unit_tolerance", &O::unit_tolerance, "", "| |direction| - 1 | above this: FAIL", kPractice},
      {"calibration.duplicate_angle_deg", &O::duplicate_angle_deg, "deg", "two light directions closer than this: FAIL",
       kPractice},
      {"calibration.duplicate_distance_m", &O::duplicate_distance_m, "m", "two light positions closer than this: FAIL",
       kPractice},
      {"calibration.coverage_radius_deg", &O::coverage_radius_deg, "deg",
       "a direction counts as covered when a light lies within this angle", kPractice},
      {"calibration.coverage_warn_pct", &O::coverage_warn_pct, "%",
       "covered share of the camera-facing hemisphere below this: WARN", kPractice},
      {"calibration.condition_warn", &O::condition_warn, "",
       "2-norm condition number of the N x 3 light matrix above this: WARN",
       "error amplification of least squares (Golub and Van Loan, Matrix Computations, 5.3); level: common practice"},
      {"calibration.condition_fail", &O::condition_fail, "", "condition number above this: FAIL", kPractice},
      {"matting.alignment_warn_px", &O::alignment_warn_px, "px", "clean plate vs backlit shift: WARN", kPractice},
      {"matting.alignment_fail_px", &O::alignment_fail_px, "px", "clean plate vs backlit shift: FAIL", kPractice},
      {"work.thumbnail_px", &O::thumbnail_px, "px", "longest side of the contact-sheet thumbnails", kPractice},
      {"work.analysis_grid", &O::analysis_grid, "cells", "longest side of the per-frame analysis grid", kPractice},
      {"work.motion_max_px", &O::motion_max_px, "px", "tracking frames are area-reduced to at most this side",
       kPractice},
      {"work.band_rows", &O::band_rows, "rows", "rows decoded at a time (rounded to EXR line blocks)", kPractice},
  };
  return table;
}

io::Status CheckOptions::Validate() const {
  for (const auto& spec : ThresholdTable()) {
    const double v = this->*spec.field;
    if (!std::isfinite(v) || v < 0)
      return io::Status::BadInput(fmt::format("check option {}: must be a finite number >= 0, got {}", spec.key, v));
  }
  auto order = [](const char* warn_key, double warn, const char* fail_key, double fail, bool ascending) -> io::Status {
    if (ascending ? warn > fail : warn < fail)
      return io::Status::BadInput(
          fmt::format("check options {} = {} and {} = {}: the WARN level must come before the FAIL level", warn_key,
                      warn, fail_key, fail));
    return io::Status::Ok();
  };
  LUMENRIG_RETURN_IF_ERROR(
      order("exposure.clipped_warn_pct", clipped_warn_pct, "exposure.clipped_fail_pct", clipped_fail_pct, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("exposure.underexposed_warn", underexposed_warn, "exposure.underexposed_fail", underexposed_fail, false));
  LUMENRIG_RETURN_IF_ERROR(
      order("lights.weak_warn_ratio", weak_warn_ratio, "lights.weak_fail_ratio", weak_fail_ratio, false));
  LUMENRIG_RETURN_IF_ERROR(
      order("lights.hot_warn_ratio", hot_warn_ratio, "lights.hot_fail_ratio", hot_fail_ratio, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("lights.colour_warn_pct", colour_warn_pct, "lights.colour_fail_pct", colour_fail_pct, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("stability.drift_warn_pct", drift_warn_pct, "stability.drift_fail_pct", drift_fail_pct, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("stability.motion_warn_px", motion_warn_px, "stability.motion_fail_px", motion_fail_px, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("calibration.condition_warn", condition_warn, "calibration.condition_fail", condition_fail, true));
  LUMENRIG_RETURN_IF_ERROR(
      order("matting.alignment_warn_px", alignment_warn_px, "matting.alignment_fail_px", alignment_fail_px, true));
  if (saturation_level <= 0) return io::Status::BadInput("check option exposure.saturation_level: must be > 0");
  if (thumbnail_px < 8 || analysis_grid < 4 || motion_max_px < 16 || band_rows < 1)
    return io::Status::BadInput(
        "check options work.*: thumbnail_px >= 8, analysis_grid >= 4, motion_max_px >= 16, band_rows >= 1");
  return io::Status::Ok();
}

static io::Status SetOne(const std::string& key, double value, const std::string& source, CheckOptions* options) {
  for (const auto& spec : ThresholdTable()) {
    if (key == spec.key) {
      options->*spec.field = value;
      return io::Status::Ok();
    }
  }
  return io::Status::BadInput(
      fmt::format("{}: unknown check threshold '{}' (see `lumenrig check --list-thresholds`)", source, key));
}

io::Status SetThreshold(const std::string& key_equals_value, CheckOptions* options) {
  const auto eq = key_equals_value.find('=');
  if (eq == std::string::npos || eq == 0)
    return io::Status::BadInput(fmt::format("--threshold '{}': expected KEY=VALUE", key_equals_value));
  const std::string key = key_equals_value.substr(0, eq);
  const std::string text = key_equals_value.substr(eq + 1);
  char* end = nullptr;
  const double value = std::strtod(text.c_str(), &end);
  if (text.empty() || end == nullptr || *end != '\0' || !std::isfinite(value))
    return io::Status::BadInput(fmt::format("--threshold {}: '{}' is not a number", key, text));
  return SetOne(key, value, "--threshold", options);
}

io::Status SetThresholds(const nlohmann::json& object, const std::string& source, CheckOptions* options) {
  if (!object.is_object())
    return io::Status::BadInput(fmt::format("{}: expected a JSON object of \"key\": number", source));
  for (const auto& [key, value] : object.items()) {
    if (!value.is_number()) return io::Status::BadInput(fmt::format("{}: {}: expected a number", source, key));
    LUMENRIG_RETURN_IF_ERROR(SetOne(key, value.get<double>(), source, options));
  }
  return io::Status::Ok();
}

}  // namespace lumenrig::solvers
