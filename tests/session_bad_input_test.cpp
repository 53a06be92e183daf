// `lumenrig info` on a small valid session, then one test per bad-input class
// of issue 2 (item 3): each must exit 2 with one line on stderr naming the
// file and the problem, and write nothing.
#include <filesystem>
#include <fstream>
#include <functional>

#include <gtest/gtest.h>
#include <nlohmann/json.hpp>
#include <opencv2/imgcodecs.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "test_support.h"

namespace fs = std::filesystem;
using lumenrig::test::TempDir;
using nlohmann::json;

namespace {

constexpr int kW = 64;
constexpr int kH = 48;

int CountFilesRecursive(const std::string& dir) {
  int n = 0;
  for (const auto& e : fs::recursive_directory_iterator(dir)) n += e.is_regular_file() ? 1 : 0;
  return n;
}

void WriteJson(const std::string& path, const json& j) { std::ofstream(path) << j.dump(2); }

json BaseRig() {
  return json{{"format", "lumenrig.rig/1"},
              {"name", "kh-test-ring"},
              {"lights",
               {{{"id", 0}, {"direction", {0.0, 0.0, 1.0}}, {"intensity", {1.0, 0.98, 1.02}}},
                {{"id", 1}, {"direction", {0.6, 0.0, 0.8}}, {"intensity", {1.0, 1.0, 1.0}}},
                {{"id", 2}, {"position", {0.8, 1.2, 0.9}}, {"intensity", {2.0, 2.0, 2.0}}}}}};
}

json BaseSession() {
  return json{{"format", "lumenrig.session/1"},
              {"subject", "kh-bust-03"},
              {"rig", "rig.json"},
              {"encoding", "linear"},
              {"black_level", 0.0},
              {"cameras",
               {{{"id", "cam00"},
                 {"intrinsics", {{"fx", 80.0}, {"fy", 80.0}, {"cx", 32.0}, {"cy", 24.0}}},
                 {"olat",
                  {{{"light", 0}, {"path", "cam00/olat_000.exr"}},
                   {{"light", 1}, {"path", "cam00/olat_001.exr"}},
                   {{"light", 2}, {"path", "cam00/olat_002.exr"}}}},
                 {"dark", "cam00/dark.exr"},
                 {"mask", "cam00/mask.png"}}}}};
}

cv::Mat Noise(int w, int h, int channels, uint64_t seed) {
  cv::Mat m(h, w, CV_MAKETYPE(CV_32F, channels));
  cv::RNG rng(seed);
  rng.fill(m, cv::RNG::UNIFORM, 0.0, 1.0);
  return m;
}

// Writes a valid session folder, letting the caller break one thing.
void MakeSession(const TempDir& dir, const std::function<void(json*, json*)>& mutate = nullptr) {
  fs::create_directories(dir / "cam00");
  for (int i = 0; i < 3; ++i) {
    auto s = lumenrig::io::WriteExr(dir / fmt::format("cam00/olat_{:03d}.exr", i), Noise(kW, kH, 3, 10 + i));
    ASSERT_TRUE(s.ok()) << s.message();
  }
  ASSERT_TRUE(lumenrig::io::WriteExr(dir / "cam00/dark.exr", Noise(kW, kH, 3, 5) * 0.01).ok());
  cv::Mat mask(kH, kW, CV_8UC1, cv::Scalar(0));
  mask(cv::Rect(16, 12, 32, 24)).setTo(255);
  ASSERT_TRUE(cv::imwrite(dir / "cam00/mask.png", mask));
  json session = BaseSession(), rig = BaseRig();
  if (mutate) mutate(&session, &rig);
  WriteJson(dir / "session.json", session);
  WriteJson(dir / "rig.json", rig);
}

// Runs `info` and checks the bad-input contract; returns stderr.
std::string ExpectBadInput(const TempDir& dir, const std::string& file_name, const std::string& problem) {
  const int files_before = CountFilesRecursive(dir.path());
  const auto r = lumenrig::test::RunCli("info " + dir.path());
  EXPECT_EQ(r.exit_code, 2) << r.out << r.err;
  EXPECT_EQ(r.out, "") << "bad input must not print a report";
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << "not one line: " << r.err;
  EXPECT_NE(r.err.find(file_name), std::string::npos) << "does not name " << file_name << ": " << r.err;
  EXPECT_NE(r.err.find(problem), std::string::npos) << "does not say '" << problem << "': " << r.err;
  EXPECT_EQ(CountFilesRecursive(dir.path()), files_before) << "files were written";
  // --json must fail the same way.
  const auto rj = lumenrig::test::RunCli("info --json " + dir.path());
  EXPECT_EQ(rj.exit_code, 2);
  EXPECT_EQ(rj.out, "");
  return r.err;
}

TEST(InfoCommand, ReportsCamerasLightsFramesSizesAndTypes) {
  TempDir dir;
  MakeSession(dir);
  const auto r = lumenrig::test::RunCli("info " + dir.path());
  ASSERT_EQ(r.exit_code, 0) << r.err;
  EXPECT_NE(r.out.find("3 lights (2 directional, 1 near-field)"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("cam00: 64x48, 5 frames"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("4 x half RGB (OpenEXR)"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("1 x uint8 Y (PNG)"), std::string::npos) << r.out;
  EXPECT_NE(r.out.find("peak RSS"), std::string::npos) << r.out;

  const auto rj = lumenrig::test::RunCli("info --json " + dir.path());
  ASSERT_EQ(rj.exit_code, 0) << rj.err;
  const json j = json::parse(rj.out);
  EXPECT_EQ(j["subject"], "kh-bust-03");
  EXPECT_EQ(j["rig"]["lights"], 3);
  EXPECT_EQ(j["rig"]["directional"], 2);
  EXPECT_EQ(j["rig"]["near_field"], 1);
  EXPECT_EQ(j["frames_total"], 5);
  ASSERT_EQ(j["cameras"].size(), 1u);
  const json& cam = j["cameras"][0];
  EXPECT_EQ(cam["frame_counts"]["olat"], 3);
  EXPECT_EQ(cam["intrinsics"]["fx"], 80.0);
  // Source: OpenCV's decoders (cv::imread) as the outside reader of each file.
  setenv("OPENCV_IO_ENABLE_OPENEXR", "1", 1);
  for (const json& f : cam["frames"]) {
    const cv::Mat m = cv::imread(dir / f["path"].get<std::string>(), cv::IMREAD_UNCHANGED);
    ASSERT_FALSE(m.empty()) << f.dump();
    EXPECT_EQ(f["width"], m.cols);
    EXPECT_EQ(f["height"], m.rows);
    EXPECT_EQ(f["channels"], m.channels());
    EXPECT_EQ(f["pixel_type"], m.depth() == CV_8U ? "uint8" : "half") << f.dump();
  }
  EXPECT_EQ(cam["frames"][1]["light"], 1);
  EXPECT_EQ(cam["frames"][4]["role"], "mask");
}

TEST(SessionBadInput, WrongType) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["olat"][1]["light"] = "one"; });
  ExpectBadInput(dir, "session.json", "cameras[0].olat[1].light: expected an integer, found a string");
}

TEST(SessionBadInput, MissingKey) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { s->erase("rig"); });
  ExpectBadInput(dir, "session.json", "rig: missing required key");
}

