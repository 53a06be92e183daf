// Tests of the session check (`lumenrig check`): clean simulated sessions pass,
// every injected fault of the simulator is found and named, calibration
// checks against closed forms, options, JSON, CLI exit codes, and the HTML
// report rendered by headless Chromium.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <mutex>
#include <sstream>

#include <gtest/gtest.h>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>

#include "../solvers/check_internal.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/normals_stage.h"
#include "lumenrig/solvers/session_check.h"
#include "lumenrig/synth/simulator.h"
#include "test_support.h"

namespace fs = std::filesystem;

namespace lumenrig::solvers {
namespace {

synth::SimOptions Small(uint64_t seed = 1) {
  synth::SimOptions o;
  o.width = 96;
  o.height = 72;
  o.num_lights = 40;
  o.num_cameras = 1;
  o.tracking_every = 8;
  o.seed = seed;
  o.threads = 2;
  return o;
}

struct Checked {
  CheckResult result;
  io::Session session;
};

/// Simulates a session into tmp/session and loads it as the check does
/// (files may be missing or damaged afterwards).
io::Expected<io::Session> SimulateAndLoad(const synth::SimOptions& sim, const test::TempDir& tmp) {
  const std::string dir = tmp / "session";
  LUMENRIG_RETURN_IF_ERROR(synth::SimulateSession(sim, dir));
  io::LoadOptions load;
  load.require_files = false;
  return io::LoadSession(dir, load);
}

Checked SimulateAndCheck(const synth::SimOptions& sim, const test::TempDir& tmp, CheckOptions options = {}) {
  Checked out;
  auto session = SimulateAndLoad(sim, tmp);
  EXPECT_TRUE(session.ok()) << session.status().message();
  if (!session.ok()) return out;
  out.session = *session;
  const io::Status st = CheckSession(out.session, options, &out.result, 2);
  EXPECT_TRUE(st.ok()) << st.message();
  return out;
}

const CheckLine* Line(const CheckResult& r, const std::string& key) {
  for (const auto& l : r.checks)
    if (l.key == key) return &l;
  return nullptr;
}

std::string Describe(const CheckResult& r) {
  std::string s;
  for (const auto& l : r.checks) {
    s += fmt::format("{} {} {}\n", VerdictName(l.verdict), l.key, l.summary);
    for (const auto& f : l.findings) s += "    " + f.message + "\n";
  }
  return s;
}

/// The rig light that lights the camera-facing side best (cam00 looks along
/// -z of the rig, so +z, slightly up), and one far from it that still lights
/// the visible side.
std::pair<int, int> FrontLights(const synth::SimOptions& sim) {
  const io::Rig rig = synth::MakeSimRig(sim);
  const Eigen::Vector3d front = Eigen::Vector3d(0.0, 0.3, 1.0).normalized();
  int best = -1;
  double best_dot = -2;
  for (const auto& l : rig.lights) {
    const double d = l.direction->dot(front);
    if (d > best_dot) best_dot = d, best = l.id;
  }
  const Eigen::Vector3d a = *rig.lights[rig.IndexOfId(best)].direction;
  int other = -1;
  double other_score = -2;
  for (const auto& l : rig.lights) {
    const Eigen::Vector3d& d = *l.direction;
    const double angle = std::acos(std::clamp(d.dot(a), -1.0, 1.0)) * 180 / M_PI;
    if (d.z() > 0.45 && angle > 45 && d.z() > other_score) other_score = d.z(), other = l.id;
  }
  return {best, other};
}

bool MentionsAll(const CheckLine& line, const std::vector<std::string>& words) {
  for (const auto& f : line.findings) {
    bool all = true;
    for (const auto& w : words) all = all && f.message.find(w) != std::string::npos;
    if (all) return true;
  }
  return false;
}

// ---------------------------------------------------------------------------
// Clean sessions: zero false FAILs across 10 seeds.

TEST(SessionCheck, CleanSimulatedSessionsPassAcrossTenSeeds) {
  for (uint64_t seed = 1; seed <= 10; ++seed) {
    test::TempDir tmp;
    const Checked c = SimulateAndCheck(Small(seed), tmp);
    EXPECT_NE(c.result.verdict, Verdict::kFail) << "seed " << seed << "\n" << Describe(c.result);
    // Every check ran on something (nothing silently skipped on a full session).
    for (const char* key : {"completeness", "exposure.clipping", "lights.weak", "lights.slot", "stability.drift",
                            "stability.motion", "calibration.condition", "matting.alignment"}) {
      const CheckLine* l = Line(c.result, key);
      ASSERT_NE(l, nullptr) << key;
      EXPECT_NE(l->verdict, Verdict::kSkip) << key << " seed " << seed;
    }
  }
}

// ---------------------------------------------------------------------------
// Injected faults (synth/simulator.h SimFaults): detected and named.

TEST(SessionCheck, DeadLightIsNamed) {
  synth::SimOptions sim = Small(3);
  const int light = FrontLights(sim).first;
  sim.faults.dead_light = synth::CameraLightTarget{"cam00", light};
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "lights.weak");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", fmt::format("light {}:", light), "dead"})) << Describe(c.result);
  EXPECT_EQ(c.result.verdict, Verdict::kFail);
}

// The streamed check (pipeline: the normals solve decodes each OLAT frame and
// hands the rows to the check) gives exactly CheckSession's result, whatever
// the band partition, and frames streamed only in part are read again.
TEST(SessionCheck, RowsStreamedFromTheNormalsSolveGiveTheSameResult) {
  synth::SimOptions sim = Small(5);
  sim.num_cameras = 2;
  sim.faults.dead_light = synth::CameraLightTarget{"cam01", FrontLights(sim).first};
  test::TempDir tmp;
  const Checked reference = SimulateAndCheck(sim, tmp);
  nlohmann::json expected = CheckResultToJson(reference.result);
  expected.erase("seconds");
  ASSERT_EQ(reference.result.verdict, Verdict::kFail) << "the fault makes the comparison cover findings";

  for (const int threads : {1, 2}) {
    auto check = StreamedCheck::Begin(reference.session, CheckOptions{}, threads);
    ASSERT_TRUE(check.ok()) << check.status().message();
    int streamed_rows = 0;
    for (int c = 0; c < 2; ++c) {
      NormalsOptions options;
      options.ps.method = PsMethod::kLeastSquares;
      options.integrate_depth = false;
      options.observer_bytes = (*check)->StreamBytes(c);
      EXPECT_GT(options.observer_bytes, 0);
      std::mutex m;
      options.on_decoded_rows = [&](int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows) {
        // Camera 1, frame 2: deliver only its first band (an interrupted
        // stream); Finish must read that frame itself.
        if (c == 1 && frame == 2 && y0 > 0) return;
        (*check)->Rows(c, frame, info, y0, y1, rows);
        std::lock_guard<std::mutex> lock(m);
        streamed_rows += y1 - y0;
      };
      // The smallest budget the view accepts (the stage refuses a smaller
      // one before reading anything): several bands per frame.
      NormalsResult r;
      io::Status st;
      for (options.mem_budget_bytes = int64_t{64} << 20; options.mem_budget_bytes < (int64_t{256} << 20);
           options.mem_budget_bytes += int64_t{1} << 19) {
        st = SolveNormals(reference.session, reference.session.cameras[c].id, options, &r, threads);
        if (st.ok()) break;
      }
      ASSERT_TRUE(st.ok()) << st.message();
      EXPECT_GT(r.bands, 1) << "several bands per frame";
    }
    EXPECT_GT(streamed_rows, 0);
    CheckResult streamed;
    ASSERT_TRUE((*check)->Finish(&streamed).ok());
    nlohmann::json got = CheckResultToJson(streamed);
    got.erase("seconds");
    EXPECT_EQ(got.dump(1), expected.dump(1)) << "threads " << threads;
    ASSERT_EQ(streamed.frames.size(), reference.result.frames.size());
    for (size_t i = 0; i < streamed.frames.size(); ++i)
      EXPECT_EQ(streamed.frames[i].thumbnail_png, reference.result.frames[i].thumbnail_png) << i;
  }
}

TEST(SessionCheck, MissingFrameIsAFailNotACrash) {
  synth::SimOptions sim = Small(4);
  sim.faults.missing_frame = synth::CameraLightTarget{"cam00", 17};
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "completeness");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "light 17"})) << Describe(c.result);
}

