// The single reading pass of the session check: every file decoded once,
// OLAT and tracking frames streamed in row bands, each reduced to a small
// FrameSummary (statistics, a PNG thumbnail, a coarse analysis grid).
#include <algorithm>
#include <atomic>
#include <cmath>
#include <memory>
#include <mutex>

#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "check_internal.h"
#include "lumenrig/capture_io/color.h"
#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/parallel.h"

namespace lumenrig::solvers::check_detail {

namespace {

constexpr int kHistBins = 4096;
// Interleaved copies of the histogram (pixel x counts into copy x mod
// kHistCopies): neighbouring pixels usually fall in one bin, and a single
// copy would make every increment wait for the previous one's store.
constexpr int kHistCopies = 4;
static_assert((kHistCopies & (kHistCopies - 1)) == 0, "x mod kHistCopies is a mask");

/// Per-camera state built before the OLAT pass.
struct CameraContext {
  int width = 0, height = 0;
  cv::Mat mask;                         // CV_8U, 255 = subject; full resolution
  std::vector<int> grid_x;              // column -> analysis cell column
  std::vector<int> grid_y;              // row -> analysis cell row
  std::vector<int> row_begin, row_end;  // per row, extent [begin, end) of mask pixels
  int grid_w = 0, grid_h = 0;
  double dark_lum = 0.0;
  // Motion: tracking frames are area-reduced by motion_factor; the subject
  // box `motion_crop` of the first tracking frame is the reference.
  int motion_factor = 1;
  cv::Rect motion_crop;
  cv::Mat motion_window;  // CV_32F over the crop
  cv::Mat motion_ref;     // CV_32F crop of the first tracking frame
  Eigen::Vector3d dark_rgb{0, 0, 0};
};

float Luma(float r, float g, float b) { return io::Bt709Luminance(r, g, b); }

/// Luminance of a CV_32FC1/3 RGB image.
cv::Mat Luminance(const cv::Mat& image) {
  if (image.channels() == 1) return image.clone();
  cv::Mat out(image.size(), CV_32FC1);
  for (int y = 0; y < image.rows; ++y) {
    const float* p = image.ptr<float>(y);
    float* o = out.ptr<float>(y);
    for (int x = 0; x < image.cols; ++x) o[x] = Luma(p[3 * x], p[3 * x + 1], p[3 * x + 2]);
  }
  return out;
}

/// Area reduction by an integer factor (drops the remainder rows/columns).
cv::Mat ReduceBy(const cv::Mat& image, int factor) {
  if (factor <= 1) return image;
  const int w = image.cols / factor, h = image.rows / factor;
  cv::Mat out;
  cv::resize(image(cv::Rect(0, 0, w * factor, h * factor)), out, cv::Size(w, h), 0, 0, cv::INTER_AREA);
  return out;
}

/// Subject mask from the clean plate and a fully lit frame: Otsu threshold on
/// the absolute luminance difference, then a 3x3 opening and closing.
cv::Mat MaskFromDifference(const cv::Mat& plate_lum, const cv::Mat& lit_lum) {
  cv::Mat diff;
  cv::absdiff(plate_lum, lit_lum, diff);
  double max_value = 0;
  cv::minMaxLoc(diff, nullptr, &max_value);
  if (!(max_value > 0)) return cv::Mat();
  cv::Mat diff8;
  diff.convertTo(diff8, CV_8U, 255.0 / max_value);
  cv::Mat mask;
  cv::threshold(diff8, mask, 0, 255, cv::THRESH_BINARY | cv::THRESH_OTSU);
  const cv::Mat k = cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(3, 3));
  cv::morphologyEx(mask, mask, cv::MORPH_OPEN, k);
  cv::morphologyEx(mask, mask, cv::MORPH_CLOSE, k);
  return mask;
}

/// Window for phase correlation on the background: Hann times "not subject"
/// (the subject mask dilated and feathered), so the silhouette that differs
/// between clean plate and backlit frame does not pull the peak.
cv::Mat BackgroundWindow(const cv::Mat& mask8, cv::Size size) {
  cv::Mat hann;
  cv::createHanningWindow(hann, size, CV_32F);
  if (mask8.empty()) return hann;
  cv::Mat m;
  cv::resize(mask8, m, size, 0, 0, cv::INTER_AREA);
  const int r = std::max(3, std::max(size.width, size.height) / 32);
  cv::dilate(m, m, cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(2 * r + 1, 2 * r + 1)));
  cv::Mat subject;
  m.convertTo(subject, CV_32F, 1.0 / 255.0);
  cv::GaussianBlur(subject, subject, cv::Size(0, 0), r);
  cv::Mat background = 1.0 - subject;
  return hann.mul(background);
}

struct FrameJob {
  int camera = 0;
  FrameKind kind = FrameKind::kOlat;
  int light = -1;
  int order = 0;
  std::string path;
};