TEST(SessionBadInput, MissingKeyInRig) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][2].erase("intensity"); });
  ExpectBadInput(dir, "rig.json", "lights[2].intensity: missing required key");
}

TEST(SessionBadInput, UnknownLightId) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["olat"][2]["light"] = 57; });
  ExpectBadInput(dir, "session.json", "unknown light id 57");
}

TEST(SessionBadInput, DuplicateLightId) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][2]["id"] = 1; });
  ExpectBadInput(dir, "rig.json", "duplicate light id 1");
}

TEST(SessionBadInput, DuplicateOlatSlot) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["olat"][2]["light"] = 0; });
  ExpectBadInput(dir, "session.json", "duplicate OLAT slot for light 0");
}

TEST(SessionBadInput, NonUnitDirection) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][1]["direction"] = {0.0, 0.0, 2.0}; });
  ExpectBadInput(dir, "rig.json", "lights[1].direction: not a unit vector");
}

TEST(SessionBadInput, ZeroDirection) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][0]["direction"] = {0.0, 0.0, 0.0}; });
  ExpectBadInput(dir, "rig.json", "lights[0].direction: zero vector");
}

TEST(SessionBadInput, NegativeIntensity) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][1]["intensity"][2] = -0.5; });
  ExpectBadInput(dir, "rig.json", "lights[1].intensity[2]: negative intensity");
}