TEST(SessionCheck, FileListedButAbsentIsNamed) {
  test::TempDir tmp;
  auto session = SimulateAndLoad(Small(5), tmp);
  ASSERT_TRUE(session.ok()) << session.status().message();
  const std::string victim = session->cameras[0].olat[9].path;
  const int light = session->cameras[0].olat[9].light;
  fs::remove(victim);
  // A truncated frame is as bad as a missing one.
  const std::string cut = session->cameras[0].olat[11].path;
  const int cut_light = session->cameras[0].olat[11].light;
  fs::resize_file(cut, fs::file_size(cut) / 2);
  CheckResult r;
  ASSERT_TRUE(CheckSession(*session, {}, &r, 2).ok());
  const CheckLine* l = Line(r, "completeness");
  EXPECT_EQ(l->verdict, Verdict::kFail);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", fmt::format("light {}:", light)})) << Describe(r);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", fmt::format("light {}:", cut_light)})) << Describe(r);
}

TEST(SessionCheck, TruncatedOrAbsentMatteFilesAreNamed) {
  test::TempDir tmp;
  auto session = SimulateAndLoad(Small(5), tmp);
  ASSERT_TRUE(session.ok()) << session.status().message();
  ASSERT_GE(session->cameras[0].matte_pairs.size(), 2u);
  {
    CheckResult clean;
    ASSERT_TRUE(CheckSession(*session, {}, &clean, 2).ok());
    EXPECT_NE(Line(clean, "completeness")->verdict, Verdict::kFail) << Describe(clean);
  }
  const std::string cut = session->cameras[0].matte_pairs[1].frame;
  fs::resize_file(cut, fs::file_size(cut) * 3 / 4);
  const std::string gone = session->cameras[0].matte_pairs[0].plate;
  fs::remove(gone);
  CheckResult r;
  ASSERT_TRUE(CheckSession(*session, {}, &r, 2).ok());
  const CheckLine* l = Line(r, "completeness");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "matte pair 1 frame unreadable", cut})) << Describe(r);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "matte pair 0 plate unreadable", gone})) << Describe(r);
}

