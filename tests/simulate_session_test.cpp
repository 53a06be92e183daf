// Tests of the simulated session folder on disk: it loads back with
// io::LoadSession, matches the in-memory simulator, is byte-identical for any
// thread count, and each injected fault shows where it should.
#include <algorithm>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>

#include <gtest/gtest.h>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/synth/simulator.h"
#include "test_support.h"

namespace fs = std::filesystem;

namespace lumenrig::synth {
namespace {

SimOptions SmallOptions() {
  SimOptions o;
  o.width = 64;
  o.height = 48;
  o.num_lights = 8;
  o.num_cameras = 2;
  o.tracking_every = 4;
  o.threads = 2;
  return o;
}

std::string Slurp(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

/// Relative path -> bytes of every regular file under `dir`.
std::map<std::string, std::string> AllFiles(const std::string& dir) {
  std::map<std::string, std::string> out;
  for (const auto& e : fs::recursive_directory_iterator(dir)) {
    if (e.is_regular_file()) out[fs::relative(e.path(), dir).string()] = Slurp(e.path().string());
  }
  return out;
}

cv::Mat Read(const std::string& path, float black = 0.0f) {
  io::DecodeOptions d;
  d.black_level = black;
  auto im = io::ReadImage(path, d);
  EXPECT_TRUE(im.ok()) << im.status().message();
  return im.ok() ? *im : cv::Mat();
}

TEST(SimulateSession, WrittenSessionLoadsBackWithEverySlot) {
  test::TempDir tmp;
  const std::string dir = tmp / "s";
  SimSummary summary;
  ASSERT_TRUE(SimulateSession(SmallOptions(), dir, &summary).ok());
  auto session = io::LoadSession(dir);
  ASSERT_TRUE(session.ok()) << session.status().message();
  EXPECT_EQ(session->subject, "kh-bust-03");
  EXPECT_DOUBLE_EQ(session->black_level, 0.01);
  ASSERT_EQ(session->cameras.size(), 2u);
  ASSERT_EQ(session->rig.lights.size(), 8u);
  const io::Rig expected_rig = MakeSimRig(SmallOptions());
  for (size_t i = 0; i < expected_rig.lights.size(); ++i) {
    EXPECT_EQ(session->rig.lights[i].id, expected_rig.lights[i].id);
    EXPECT_TRUE(session->rig.lights[i].intensity.isApprox(expected_rig.lights[i].intensity, 1e-12));
    EXPECT_TRUE(session->rig.lights[i].direction->isApprox(*expected_rig.lights[i].direction, 1e-9));
  }
  for (const io::Camera& cam : session->cameras) {
    EXPECT_EQ(cam.olat.size(), 8u);
    EXPECT_EQ(cam.tracking.size(), 2u);  // after lights 3 and 7
    EXPECT_EQ(cam.matte_pairs.size(), 2u);
    EXPECT_FALSE(cam.dark.empty());
    EXPECT_FALSE(cam.clean_plate.empty());
    EXPECT_FALSE(cam.backlit.empty());
    EXPECT_FALSE(cam.lit.empty());
    EXPECT_FALSE(cam.mask.empty());
    ASSERT_TRUE(cam.intrinsics.has_value());
    EXPECT_TRUE(cam.has_camera_from_rig);
    auto info = io::ProbeImage(cam.olat[0].path);
    ASSERT_TRUE(info.ok());
    EXPECT_EQ(info->width, 64);
    EXPECT_EQ(info->height, 48);
    EXPECT_EQ(info->pixel_type, "half");
    for (const char* name : {"normals.exr", "albedo.exr", "alpha.exr", "depth.exr", "foreground.exr", "mask.png"})
      EXPECT_TRUE(fs::exists(dir + "/truth/" + cam.id + "/" + name)) << cam.id << " " << name;
  }
  EXPECT_TRUE(fs::exists(dir + "/truth/simulation.json"));
  EXPECT_EQ(summary.session_path, fs::absolute(dir).lexically_normal().string() + "/session.json");
}

TEST(SimulateSession, DiskFramesEqualTheInMemorySimulatorToHalfPrecision) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  ASSERT_TRUE(SimulateSession(o, tmp / "s").ok());
  auto session = io::LoadSession(tmp / "s");
  ASSERT_TRUE(session.ok()) << session.status().message();
  auto mem = SimulateCamera(o, 1);
  ASSERT_TRUE(mem.ok());
  for (size_t k = 0; k < mem->olat.size(); ++k) {
    const cv::Mat disk = Read(session->cameras[1].olat[k].path);
    cv::Mat diff;
    cv::absdiff(disk, mem->olat[k], diff);
    double worst;
    cv::minMaxLoc(diff.reshape(1), nullptr, &worst);
    // IEEE binary16 has an 11-bit significand: relative rounding 2^-11 of values <= 1.
    EXPECT_LE(worst, 1.0 / 2048) << "light " << k;
  }
  const cv::Mat alpha = Read(tmp / "s/truth/cam01/alpha.exr");
  EXPECT_EQ(cv::norm(alpha, mem->truth.alpha, cv::NORM_INF), 0.0);
}

// The compositing equation I = alpha F + (1 - alpha) B (Porter and Duff 1984;
// Smith and Blinn 1996, "Blue screen matting") holds for both matte pairs with
// the truth alpha and foreground. Tolerance: half-float storage of values
// <= 1 (2^-11 relative) on three terms (common practice).
TEST(SimulateSession, MattePairsObeyTheCompositingEquationWithTruth) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.num_cameras = 1;
  o.noise = false;
  o.black_level = 0.0;
  ASSERT_TRUE(SimulateSession(o, tmp / "s").ok());
  auto session = io::LoadSession(tmp / "s");
  ASSERT_TRUE(session.ok()) << session.status().message();
  const cv::Mat alpha = Read(tmp / "s/truth/cam00/alpha.exr");
  const cv::Mat fg = Read(tmp / "s/truth/cam00/foreground.exr");
  ASSERT_EQ(session->cameras[0].matte_pairs.size(), 2u);
  int fractional = 0;
  for (const io::MattePair& pair : session->cameras[0].matte_pairs) {
    const cv::Mat plate = Read(pair.plate);
    const cv::Mat frame = Read(pair.frame);
    for (int y = 0; y < o.height; ++y) {
      for (int x = 0; x < o.width; ++x) {
        const float a = alpha.at<float>(y, x);
        if (a > 0.0f && a < 1.0f) ++fractional;
        const cv::Vec3f expect = a * fg.at<cv::Vec3f>(y, x) + (1.0f - a) * plate.at<cv::Vec3f>(y, x);
        const cv::Vec3f got = frame.at<cv::Vec3f>(y, x);
        for (int c = 0; c < 3; ++c) ASSERT_NEAR(got[c], expect[c], 3e-3) << "pixel (" << x << "," << y << ")";
      }
    }
  }
  EXPECT_GT(fractional, 20);
  // The two plates differ by >= 0.15 per channel everywhere (triangulation needs it).
  cv::Mat diff;
  cv::absdiff(Read(session->cameras[0].matte_pairs[0].plate), Read(session->cameras[0].matte_pairs[1].plate), diff);
  double mn;
  cv::minMaxLoc(diff.reshape(1), &mn, nullptr);
  EXPECT_GE(mn, 0.149);
}

TEST(SimulateSession, ByteIdenticalForOneAndTwoThreads) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.faults.motion_px = 3.0;  // exercises per-frame geometry too
  o.threads = 1;
  ASSERT_TRUE(SimulateSession(o, tmp / "one").ok());
  o.threads = 2;
  ASSERT_TRUE(SimulateSession(o, tmp / "two").ok());
  const auto one = AllFiles(tmp / "one");
  const auto two = AllFiles(tmp / "two");
  ASSERT_EQ(one.size(), two.size());
  ASSERT_GT(one.size(), 40u);
  for (const auto& [name, bytes] : one) {
    ASSERT_TRUE(two.count(name)) << name;
    EXPECT_TRUE(bytes == two.at(name)) << name << " differs between 1 and 2 threads";
  }
}