TEST(SessionBadInput, NanIntensityAsNull) {
  // JSON has no NaN; serialisers write null for it (nlohmann, JavaScript).
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["lights"][0]["intensity"][1] = nullptr; });
  ExpectBadInput(dir, "rig.json", "lights[0].intensity[1]: not a number");
}

TEST(SessionBadInput, NanIntensityAsLiteral) {
  // Python's json.dumps writes the non-standard literal NaN.
  TempDir dir;
  MakeSession(dir);
  std::ofstream(dir / "rig.json")
      << R"({"format": "lumenrig.rig/1", "lights": [{"id": 0, "direction": [0, 0, 1], "intensity": [1, NaN, 1]}]})";
  ExpectBadInput(dir, "rig.json", "invalid JSON");
}

TEST(SessionBadInput, PathEscapingTheSessionFolder) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["olat"][0]["path"] = "../cam00/olat_000.exr"; });
  ExpectBadInput(dir, "session.json",
                 "cameras[0].olat[0].path: path \"../cam00/olat_000.exr\" escapes the session folder");
}

TEST(SessionBadInput, AbsolutePath) {
  TempDir dir;
  MakeSession(dir, [&](json* s, json*) { (*s)["cameras"][0]["dark"] = dir / "cam00/dark.exr"; });
  ExpectBadInput(dir, "session.json", "cameras[0].dark: path");
}

TEST(SessionBadInput, FileNotFound) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["olat"][1]["path"] = "cam00/olat_099.exr"; });
  ExpectBadInput(dir, "olat_099.exr", "file not found");
}

TEST(SessionBadInput, SessionFileNotFound) {
  TempDir dir;
  const auto r = lumenrig::test::RunCli("info " + (dir / "nowhere/session.json"));
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("nowhere/session.json: file not found"), std::string::npos) << r.err;
}

// A frame passed where the session goes: the message says what is expected.
TEST(SessionBadInput, AFramePassedAsTheSession) {
  TempDir dir;
  MakeSession(dir);
  const auto r = lumenrig::test::RunCli("info " + (dir / "cam00/olat_000.exr"));
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  EXPECT_NE(r.err.find("olat_000.exr: not a session (expected a session folder or its session.json)"),
            std::string::npos)
      << r.err;
}

TEST(SessionBadInput, TruncatedExr) {
  TempDir dir;
  MakeSession(dir);
  const std::string victim = dir / "cam00/olat_001.exr";
  fs::resize_file(victim, fs::file_size(victim) / 2);
  ExpectBadInput(dir, "olat_001.exr", "truncated");
}

TEST(SessionBadInput, GarbageExr) {
  TempDir dir;
  MakeSession(dir);
  std::ofstream(dir / "cam00/olat_002.exr") << "definitely not an OpenEXR file";
  ExpectBadInput(dir, "olat_002.exr", "OpenEXR");
}