/// Which frame a summary is about.
void Identify(const FrameJob& job, FrameSummary* s) {
  s->kind = job.kind;
  s->camera = job.camera;
  s->light = job.light;
  s->order = job.order;
  s->path = job.path;
}

/// What the frame's reader says of it.
void Describe(const io::ImageInfo& info, FrameSummary* s) {
  s->width = info.width;
  s->height = info.height;
  s->channels = info.channels;
  s->pixel_type = info.pixel_type;
}

/// The per-frame reduction of the check, fed with decoded rows in increasing
/// order (any band partition gives the same result: every sum runs row by
/// row). Used by ScanFrame for frames the check reads itself, and by the
/// streamed check for OLAT frames another stage decodes.
class FrameScanner {
 public:
  FrameScanner(const CameraContext& ctx, const CheckOptions& options, double saturation)
      : ctx_(ctx), options_(options), saturation_(saturation) {}

  /// Starts a frame of the camera's size (`info` from its reader).
  void Begin(const FrameJob& job, const io::ImageInfo& info, FrameSummary* s) {
    s_ = s;
    Identify(job, s);
    Describe(info, s);
    W_ = info.width;
    H_ = info.height;
    nc_ = info.channels;
    next_row_ = 0;
    const double tscale = options_.thumbnail_px / std::max(W_, H_);
    tw_ = std::max(1, static_cast<int>(std::lround(W_ * std::min(1.0, tscale))));
    th_ = std::max(1, static_cast<int>(std::lround(H_ * std::min(1.0, tscale))));
    tx_.resize(W_);
    for (int x = 0; x < W_; ++x) tx_[x] = static_cast<int>(static_cast<int64_t>(x) * tw_ / W_);
    tacc_.assign(static_cast<size_t>(tw_) * th_ * 3, 0.0);
    tcnt_.assign(static_cast<size_t>(tw_) * th_, 0);
    gsum_.assign(static_cast<size_t>(ctx_.grid_w) * ctx_.grid_h, 0.0);
    gcnt_.assign(gsum_.size(), 0);
    mf_ = 1;
    mw_ = mh_ = 0;
    macc_.clear();
    if (job.kind == FrameKind::kTracking) {
      mf_ = ctx_.motion_factor;
      mw_ = W_ / mf_;
      mh_ = H_ / mf_;
      macc_.assign(static_cast<size_t>(mw_) * mh_, 0.0f);
    }
    hist_.assign(static_cast<size_t>(kHistBins) * kHistCopies, 0);
    hist_scale_ = kHistBins / (saturation_ * 1.0625);
    sat_ = static_cast<float>(saturation_ * (1.0 - 1e-3));
    sum_r_ = sum_g_ = sum_b_ = sum_abs_d_ = 0;
    count_ = clipped_ = n_d_ = 0;
    full_mask_row_.assign(W_, 255);
    thumb_step_ = std::max(1, std::min(W_ / tw_, H_ / th_) / 4);
    noise_step_ = std::max(1, H_ / 256);
  }

  /// Rows [y0, y1) of the frame (CV_32FC1/3, decoded). False when they do not
  /// continue the rows seen so far or do not match the frame's geometry.
  bool Rows(int y0, int y1, const cv::Mat& rows) {
    if (y0 != next_row_ || y1 > H_ || rows.rows != y1 - y0 || rows.cols != W_ || rows.channels() != nc_ ||
        rows.depth() != CV_32F)
      return false;
    for (int y = y0; y < y1; ++y) Row(y, rows.ptr<float>(y - y0));
    next_row_ = y1;
    return true;
  }

  bool Complete() const { return next_row_ == H_ && H_ > 0; }

