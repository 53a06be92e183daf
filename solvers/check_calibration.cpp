// Calibration sanity: unit directions, duplicated lights, coverage of the
// camera-facing hemisphere, conditioning of the photometric-stereo light matrix.
#include <algorithm>
#include <cmath>
#include <limits>

#include <Eigen/Geometry>

#include "check_internal.h"
#include "lumenrig/solvers/light_matrix.h"

namespace lumenrig::solvers {

namespace {
constexpr double kPi = 3.14159265358979323846;
double Deg(double rad) { return rad * 180.0 / kPi; }
double AngleDeg(const Eigen::Vector3d& a, const Eigen::Vector3d& b) {
  return Deg(std::atan2(a.cross(b).norm(), a.dot(b)));
}
/// Unit direction of a light seen from the rig origin (rig frame).
Eigen::Vector3d RigDirection(const io::Light& light) {
  if (light.direction) return light.direction->normalized();
  if (light.position && light.position->norm() > 0) return light.position->normalized();
  return Eigen::Vector3d::Zero();
}
}  // namespace

void CheckCalibration(const io::Rig& rig, const std::vector<CameraPose>& cameras_in, const CheckOptions& options,
                      std::vector<CheckLine>* lines) {
  using check_detail::AddFinding;
  using check_detail::MakeLine;
  using check_detail::Num;
  const double nan = std::numeric_limits<double>::quiet_NaN();
  std::vector<CameraPose> cameras = cameras_in;
  if (cameras.empty()) cameras.push_back({"rig", Eigen::Matrix3d::Identity()});
  const int n = static_cast<int>(rig.lights.size());

  // Unit directions.
  CheckLine unit =
      MakeLine("calibration.directions", "Light directions are unit vectors", "| |d|-1 |", nan, options.unit_tolerance);
  double worst_unit = 0.0;
  for (const auto& l : rig.lights) {
    double err = 0.0;
    if (l.direction) {
      err = std::abs(l.direction->norm() - 1.0);
    } else if (l.position && !(l.position->norm() > 0)) {
      err = 1.0;
    }
    worst_unit = std::max(worst_unit, err);
    if (err > options.unit_tolerance) {
      Finding f;
      f.verdict = Verdict::kFail;
      f.lights = {l.id};
      f.value = err;
      f.message = l.direction ? fmt::format("rig {}: light {} direction has length {} (not a unit vector)", rig.name,
                                            l.id, Num(l.direction->norm(), 4))
                              : fmt::format("rig {}: light {} sits at the rig origin (no direction)", rig.name, l.id);
      AddFinding(&unit, std::move(f));
    }
  }
  unit.value = worst_unit;
  unit.summary = fmt::format("{} lights, largest deviation from unit length {}", n, Num(worst_unit, 5));
  lines->push_back(std::move(unit));

  // Duplicates.
  CheckLine dup = MakeLine("calibration.duplicates", "No two lights share a direction or position", "deg", nan,
                           options.duplicate_angle_deg);
  double closest = std::numeric_limits<double>::infinity();
  for (int i = 0; i < n; ++i) {
    for (int j = i + 1; j < n; ++j) {
      const auto& a = rig.lights[i];
      const auto& b = rig.lights[j];
      bool same = false;
      double value = 0;
      if (a.position && b.position) {
        value = (*a.position - *b.position).norm();
        same = value < options.duplicate_distance_m;
      }
      const Eigen::Vector3d da = RigDirection(a), db = RigDirection(b);
      const double ang = AngleDeg(da, db);
      if (!(a.position && b.position)) {
        same = ang < options.duplicate_angle_deg;
        value = ang;
      }
      closest = std::min(closest, ang);
      if (same) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.lights = {a.id, b.id};
        f.value = value;
        f.message = (a.position && b.position)
                        ? fmt::format("rig {}: lights {} and {} are {} m apart (duplicated position)", rig.name, a.id,
                                      b.id, Num(value, 4))
                        : fmt::format("rig {}: lights {} and {} point {} deg apart (duplicated direction)", rig.name,
                                      a.id, b.id, Num(value, 3));
        AddFinding(&dup, std::move(f));
      }
    }
  }
  dup.value = std::isfinite(closest) ? closest : 0.0;
  dup.summary = n < 2 ? "fewer than two lights" : fmt::format("closest pair of lights {} deg apart", Num(dup.value, 2));
  lines->push_back(std::move(dup));