TEST(SessionCheck, SubjectMotionOfThreePixelsIsNamed) {
  synth::SimOptions sim = Small(6);
  sim.faults.motion_px = 3.0;
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "stability.motion");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  // The last tracking frame (t = 1) moved 3 px, the first (after light 7, t =
  // 7/39) 3 * 7/39 px: 2.46 px between them (simulator.h SimFaults contract).
  EXPECT_NEAR(l->value, 3.0 * (1.0 - 7.0 / 39.0), 0.35);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "after light 39"})) << Describe(c.result);
}

TEST(SessionCheck, SaturatedLightIsNamed) {
  synth::SimOptions sim = Small(7);
  const int light = FrontLights(sim).first;
  sim.faults.saturated_light = synth::CameraLightTarget{"cam00", light};
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "exposure.clipping");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", fmt::format("light {}:", light), "clipped"})) << Describe(c.result);
}

TEST(SessionCheck, FivePercentDriftIsNamed) {
  synth::SimOptions sim = Small(8);
  sim.faults.drift_percent = 5.0;
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "stability.drift");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  // Closed form of the simulator's linear drift: (1 + 0.05) / (1 + 0.05 * 7/39) - 1.
  EXPECT_NEAR(l->value, 100.0 * (1.05 / (1.0 + 0.05 * 7.0 / 39.0) - 1.0), 0.3);
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "after light 39"})) << Describe(c.result);
}

TEST(SessionCheck, TwoSwappedFramesAreNamedTogether) {
  synth::SimOptions sim = Small(9);
  const auto [a, b] = FrontLights(sim);
  ASSERT_GE(b, 0);
  synth::SimFaults::Swap swap;
  swap.camera = "cam00";
  swap.light_a = a;
  swap.light_b = b;
  sim.faults.swapped_frames = swap;
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "lights.slot");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  ASSERT_EQ(l->findings.size(), 1u) << Describe(c.result);
  std::vector<int> named = l->findings[0].lights;
  std::sort(named.begin(), named.end());
  EXPECT_EQ(named, (std::vector<int>{std::min(a, b), std::max(a, b)}));
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "swapped"}));
}

TEST(SessionCheck, CameraMovedBetweenCleanPlateAndBacklitIsNamed) {
  synth::SimOptions sim = Small(10);
  sim.faults.plate_shift_px = 2.0;
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const CheckLine* l = Line(c.result, "matting.alignment");
  ASSERT_NE(l, nullptr);
  EXPECT_EQ(l->verdict, Verdict::kFail) << Describe(c.result);
  EXPECT_NEAR(l->value, 2.0, 0.15);  // the injected shift (simulator.h SimFaults::plate_shift_px)
  EXPECT_TRUE(MentionsAll(*l, {"cam00", "backlit"})) << Describe(c.result);
}