TEST(SessionBadInput, TruncatedPngFoundByVerify) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["backlit"] = "cam00/backlit.png"; });
  cv::Mat noise(kH, kW, CV_8UC3);
  cv::randu(noise, 0, 256);  // incompressible: the cut lands in pixel data
  const std::string victim = dir / "cam00/backlit.png";
  ASSERT_TRUE(cv::imwrite(victim, noise));
  fs::resize_file(victim, fs::file_size(victim) / 2);
  // The PNG header is intact, so the header probe passes; --verify decodes.
  const auto r = lumenrig::test::RunCli("info --verify " + dir.path());
  EXPECT_EQ(r.exit_code, 2) << r.out << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  EXPECT_NE(r.err.find("backlit.png: truncated or corrupt PNG data"), std::string::npos) << r.err;
}

// OpenEXR frames store half floats, and --verify decodes them as stored
// (without widening to float): corrupt ZIP blocks must still be found.
TEST(SessionBadInput, CorruptExrBlocksFoundByVerify) {
  TempDir dir;
  MakeSession(dir);
  const std::string victim = dir / "cam00/olat_001.exr";
  const auto size = static_cast<std::streamoff>(fs::file_size(victim));
  {
    // Overwrite a sixth from a third into the file (a middle block of pixels;
    // the header and the offset table come first, and the header probe reads
    // the last block) with a fixed byte pattern, keeping the size.
    std::fstream f(victim, std::ios::in | std::ios::out | std::ios::binary);
    f.seekp(size / 3);
    const std::string junk(static_cast<size_t>(size / 6), '\xa5');
    f.write(junk.data(), static_cast<std::streamsize>(junk.size()));
  }
  const auto probe = lumenrig::test::RunCli("info " + dir.path());
  EXPECT_EQ(probe.exit_code, 0) << probe.out << probe.err;  // headers are intact
  const auto r = lumenrig::test::RunCli("info --verify " + dir.path());
  EXPECT_EQ(r.exit_code, 2) << r.out << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  EXPECT_NE(r.err.find("olat_001.exr"), std::string::npos) << r.err;
}

TEST(SessionBadInput, PngOfTheWrongSize) {
  TempDir dir;
  MakeSession(dir);
  ASSERT_TRUE(cv::imwrite(dir / "cam00/mask.png", cv::Mat(32, 32, CV_8UC1, cv::Scalar(255))));
  ExpectBadInput(dir, "mask.png", "frame size 32x32 differs from 64x48");
}

TEST(SessionBadInput, UnknownSessionFormatString) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["format"] = "lumenrig.session/9"; });
  ExpectBadInput(dir, "session.json", "format: unsupported format \"lumenrig.session/9\"");
}

TEST(SessionBadInput, UnknownRigFormatString) {
  TempDir dir;
  MakeSession(dir, [](json*, json* r) { (*r)["format"] = "dome-calib-v2"; });
  ExpectBadInput(dir, "rig.json", "unsupported format \"dome-calib-v2\"");
}

TEST(SessionBadInput, UnknownEncodingString) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["encoding"] = "rec709"; });
  ExpectBadInput(dir, "session.json", "unknown encoding \"rec709\"");
}

TEST(SessionBadInput, UnknownImageFormat) {
  TempDir dir;
  MakeSession(dir, [](json* s, json*) { (*s)["cameras"][0]["backlit"] = "cam00/backlit.bmp"; });
  ASSERT_TRUE(cv::imwrite(dir / "cam00/backlit.bmp", cv::Mat(kH, kW, CV_8UC3, cv::Scalar(1, 2, 3))));
  ExpectBadInput(dir, "backlit.bmp", "unsupported image format");
}

TEST(SessionBadInput, MissingSessionArgumentIsUsageError) {
  const auto r = lumenrig::test::RunCli("info");
  EXPECT_EQ(r.exit_code, 2) << r.out << r.err;
}

}  // namespace
