// Stability over the take from the tracking frames (global intensity drift,
// subject motion by phase correlation) and the matting prerequisite (clean
// plate and backlit frame aligned).
#include <algorithm>
#include <cmath>
#include <limits>

#include <opencv2/imgproc.hpp>

#include "check_internal.h"

namespace lumenrig::solvers::check_detail {

namespace {

/// Weighted Lucas-Kanade (Gauss-Newton on a pure translation) from `d`:
/// moved(x + d) ~ reference(x). Returns the weighted mean squared residual.
/// OpenCV's bilinear warp places samples on a 1/32-pixel grid
/// (INTER_BITS = 5), so the residual is flat between grid steps and the
/// iteration ends in a cycle of steps of about that size rather than below
/// 1e-3: it stops after two steps in a row that do not lower the residual
/// and keeps the best shift seen (it ran all 30 iterations at every call
/// before).
double RefineShift(const cv::Mat& ref, const cv::Mat& mov, const cv::Mat& win, cv::Point2d* d) {
  cv::Mat warped, gx, gy;
  double err = std::numeric_limits<double>::infinity();
  cv::Point2d best = *d;
  int stalls = 0;  // iterations in a row without a lower residual
  const double wsum = std::max(1e-12, cv::sum(win)[0]);
  for (int iter = 0; iter < 30; ++iter) {
    const cv::Mat m = (cv::Mat_<double>(2, 3) << 1, 0, d->x, 0, 1, d->y);
    cv::warpAffine(mov, warped, m, mov.size(), cv::INTER_LINEAR | cv::WARP_INVERSE_MAP, cv::BORDER_REPLICATE);
    cv::Sobel(warped, gx, CV_32F, 1, 0, 3, 1.0 / 8.0);
    cv::Sobel(warped, gy, CV_32F, 0, 1, 3, 1.0 / 8.0);
    // The weighted sums of the normal equations in one pass (no full-size
    // temporaries: at 2048x2048 they cost more in page faults than in maths).
    double e = 0, a = 0, b = 0, c = 0, u = 0, v = 0;
    for (int y = 0; y < ref.rows; ++y) {
      const float* pw = warped.ptr<float>(y);
      const float* pr = ref.ptr<float>(y);
      const float* pg = gx.ptr<float>(y);
      const float* ph = gy.ptr<float>(y);
      const float* pn = win.ptr<float>(y);
      double re = 0, ra = 0, rb = 0, rc = 0, ru = 0, rv = 0;
      for (int x = 0; x < ref.cols; ++x) {
        const double w = pn[x], r = pw[x] - pr[x], g = pg[x], h = ph[x];
        re += w * r * r;
        ra += w * g * g;
        rb += w * g * h;
        rc += w * h * h;
        ru += w * g * r;
        rv += w * h * r;
      }
      e += re, a += ra, b += rb, c += rc, u += ru, v += rv;
    }
    const bool improved = e / wsum < err;
    if (improved) {
      err = e / wsum;
      best = *d;
      stalls = 0;
    } else if (++stalls >= 2) {
      break;
    }
    const double det = a * c - b * b;
    if (!(det > 1e-12 * (a * c + 1e-30))) break;
    double sx = -(c * u - b * v) / det, sy = -(a * v - b * u) / det;
    const double step = std::hypot(sx, sy);
    if (step > 1.0) sx /= step, sy /= step;  // trust region: at most a pixel per step
    d->x += sx;
    d->y += sy;
    if (step < 1e-3 && improved) return err;  // converged from the best shift
  }
  *d = best;
  return err;
}

/// Coarse-to-fine Lucas-Kanade from `start` over a 3-level pyramid.
double PyramidShift(const cv::Mat& ref, const cv::Mat& mov, const cv::Mat& win, cv::Point2d start, cv::Point2d* d) {
  std::vector<cv::Mat> r{ref}, m{mov}, w{win};
  while (r.size() < 3 && std::min(r.back().cols, r.back().rows) >= 64) {
    cv::Mat a, b, c;
    cv::pyrDown(r.back(), a);
    cv::pyrDown(m.back(), b);
    cv::resize(w.back(), c, a.size(), 0, 0, cv::INTER_AREA);
    r.push_back(a);
    m.push_back(b);
    w.push_back(c);
  }
  const double scale = std::ldexp(1.0, static_cast<int>(r.size()) - 1);
  *d = cv::Point2d(start.x / scale, start.y / scale);
  double err = 0;
  for (int level = static_cast<int>(r.size()) - 1; level >= 0; --level) {
    err = RefineShift(r[level], m[level], w[level], d);
    if (level > 0) *d *= 2.0;
  }
  return err;
}

}  // namespace

cv::Point2d EstimateShift(const cv::Mat& reference, const cv::Mat& moved, const cv::Mat& window, double* response) {
  cv::Mat win = window;
  if (win.empty()) cv::createHanningWindow(win, reference.size(), CV_32F);
  // Remove the weighted mean so the window's own spectrum does not dominate.
  auto centred = [&](const cv::Mat& img) {
    const double wsum = cv::sum(win)[0];
    const double mean = wsum > 0 ? cv::sum(img.mul(win))[0] / wsum : 0.0;
    cv::Mat out = img - mean;
    return out;
  };
  double r = 0;
  const cv::Point2d phase = cv::phaseCorrelate(centred(reference), centred(moved), win, &r);
  if (response) *response = r;

  // Phase correlation whitens the spectrum, so on smooth content (painted
  // walls, plaster) noise sets its error. Refine with coarse-to-fine weighted
  // Lucas-Kanade on lightly smoothed, gain/offset-normalised images, started
  // from zero and from the phase-correlation peak; keep the better fit.
  auto normalised = [&](const cv::Mat& img) {
    cv::Mat s;
    cv::GaussianBlur(img, s, cv::Size(0, 0), 1.0);
    // Statistics under the window only: what it masks out (a subject
    // present in one frame only) must not change the normalisation.
    const double wsum = std::max(1e-12, cv::sum(win)[0]);
    const double mean = cv::sum(s.mul(win))[0] / wsum;
    cv::Mat c = s - mean;
    const double var = cv::sum(c.mul(c).mul(win))[0] / wsum;
    return cv::Mat(c / std::sqrt(std::max(1e-24, var)));
  };
  const cv::Mat ref = normalised(reference), mov = normalised(moved);
  cv::Point2d from_zero, from_phase;
  const double e0 = PyramidShift(ref, mov, win, cv::Point2d(0, 0), &from_zero);
  const double e1 = PyramidShift(ref, mov, win, phase, &from_phase);
  cv::Point2d d = e1 < e0 ? from_phase : from_zero;
  if (!std::isfinite(d.x) || !std::isfinite(d.y)) return phase;
  // Robust polish: Cauchy weights on the residual (scale 3 x 1.4826 MAD) so
  // what differs between the two frames (a silhouette, hair, a moved
  // shadow) does not bias the shift.
  for (int round = 0; round < 3; ++round) {
    cv::Mat warped;
    const cv::Mat m = (cv::Mat_<double>(2, 3) << 1, 0, d.x, 0, 1, d.y);
    cv::warpAffine(mov, warped, m, mov.size(), cv::INTER_LINEAR | cv::WARP_INVERSE_MAP, cv::BORDER_REPLICATE);
    const cv::Mat res = cv::abs(warped - ref);
    std::vector<float> vals;
    for (int y = 0; y < res.rows; ++y)
      for (int x = 0; x < res.cols; ++x)
        if (win.at<float>(y, x) > 1e-3f) vals.push_back(res.at<float>(y, x));
    if (vals.size() < 16) break;
    std::nth_element(vals.begin(), vals.begin() + vals.size() / 2, vals.end());
    const double scale = std::max(1e-6, 3.0 * 1.4826 * vals[vals.size() / 2]);
    cv::Mat q = res / scale;
    cv::Mat robust = 1.0 / (1.0 + q.mul(q));
    cv::Point2d next = d;
    RefineShift(ref, mov, win.mul(robust), &next);
    if (!std::isfinite(next.x) || !std::isfinite(next.y)) break;
    d = next;
  }
  return d;
}

namespace {
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
std::string After(int light) { return fmt::format("after light {}", light); }
}  // namespace

void CheckStability(const io::Session& session, const CheckOptions& options, CheckResult* result,
                    std::vector<CheckLine>* lines) {
  (void)session;
  CheckLine drift = MakeLine("stability.drift", "Lighting stable over the take (tracking frames)", "%",
                             options.drift_warn_pct, options.drift_fail_pct);
  CheckLine motion = MakeLine("stability.motion", "Subject still over the take (tracking frames)", "px",
                              options.motion_warn_px, options.motion_fail_px);
  int cams_with_tracking = 0;
  std::string drift_where, motion_where;
  for (size_t c = 0; c < result->cameras.size(); ++c) {
    CameraSummary& cs = result->cameras[c];
    std::vector<const FrameSummary*> tr;
    for (const auto& s : result->frames)
      if (s.camera == static_cast<int>(c) && s.kind == FrameKind::kTracking && s.readable && s.error.empty() &&
          s.has_motion)
        tr.push_back(&s);
    std::sort(tr.begin(), tr.end(), [](const FrameSummary* a, const FrameSummary* b) { return a->order < b->order; });
    if (tr.size() < 2 || !(tr[0]->box_energy > 0)) continue;
    ++cams_with_tracking;
    const FrameSummary& first = *tr[0];
    cs.tracking.clear();
    for (const FrameSummary* s : tr) {
      // Drift from the energy over the subject's box (the mask dilated), so a
      // subject that moves stays inside what is summed.
      TrackingPoint t;
      t.after_light = s->light;
      t.drift_pct = 100.0 * (s->box_energy / first.box_energy - 1.0);
      t.shift_x_px = s->shift_x_px;
      t.shift_y_px = s->shift_y_px;
      cs.tracking.push_back(t);
    }
    // Worst frame against the first, and worst interval between neighbours.
    size_t worst_d = 0, worst_m = 0, step_d = 1, step_m = 1;
    auto mag = [](const TrackingPoint& t) { return std::hypot(t.shift_x_px, t.shift_y_px); };
    for (size_t k = 1; k < cs.tracking.size(); ++k) {
      const auto& t = cs.tracking[k];
      const auto& p = cs.tracking[k - 1];
      if (std::abs(t.drift_pct) > std::abs(cs.tracking[worst_d].drift_pct)) worst_d = k;
      if (mag(t) > mag(cs.tracking[worst_m])) worst_m = k;
      if (std::abs(t.drift_pct - p.drift_pct) >
          std::abs(cs.tracking[step_d].drift_pct - cs.tracking[step_d - 1].drift_pct))
        step_d = k;
      if (std::hypot(t.shift_x_px - p.shift_x_px, t.shift_y_px - p.shift_y_px) >
          std::hypot(cs.tracking[step_m].shift_x_px - cs.tracking[step_m - 1].shift_x_px,
                     cs.tracking[step_m].shift_y_px - cs.tracking[step_m - 1].shift_y_px))
        step_m = k;
    }
    const auto& td = cs.tracking[worst_d];
    const double dval = std::abs(td.drift_pct);
    const double step_dv = cs.tracking[step_d].drift_pct - cs.tracking[step_d - 1].drift_pct;
    const std::string d_interval = fmt::format(
        "largest step {}{}% between the tracking frames {} and {}", step_dv >= 0 ? "+" : "", Num(step_dv, 2),
        After(cs.tracking[step_d - 1].after_light), After(cs.tracking[step_d].after_light));
    if (dval >= drift.value) {
      drift.value = dval;
      drift_where = fmt::format("camera {}, tracking frame {}; {}", cs.id, After(td.after_light), d_interval);
    }
    if (dval > options.drift_warn_pct) {
      Finding f;
      f.verdict = dval > options.drift_fail_pct ? Verdict::kFail : Verdict::kWarn;
      f.camera = cs.id;
      f.lights = {td.after_light};
      f.frame = tr[worst_d]->path;
      f.value = td.drift_pct;
      f.message = fmt::format("camera {}: lighting drifted {}{}% from the first tracking frame ({}) to the one {}; {}",
                              cs.id, td.drift_pct >= 0 ? "+" : "", Num(td.drift_pct, 2), After(first.light),
                              After(td.after_light), d_interval);
      AddFinding(&drift, std::move(f));
    }
    const auto& tm = cs.tracking[worst_m];
    const double mval = mag(tm);
    const auto& a = cs.tracking[step_m - 1];
    const auto& b = cs.tracking[step_m];
    const std::string m_interval =
        fmt::format("largest step {} px between the tracking frames {} and {}",
                    Num(std::hypot(b.shift_x_px - a.shift_x_px, b.shift_y_px - a.shift_y_px), 2), After(a.after_light),
                    After(b.after_light));
    if (mval >= motion.value) {
      motion.value = mval;
      motion_where = fmt::format("camera {}, tracking frame {}; {}", cs.id, After(tm.after_light), m_interval);
    }
    if (mval > options.motion_warn_px) {
      Finding f;
      f.verdict = mval > options.motion_fail_px ? Verdict::kFail : Verdict::kWarn;
      f.camera = cs.id;
      f.lights = {tm.after_light};
      f.frame = tr[worst_m]->path;
      f.value = mval;
      f.message = fmt::format(
          "camera {}: subject moved {} px (dx {}, dy {}) from the first tracking frame to the one "
          "{}; {}",
          cs.id, Num(mval, 2), Num(tm.shift_x_px, 2), Num(tm.shift_y_px, 2), After(tm.after_light), m_interval);
      AddFinding(&motion, std::move(f));
    }
  }
  if (cams_with_tracking == 0) {
    drift.verdict = motion.verdict = Verdict::kSkip;
    drift.value = motion.value = kNaN;
    drift.summary = motion.summary = "fewer than two readable tracking frames listed";
  } else {
    drift.summary = fmt::format("largest drift {}% ({})", Num(drift.value, 2), drift_where);
    motion.summary = fmt::format("largest subject shift {} px ({})", Num(motion.value, 2), motion_where);
  }
  lines->push_back(std::move(drift));
  lines->push_back(std::move(motion));
}

void CheckMatting(const io::Session& session, const CheckOptions& options, CheckResult* result,
                  std::vector<CheckLine>* lines) {
  CheckLine align = MakeLine("matting.alignment", "Clean plate and backlit frame aligned (camera did not move)", "px",
                             options.alignment_warn_px, options.alignment_fail_px);
  int n = 0;
  std::string parts;
  for (size_t c = 0; c < result->cameras.size(); ++c) {
    const CameraSummary& cs = result->cameras[c];
    if (!cs.has_alignment) continue;
    ++n;
    const double mag = std::hypot(cs.align_dx_px, cs.align_dy_px);
    align.value = std::max(align.value, mag);
    parts += fmt::format("{}camera {} {} px", parts.empty() ? "" : ", ", cs.id, Num(mag, 2));
    if (mag > options.alignment_warn_px) {
      Finding f;
      f.verdict = mag > options.alignment_fail_px ? Verdict::kFail : Verdict::kWarn;
      f.camera = cs.id;
      f.frame = session.cameras[c].backlit;
      f.value = mag;
      f.message = fmt::format(
          "camera {}: backlit frame is shifted {} px (dx {}, dy {}) against the clean plate; the "
          "camera moved between them, difference matting will leave edges",
          cs.id, Num(mag, 2), Num(cs.align_dx_px, 2), Num(cs.align_dy_px, 2));
      AddFinding(&align, std::move(f));
    }
  }
  if (n == 0) {
    align.verdict = Verdict::kSkip;
    align.value = kNaN;
    align.summary = "no camera lists both a clean plate and a backlit frame";
  } else {
    align.summary = "shift of the backlit frame against the clean plate: " + parts;
  }
  lines->push_back(std::move(align));
}

}  // namespace lumenrig::solvers::check_detail