// ---------------------------------------------------------------------------
// Phase correlation helper against a shift made by OpenCV's warpAffine.

TEST(SessionCheck, EstimateShiftMatchesWarpAffine) {
  cv::Mat base(128, 128, CV_32F);
  cv::RNG rng(7);
  rng.fill(base, cv::RNG::UNIFORM, 0.0, 1.0);
  cv::GaussianBlur(base, base, cv::Size(0, 0), 2.0);
  const cv::Mat m = (cv::Mat_<double>(2, 3) << 1, 0, 2.5, 0, 1, -1.25);
  cv::Mat moved;
  cv::warpAffine(base, moved, m, base.size(), cv::INTER_CUBIC, cv::BORDER_REFLECT);
  const cv::Point2d d = check_detail::EstimateShift(base, moved, cv::Mat());
  // Sub-pixel accuracy of phase correlation: 0.1 px is common practice.
  EXPECT_NEAR(d.x, 2.5, 0.1);
  EXPECT_NEAR(d.y, -1.25, 0.1);
}

TEST(SessionCheck, EstimateShiftIsSubPixelOverManyShifts) {
  // Textured frames moved by OpenCV's warpAffine (bicubic, the outside
  // reference) by shifts spread over a pixel: the estimate stays within the
  // common-practice 0.1 px and averages well below it.
  cv::Mat base(256, 256, CV_32F);
  cv::RNG rng(11);
  rng.fill(base, cv::RNG::UNIFORM, 0.0, 1.0);
  cv::GaussianBlur(base, base, cv::Size(0, 0), 1.5);
  double sum_err = 0.0, max_err = 0.0;
  const int n = 12;
  for (int k = 0; k < n; ++k) {
    const double dx = rng.uniform(-3.0, 3.0), dy = rng.uniform(-3.0, 3.0);
    const cv::Mat m = (cv::Mat_<double>(2, 3) << 1, 0, dx, 0, 1, dy);
    cv::Mat moved;
    cv::warpAffine(base, moved, m, base.size(), cv::INTER_CUBIC, cv::BORDER_REFLECT);
    const cv::Point2d d = check_detail::EstimateShift(base, moved, cv::Mat());
    const double err = std::hypot(d.x - dx, d.y - dy);
    sum_err += err;
    max_err = std::max(max_err, err);
  }
  EXPECT_LT(max_err, 0.1);
  EXPECT_LT(sum_err / n, 0.05);
  std::printf("EstimateShift over %d shifts: mean error %.4f px, max %.4f px\n", n, sum_err / n, max_err);
}

// ---------------------------------------------------------------------------
// Calibration checks on crafted rigs, against closed forms.

io::Rig RigFrom(const std::vector<Eigen::Vector3d>& dirs) {
  io::Rig rig;
  rig.name = "crafted";
  for (size_t i = 0; i < dirs.size(); ++i) {
    io::Light l;
    l.id = static_cast<int>(i);
    l.direction = dirs[i];
    rig.lights.push_back(l);
  }
  return rig;
}

TEST(SessionCheck, CalibrationCoplanarRigFails) {
  std::vector<Eigen::Vector3d> ring;
  for (int k = 0; k < 12; ++k) ring.emplace_back(std::cos(k * M_PI / 6), 0.0, std::sin(k * M_PI / 6));
  std::vector<CheckLine> lines;
  CheckCalibration(RigFrom(ring), {}, CheckOptions{}, &lines);
  const CheckLine* cond = nullptr;
  for (const auto& l : lines)
    if (l.key == "calibration.condition") cond = &l;
  ASSERT_NE(cond, nullptr);
  EXPECT_EQ(cond->verdict, Verdict::kFail);
  EXPECT_FALSE(std::isfinite(cond->value));  // rank 2: sigma_min = 0
}