  /// Turns the sums into the frame's summary; tracking frames return their
  /// area-reduced luminance in *motion.
  void Finish(cv::Mat* motion) {
    FrameSummary* s = s_;
    s->readable = true;
    // Statistics inside the mask, corrected by the residual dark level.
    if (count_ > 0) {
      s->mean_rgb = Eigen::Vector3d(sum_r_, sum_g_, sum_b_) / static_cast<double>(count_) - ctx_.dark_rgb;
      s->mean = Luma(static_cast<float>(s->mean_rgb.x()), static_cast<float>(s->mean_rgb.y()),
                     static_cast<float>(s->mean_rgb.z()));
      s->clipped_pct = 100.0 * static_cast<double>(clipped_) / static_cast<double>(count_);
      const int64_t target = static_cast<int64_t>(std::ceil(0.99 * static_cast<double>(count_)));
      int64_t acc = 0;
      int bin = 0;
      for (; bin < kHistBins; ++bin) {
        for (int k = 0; k < kHistCopies; ++k) acc += hist_[static_cast<size_t>(k) * kHistBins + bin];
        if (acc >= target) break;
      }
      s->p99 = (bin + 0.5) / hist_scale_ - ctx_.dark_lum;
    }
    // Gaussian noise: E|d| = sigma * sqrt(6) * sqrt(2/pi) for the [1,-2,1] kernel
    // (the 1-D form of Immerkaer, "Fast noise variance estimation", CVIU 1996).
    if (n_d_ > 0) s->noise_sigma = std::sqrt(M_PI / 2.0) * (sum_abs_d_ / static_cast<double>(n_d_)) / std::sqrt(6.0);
    s->snr_db = (s->noise_sigma > 0 && s->mean > 0) ? 20.0 * std::log10(s->mean / s->noise_sigma) : 0.0;

    // Analysis grid.
    s->grid_w = ctx_.grid_w;
    s->grid_h = ctx_.grid_h;
    s->grid.assign(gsum_.size(), 0.0f);
    for (size_t i = 0; i < gsum_.size(); ++i)
      if (gcnt_[i] > 0) s->grid[i] = static_cast<float>(gsum_[i] / gcnt_[i] - ctx_.dark_lum);

    // Thumbnail: full scale (saturation) maps to white.
    cv::Mat thumb(th_, tw_, CV_32FC3);
    for (int y = 0; y < th_; ++y) {
      float* o = thumb.ptr<float>(y);
      for (int x = 0; x < tw_; ++x) {
        const size_t i = static_cast<size_t>(y) * tw_ + x;
        const double n = std::max(1, tcnt_[i]);
        for (int c = 0; c < 3; ++c) o[3 * x + c] = static_cast<float>(tacc_[3 * i + c] / n);
      }
    }
    cv::imencode(".png", io::ToPreview8(thumb, static_cast<float>(1.0 / saturation_)), s->thumbnail_png);

    if (!macc_.empty() && motion != nullptr) {
      const float inv = 1.0f / static_cast<float>(mf_ * mf_);
      for (auto& v : macc_) v *= inv;
      cv::Mat(mh_, mw_, CV_32F, macc_.data()).copyTo(*motion);
    }
    Release();
  }

  /// Frees the accumulators (a scanner whose frame is abandoned).
  void Release() {
    std::vector<double>().swap(tacc_);
    std::vector<int>().swap(tcnt_);
    std::vector<double>().swap(gsum_);
    std::vector<int>().swap(gcnt_);
    std::vector<float>().swap(macc_);
    std::vector<int64_t>().swap(hist_);
    std::vector<int>().swap(tx_);
    std::vector<unsigned char>().swap(full_mask_row_);
  }

  /// Accumulator bytes for a frame of the camera's size (memory plans).
  static int64_t BytesFor(const CameraContext& ctx, const CheckOptions& options) {
    const double tscale = options.thumbnail_px / std::max(1, std::max(ctx.width, ctx.height));
    const int64_t tw = std::max(1, static_cast<int>(std::lround(ctx.width * std::min(1.0, tscale))));
    const int64_t th = std::max(1, static_cast<int>(std::lround(ctx.height * std::min(1.0, tscale))));
    return tw * th * (3 * 8 + 4) + int64_t{kHistBins} * kHistCopies * 8 + int64_t{ctx.grid_w} * ctx.grid_h * 12 +
           int64_t{ctx.width} * 5 + 4096;
  }

