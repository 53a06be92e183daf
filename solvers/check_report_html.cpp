// The technician's HTML report: one self-contained file (inline CSS, inline
// SVG plots, thumbnails as PNG data URIs; no scripts, no network). Every
// string that comes from input files is escaped.
#include <algorithm>
#include <cmath>
#include <limits>
#include <sstream>

#include "check_internal.h"
#include "lumenrig/capture_io/atomic_file.h"

namespace lumenrig::solvers {

namespace {

using check_detail::Num;

std::string Esc(const std::string& s) {
  std::string out;
  out.reserve(s.size());
  for (char ch : s) {
    switch (ch) {
      case '&': out += "&amp;"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '"': out += "&quot;"; break;
      case '\'': out += "&#39;"; break;
      default: out += ch;
    }
  }
  return out;
}

std::string Base64(const std::vector<unsigned char>& data) {
  static const char* kTable = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
  std::string out;
  out.reserve((data.size() + 2) / 3 * 4);
  size_t i = 0;
  for (; i + 2 < data.size(); i += 3) {
    const unsigned v = (data[i] << 16) | (data[i + 1] << 8) | data[i + 2];
    out += kTable[(v >> 18) & 63];
    out += kTable[(v >> 12) & 63];
    out += kTable[(v >> 6) & 63];
    out += kTable[v & 63];
  }
  if (i < data.size()) {
    unsigned v = data[i] << 16;
    if (i + 1 < data.size()) v |= data[i + 1] << 8;
    out += kTable[(v >> 18) & 63];
    out += kTable[(v >> 12) & 63];
    out += i + 1 < data.size() ? kTable[(v >> 6) & 63] : '=';
    out += '=';
  }
  return out;
}

const char* VerdictClass(Verdict v) {
  switch (v) {
    case Verdict::kPass: return "pass";
    case Verdict::kSkip: return "skip";
    case Verdict::kWarn: return "warn";
    case Verdict::kFail: return "fail";
  }
  return "skip";
}

const char* VerdictColour(Verdict v) {
  switch (v) {
    case Verdict::kPass: return "#2e7d32";
    case Verdict::kSkip: return "#757575";
    case Verdict::kWarn: return "#c77700";
    case Verdict::kFail: return "#c62828";
  }
  return "#757575";
}

/// Viridis-like ramp (5 stops sampled from matplotlib's viridis, from memory).
std::string Ramp(double t) {
  static const double kStops[5][3] = {{68, 1, 84}, {59, 82, 139}, {33, 145, 140}, {94, 201, 98}, {253, 231, 37}};
  if (!std::isfinite(t)) return "#999999";
  t = std::clamp(t, 0.0, 1.0) * 4.0;
  const int i = std::min(3, static_cast<int>(t));
  const double f = t - i;
  int rgb[3];
  for (int c = 0; c < 3; ++c) rgb[c] = static_cast<int>(std::lround(kStops[i][c] * (1 - f) + kStops[i + 1][c] * f));
  return fmt::format("#{:02x}{:02x}{:02x}", rgb[0], rgb[1], rgb[2]);
}

/// A simple x/y plot frame in SVG with axes, ticks and labels.
class SvgPlot {
 public:
  SvgPlot(int width, int height, double x0, double x1, double y0, double y1, const std::string& xlabel,
          const std::string& ylabel)
      : w_(width), h_(height), x0_(x0), x1_(x1 > x0 ? x1 : x0 + 1), y0_(y0), y1_(y1 > y0 ? y1 : y0 + 1) {
    out_ << fmt::format(
        "<svg width='{}' height='{}' viewBox='0 0 {} {}' "
        "class='plot'>",
        w_, h_, w_, h_);
    out_ << fmt::format("<rect x='{}' y='{}' width='{}' height='{}' fill='#fff' stroke='#bbb'/>", kL, kT, PlotW(),
                        PlotH());
    for (int k = 0; k <= 4; ++k) {
      const double yv = y0_ + (y1_ - y0_) * k / 4.0;
      const double py = Y(yv);
      out_ << fmt::format("<line x1='{}' x2='{}' y1='{:.1f}' y2='{:.1f}' stroke='#eee'/>", kL, kL + PlotW(), py, py);
      out_ << fmt::format("<text x='{}' y='{:.1f}' class='tick' text-anchor='end'>{}</text>", kL - 4, py + 4,
                          Num(yv, std::abs(y1_ - y0_) < 5 ? 2 : 0));
    }
    for (int k = 0; k <= 5; ++k) {
      const double xv = x0_ + (x1_ - x0_) * k / 5.0;
      out_ << fmt::format("<text x='{:.1f}' y='{}' class='tick' text-anchor='middle'>{}</text>", X(xv),
                          kT + PlotH() + 14, Num(xv, std::abs(x1_ - x0_) < 5 ? 1 : 0));
    }
    out_ << fmt::format("<text x='{:.1f}' y='{}' class='axis' text-anchor='middle'>{}</text>", kL + PlotW() / 2.0,
                        h_ - 4, Esc(xlabel));
    out_ << fmt::format(
        "<text x='12' y='{:.1f}' class='axis' text-anchor='middle' transform='rotate(-90 12 {:.1f})'>"
        "{}</text>",
        kT + PlotH() / 2.0, kT + PlotH() / 2.0, Esc(ylabel));
  }
  double X(double x) const { return kL + (x - x0_) / (x1_ - x0_) * PlotW(); }
  double Y(double y) const { return kT + (1.0 - (std::clamp(y, y0_, y1_) - y0_) / (y1_ - y0_)) * PlotH(); }
  double PlotW() const { return w_ - kL - 12.0; }
  double PlotH() const { return h_ - kT - 36.0; }
  void HLine(double y, const char* colour, const std::string& label) {
    if (y < y0_ || y > y1_) return;
    out_ << fmt::format("<line x1='{}' x2='{:.1f}' y1='{:.1f}' y2='{:.1f}' stroke='{}' stroke-dasharray='5,3'/>", kL,
                        kL + PlotW(), Y(y), Y(y), colour);
    out_ << fmt::format("<text x='{:.1f}' y='{:.1f}' class='tick' fill='{}' text-anchor='end'>{}</text>",
                        kL + PlotW() - 3, Y(y) - 3, colour, Esc(label));
  }
  void Raw(const std::string& s) { out_ << s; }
  std::string Finish() {
    out_ << "</svg>";
    return out_.str();
  }