TEST(SessionCheck, CalibrationConditionNumberMatchesClosedForm) {
  // Octahedron: L^T L = 2 I, condition number exactly 1.
  std::vector<Eigen::Vector3d> octa = {{1, 0, 0}, {-1, 0, 0}, {0, 1, 0}, {0, -1, 0}, {0, 0, 1}, {0, 0, -1}};
  std::vector<CheckLine> lines;
  CheckCalibration(RigFrom(octa), {}, CheckOptions{}, &lines);
  for (const auto& l : lines) {
    if (l.key == "calibration.condition") {
      EXPECT_NEAR(l.value, 1.0, 1e-9);
      EXPECT_EQ(l.verdict, Verdict::kPass);
    }
    if (l.key == "calibration.directions" || l.key == "calibration.duplicates") {
      EXPECT_EQ(l.verdict, Verdict::kPass);
    }
  }
  // A ring of N evenly spaced lights at elevation e: L^T L = diag(N cos^2 e / 2,
  // N sin^2 e, N cos^2 e / 2), so kappa = cos e / (sqrt 2 sin e) for e < 35.26 deg.
  const double e = 4.0 * M_PI / 180.0;
  std::vector<Eigen::Vector3d> ring;
  for (int k = 0; k < 24; ++k)
    ring.emplace_back(std::cos(e) * std::cos(k * M_PI / 12), std::sin(e), std::cos(e) * std::sin(k * M_PI / 12));
  lines.clear();
  CheckCalibration(RigFrom(ring), {}, CheckOptions{}, &lines);
  for (const auto& l : lines) {
    if (l.key == "calibration.condition") {
      EXPECT_NEAR(l.value, std::cos(e) / (std::sqrt(2.0) * std::sin(e)), 1e-6);
      EXPECT_EQ(l.verdict, Verdict::kWarn);  // 10.1: above the warn level 10, below fail 100
    }
  }
}

TEST(SessionCheck, CalibrationFlagsNonUnitAndDuplicatedLights) {
  std::vector<Eigen::Vector3d> dirs = {{1, 0, 0}, {0, 1, 0}, {0, 0, 1.05}, {0.6, 0.8, 0}, {0.6, 0.8, 0.001}};
  std::vector<CheckLine> lines;
  CheckCalibration(RigFrom(dirs), {}, CheckOptions{}, &lines);
  for (const auto& l : lines) {
    if (l.key == "calibration.directions") {
      EXPECT_EQ(l.verdict, Verdict::kFail);
      ASSERT_EQ(l.findings.size(), 1u);
      EXPECT_EQ(l.findings[0].lights, std::vector<int>{2});
    }
    if (l.key == "calibration.duplicates") {
      EXPECT_EQ(l.verdict, Verdict::kFail);
      ASSERT_EQ(l.findings.size(), 1u);
      EXPECT_EQ(l.findings[0].lights, (std::vector<int>{3, 4}));
    }
  }
}

// ---------------------------------------------------------------------------
// Options and documentation.

TEST(SessionCheck, ThresholdsParseValidateAndAreDocumented) {
  CheckOptions o;
  EXPECT_TRUE(SetThreshold("stability.drift_fail_pct=4.5", &o).ok());
  EXPECT_DOUBLE_EQ(o.drift_fail_pct, 4.5);
  EXPECT_EQ(SetThreshold("stability.nope=1", &o).code(), io::StatusCode::kBadInput);
  EXPECT_EQ(SetThreshold("stability.drift_fail_pct=abc", &o).code(), io::StatusCode::kBadInput);
  EXPECT_TRUE(SetThresholds(nlohmann::json{{"lights.weak_fail_ratio", 0.2}}, "t.json", &o).ok());
  EXPECT_DOUBLE_EQ(o.weak_fail_ratio, 0.2);
  o.drift_warn_pct = 9;  // warn above fail
  EXPECT_EQ(o.Validate().code(), io::StatusCode::kBadInput);
  std::ifstream doc(std::string(LUMENRIG_SOURCE_DIR) + "/docs/check.md");
  ASSERT_TRUE(doc.good());
  std::stringstream ss;
  ss << doc.rdbuf();
  const CheckOptions defaults;
  for (const auto& spec : ThresholdTable()) {
    EXPECT_NE(ss.str().find(std::string("`") + spec.key + "`"), std::string::npos)
        << spec.key << " not in docs/check.md";
    EXPECT_NE(ss.str().find(check_detail::Num(defaults.*spec.field, 4)), std::string::npos) << spec.key;
  }
}

// ---------------------------------------------------------------------------
// CLI: exit codes, JSON, no partial output on bad input, thread independence.

