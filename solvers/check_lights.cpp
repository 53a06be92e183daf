// Lights: dead / weak and hot lights, frames captured in the wrong slot
// (swapped), colour outliers. Works on the coarse analysis grids kept by the
// reading pass: per analysis cell a Woodham least-squares scaled normal B is
// fitted from the lit samples of all frames, so every frame has a Lambertian
// prediction max(0, l . B) from the calibrated direction l of its slot.
#include <algorithm>
#include <cmath>
#include <limits>

#include <Eigen/Dense>

#include "check_internal.h"
#include "lumenrig/capture_io/color.h"

namespace lumenrig::solvers::check_detail {

namespace {

constexpr double kPi = 3.14159265358979323846;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

double AngleDeg(const Eigen::Vector3d& a, const Eigen::Vector3d& b) {
  return std::atan2(a.cross(b).norm(), a.dot(b)) * 180.0 / kPi;
}

double Lum(const Eigen::Vector3d& rgb) { return io::kBt709R * rgb.x() + io::kBt709G * rgb.y() + io::kBt709B * rgb.z(); }

struct CamFrames {
  std::vector<int> frame;          // index into result->frames
  std::vector<Eigen::Vector3d> d;  // calibrated direction, camera frame
  std::vector<double> iota;        // intensity luminance
  std::vector<int> cells;          // analysis cells used
};

/// Per-cell least-squares scaled normals from the active frames' lit samples
/// (value above 5% of the cell's brightest, so attached shadows stay out).
std::vector<Eigen::Vector3d> FitNormals(const CamFrames& cf, const std::vector<FrameSummary>& frames,
                                        const std::vector<char>& active, std::vector<char>* fitted) {
  const size_t nc = cf.cells.size();
  std::vector<Eigen::Vector3d> b(nc, Eigen::Vector3d::Zero());
  fitted->assign(nc, 0);
  for (size_t k = 0; k < nc; ++k) {
    const int p = cf.cells[k];
    double vmax = 0;
    for (size_t i = 0; i < cf.frame.size(); ++i)
      if (active[i]) vmax = std::max(vmax, frames[cf.frame[i]].grid[p] / cf.iota[i]);
    if (!(vmax > 0)) continue;
    Eigen::Matrix3d a = Eigen::Matrix3d::Zero();
    Eigen::Vector3d rhs = Eigen::Vector3d::Zero();
    int n = 0;
    for (size_t i = 0; i < cf.frame.size(); ++i) {
      if (!active[i]) continue;
      const double v = frames[cf.frame[i]].grid[p] / cf.iota[i];
      if (v <= 0.05 * vmax) continue;
      a += cf.d[i] * cf.d[i].transpose();
      rhs += cf.d[i] * v;
      ++n;
    }
    if (n < 3) continue;
    Eigen::SelfAdjointEigenSolver<Eigen::Matrix3d> eig(a);
    if (!(eig.eigenvalues()(0) > 1e-3 * eig.eigenvalues()(2))) continue;
    b[k] = a.ldlt().solve(rhs);
    (*fitted)[k] = 1;
  }
  return b;
}

}  // namespace

void CheckLights(const io::Session& session, const CheckOptions& options, CheckResult* result,
                 std::vector<CheckLine>* lines) {
  CheckLine weak = MakeLine("lights.weak", "No dead or weak light", "measured/predicted", options.weak_warn_ratio,
                            options.weak_fail_ratio);
  CheckLine hot = MakeLine("lights.hot", "No light brighter than calibrated", "measured/predicted",
                           options.hot_warn_ratio, options.hot_fail_ratio);
  CheckLine slot = MakeLine("lights.slot", "Every frame lit from its slot's direction (no swapped frames)",
                            "swapped pairs", kNaN, 0.0);
  CheckLine colour = MakeLine("lights.colour", "Light colours match calibration", "%", options.colour_warn_pct,
                              options.colour_fail_pct);
  weak.value = std::numeric_limits<double>::infinity();
  hot.value = 0.0;
  colour.value = 0.0;
  int judged_total = 0, skipped_total = 0, colour_judged = 0;
  std::string weak_where, hot_where, colour_where;
  auto& frames = result->frames;

  for (size_t c = 0; c < session.cameras.size(); ++c) {
    const io::Camera& cam = session.cameras[c];
    const CameraSummary& cs = result->cameras[c];
    const Eigen::Vector3d subject_camera = cam.camera_from_rig.topRightCorner<3, 1>();
    CamFrames cf;
    for (size_t j = 0; j < frames.size(); ++j) {
      FrameSummary& s = frames[j];
      if (s.camera != static_cast<int>(c) || s.kind != FrameKind::kOlat) continue;
      const int li = session.rig.IndexOfId(s.light);
      if (li < 0) continue;
      const io::Light& light = session.rig.lights[li];
      s.direction_rig = light.direction ? light.direction->normalized()
                                        : (light.position ? light.position->normalized() : Eigen::Vector3d::Zero());
      if (!s.readable || s.grid.empty() || !s.error.empty()) continue;
      const double iota = Lum(light.intensity);
      if (!(iota > 0)) continue;
      cf.frame.push_back(static_cast<int>(j));
      cf.d.push_back(io::LightDirectionInCamera(light, cam, subject_camera).normalized());
      cf.iota.push_back(iota);
    }
    for (size_t p = 0; p < cs.grid_valid.size(); ++p)
      if (cs.grid_valid[p]) cf.cells.push_back(static_cast<int>(p));
    const int n = static_cast<int>(cf.frame.size());
    if (n < 4 || cf.cells.empty()) continue;

    // Two passes: the second refits the normals without the frames the first
    // found suspicious, so one bad frame does not bend its neighbours' model.
    std::vector<char> active(n, 1), fitted;
    for (int i = 0; i < n; ++i)
      if (frames[cf.frame[i]].clipped_pct > options.clipped_fail_pct) active[i] = 0;
    std::vector<int> partner(n, -1);
    std::vector<double> measured(n), predicted(n), gain_of(n, 0.0);
    for (int pass = 0; pass < 2; ++pass) {
      const auto b = FitNormals(cf, frames, active, &fitted);
      std::vector<int> used;
      for (size_t k = 0; k < cf.cells.size(); ++k)
        if (fitted[k]) used.push_back(static_cast<int>(k));
      if (used.empty()) break;
      // Values and predictions on the fitted cells.
      const size_t m = used.size();
      Eigen::MatrixXd v(n, m), pr(n, m);
      for (int i = 0; i < n; ++i) {
        const auto& grid = frames[cf.frame[i]].grid;
        for (size_t k = 0; k < m; ++k) {
          v(i, k) = grid[cf.cells[used[k]]] / cf.iota[i];
          pr(i, k) = std::max(0.0, cf.d[i].dot(b[used[k]]));
        }
        measured[i] = v.row(i).mean();
        predicted[i] = pr.row(i).mean();
      }
      // Swaps: exchanging frames i and j must cut their joint residual.
      std::vector<double> own(n);
      for (int i = 0; i < n; ++i) own[i] = (v.row(i) - pr.row(i)).squaredNorm();
      std::vector<double> sorted_own = own;
      std::nth_element(sorted_own.begin(), sorted_own.begin() + n / 2, sorted_own.end());
      const double med_own = sorted_own[n / 2];
      struct Cand {
        double gain;
        int i, j;
      };
      std::vector<Cand> cands;
      for (int i = 0; i < n; ++i) {
        for (int j = i + 1; j < n; ++j) {
          const double total = own[i] + own[j];
          if (!(total > 6.0 * med_own)) continue;
          if (AngleDeg(cf.d[i], cf.d[j]) < options.swap_min_angle_deg) continue;
          const double cij = (v.row(i) * (cf.iota[i] / cf.iota[j]) - pr.row(j)).squaredNorm();
          const double cji = (v.row(j) * (cf.iota[j] / cf.iota[i]) - pr.row(i)).squaredNorm();
          const double gain = total - (cij + cji);
          // Both frames must be explained better by the other's direction
          // (a dead and a hot light close together are not a swap).
          const double keep = 1.0 - options.swap_gain_fraction;
          if (cij < keep * own[i] && cji < keep * own[j]) cands.push_back({gain / total, i, j});
        }
      }
      std::sort(cands.begin(), cands.end(), [](const Cand& a, const Cand& b) {
        return a.gain != b.gain ? a.gain > b.gain : (a.i != b.i ? a.i < b.i : a.j < b.j);
      });
      std::fill(partner.begin(), partner.end(), -1);
      for (const auto& cd : cands) {
        if (partner[cd.i] >= 0 || partner[cd.j] >= 0) continue;
        partner[cd.i] = cd.j;
        partner[cd.j] = cd.i;
        gain_of[cd.i] = gain_of[cd.j] = cd.gain;
      }
      // Suspicious frames leave the fit for the second pass.
      double max_pred = 0;
      for (int i = 0; i < n; ++i) max_pred = std::max(max_pred, predicted[i]);
      for (int i = 0; i < n; ++i) {
        const double ratio = predicted[i] > 0 ? measured[i] / predicted[i] : kNaN;
        if (partner[i] >= 0 || (predicted[i] >= options.min_predicted_fraction * max_pred &&
                                (ratio < options.weak_warn_ratio || ratio > options.hot_warn_ratio)))
          active[i] = 0;
      }
    }

    // Findings.
    double max_pred = 0;
    for (int i = 0; i < n; ++i) max_pred = std::max(max_pred, predicted[i]);
    for (int i = 0; i < n; ++i) {
      FrameSummary& s = frames[cf.frame[i]];
      s.measured = measured[i];
      s.predicted = predicted[i];
      if (partner[i] >= 0) {
        if (partner[i] > i) {
          const FrameSummary& o = frames[cf.frame[partner[i]]];
          Finding f;
          f.verdict = Verdict::kFail;
          f.camera = cam.id;
          f.lights = {s.light, o.light};
          f.value = 100.0 * gain_of[i];
          f.message = fmt::format(
              "camera {}: frames of lights {} and {} are swapped (each is lit from the other's "
              "direction, {} deg apart; exchanging them explains {}% of their residual)",
              cam.id, s.light, o.light, Num(AngleDeg(cf.d[i], cf.d[partner[i]]), 0), Num(100.0 * gain_of[i], 0));
          AddFinding(&slot, std::move(f));
        }
        continue;
      }
      if (!(predicted[i] > 0) || predicted[i] < options.min_predicted_fraction * max_pred) {
        ++skipped_total;
        continue;
      }
      ++judged_total;
      const double ratio = measured[i] / predicted[i];
      s.energy_ratio = ratio;
      if (ratio < weak.value) {
        weak.value = ratio;
        weak_where = fmt::format("camera {} light {}", cam.id, s.light);
      }
      if (ratio > hot.value) {
        hot.value = ratio;
        hot_where = fmt::format("camera {} light {}", cam.id, s.light);
      }
      if (ratio < options.weak_warn_ratio) {
        Finding f;
        f.verdict = ratio < options.weak_fail_ratio ? Verdict::kFail : Verdict::kWarn;
        f.camera = cam.id;
        f.lights = {s.light};
        f.frame = s.path;
        f.value = ratio;
        f.message = fmt::format(
            "camera {} light {}: frame energy is {}% of what its direction and calibrated "
            "intensity predict ({} light)",
            cam.id, s.light, Num(100 * ratio, 0), f.verdict == Verdict::kFail ? "dead" : "weak");
        AddFinding(&weak, std::move(f));
      } else if (ratio > options.hot_warn_ratio) {
        Finding f;
        f.verdict = ratio > options.hot_fail_ratio ? Verdict::kFail : Verdict::kWarn;
        f.camera = cam.id;
        f.lights = {s.light};
        f.frame = s.path;
        f.value = ratio;
        f.message = fmt::format(
            "camera {} light {}: frame energy is {}x what its direction and calibrated intensity "
            "predict (light too bright or wrong intensity in the rig file)",
            cam.id, s.light, Num(ratio, 2));
        AddFinding(&hot, std::move(f));
      }
    }

    // Colour: intensity-corrected mean colour against the camera's median.
    std::vector<int> col;
    for (int i = 0; i < n; ++i) {
      const FrameSummary& s = frames[cf.frame[i]];
      if (s.channels != 3 || partner[i] >= 0 || !std::isfinite(s.energy_ratio)) continue;
      if (s.clipped_pct > options.clipped_warn_pct || s.energy_ratio < options.weak_fail_ratio) continue;
      col.push_back(i);
    }
    if (col.size() < 3) continue;
    std::vector<Eigen::Vector3d> chroma(col.size());
    for (size_t k = 0; k < col.size(); ++k) {
      const FrameSummary& s = frames[cf.frame[col[k]]];
      const io::Light& light = session.rig.lights[session.rig.IndexOfId(s.light)];
      Eigen::Vector3d rgb = s.mean_rgb.cwiseQuotient(light.intensity.cwiseMax(1e-12));
      const double l = Lum(rgb);
      chroma[k] = l > 0 ? Eigen::Vector3d(rgb / l) : Eigen::Vector3d::Zero();
    }
    Eigen::Vector3d ref;
    for (int ch = 0; ch < 3; ++ch) {
      std::vector<double> vals;
      for (const auto& x : chroma) vals.push_back(x(ch));
      std::nth_element(vals.begin(), vals.begin() + vals.size() / 2, vals.end());
      ref(ch) = vals[vals.size() / 2];
    }
    for (size_t k = 0; k < col.size(); ++k) {
      FrameSummary& s = frames[cf.frame[col[k]]];
      if (!(ref.minCoeff() > 0)) break;
      const Eigen::Vector3d rel = chroma[k].cwiseQuotient(ref) - Eigen::Vector3d::Ones();
      int worst_ch = 0;
      rel.cwiseAbs().maxCoeff(&worst_ch);
      const double dev = 100.0 * std::abs(rel(worst_ch));
      s.colour_dev_pct = dev;
      ++colour_judged;
      if (dev > colour.value) {
        colour.value = dev;
        colour_where = fmt::format("camera {} light {}", cam.id, s.light);
      }
      if (dev > options.colour_warn_pct) {
        static const char* kNames[3] = {"red", "green", "blue"};
        Finding f;
        f.verdict = dev > options.colour_fail_pct ? Verdict::kFail : Verdict::kWarn;
        f.camera = cam.id;
        f.lights = {s.light};
        f.frame = s.path;
        f.value = dev;
        f.message = fmt::format(
            "camera {} light {}: {} channel {} by {}% against the other lights after calibration "
            "(wrong gel / LED bin or stale colour calibration)",
            cam.id, s.light, kNames[worst_ch], rel(worst_ch) > 0 ? "high" : "low", Num(dev, 1));
        AddFinding(&colour, std::move(f));
      }
    }
  }

  if (judged_total == 0) {
    weak.verdict = hot.verdict = Verdict::kSkip;
    weak.value = hot.value = kNaN;
    weak.summary = hot.summary = "no OLAT frames could be judged (need a subject mask and 4+ readable frames)";
  } else {
    weak.summary = fmt::format("lowest measured/predicted energy {} ({}); {} lights judged, {} too dim to judge",
                               Num(weak.value, 2), weak_where, judged_total, skipped_total);
    hot.summary = fmt::format("highest measured/predicted energy {} ({})", Num(hot.value, 2), hot_where);
  }
  slot.value = static_cast<double>(slot.findings.size());
  slot.summary = slot.findings.empty() ? "no frame is better explained by another light's direction"
                                       : fmt::format("{} swapped pair(s)", slot.findings.size());
  if (judged_total == 0) slot.verdict = Worse(slot.verdict, Verdict::kSkip);
  if (colour_judged == 0) {
    colour.verdict = Verdict::kSkip;
    colour.value = kNaN;
    colour.summary = "no colour frames to compare";
  } else {
    colour.summary = fmt::format("largest colour deviation {}% ({})", Num(colour.value, 1), colour_where);
  }
  lines->push_back(std::move(weak));
  lines->push_back(std::move(hot));
  lines->push_back(std::move(slot));
  lines->push_back(std::move(colour));
}

}  // namespace lumenrig::solvers::check_detail