 private:
  void Row(int y, const float* p) {
    const unsigned char* m = ctx_.mask.empty() ? full_mask_row_.data() : ctx_.mask.ptr<unsigned char>(y);
    const int nc = nc_, W = W_;
    const float sat = sat_;
    auto rgb = [&](int x, float* r, float* g, float* b) {
      if (nc == 3) {
        *r = p[3 * x];
        *g = p[3 * x + 1];
        *b = p[3 * x + 2];
      } else {
        *r = *g = *b = p[x];
      }
    };
    auto luma = [&](int x) { return nc == 3 ? Luma(p[3 * x], p[3 * x + 1], p[3 * x + 2]) : p[x]; };
    // Statistics over the mask pixels of this row (its extent precomputed).
    const int xb = ctx_.row_begin[y], xe = ctx_.row_end[y];
    if (xb < xe) {
      const int gy = ctx_.grid_y[y];
      double* grow = &gsum_[static_cast<size_t>(gy) * ctx_.grid_w];
      int* gcrow = &gcnt_[static_cast<size_t>(gy) * ctx_.grid_w];
      float rr = 0, rg = 0, rb = 0;
      int64_t rc = 0, rclip = 0;
      // The grid cell's sum is held in a register while x stays in the cell
      // (the same additions in the same order as adding into the row each
      // time, without a store-to-load chain per pixel).
      int cell = -1;
      double cell_sum = 0.0;
      int cell_count = 0;
      int64_t* hist = hist_.data();
      for (int x = xb; x < xe; ++x) {
        if (!m[x]) continue;
        float r, g, b;
        rgb(x, &r, &g, &b);
        const float l = Luma(r, g, b);
        rr += r;
        rg += g;
        rb += b;
        ++rc;
        rclip += std::max(r, std::max(g, b)) >= sat ? 1 : 0;
        const int bin = std::min(kHistBins - 1, std::max(0, static_cast<int>(l * hist_scale_)));
        ++hist[(x & (kHistCopies - 1)) * kHistBins + bin];
        const int gx = ctx_.grid_x[x];
        if (gx != cell) {
          if (cell >= 0) grow[cell] = cell_sum, gcrow[cell] += cell_count;
          cell = gx;
          cell_sum = grow[gx];
          cell_count = 0;
        }
        cell_sum += l;
        ++cell_count;
      }
      if (cell >= 0) grow[cell] = cell_sum, gcrow[cell] += cell_count;
      sum_r_ += rr;
      sum_g_ += rg;
      sum_b_ += rb;
      count_ += rc;
      clipped_ += rclip;
      // Noise: horizontal second difference inside the mask, away from
      // clipping, on every noise_step-th row (plenty of samples).
      if (y % noise_step_ == 0) {
        for (int x = std::max(1, xb); x + 1 < std::min(W, xe + 1); ++x) {
          if (!(m[x - 1] && m[x] && m[x + 1])) continue;
          const float a = luma(x - 1), c = luma(x), d = luma(x + 1);
          if (a < sat && c < sat && d < sat) {
            sum_abs_d_ += std::abs(a - 2.0f * c + d);
            ++n_d_;
          }
        }
      }
    }
    // Thumbnail from a regular subsample (about 16 samples per thumbnail pixel).
    if (y % thumb_step_ == 0) {
      const int ty = static_cast<int>(static_cast<int64_t>(y) * th_ / H_);
      double* trow = &tacc_[static_cast<size_t>(ty) * tw_ * 3];
      int* tcrow = &tcnt_[static_cast<size_t>(ty) * tw_];
      for (int x = 0; x < W; x += thumb_step_) {
        float r, g, b;
        rgb(x, &r, &g, &b);
        double* t = trow + 3 * tx_[x];
        t[0] += r;
        t[1] += g;
        t[2] += b;
        ++tcrow[tx_[x]];
      }
    }
    if (!macc_.empty() && y / mf_ < mh_) {
      float* mrow = &macc_[static_cast<size_t>(y / mf_) * mw_];
      for (int x = 0; x < mw_ * mf_; ++x) mrow[x / mf_] += luma(x);
    }
  }

  const CameraContext& ctx_;
  const CheckOptions& options_;
  const double saturation_;
  FrameSummary* s_ = nullptr;
  int W_ = 0, H_ = 0, nc_ = 0, next_row_ = 0;
  int tw_ = 1, th_ = 1, thumb_step_ = 1, noise_step_ = 1;
  std::vector<int> tx_;
  std::vector<double> tacc_;
  std::vector<int> tcnt_;
  std::vector<double> gsum_;
  std::vector<int> gcnt_;
  int mf_ = 1, mw_ = 0, mh_ = 0;
  std::vector<float> macc_;
  std::vector<int64_t> hist_;
  double hist_scale_ = 1.0;
  float sat_ = 1.0f;
  double sum_r_ = 0, sum_g_ = 0, sum_b_ = 0, sum_abs_d_ = 0;
  int64_t count_ = 0, clipped_ = 0, n_d_ = 0;
  std::vector<unsigned char> full_mask_row_;
};

/// Reads one frame once. Tracking frames also return their area-reduced
/// luminance in *motion (empty otherwise).
void ScanFrame(const FrameJob& job, const CameraContext& ctx, const io::DecodeOptions& decode,
               const CheckOptions& options, double saturation, FrameSummary* s, cv::Mat* motion) {
  Identify(job, s);
  auto reader = io::BandReader::Open(job.path, decode);
  if (!reader.ok()) {
    s->error = reader.status().message();
    return;
  }
  const io::ImageInfo info = (*reader)->info();
  Describe(info, s);
  if (info.width != ctx.width || info.height != ctx.height) {
    // Reported by the completeness check; its pixels cannot be compared.
    s->readable = true;
    return;
  }
  FrameScanner scanner(ctx, options, saturation);
  scanner.Begin(job, info, s);
  const int lpb = std::max(1, info.lines_per_block);
  const int band = std::max(lpb, static_cast<int>(std::lround(options.band_rows / lpb)) * lpb);
  cv::Mat rows;
  for (int y0 = 0; y0 < info.height; y0 += band) {
    const int y1 = std::min(info.height, y0 + band);
    io::Status st = (*reader)->ReadRows(y0, y1, &rows);
    if (!st.ok()) {
      s->error = st.message();
      scanner.Release();
      return;
    }
    scanner.Rows(y0, y1, rows);
  }
  scanner.Finish(motion);
}

}  // namespace