TEST(SessionCheck, CliExitCodesAndJson) {
  test::TempDir tmp;
  ASSERT_TRUE(synth::SimulateSession(Small(2), tmp / "clean").ok());
  synth::SimOptions bad = Small(2);
  bad.faults.dead_light = synth::CameraLightTarget{"cam00", FrontLights(bad).first};
  ASSERT_TRUE(synth::SimulateSession(bad, tmp / "bad").ok());

  auto r = test::RunCli("check " + tmp / "clean" + " --json " + tmp / "clean.json" + " --threads 1");
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
  EXPECT_NE(r.out.find("verdict: PASS"), std::string::npos) << r.out;
  EXPECT_EQ(r.out.find("\033["), std::string::npos);  // NO_COLOR and not a TTY
  r = test::RunCli("check " + tmp / "bad" + " --json " + tmp / "bad.json");
  EXPECT_EQ(r.exit_code, 1) << r.out << r.err;
  EXPECT_NE(r.out.find("verdict: FAIL"), std::string::npos);

  std::ifstream in(tmp / "bad.json");
  const nlohmann::json j = nlohmann::json::parse(in);
  EXPECT_EQ(j["verdict"], "FAIL");
  bool found = false;
  for (const auto& c : j["checks"]) {
    ASSERT_TRUE(c.contains("value") && c.contains("warn_threshold") && c.contains("fail_threshold"));
    if (c["key"] == "lights.weak") {
      EXPECT_EQ(c["verdict"], "FAIL");
      found = !c["findings"].empty() && !c["findings"][0]["frame"].get<std::string>().empty();
    }
  }
  EXPECT_TRUE(found);

  // Same numbers with 1 and 2 threads (seconds aside).
  r = test::RunCli("check " + tmp / "clean" + " --json " + tmp / "clean2.json" + " --threads 2");
  std::ifstream a(tmp / "clean.json"), b(tmp / "clean2.json");
  nlohmann::json ja = nlohmann::json::parse(a), jb = nlohmann::json::parse(b);
  ja.erase("seconds");
  jb.erase("seconds");
  EXPECT_EQ(ja, jb);

  // Bad input: exit 2, one line naming the problem, no output written.
  r = test::RunCli("check " + tmp / "nowhere" + " --json " + tmp / "x.json");
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_FALSE(fs::exists(tmp / "x.json"));
  r = test::RunCli("check " + tmp / "clean" + " --threshold lights.bogus=1 --json " + tmp / "y.json");
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("lights.bogus"), std::string::npos);
  EXPECT_FALSE(fs::exists(tmp / "y.json"));
  // Existing output is not overwritten without --force.
  r = test::RunCli("check " + tmp / "clean" + " --json " + tmp / "clean.json");
  EXPECT_EQ(r.exit_code, 2);
  r = test::RunCli("check " + tmp / "clean" + " --json " + tmp / "clean.json --force");
  EXPECT_EQ(r.exit_code, 0);
  // --out DIR: the JSON and the report in one folder (created), refused
  // when they exist, and named on the terminal.
  r = test::RunCli("check " + tmp / "clean" + " --out " + tmp / "qa");
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
  EXPECT_TRUE(fs::exists(tmp / "qa/check.json"));
  EXPECT_TRUE(fs::exists(tmp / "qa/check_report.html"));
  EXPECT_NE(r.out.find("json: " + tmp / "qa/check.json"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("report: "), std::string::npos) << r.out;
  r = test::RunCli("check " + tmp / "clean" + " --out " + tmp / "qa");
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("check.json"), std::string::npos) << r.err;
}

// ---------------------------------------------------------------------------
// HTML report: self-contained, escaped, renders in headless Chromium.

TEST(SessionCheck, ReportIsSelfContainedAndEscaped) {
  synth::SimOptions sim = Small(11);
  sim.subject = "kh-bust-03<script>alert(1)</script>";
  sim.faults.dead_light = synth::CameraLightTarget{"cam00", FrontLights(sim).first};
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  const std::string html = RenderCheckReportHtml(c.result);
  EXPECT_EQ(html.find("<script>alert"), std::string::npos);
  EXPECT_NE(html.find("&lt;script&gt;alert(1)&lt;/script&gt;"), std::string::npos);
  EXPECT_EQ(html.find("http://"), std::string::npos);
  EXPECT_EQ(html.find("https://"), std::string::npos);
  EXPECT_EQ(html.find("<script"), std::string::npos);  // no scripts at all
  EXPECT_EQ(html.find("<link"), std::string::npos);
  // One thumbnail per OLAT frame.
  size_t count = 0;
  for (size_t p = html.find("data:image/png;base64,"); p != std::string::npos;
       p = html.find("data:image/png;base64,", p + 1))
    ++count;
  EXPECT_EQ(count, 40u);
}