 private:
  static constexpr double kL = 52, kT = 10;
  int w_, h_;
  double x0_, x1_, y0_, y1_;
  std::ostringstream out_;
};

std::string ThresholdText(const CheckLine& line) {
  std::string s;
  if (std::isfinite(line.warn_threshold)) s += "warn " + Num(line.warn_threshold, 3);
  if (std::isfinite(line.fail_threshold))
    s += (s.empty() ? "" : " / ") + std::string("fail ") + Num(line.fail_threshold, 3);
  return s.empty() ? "-" : s;
}

std::string Badge(Verdict v) {
  return fmt::format("<span class='badge {}'>{}</span>", VerdictClass(v), VerdictName(v));
}

std::string ExposurePlot(const CheckResult& r, int cam, const std::vector<const FrameSummary*>& olat) {
  const double sat = r.options.saturation_level;
  double ymax = 1.05;
  for (const auto* s : olat) ymax = std::max(ymax, s->p99 / sat * 1.05);
  const double n = static_cast<double>(olat.size());
  SvgPlot plot(1180, 250, 0, std::max(1.0, n), 0, ymax, "OLAT frame in capture order (hover a bar for the light id)",
               "fraction of full scale");
  const double bw = std::max(1.0, plot.PlotW() / std::max(1.0, n) - 1.0);
  for (size_t i = 0; i < olat.size(); ++i) {
    const FrameSummary& s = *olat[i];
    const double x = plot.X(static_cast<double>(i));
    const double ym = plot.Y(std::max(0.0, s.mean / sat)), yp = plot.Y(std::max(0.0, s.p99 / sat));
    const char* colour =
        s.verdict == Verdict::kFail ? "#c62828" : (s.verdict == Verdict::kWarn ? "#e0a000" : "#5c7fa3");
    plot.Raw(fmt::format(
        "<g><title>camera {} light {}: mean {}, p99 {} of full scale, {}% clipped{}</title>"
        "<rect x='{:.1f}' y='{:.1f}' width='{:.1f}' height='{:.1f}' fill='{}'/>"
        "<rect x='{:.1f}' y='{:.1f}' width='{:.1f}' height='2' fill='#222'/></g>",
        Esc(r.cameras[cam].id), s.light, Num(s.mean / sat, 3), Num(s.p99 / sat, 3), Num(s.clipped_pct, 2),
        s.flag.empty() ? "" : " - " + Esc(s.flag), x + 0.5, ym, bw, plot.Y(0) - ym, colour, x + 0.5, yp - 1, bw));
  }
  plot.HLine(1.0, "#c62828", "clipping (full scale)");
  plot.HLine(r.options.underexposed_warn, "#c77700", "p99 target for the brightest frame");
  return plot.Finish();
}

std::string RatioPlot(const CheckResult& r, int cam, const std::vector<const FrameSummary*>& olat) {
  double ymax = std::max(2.0, r.options.hot_warn_ratio * 1.2);
  for (const auto* s : olat)
    if (std::isfinite(s->energy_ratio)) ymax = std::max(ymax, std::min(6.0, s->energy_ratio * 1.1));
  const double n = static_cast<double>(olat.size());
  SvgPlot plot(1180, 220, 0, std::max(1.0, n), 0, ymax, "OLAT frame in capture order", "measured / predicted energy");
  for (size_t i = 0; i < olat.size(); ++i) {
    const FrameSummary& s = *olat[i];
    const double x = plot.X(i + 0.5);
    if (!std::isfinite(s.energy_ratio)) {
      plot.Raw(
          fmt::format("<g><title>camera {} light {}: {}</title><circle cx='{:.1f}' cy='{:.1f}' r='2' "
                      "fill='#bbb'/></g>",
                      Esc(r.cameras[cam].id), s.light,
                      s.flag.empty() ? "not judged (subject barely lit from here)" : Esc(s.flag), x, plot.Y(0) - 2));
      continue;
    }
    plot.Raw(fmt::format(
        "<g><title>camera {} light {}: measured/predicted {}</title><circle cx='{:.1f}' cy='{:.1f}' "
        "r='3.5' fill='{}'/></g>",
        Esc(r.cameras[cam].id), s.light, Num(s.energy_ratio, 3), x, plot.Y(s.energy_ratio), VerdictColour(s.verdict)));
  }
  plot.HLine(1.0, "#555", "as calibrated");
  plot.HLine(r.options.weak_fail_ratio, "#c62828", "dead");
  plot.HLine(r.options.weak_warn_ratio, "#c77700", "weak");
  plot.HLine(r.options.hot_warn_ratio, "#c77700", "hot");
  return plot.Finish();
}

std::string DomeMap(const CheckResult& r, int cam, const std::vector<const FrameSummary*>& olat) {
  SvgPlot plot(1180, 400, -180, 180, -90, 90, "azimuth (deg, rig frame, 0 = +z toward the camera side)",
               "elevation (deg)");
  double emax = 0;
  for (const auto* s : olat) emax = std::max(emax, s->measured);
  for (const auto* s : olat) {
    const Eigen::Vector3d& d = s->direction_rig;
    if (d.norm() == 0) continue;
    const double az = std::atan2(d.x(), d.z()) * 180.0 / M_PI;
    const double el = std::asin(std::clamp(d.y(), -1.0, 1.0)) * 180.0 / M_PI;
    const double t = emax > 0 ? std::clamp(s->measured / emax, 0.0, 1.0) : 0.0;
    const bool bad = s->verdict == Verdict::kFail || s->verdict == Verdict::kWarn;
    plot.Raw(
        fmt::format("<g><title>camera {} light {}: az {} el {}, energy {} of max{}</title>"
                    "<circle cx='{:.1f}' cy='{:.1f}' r='7' fill='{}' stroke='{}' stroke-width='{}'/></g>",
                    Esc(r.cameras[cam].id), s->light, Num(az, 0), Num(el, 0), Num(t, 2),
                    s->flag.empty() ? "" : " - " + Esc(s->flag), plot.X(az), plot.Y(el), Ramp(std::sqrt(t)),
                    bad ? VerdictColour(s->verdict) : "#333", bad ? 3 : 0.5));
  }
  // Colour legend.
  std::string legend;
  for (int k = 0; k <= 10; ++k)
    legend +=
        fmt::format("<rect x='{}' y='0' width='16' height='10' fill='{}'/>", 60 + 16 * k, Ramp(std::sqrt(k / 10.0)));
  plot.Raw(
      fmt::format("<g transform='translate(880,{})'>{}<text x='56' y='9' class='tick' text-anchor='end'>0</text>"
                  "<text x='240' y='9' class='tick'>max energy</text></g>",
                  0, legend));
  return plot.Finish();
}

std::string TimePlot(const std::vector<TrackingPoint>& t, bool motion, const CheckOptions& o) {
  double ymin = 0, ymax = 0;
  for (const auto& p : t) {
    const double v = motion ? std::hypot(p.shift_x_px, p.shift_y_px) : p.drift_pct;
    ymin = std::min(ymin, v);
    ymax = std::max(ymax, v);
  }
  if (motion) {
    ymin = 0;
    ymax = std::max(ymax * 1.15, o.motion_fail_px * 1.2);
  } else {
    const double a = std::max({std::abs(ymin), std::abs(ymax), o.drift_fail_pct}) * 1.2;
    ymin = -a;
    ymax = a;
  }
  const double x1 = t.empty() ? 1 : t.back().after_light;
  const double x0 = t.empty() ? 0 : t.front().after_light;
  SvgPlot plot(575, 240, x0, std::max(x0 + 1, x1), ymin, ymax, "tracking frame (captured after light id)",
               motion ? "subject shift (px)" : "intensity drift (%)");
  std::string pts;
  for (const auto& p : t) {
    const double v = motion ? std::hypot(p.shift_x_px, p.shift_y_px) : p.drift_pct;
    pts += fmt::format("{:.1f},{:.1f} ", plot.X(p.after_light), plot.Y(v));
  }
  plot.Raw(fmt::format("<polyline points='{}' fill='none' stroke='#1f5fa0' stroke-width='2'/>", pts));
  for (const auto& p : t) {
    const double v = motion ? std::hypot(p.shift_x_px, p.shift_y_px) : p.drift_pct;
    plot.Raw(
        fmt::format("<g><title>after light {}: {}{}</title><circle cx='{:.1f}' cy='{:.1f}' r='3' "
                    "fill='#1f5fa0'/></g>",
                    p.after_light, Num(v, 2), motion ? " px" : " %", plot.X(p.after_light), plot.Y(v)));
  }
  if (motion) {
    plot.HLine(o.motion_warn_px, "#c77700", "warn");
    plot.HLine(o.motion_fail_px, "#c62828", "fail");
  } else {
    plot.HLine(o.drift_warn_pct, "#c77700", "warn");
    plot.HLine(-o.drift_warn_pct, "#c77700", "");
    plot.HLine(o.drift_fail_pct, "#c62828", "fail");
    plot.HLine(-o.drift_fail_pct, "#c62828", "");
  }
  return plot.Finish();
}

const char* kCss = R"CSS(
body{font-family:-apple-system,"Segoe UI",Roboto,Helvetica,Arial,sans-serif;margin:0;background:#f4f5f7;color:#1d232b}
header{padding:18px 28px;color:#fff}
header.pass{background:#2e7d32}header.warn{background:#b36b00}header.fail{background:#b71c1c}
header h1{margin:0;font-size:30px;letter-spacing:.5px}
header p{margin:4px 0 0;opacity:.92;font-size:14px}
main{padding:10px 28px 40px}
section{background:#fff;border:1px solid #dde1e6;border-radius:6px;margin:16px 0;padding:12px 18px}
h2{font-size:19px;margin:4px 0 10px}h3{font-size:15px;margin:14px 0 6px;color:#3a4654}
table{border-collapse:collapse;width:100%;font-size:13px}
th,td{border-bottom:1px solid #e6e9ed;padding:5px 8px;text-align:left;vertical-align:top}
th{background:#f0f2f5;font-weight:600}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
.badge{display:inline-block;min-width:42px;text-align:center;padding:2px 6px;border-radius:3px;color:#fff;font-weight:700;font-size:12px}
.badge.pass{background:#2e7d32}.badge.warn{background:#c77700}.badge.fail{background:#c62828}.badge.skip{background:#8a8f96}
.sheet{display:flex;flex-wrap:wrap;gap:6px}
.thumb{width:100px;border:3px solid #d0d4da;border-radius:4px;background:#222;position:relative}
.thumb img{display:block;width:100%;image-rendering:auto}
.thumb .missing{height:70px;color:#ff8a80;font-size:12px;display:flex;align-items:center;justify-content:center}
.thumb .cap{background:#fff;color:#1d232b;font-size:11px;padding:1px 4px;display:flex;justify-content:space-between}
.thumb.warn{border-color:#e0a000}.thumb.fail{border-color:#d32f2f}
.thumb .tag{position:absolute;top:2px;left:2px;font-size:10px;font-weight:700;color:#fff;padding:0 3px;border-radius:2px}
.thumb.warn .tag{background:#c77700}.thumb.fail .tag{background:#c62828}
.plots{display:flex;flex-wrap:wrap;gap:12px}
svg.plot{background:#fff;max-width:100%}
svg .tick{font-size:10px;fill:#555}svg .axis{font-size:11px;fill:#333}
.meta{color:#5a6572;font-size:13px}
.note{color:#5a6572;font-size:12px;margin:4px 0}
code{font-size:12px;background:#f0f2f5;padding:0 3px;border-radius:2px}
)CSS";

}  // namespace

std::string RenderCheckReportHtml(const CheckResult& r) {
  std::ostringstream h;
  int fails = 0, warns = 0;
  for (const auto& line : r.checks) {
    fails += line.verdict == Verdict::kFail;
    warns += line.verdict == Verdict::kWarn;
  }
  const std::string verdict_text =
      r.verdict == Verdict::kFail
          ? fmt::format("FAIL: {} check(s) failed - do not release the subject, recapture what is listed below", fails)
          : (r.verdict == Verdict::kWarn ? fmt::format("PASS with {} warning(s) - usable, review the warnings", warns)
                                         : std::string("PASS - session is usable"));
  h << "<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
    << "<meta name='viewport' content='width=device-width, initial-scale=1'>"
    << "<title>lumenrig check: " << Esc(r.session_id) << "</title><style>" << kCss << "</style></head><body>\n";
  const char* hclass = r.verdict == Verdict::kFail ? "fail" : (r.verdict == Verdict::kWarn ? "warn" : "pass");
  h << "<header class='" << hclass << "'><h1>" << Esc(verdict_text) << "</h1><p>Session <b>" << Esc(r.session_id)
    << "</b> &middot; rig " << Esc(r.rig_name) << " &middot; " << r.light_count << " lights &middot; "
    << r.cameras.size() << " camera(s) &middot; checked in " << Num(r.seconds, 1) << " s</p><p>" << Esc(r.session_path)
    << "</p></header>\n<main>\n";

  // Summary table, one line per check.
  h << "<section><h2>Checks</h2><table><tr><th>verdict</th><th>check</th><th>value</th><th>thresholds</th>"
       "<th>what was measured</th></tr>\n";
  for (const auto& line : r.checks) {
    h << "<tr><td>" << Badge(line.verdict) << "</td><td><b>" << Esc(line.title) << "</b><br><code>" << Esc(line.key)
      << "</code></td><td class='num'>" << Esc(Num(line.value, 3)) << " " << Esc(line.unit) << "</td><td class='num'>"
      << Esc(ThresholdText(line)) << "</td><td>" << Esc(line.summary) << "</td></tr>\n";
  }
  h << "</table></section>\n";

  // Findings.
  std::vector<std::pair<const CheckLine*, const Finding*>> found;
  for (const auto& line : r.checks)
    for (const auto& f : line.findings) found.push_back({&line, &f});
  std::stable_sort(found.begin(), found.end(), [](const auto& a, const auto& b) {
    return static_cast<int>(a.second->verdict) > static_cast<int>(b.second->verdict);
  });
  h << "<section><h2>Findings (" << found.size() << ")</h2>";
  if (found.empty()) {
    h << "<p>Nothing to report.</p>";
  } else {
    h << "<table><tr><th>verdict</th><th>check</th><th>camera</th><th>light(s)</th><th>finding</th></tr>\n";
    for (const auto& [line, f] : found) {
      std::string lights;
      for (size_t i = 0; i < f->lights.size(); ++i) lights += (i ? ", " : "") + std::to_string(f->lights[i]);
      h << "<tr><td>" << Badge(f->verdict) << "</td><td><code>" << Esc(line->key) << "</code></td><td>"
        << Esc(f->camera) << "</td><td>" << Esc(lights) << "</td><td>" << Esc(f->message);
      if (!f->frame.empty()) h << "<br><span class='meta'>" << Esc(f->frame) << "</span>";
      h << "</td></tr>\n";
    }
    h << "</table>";
  }
  h << "</section>\n";

  // Per camera.
  for (size_t c = 0; c < r.cameras.size(); ++c) {
    const CameraSummary& cs = r.cameras[c];
    std::vector<const FrameSummary*> olat;
    for (const auto& s : r.frames)
      if (s.camera == static_cast<int>(c) && s.kind == FrameKind::kOlat) olat.push_back(&s);
    h << "<section><h2>Camera " << Esc(cs.id) << "</h2><p class='meta'>" << cs.width << " x " << cs.height
      << " px &middot; subject mask: " << Esc(cs.mask_source) << " (" << Num(100 * cs.mask_fraction, 1)
      << "% of the frame)";
    if (cs.has_alignment)
      h << " &middot; backlit vs clean plate shift " << Num(std::hypot(cs.align_dx_px, cs.align_dy_px), 2) << " px";
    h << "</p>\n";

    h << "<h3>Contact sheet: every OLAT frame (full scale = white; red/amber border = flagged)</h3><div class='sheet'>";
    // Tiles by light id, with a placeholder for every light without a frame.
    std::vector<std::pair<int, const FrameSummary*>> tiles;
    for (const auto* s : olat) tiles.push_back({s->light, s});
    for (int id : cs.missing_lights) tiles.push_back({id, nullptr});
    std::stable_sort(tiles.begin(), tiles.end(), [](const auto& a, const auto& b) { return a.first < b.first; });
    for (const auto& [id, s] : tiles) {
      if (s == nullptr) {
        h << "<div class='thumb fail'><div class='missing'>no frame</div><span class='tag'>missing</span>"
          << "<div class='cap'><span>L" << id << "</span><span></span></div></div>";
        continue;
      }
      const char* cls = s->verdict == Verdict::kFail ? " fail" : (s->verdict == Verdict::kWarn ? " warn" : "");
      h << "<div class='thumb" << cls << "' title='" << Esc(s->path) << "'>";
      if (!s->thumbnail_png.empty()) {
        h << "<img alt='light " << s->light << "' src='data:image/png;base64," << Base64(s->thumbnail_png) << "'>";
      } else {
        h << "<div class='missing'>unreadable</div>";
      }
      if (s->verdict == Verdict::kFail || s->verdict == Verdict::kWarn) {
        std::string tag = s->flag;
        const auto dot = tag.find('.');
        if (dot != std::string::npos) tag = tag.substr(dot + 1);
        h << "<span class='tag'>" << Esc(tag) << "</span>";
      }
      h << "<div class='cap'><span>L" << s->light << "</span><span>"
        << (std::isfinite(s->energy_ratio) ? Num(s->energy_ratio, 2) + "x" : std::string("")) << "</span></div></div>";
    }
    h << "</div><p class='note'>Caption: light id and measured/predicted energy. Hover a frame for its file.</p>\n";

    h << "<h3>Per-light exposure inside the subject mask (bar = mean, black tick = 99th percentile)</h3>"
      << ExposurePlot(r, static_cast<int>(c), olat);
    h << "<h3>Light energy against the model (dead, weak and hot lights)</h3>"
      << RatioPlot(r, static_cast<int>(c), olat);
    h << "<h3>Light energy over the dome</h3>" << DomeMap(r, static_cast<int>(c), olat)
      << "<p class='note'>Each disc is a light at its calibrated azimuth/elevation (rig frame), coloured by the "
         "energy it put on the subject as this camera sees it; flagged lights are ringed in red/amber.</p>";
    if (!cs.tracking.empty()) {
      h << "<div class='plots'><div><h3>Intensity drift over the take</h3>" << TimePlot(cs.tracking, false, r.options)
        << "</div><div><h3>Subject motion over the take</h3>" << TimePlot(cs.tracking, true, r.options)
        << "</div></div>";
    } else {
      h << "<h3>Drift and motion</h3><p class='note'>No tracking frames listed for this camera.</p>";
    }
    h << "</section>\n";
  }

  // Thresholds used.
  h << "<section><h2>Thresholds used</h2><table><tr><th>key</th><th>value</th><th>unit</th><th>meaning</th>"
       "<th>source</th></tr>\n";
  for (const auto& spec : ThresholdTable()) {
    h << "<tr><td><code>" << Esc(spec.key) << "</code></td><td class='num'>" << Num(r.options.*spec.field, 4)
      << "</td><td>" << Esc(spec.unit) << "</td><td>" << Esc(spec.description) << "</td><td>" << Esc(spec.source)
      << "</td></tr>\n";
  }
  h << "</table><p class='note'>Change with <code>lumenrig check --threshold KEY=VALUE</code> or "
       "<code>--thresholds FILE.json</code>; see docs/check.md.</p></section>\n";
  h << "</main></body></html>\n";
  return h.str();
}

io::Status WriteCheckReport(const CheckResult& result, const std::string& dir, bool overwrite, std::string* html_path) {
  LUMENRIG_RETURN_IF_ERROR(io::EnsureDirectory(dir));
  const std::string path = dir + "/check_report.html";
  LUMENRIG_RETURN_IF_ERROR(io::WriteTextFile(path, RenderCheckReportHtml(result), overwrite));
  if (html_path) *html_path = path;
  return io::Status::Ok();
}

}  // namespace lumenrig::solvers