struct ScanState {
  const io::Session* session = nullptr;
  CheckOptions options;
  CheckResult* result = nullptr;
  int threads = 0;
  io::DecodeOptions decode;
  double saturation = 1.0;
  std::vector<CameraContext> contexts;
  std::vector<FrameJob> jobs;
  std::vector<int> olat_offset;                        // per camera, index of its first OLAT job
  std::vector<char> scanned;                           // frames already summarised (phase A or streamed)
  std::vector<std::unique_ptr<FrameScanner>> streams;  // per job, while rows are streamed in
  std::mutex progress_mutex;
  int done = 0;
  void ReportProgress() {
    if (!options.progress) return;
    std::lock_guard<std::mutex> lock(progress_mutex);
    options.progress(++done, static_cast<int>(jobs.size()));
  }
};

io::Status ScanBegin(const io::Session& session, const CheckOptions& options, CheckResult* result, CheckLine* integrity,
                     int threads, std::unique_ptr<ScanState, ScanStateDeleter>* state_out) {
  std::unique_ptr<ScanState, ScanStateDeleter> state(new ScanState());
  ScanState& st = *state;
  st.session = &session;
  st.options = options;
  st.result = result;
  st.threads = threads;
  const io::DecodeOptions decode = io::DecodeOptionsFor(session);
  st.decode = decode;
  // Saturation in decoded units (after transfer function and black level).
  double saturation = options.saturation_level;
  if (decode.encoding == io::Encoding::kSrgb) saturation = io::SrgbToLinear(static_cast<float>(saturation));
  saturation -= decode.black_level;
  if (!(saturation > 0))
    return io::Status::BadInput(fmt::format("{}: black_level {} is at or above exposure.saturation_level {}",
                                            session.path, decode.black_level, options.saturation_level));
  st.saturation = saturation;

  const int ncam = static_cast<int>(session.cameras.size());
  result->cameras.assign(ncam, CameraSummary{});
  st.contexts.assign(ncam, CameraContext{});
  std::vector<CameraContext>& contexts = st.contexts;
  std::vector<std::vector<Finding>> cam_findings(ncam);

  // Every OLAT and tracking frame, in list order per camera.
  std::vector<FrameJob>& jobs = st.jobs;
  st.olat_offset.assign(ncam, 0);
  for (int c = 0; c < ncam; ++c) {
    const io::Camera& cam = session.cameras[c];
    st.olat_offset[c] = static_cast<int>(jobs.size());
    for (size_t i = 0; i < cam.olat.size(); ++i)
      jobs.push_back({c, FrameKind::kOlat, cam.olat[i].light, static_cast<int>(i), cam.olat[i].path});
  }
  for (int c = 0; c < ncam; ++c) {
    const io::Camera& cam = session.cameras[c];
    for (size_t i = 0; i < cam.tracking.size(); ++i)
      jobs.push_back({c, FrameKind::kTracking, cam.tracking[i].after_light, static_cast<int>(i), cam.tracking[i].path});
  }
  result->frames.assign(jobs.size(), FrameSummary{});
  std::vector<int> first_tracking(ncam, -1);
  for (size_t j = 0; j < jobs.size(); ++j)
    if (jobs[j].kind == FrameKind::kTracking && first_tracking[jobs[j].camera] < 0)
      first_tracking[jobs[j].camera] = static_cast<int>(j);
  st.scanned.assign(jobs.size(), 0);
  st.streams.resize(jobs.size());
  std::vector<char>& scanned = st.scanned;
  auto report_progress = [&st]() { st.ReportProgress(); };

  // Phase A: per camera, the reference size, mask, dark, clean plate, backlit, lit.
  io::ParallelFor(0, ncam, 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t c = b; c < e; ++c) {
      const io::Camera& cam = session.cameras[c];
      CameraSummary& cs = result->cameras[c];
      CameraContext& ctx = contexts[c];
      auto& findings = cam_findings[c];
      cs.id = cam.id;
      auto fail = [&](const std::string& frame, const std::string& message) {
        Finding f;
        f.verdict = Verdict::kFail;
        f.camera = cam.id;
        f.frame = frame;
        f.message = message;
        findings.push_back(std::move(f));
      };
      // Reference size: the first OLAT frame whose header reads.
      for (const auto& o : cam.olat) {
        auto info = io::ProbeImage(o.path);
        if (info.ok()) {
          ctx.width = info->width;
          ctx.height = info->height;
          break;
        }
      }
      cs.width = ctx.width;
      cs.height = ctx.height;
      if (ctx.width == 0) continue;  // nothing readable; completeness reports each frame
      // False, with a finding, when a file (`what`: "mask", "dark frame"...)
      // did not read or is not the OLAT frames' size.
      auto usable = [&](const std::string& path, const std::string& what, const io::Status& read, int w, int h) {
        if (!read.ok()) {
          fail(path, fmt::format("camera {}: {} unreadable: {}", cam.id, what, read.message()));
          return false;
        }
        if (w != ctx.width || h != ctx.height) {
          fail(path, fmt::format("camera {}: {} is {}x{}, the OLAT frames are {}x{}", cam.id, what, w, h, ctx.width,
                                 ctx.height));
          return false;
        }
        return true;
      };
      auto read_aux = [&](const std::string& path, const char* key) -> cv::Mat {
        if (path.empty()) return cv::Mat();
        auto img = io::ReadImage(path, decode);
        const bool ok = img.ok();
        if (!usable(path, fmt::format("{} frame", key), img.status(), ok ? img->cols : 0, ok ? img->rows : 0))
          return cv::Mat();
        return std::move(img).value();
      };

      // Mask: file, else clean plate vs lit, else the whole frame.
      if (!cam.mask.empty()) {
        auto m = io::ReadImage(cam.mask);
        const bool ok = m.ok();
        if (usable(cam.mask, "mask", m.status(), ok ? m->cols : 0, ok ? m->rows : 0)) {
          cv::Mat l = Luminance(*m);
          ctx.mask = l > 0.0f;
          cs.mask_source = "mask file";
        }
      }
      cv::Mat dark = read_aux(cam.dark, "dark");
      cv::Mat plate = read_aux(cam.clean_plate, "clean plate");
      cv::Mat backlit = read_aux(cam.backlit, "backlit");
      cv::Mat lit = read_aux(cam.lit, "lit");
      // Matte pairs are decoded in full only by the matte stage. Here each
      // file is opened and its last line block decoded (io::ProbeImage), so
      // a missing, cut-short or wrongly sized one fails the check, at the
      // cost of one block per file.
      for (size_t k = 0; k < cam.matte_pairs.size(); ++k) {
        for (const auto& [path, what] : {std::pair<std::string, const char*>{cam.matte_pairs[k].plate, "plate"},
                                         std::pair<std::string, const char*>{cam.matte_pairs[k].frame, "frame"}}) {
          if (path.empty()) continue;
          auto info = io::ProbeImage(path);
          const bool ok = info.ok();
          usable(path, fmt::format("matte pair {} {}", k, what), info.status(), ok ? info->width : 0,
                 ok ? info->height : 0);
        }
      }
      cv::Mat plate_lum = plate.empty() ? cv::Mat() : Luminance(plate);
      plate.release();
      if (ctx.mask.empty() && !plate_lum.empty() && !lit.empty()) {
        ctx.mask = MaskFromDifference(plate_lum, Luminance(lit));
        if (!ctx.mask.empty()) cs.mask_source = "estimated: clean plate vs lit frame";
      }
      lit.release();
      if (!ctx.mask.empty() && cv::countNonZero(ctx.mask) == 0) {
        fail(cam.mask, fmt::format("camera {}: subject mask is empty", cam.id));
        ctx.mask.release();
      }
      if (ctx.mask.empty()) cs.mask_source = "whole frame (no mask, no clean plate + lit pair)";
      cs.mask_fraction = ctx.mask.empty() ? 1.0
                                          : static_cast<double>(cv::countNonZero(ctx.mask)) /
                                                (static_cast<double>(ctx.width) * ctx.height);

      // Subject window for motion (tracking frames are area-reduced by an
      // integer factor): the mask dilated and feathered, cropped to its box,
      // times a Hann window, so the static background does not anchor the peak.
      ctx.motion_factor =
          std::max(1, static_cast<int>(std::ceil(std::max(ctx.width, ctx.height) / options.motion_max_px)));
      if (!cam.tracking.empty()) {
        const int mf = ctx.motion_factor, mw = ctx.width / mf, mh = ctx.height / mf;
        cv::Rect crop(0, 0, mw, mh);
        cv::Mat weight(mh, mw, CV_32F, cv::Scalar(1.0f));
        if (!ctx.mask.empty()) {
          cv::Mat m;
          cv::resize(ctx.mask(cv::Rect(0, 0, mw * mf, mh * mf)), m, cv::Size(mw, mh), 0, 0, cv::INTER_AREA);
          const int r = std::max(3, std::max(mw, mh) / 32);
          cv::dilate(m, m, cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(2 * r + 1, 2 * r + 1)));
          cv::Rect box = cv::boundingRect(m);
          box.x -= r;
          box.y -= r;
          box.width += 2 * r;
          box.height += 2 * r;
          crop = box & cv::Rect(0, 0, mw, mh);
          m.convertTo(weight, CV_32F, 1.0 / 255.0);
          cv::GaussianBlur(weight, weight, cv::Size(0, 0), r / 2.0);
        }
        if (crop.width >= 8 && crop.height >= 8) {
          cv::Mat hann;
          cv::createHanningWindow(hann, crop.size(), CV_32F);
          cv::Mat w = weight(crop).mul(hann);
          ctx.motion_crop = crop;
          ctx.motion_window = w;
        }
      }

      // Dark frame: residual black level (the session black_level is already subtracted).
      if (!dark.empty()) {
        cs.has_dark = true;
        const cv::Scalar mean = cv::mean(dark);
        if (dark.channels() == 3) {
          cs.dark_mean = Eigen::Vector3d(mean[0], mean[1], mean[2]);
        } else {
          cs.dark_mean = Eigen::Vector3d::Constant(mean[0]);
        }
        cv::Mat dl = Luminance(dark);
        cv::Mat d2;
        const float k[3] = {1.0f, -2.0f, 1.0f};
        cv::filter2D(dl, d2, CV_32F, cv::Mat(1, 3, CV_32F, const_cast<float*>(k)));
        cs.dark_noise = std::sqrt(M_PI / 2.0) * cv::mean(cv::abs(d2))[0] / std::sqrt(6.0);
        ctx.dark_rgb = cs.dark_mean;
        ctx.dark_lum = Luma(static_cast<float>(cs.dark_mean.x()), static_cast<float>(cs.dark_mean.y()),
                            static_cast<float>(cs.dark_mean.z()));
      }
      dark.release();

      // Clean plate vs backlit: sub-pixel shift on the background texture.
      if (!plate_lum.empty() && !backlit.empty()) {
        cv::Mat back_lum = Luminance(backlit);
        // At most 1024 px a side: sub-pixel precision holds after the x f
        // scaling and full-size Lucas-Kanade would cost more than the frames.
        const int f = std::max(1, static_cast<int>(std::ceil(std::max(ctx.width, ctx.height) / 1024.0)));
        cv::Mat a = ReduceBy(plate_lum, f), bb = ReduceBy(back_lum, f);
        // The subject only darkens the backdrop in the backlit frame: pixels
        // below 80% of the clean plate (partial coverage, hair) are left out
        // too, with a 2 px margin.
        cv::Mat occluded = bb < 0.8 * a;
        cv::dilate(occluded, occluded, cv::getStructuringElement(cv::MORPH_ELLIPSE, cv::Size(5, 5)));
        cv::Mat keep;
        cv::Mat(occluded == 0).convertTo(keep, CV_32F, 1.0 / 255.0);
        const cv::Point2d d = EstimateShift(a, bb, BackgroundWindow(ctx.mask, a.size()).mul(keep));
        cs.has_alignment = true;
        cs.align_dx_px = d.x * f;
        cs.align_dy_px = d.y * f;
      }

      // Extent of the mask on each row (the statistics loop visits only it).
      ctx.row_begin.assign(ctx.height, 0);
      ctx.row_end.assign(ctx.height, ctx.width);
      if (!ctx.mask.empty()) {
        for (int y = 0; y < ctx.height; ++y) {
          const unsigned char* m = ctx.mask.ptr<unsigned char>(y);
          int b = 0, e = ctx.width;
          while (b < e && !m[b]) ++b;
          while (e > b && !m[e - 1]) --e;
          ctx.row_begin[y] = b;
          ctx.row_end[y] = e;
        }
      }

      // Analysis grid cells: valid when at least half their pixels are subject.
      const double gscale = options.analysis_grid / std::max(ctx.width, ctx.height);
      ctx.grid_w = std::max(1, static_cast<int>(std::lround(ctx.width * std::min(1.0, gscale))));
      ctx.grid_h = std::max(1, static_cast<int>(std::lround(ctx.height * std::min(1.0, gscale))));
      ctx.grid_x.resize(ctx.width);
      ctx.grid_y.resize(ctx.height);
      for (int x = 0; x < ctx.width; ++x)
        ctx.grid_x[x] = static_cast<int>(static_cast<int64_t>(x) * ctx.grid_w / ctx.width);
      for (int y = 0; y < ctx.height; ++y)
        ctx.grid_y[y] = static_cast<int>(static_cast<int64_t>(y) * ctx.grid_h / ctx.height);
      std::vector<int> in(static_cast<size_t>(ctx.grid_w) * ctx.grid_h, 0), all(in.size(), 0);
      for (int y = 0; y < ctx.height; ++y) {
        const unsigned char* m = ctx.mask.empty() ? nullptr : ctx.mask.ptr<unsigned char>(y);
        for (int x = 0; x < ctx.width; ++x) {
          const size_t i = static_cast<size_t>(ctx.grid_y[y]) * ctx.grid_w + ctx.grid_x[x];
          ++all[i];
          in[i] += (m == nullptr || m[x]) ? 1 : 0;
        }
      }
      cs.grid_w = ctx.grid_w;
      cs.grid_h = ctx.grid_h;
      cs.grid_valid.resize(in.size());
      for (size_t i = 0; i < in.size(); ++i) cs.grid_valid[i] = (2 * in[i] >= all[i] && all[i] > 0) ? 1 : 0;

      // The first tracking frame becomes the motion/drift reference.
      if (first_tracking[c] >= 0) {
        FrameSummary& s = result->frames[first_tracking[c]];
        cv::Mat grid;
        ScanFrame(jobs[first_tracking[c]], ctx, decode, options, saturation, &s, &grid);
        scanned[first_tracking[c]] = 1;
        if (!grid.empty() && ctx.motion_crop.area() > 0 &&
            (ctx.motion_crop & cv::Rect(0, 0, grid.cols, grid.rows)) == ctx.motion_crop) {
          ctx.motion_ref = grid(ctx.motion_crop).clone();
          s.has_motion = true;
          s.box_energy = cv::sum(ctx.motion_ref)[0];
        }
        report_progress();
      }
    }
  });
  for (auto& fs : cam_findings)
    for (auto& f : fs) AddFinding(integrity, std::move(f));

  *state_out = std::move(state);
  return io::Status::Ok();
}