TEST(SessionCheck, ReportRendersInHeadlessChromium) {
  const std::string chromium = "/usr/bin/chromium";
  if (!fs::exists(chromium)) GTEST_SKIP() << "Debian package chromium not installed (.ci/run installs it)";
  synth::SimOptions sim = Small(12);
  sim.faults.dead_light = synth::CameraLightTarget{"cam00", FrontLights(sim).first};
  sim.faults.drift_percent = 5.0;
  test::TempDir tmp;
  const Checked c = SimulateAndCheck(sim, tmp);
  std::string path;
  ASSERT_TRUE(WriteCheckReport(c.result, tmp / "report", false, &path).ok());
  // Test copy with an error catcher: any script error, failed image or
  // console.error becomes text in the DOM that --dump-dom prints.
  std::string html;
  {
    std::ifstream in(path);
    std::stringstream ss;
    ss << in.rdbuf();
    html = ss.str();
  }
  const std::string probe =
      "<script>window.__errs=[];window.onerror=function(m){window.__errs.push('JSERROR '+m)};"
      "var ce=console.error;console.error=function(m){window.__errs.push('CONSOLEERROR "
      "'+m);ce.apply(console,arguments)};"
      "window.addEventListener('error',function(e){if(e.target&&e.target.tagName)window.__errs.push('RESOURCEERROR '+"
      "e.target.tagName)},true);"
      "window.addEventListener('load',function(){var im=document.images;for(var i=0;i<im.length;i++)"
      "if(!im[i].complete||im[i].naturalWidth==0)window.__errs.push('IMGERROR '+i);"
      "var d=document.createElement('pre');d.id='probe';d.textContent='PROBE_DONE '+im.length+' "
      "'+window.__errs.join('|');"
      "document.body.appendChild(d)});</script>";
  const std::string probed_path = tmp / "report/probed.html";
  {
    std::string p = html;
    p.insert(p.find("<head>") + 6, probe);
    std::ofstream(probed_path) << p;
  }
  const std::string flags =
      "--headless --no-sandbox --disable-gpu --no-first-run --disable-background-networking "
      "--disable-component-update --disable-sync --enable-logging=stderr --v=0 "
      "--virtual-time-budget=5000 --user-data-dir=";
  auto dom = test::RunShell(chromium + " " + flags + tmp / "profile1" + " --dump-dom file://" + probed_path);
  ASSERT_EQ(dom.exit_code, 0) << dom.err;
  EXPECT_NE(dom.out.find("PROBE_DONE 40 </pre>"), std::string::npos)
      << "errors or missing images: " << dom.out.substr(std::min(dom.out.size(), dom.out.find("PROBE_DONE")), 400);
  EXPECT_EQ(dom.err.find("Uncaught"), std::string::npos) << dom.err;

  // Screenshot of the report itself: not blank.
  const std::string png = tmp / "report.png";
  auto shot = test::RunShell(chromium + " " + flags + tmp / "profile2" + " --hide-scrollbars --window-size=1280,2000" +
                             " --screenshot=" + png + " file://" + path);
  ASSERT_EQ(shot.exit_code, 0) << shot.err;
  EXPECT_EQ(shot.err.find("Uncaught"), std::string::npos) << shot.err;
  const cv::Mat img = cv::imread(png, cv::IMREAD_COLOR);
  ASSERT_FALSE(img.empty()) << "no screenshot at " << png;
  cv::Scalar mean, stddev;
  cv::meanStdDev(img, mean, stddev);
  EXPECT_GT(stddev[0] + stddev[1] + stddev[2], 30.0);  // a blank page has ~0 variance (common practice level)
  // The FAIL banner colour (#b71c1c) fills the top of the page.
  const cv::Vec3b top = img.at<cv::Vec3b>(10, 640);
  EXPECT_GT(top[2], 150);
  EXPECT_LT(top[1], 60);
  if (const char* keep = std::getenv("LUMENRIG_CHECK_SCREENSHOT"))
    fs::copy_file(png, keep, fs::copy_options::overwrite_existing);
}

}  // namespace
}  // namespace lumenrig::solvers