TEST(SimulateSession, RefusesNonEmptyFolderUnlessOverwrite) {
  test::TempDir tmp;
  const std::string dir = tmp / "s";
  fs::create_directories(dir);
  std::ofstream(dir + "/keep.txt") << "user data";
  SimOptions o = SmallOptions();
  io::Status st = SimulateSession(o, dir);
  EXPECT_EQ(st.code(), io::StatusCode::kBadInput);
  EXPECT_NE(st.message().find("--force"), std::string::npos) << st.message();
  EXPECT_EQ(test::CountFiles(dir), 1);
  o.overwrite = true;
  EXPECT_TRUE(SimulateSession(o, dir).ok());
  EXPECT_TRUE(fs::exists(dir + "/session.json"));
  EXPECT_TRUE(SimulateSession(o, dir).ok()) << "rewriting over itself with overwrite";
}

TEST(SimulateSessionFaults, MissingFrameIsAbsentFromFolderAndSession) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.faults.missing_frame = CameraLightTarget{"cam01", 3};
  ASSERT_TRUE(SimulateSession(o, tmp / "s").ok());
  EXPECT_FALSE(fs::exists(tmp / "s/cam01/olat_003.exr"));
  EXPECT_TRUE(fs::exists(tmp / "s/cam00/olat_003.exr"));
  auto session = io::LoadSession(tmp / "s");
  ASSERT_TRUE(session.ok()) << session.status().message();
  EXPECT_EQ(session->cameras[0].olat.size(), 8u);
  ASSERT_EQ(session->cameras[1].olat.size(), 7u);
  for (const io::OlatFrame& f : session->cameras[1].olat) EXPECT_NE(f.light, 3);
}