int64_t ScanStreamBytes(const ScanState& st, int camera) {
  const CameraContext& ctx = st.contexts[static_cast<size_t>(camera)];
  if (ctx.width == 0) return 0;
  return FrameScanner::BytesFor(ctx, st.options) *
         static_cast<int64_t>(st.session->cameras[static_cast<size_t>(camera)].olat.size());
}

void ScanRows(ScanState* st, int camera, int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows) {
  if (camera < 0 || camera >= static_cast<int>(st->contexts.size())) return;
  const io::Camera& cam = st->session->cameras[static_cast<size_t>(camera)];
  if (frame < 0 || frame >= static_cast<int>(cam.olat.size())) return;
  const CameraContext& ctx = st->contexts[static_cast<size_t>(camera)];
  if (ctx.width == 0 || info.width != ctx.width || info.height != ctx.height) return;
  const size_t j = static_cast<size_t>(st->olat_offset[static_cast<size_t>(camera)] + frame);
  if (st->scanned[j]) return;
  std::unique_ptr<FrameScanner>& scanner = st->streams[j];
  if (y0 == 0) {
    scanner = std::make_unique<FrameScanner>(ctx, st->options, st->saturation);
    st->result->frames[j] = FrameSummary{};
    scanner->Begin(st->jobs[j], info, &st->result->frames[j]);
  }
  if (!scanner) return;
  if (!scanner->Rows(y0, y1, rows)) {
    scanner.reset();  // out of order: Finish reads this frame itself
    return;
  }
  if (scanner->Complete()) {
    scanner->Finish(nullptr);
    scanner.reset();
    st->scanned[j] = 1;
    st->ReportProgress();
  }
}