  // Coverage of the camera-facing hemisphere (camera frame z > 0), sampled
  // with a golden-angle spiral of equal-area points.
  CheckLine cov = MakeLine("calibration.coverage", "Lights cover the camera-facing hemisphere", "%",
                           options.coverage_warn_pct, nan);
  cov.value = 100.0;
  const int samples = 2000;
  const double golden = kPi * (3.0 - std::sqrt(5.0));
  std::vector<std::string> parts;
  for (const auto& cam : cameras) {
    std::vector<Eigen::Vector3d> dirs;
    for (const auto& l : rig.lights) dirs.push_back(cam.camera_from_rig * RigDirection(l));
    int covered = 0;
    double largest_gap = 0;
    for (int k = 0; k < samples; ++k) {
      const double z = 1.0 - (k + 0.5) / samples;  // equal-area bands of the z > 0 half
      const double r = std::sqrt(std::max(0.0, 1.0 - z * z));
      const Eigen::Vector3d v(r * std::cos(golden * k), r * std::sin(golden * k), z);
      double nearest = 180.0;
      for (const auto& d : dirs) nearest = std::min(nearest, AngleDeg(v, d));
      largest_gap = std::max(largest_gap, nearest);
      covered += nearest <= options.coverage_radius_deg ? 1 : 0;
    }
    const double pct = 100.0 * covered / samples;
    parts.push_back(fmt::format("{} {}%", cam.id, Num(pct, 1)));
    if (pct < cov.value) cov.value = pct;
    if (pct < options.coverage_warn_pct) {
      Finding f;
      f.verdict = Verdict::kWarn;
      f.camera = cam.id;
      f.value = pct;
      f.message = fmt::format(
          "camera {}: only {}% of the camera-facing hemisphere has a light within {} deg "
          "(largest gap {} deg); normals facing the gaps are poorly lit",
          cam.id, Num(pct, 1), Num(options.coverage_radius_deg, 0), Num(largest_gap, 0));
      AddFinding(&cov, std::move(f));
    }
  }
  std::string joined;
  for (size_t i = 0; i < parts.size(); ++i) joined += (i ? ", " : "") + parts[i];
  cov.summary =
      fmt::format("camera-facing hemisphere within {} deg of a light: {}", Num(options.coverage_radius_deg, 0), joined);
  lines->push_back(std::move(cov));

  // Condition number of the N x 3 light matrix (rotation-invariant).
  CheckLine cond = MakeLine("calibration.condition", "Light matrix is well conditioned", "", options.condition_warn,
                            options.condition_fail);
  std::vector<Eigen::Vector3d> dirs;
  for (const auto& l : rig.lights) dirs.push_back(RigDirection(l));
  const double kappa = ConditionNumber(StackDirections(dirs));
  cond.value = kappa;
  if (!std::isfinite(kappa) || kappa > options.condition_warn) {
    Finding f;
    f.verdict = (!std::isfinite(kappa) || kappa > options.condition_fail) ? Verdict::kFail : Verdict::kWarn;
    f.value = kappa;
    f.message = std::isfinite(kappa)
                    ? fmt::format(
                          "rig {}: condition number {} of the light matrix: photometric stereo amplifies "
                          "noise by up to this factor",
                          rig.name, Num(kappa, 1))
                    : fmt::format(
                          "rig {}: light directions are coplanar or fewer than 3 (rank < 3): normals cannot "
                          "be solved",
                          rig.name);
    AddFinding(&cond, std::move(f));
  }
  cond.summary = std::isfinite(kappa) ? fmt::format("condition number {}", Num(kappa, 2))
                                      : std::string("condition number infinite (rank < 3)");
  lines->push_back(std::move(cond));
}

}  // namespace lumenrig::solvers