TEST(SimulateSessionFaults, SwappedFramesHoldEachOthersPixels) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  ASSERT_TRUE(SimulateSession(o, tmp / "clean").ok());
  o.faults.swapped_frames = SimFaults::Swap{"cam00", 2, 5};
  ASSERT_TRUE(SimulateSession(o, tmp / "swap").ok());
  auto clean = AllFiles(tmp / "clean");
  auto swap = AllFiles(tmp / "swap");
  EXPECT_TRUE(swap.at("cam00/olat_002.exr") == clean.at("cam00/olat_005.exr"));
  EXPECT_TRUE(swap.at("cam00/olat_005.exr") == clean.at("cam00/olat_002.exr"));
  EXPECT_FALSE(swap.at("cam00/olat_002.exr") == clean.at("cam00/olat_002.exr"));
  EXPECT_TRUE(swap.at("cam01/olat_002.exr") == clean.at("cam01/olat_002.exr")) << "other camera untouched";
  EXPECT_TRUE(swap.at("cam00/olat_003.exr") == clean.at("cam00/olat_003.exr"));
}

TEST(SimulateSessionFaults, DeadAndSaturatedLightsOnDisk) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.faults.dead_light = CameraLightTarget{"cam00", 1};
  o.faults.saturated_light = CameraLightTarget{"cam01", 2};
  ASSERT_TRUE(SimulateSession(o, tmp / "s").ok());
  const cv::Scalar dead = cv::mean(Read(tmp / "s/cam00/olat_001.exr", 0.01f));
  for (int c = 0; c < 3; ++c) EXPECT_NEAR(dead[c], 0.0, 1e-3) << "dead light: only black level and noise";
  const cv::Scalar alive = cv::mean(Read(tmp / "s/cam01/olat_001.exr", 0.01f));
  EXPECT_GT(alive[1], 0.003);  // dead frame mean is 0 +- read noise / sqrt(pixels)
  double mx;
  cv::minMaxLoc(Read(tmp / "s/cam01/olat_002.exr").reshape(1), nullptr, &mx);
  EXPECT_EQ(mx, 1.0);
  cv::minMaxLoc(Read(tmp / "s/cam00/olat_002.exr").reshape(1), nullptr, &mx);
  EXPECT_LT(mx, 1.0);
}