io::Status ScanFinish(ScanState* state) {
  ScanState& st = *state;
  const CheckOptions& options = st.options;
  const io::DecodeOptions& decode = st.decode;
  const double saturation = st.saturation;
  CheckResult* result = st.result;
  const std::vector<FrameJob>& jobs = st.jobs;
  const std::vector<CameraContext>& contexts = st.contexts;
  const std::vector<char>& scanned = st.scanned;
  const int total = static_cast<int>(jobs.size());
  for (auto& s : st.streams) s.reset();  // frames streamed only in part are read below
  const int threads = st.threads;
  // Phase B: every other OLAT and tracking frame once, in parallel across frames.
  io::ParallelFor(0, total, 1, threads, [&](int64_t b, int64_t e) {
    for (int64_t j = b; j < e; ++j) {
      const FrameJob& job = jobs[j];
      if (scanned[j]) continue;  // read in phase A
      const CameraContext& ctx = contexts[job.camera];
      FrameSummary& s = result->frames[j];
      if (ctx.width == 0) {
        Identify(job, &s);
        auto probe = io::ProbeImage(job.path);
        s.error = probe.ok() ? "unreadable" : probe.status().message();
      } else {
        cv::Mat grid;
        ScanFrame(job, ctx, decode, options, saturation, &s, &grid);
        // Tracking: energy over the subject box and shift against the reference.
        if (!grid.empty() && !ctx.motion_ref.empty() &&
            (ctx.motion_crop & cv::Rect(0, 0, grid.cols, grid.rows)) == ctx.motion_crop) {
          const cv::Mat cur = grid(ctx.motion_crop);
          s.box_energy = cv::sum(cur)[0];
          const cv::Point2d d = EstimateShift(ctx.motion_ref, cur.clone(), ctx.motion_window);
          s.shift_x_px = d.x * ctx.motion_factor;
          s.shift_y_px = d.y * ctx.motion_factor;
          s.has_motion = true;
        }
      }
      st.ReportProgress();
    }
  });
  return io::Status::Ok();
}

void ScanStateDeleter::operator()(ScanState* state) const { delete state; }

}  // namespace lumenrig::solvers::check_detail