TEST(SimulateSessionFaults, PlateShiftMovesTheBacklitFrameOnly) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.num_cameras = 1;
  o.noise = false;
  ASSERT_TRUE(SimulateSession(o, tmp / "clean").ok());
  o.faults.plate_shift_px = 5.0;
  ASSERT_TRUE(SimulateSession(o, tmp / "shift").ok());
  const cv::Mat clean = Read(tmp / "clean/cam00/backlit.exr");
  const cv::Mat shifted = Read(tmp / "shift/cam00/backlit.exr");
  // An integer principal-point shift moves every pixel ray by exactly 5 columns.
  const cv::Mat a = clean(cv::Rect(0, 0, o.width - 5, o.height));
  const cv::Mat b = shifted(cv::Rect(5, 0, o.width - 5, o.height));
  EXPECT_LE(cv::norm(a, b, cv::NORM_INF), 1e-3);
  EXPECT_GT(cv::norm(clean, shifted, cv::NORM_INF), 0.05);
  EXPECT_EQ(Slurp(tmp / "clean/cam00/plate.exr"), Slurp(tmp / "shift/cam00/plate.exr"));
}

TEST(SimulateSessionFaults, MotionShowsInTrackingFrames) {
  test::TempDir tmp;
  SimOptions o = SmallOptions();
  o.num_cameras = 1;
  o.noise = false;
  ASSERT_TRUE(SimulateSession(o, tmp / "clean").ok());
  o.faults.motion_px = 6.0;
  ASSERT_TRUE(SimulateSession(o, tmp / "moved").ok());
  // Tracking after light 7 is at t = 1: the whole 6 px. Compare column
  // profiles of the fully lit tracking frames: best integer shift is 6.
  const cv::Mat clean = Read(tmp / "clean/cam00/track_007.exr", 0.01f);
  const cv::Mat moved = Read(tmp / "moved/cam00/track_007.exr", 0.01f);
  double best_err = 1e30;
  int best_shift = -100;
  for (int s = -10; s <= 10; ++s) {
    const int w = o.width - 20;
    const double err =
        cv::norm(clean(cv::Rect(10, 0, w, o.height)), moved(cv::Rect(10 + s, 0, w, o.height)), cv::NORM_L2);
    if (err < best_err) {
      best_err = err;
      best_shift = s;
    }
  }
  EXPECT_EQ(best_shift, 6);
  EXPECT_EQ(Slurp(tmp / "clean/cam00/olat_000.exr"), Slurp(tmp / "moved/cam00/olat_000.exr")) << "t = 0";
}

TEST(SimulateCli, WritesSessionAndPrintsWhere) {
  test::TempDir tmp;
  // A trailing slash names the same folder.
  auto r = test::RunCli("simulate --out " + (tmp / "s/") + " --size 48x32 --lights 6 --no-noise --threads 2");
  ASSERT_EQ(r.exit_code, 0) << r.err;
  EXPECT_NE(r.out.find("session: " + fs::absolute(tmp / "s").string() + "/session.json"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("peak RSS"), std::string::npos);
  EXPECT_TRUE(io::LoadSession(tmp / "s").ok());
}

TEST(SimulateCli, BadInputExitsTwoWithOneLineAndNoOutput) {
  test::TempDir tmp;
  struct Case {
    std::string args, needle;
  } cases[] = {
      {"--size 12", "--size"},
      {"--lights 2", "lights"},
      {"--fault-dead-light cam09:1", "cam09"},
      {"--fault-missing cam00", "--fault-missing"},
      {"--fault-swap cam00:1,1", "swap"},
  };
  for (const Case& c : cases) {
    auto r = test::RunCli("simulate --out " + (tmp / "s") + " " + c.args);
    EXPECT_EQ(r.exit_code, 2) << c.args;
    EXPECT_NE(r.err.find(c.needle), std::string::npos) << c.args << ": " << r.err;
    EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
    EXPECT_FALSE(fs::exists(tmp / "s")) << c.args;
  }
  fs::create_directories(tmp / "full");
  std::ofstream(tmp / "full/x") << "x";
  auto r = test::RunCli("simulate --out " + (tmp / "full") + " --size 48x32 --lights 6");
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("--force"), std::string::npos) << r.err;
  EXPECT_EQ(test::CountFiles(tmp / "full"), 1);
}

}  // namespace
}  // namespace lumenrig::synth
