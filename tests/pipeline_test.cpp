// `lumenrig run` end to end: two simulated sessions with two cameras each,
// read back by h5py (the outside reader) and compared with the per-stage EXR
// outputs; kill-and-resume with SIGKILL at several points; dry-run reasons;
// the QA gate; thread-count determinism; MPI sharding.
#include <filesystem>
#include <fstream>
#include <iterator>
#include <string>

#include <gtest/gtest.h>
#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/synth/pipeline.h"
#include "test_support.h"

namespace fs = std::filesystem;
using lumenrig::test::CommandResult;
using lumenrig::test::RunCli;
using lumenrig::test::RunShell;
using lumenrig::test::TempDir;

namespace {

/// Two small sessions and a folder of maps, shared by the tests of this file.
class PipelineTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    data_ = new TempDir();
    for (int i = 0; i < 2; ++i) {
      const std::string dir = Session(i);
      auto r = RunCli(fmt("simulate --out %s --cameras 2 --lights 40 --size 96x72 --seed %d --subject kh-bust-0%d",
                          dir.c_str(), 11 + i, 3 + i));
      ASSERT_EQ(r.exit_code, 0) << r.err;
    }
    auto r = RunCli("envmaps --out " + Envs() + " --height 32");
    ASSERT_EQ(r.exit_code, 0) << r.err;
  }
  static void TearDownTestSuite() {
    delete data_;
    data_ = nullptr;
  }
  static std::string fmt(const char* f, const char* a, int b, int c) {
    char buf[512];
    std::snprintf(buf, sizeof(buf), f, a, b, c);
    return buf;
  }
  static std::string Session(int i) { return *data_ / ("session" + std::to_string(i)); }
  static std::string Envs() { return *data_ / "envs"; }
  static std::string Args(const std::string& out, const std::string& extra = "") {
    return "run " + Session(0) + " " + Session(1) + " --out " + out + " --envs " + Envs() +
           " --count 4 --size 48x48 --mem-budget 512M " + extra;
  }
  /// Content hashes of every dataset of every HDF5 file in `out` (h5py), one
  /// line per dataset, so runs can be compared without timestamps.
  static std::string DatasetHashes(const std::string& out) {
    const std::string script = *data_ / "hashes.py";
    std::ofstream(script) << R"PY(
import sys, glob, hashlib, h5py, numpy as np
for path in sorted(glob.glob(sys.argv[1] + '/*.h5')):
    f = h5py.File(path, 'r')
    def visit(name, obj):
        if isinstance(obj, h5py.Dataset):
            data = obj[...]
            if data.dtype.kind == 'O':
                data = np.array([str(x) for x in data.reshape(-1)])
            print(path.split('/')[-1], name, obj.shape, hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest())
    f.visititems(visit)
)PY";
    auto r = RunShell(lumenrig::test::Python() + " " + script + " " + out);
    EXPECT_EQ(r.exit_code, 0) << r.err;
    return r.out;
  }
  static TempDir* data_;
};
TempDir* PipelineTest::data_ = nullptr;

TEST_F(PipelineTest, RunsEndToEndAndH5pyOutputsMatchStageExrs) {
  TempDir out;
  auto r = RunCli(Args(out.path()) + " --stats");
  ASSERT_EQ(r.exit_code, 0) << r.out << r.err;
  for (const char* id : {"kh-bust-03", "kh-bust-04"}) {
    EXPECT_TRUE(fs::exists(out / (std::string(id) + ".h5"))) << id;
    EXPECT_TRUE(fs::exists(out / (std::string(id) + ".pairs.h5"))) << id;
    EXPECT_NE(r.out.find(std::string(id) + ".h5"), std::string::npos) << "output paths are printed";
  }
  EXPECT_NE(r.out.find("stage"), std::string::npos) << "--stats table";
  // Log lines (stderr is not a terminal here): the normals are solved in the
  // session check's one read of the OLAT frames, and the lines say so rather
  // than give the normals units only their bookkeeping time.
  EXPECT_NE(r.err.find("check (with the normals of cam00, cam01 in the same read of the OLAT frames)"),
            std::string::npos)
      << r.err;
  EXPECT_NE(r.err.find("check in "), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("solving the normals of cam00, cam01 in the same read of the OLAT frames"), std::string::npos)
      << r.err;
  EXPECT_NE(r.err.find("cam01 normals in "), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("(solved in the session check's read of the OLAT frames)"), std::string::npos) << r.err;
  // HDF5 used from worker threads must not print at exit ("infinite loop
  // closing library") or leak its error stacks to the terminal.
  EXPECT_EQ(r.err.find("HDF5"), std::string::npos) << r.err;
  // h5py (outside reader) against OpenCV's EXR reader (outside reader) of the
  // per-stage outputs: half precision of the stored values (2^-11 relative).
  const std::string script = out / "compare.py";
  std::ofstream(script) << R"PY(
import os, sys, h5py, numpy as np
os.environ['OPENCV_IO_ENABLE_OPENEXR'] = '1'
import cv2
out = sys.argv[1]
checked = 0
for sid in ('kh-bust-03', 'kh-bust-04'):
    f = h5py.File(f'{out}/{sid}.h5', 'r')
    assert f.attrs['format'] == 'lumenrig.groundtruth/1'
    assert 'qa_json' in f.attrs
    for cam in ('cam00', 'cam01'):
        for ds, stage, name in (('normals', 'normals', 'normals.exr'), ('albedo', 'normals', 'albedo.exr'),
                                ('depth', 'normals', 'depth.exr'), ('alpha', 'matte', 'alpha.exr')):
            exr = cv2.imread(f'{out}/{sid}/{cam}/{stage}/{name}', cv2.IMREAD_UNCHANGED).astype(np.float32)
            if exr.ndim == 3:
                exr = exr[:, :, ::-1]
            else:
                exr = exr[:, :, None]
            h = f[f'/cameras/{cam}/{ds}'][...].astype(np.float32)
            assert h.shape == exr.shape, (sid, cam, ds, h.shape, exr.shape)
            tol = 0 if ds == 'depth' else 1e-3 * np.abs(exr) + 1e-4
            assert np.all(np.abs(h - exr) <= tol), (sid, cam, ds, float(np.abs(h - exr).max()))
            checked += 1
    p = h5py.File(f'{out}/{sid}.pairs.h5', 'r')
    assert p['/pairs/input'].shape == (4, 48, 48, 3) and p['/pairs/input'].dtype == np.float16
print(checked)
)PY";
  auto c = RunShell(lumenrig::test::Python() + " " + script + " " + out.path());
  EXPECT_EQ(c.exit_code, 0) << c.out << c.err;
  EXPECT_EQ(c.out, "16\n");

  // The run's check decoded the OLAT frames once for itself and the normals:
  // its verdict file equals the standalone `lumenrig check` (wall time aside),
  // and the normals outputs equal the standalone `lumenrig normals`.
  TempDir alone;
  auto chk = RunCli("check " + Session(0) + " --json " + (alone / "check.json"));
  ASSERT_EQ(chk.exit_code, 0) << chk.err;
  auto load = [](const std::string& path) {
    std::ifstream in(path);
    nlohmann::json j = nlohmann::json::parse(in, nullptr, false);
    if (!j.is_discarded()) j.erase("seconds");
    return j.dump(1);
  };
  EXPECT_EQ(load(out / "kh-bust-03/check/check.json"), load(alone / "check.json"));
  auto nrm = RunCli("normals " + Session(0) + " --camera cam01 --out " + (alone / "n"));
  ASSERT_EQ(nrm.exit_code, 0) << nrm.err;
  auto pixels = [](const std::string& path) {
    auto image = lumenrig::io::ReadImage(path);
    EXPECT_TRUE(image.ok()) << path;
    return image.ok() ? std::string(reinterpret_cast<const char*>(image->data), image->total() * image->elemSize())
                      : std::string();
  };
  for (const char* name : {"normals.exr", "albedo.exr", "confidence.exr", "depth.exr"})
    EXPECT_EQ(pixels(out / (std::string("kh-bust-03/cam01/normals/") + name)),
              pixels(alone / (std::string("n/") + name)))
        << name;
  std::ifstream stamp(out / "kh-bust-03/stamps/normals.cam01.json");
  EXPECT_NE(std::string(std::istreambuf_iterator<char>(stamp), {}).find("\"solved_in\": \"check\""), std::string::npos)
      << "the normals were solved in the check's reading pass";
}

TEST_F(PipelineTest, KilledRunsResumeToTheSameContent) {
  TempDir reference;
  auto r = RunCli(Args(reference.path()));
  ASSERT_EQ(r.exit_code, 0) << r.err;
  const std::string expected = DatasetHashes(reference.path());
  ASSERT_FALSE(expected.empty());
  // Kill points: after some frames were solved (first camera's normals), in
  // the middle of an HDF5 write (assemble), and after the matte of the
  // second session.
  // "fused:normals" falls inside the check's reading pass, after the first
  // camera's normals were written and before the check finished.
  for (const char* point : {"fused:normals:kh-bust-03:cam00", "after:normals:kh-bust-03:cam00", "assemble:mid_write",
                            "after:matte:kh-bust-04:cam01"}) {
    TempDir out;
    auto killed = RunShell(std::string("LUMENRIG_TEST_KILL_AT=") + point + " NO_COLOR=1 " + LUMENRIG_CLI_PATH + " " +
                           Args(out.path()) + " </dev/null");
    EXPECT_EQ(killed.exit_code, 128 + 9) << point << ": the process must die by SIGKILL\n" << killed.err;
    // Nothing half-written where a finished file is expected.
    for (const auto& e : fs::directory_iterator(out.path()))
      if (e.path().extension() == ".h5") {
        auto check = RunShell(lumenrig::test::Python() + " -c \"import h5py,sys; h5py.File(sys.argv[1],'r')\" " +
                              e.path().string());
        EXPECT_EQ(check.exit_code, 0) << point << ": unreadable " << e.path();
      }
    auto resumed = RunCli(Args(out.path()));
    ASSERT_EQ(resumed.exit_code, 0) << point << "\n" << resumed.err;
    EXPECT_EQ(DatasetHashes(out.path()), expected) << point;
  }
}

TEST_F(PipelineTest, DryRunShowsWhatAnOptionChangeReruns) {
  TempDir out;
  ASSERT_EQ(RunCli(Args(out.path())).exit_code, 0);
  auto same = RunCli(Args(out.path(), "--dry-run"));
  ASSERT_EQ(same.exit_code, 0) << same.err;
  EXPECT_EQ(same.out.find("will"), std::string::npos) << same.out;
  auto changed = RunCli(Args(out.path(), "--dry-run --matte-method difference"));
  ASSERT_EQ(changed.exit_code, 0) << changed.err;
  std::istringstream lines(changed.out);
  std::string line;
  int matte = 0, downstream = 0, untouched = 0;
  while (std::getline(lines, line)) {
    const bool reruns = line.find("will rerun") != std::string::npos;
    if (line.find(" matte ") != std::string::npos) {
      EXPECT_TRUE(reruns) << line;
      EXPECT_NE(line.find("options changed: method"), std::string::npos) << line;
      ++matte;
    } else if (line.find(" assemble ") != std::string::npos || line.find(" pairs ") != std::string::npos) {
      EXPECT_TRUE(reruns) << line;
      ++downstream;
    } else {
      EXPECT_NE(line.find("up to date"), std::string::npos) << line;
      ++untouched;
    }
  }
  EXPECT_EQ(matte, 4);       // 2 sessions x 2 cameras
  EXPECT_EQ(downstream, 4);  // assemble + pairs per session
  EXPECT_EQ(untouched, 6);   // check + 2 normals per session
  // Modifying an output is noticed too.
  std::ofstream(out / "kh-bust-03/cam00/normals/albedo.exr", std::ios::app) << "x";
  auto modified = RunCli(Args(out.path(), "--dry-run"));
  EXPECT_NE(modified.out.find("output missing or modified"), std::string::npos) << modified.out;
}

TEST_F(PipelineTest, OutputsAreIdenticalForOneAndTwoThreads) {
  TempDir one, two;
  ASSERT_EQ(RunCli(Args(one.path(), "--threads 1")).exit_code, 0);
  ASSERT_EQ(RunCli(Args(two.path(), "--threads 2")).exit_code, 0);
  EXPECT_EQ(DatasetHashes(one.path()), DatasetHashes(two.path()));
  // The ground-truth files carry no timestamps: byte-identical.
  auto cmp = RunShell("cmp " + (one / "kh-bust-03.h5") + " " + (two / "kh-bust-03.h5"));
  EXPECT_EQ(cmp.exit_code, 0) << cmp.out;
}

TEST_F(PipelineTest, QaFailStopsLaterStagesUnlessForced) {
  TempDir bad, out, forced;
  auto sim =
      RunCli("simulate --out " + bad.path() + "/s --cameras 1 --lights 40 --size 96x72 --fault-dead-light cam00:3");
  ASSERT_EQ(sim.exit_code, 0) << sim.err;
  auto r = RunCli("run " + bad.path() + "/s --out " + out.path() + " --stages check,normals,matte,assemble");
  EXPECT_EQ(r.exit_code, 1) << r.out << r.err;
  EXPECT_NE(r.err.find("QA failed"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(out / "kh-bust-03.h5"));
  // The check solved the normals in its reading pass; a FAIL leaves none.
  EXPECT_FALSE(fs::exists(out / "kh-bust-03/cam00/normals/normals.exr"));
  EXPECT_FALSE(fs::exists(out / "kh-bust-03/cam00")) << "empty folder left behind";
  EXPECT_TRUE(fs::exists(out / "kh-bust-03/check/check.json"));
  auto f = RunCli("run " + bad.path() + "/s --out " + forced.path() + " --stages check,normals,matte,assemble --force");
  EXPECT_EQ(f.exit_code, 0) << f.err;
  EXPECT_TRUE(fs::exists(forced / "kh-bust-03.h5"));
  EXPECT_TRUE(fs::exists(forced / "kh-bust-03/cam00/normals/normals.exr"));
}

TEST_F(PipelineTest, BadInputIsOneLineExitTwo) {
  TempDir out;
  auto r = RunCli("run " + (*data_ / "nope") + " --out " + out.path());
  EXPECT_EQ(r.exit_code, 2);
  EXPECT_NE(r.err.find("nope"), std::string::npos) << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  auto s = RunCli(Args(out.path(), "--stages check,bogus"));
  EXPECT_EQ(s.exit_code, 2);
  EXPECT_NE(s.err.find("bogus"), std::string::npos) << s.err;
  EXPECT_EQ(lumenrig::test::CountFiles(out.path()), 0);
}

TEST_F(PipelineTest, MpiRanksShareTheSessionsWithIdenticalResults) {
  if (RunShell("command -v mpirun").exit_code != 0) GTEST_SKIP() << "mpirun not installed (Debian openmpi-bin)";
  TempDir single, sharded;
  ASSERT_EQ(RunCli(Args(single.path())).exit_code, 0);
  auto r = RunShell(std::string("OMPI_MCA_plm=isolated OMPI_MCA_btl_vader_single_copy_mechanism=none "
                                "OMPI_MCA_rmaps_base_oversubscribe=1 mpirun --allow-run-as-root -np 2 ") +
                    LUMENRIG_CLI_PATH + " " + Args(sharded.path(), "--threads 1") + " </dev/null");
  ASSERT_EQ(r.exit_code, 0) << r.out << r.err;
  EXPECT_EQ(DatasetHashes(single.path()), DatasetHashes(sharded.path()));
}

}  // namespace

// The progress display's ETA weighs units by expected work (UnitWeights):
// a due check carries the normals it solves in its pass; a normals unit run
// on its own (its check up to date) carries its decode and solve; units that
// will not run weigh nothing.
TEST(RunProgress, UnitWeightsFollowWhereTheWorkRuns) {
  using namespace lumenrig::synth;
  RunPlan plan;
  lumenrig::io::Session s;
  for (const char* id : {"cam00", "cam01"}) {
    lumenrig::io::Camera c;
    c.id = id;
    c.olat.resize(10);
    c.dark = "dark.exr";
    c.clean_plate = "plate.exr";
    s.cameras.push_back(c);
  }
  plan.sessions.push_back(s);
  auto unit = [&](StageKind k, const std::string& cam, UnitState st) {
    UnitPlan u;
    u.session_index = 0;
    u.camera_id = cam;
    u.stage = k;
    u.state = st;
    plan.units.push_back(u);
  };
  unit(StageKind::kCheck, "", UnitState::kMissing);
  unit(StageKind::kNormals, "cam00", UnitState::kMissing);
  unit(StageKind::kNormals, "cam01", UnitState::kStale);
  unit(StageKind::kMatte, "cam00", UnitState::kUpToDate);
  unit(StageKind::kAssemble, "", UnitState::kMissing);
  std::vector<double> w = UnitWeights(plan);
  ASSERT_EQ(w.size(), 5u);
  EXPECT_DOUBLE_EQ(w[0], 2 * 12 + 2 * 0.5 * 10);  // every frame once + both solves
  EXPECT_DOUBLE_EQ(w[1], 0.0);                    // solved inside the check
  EXPECT_DOUBLE_EQ(w[2], 0.0);
  EXPECT_DOUBLE_EQ(w[3], 0.0);  // up to date: not run
  EXPECT_DOUBLE_EQ(w[4], 2 * 30.0);
  plan.units[0].state = UnitState::kUpToDate;  // normals alone read their frames
  w = UnitWeights(plan);
  EXPECT_DOUBLE_EQ(w[0], 0.0);
  EXPECT_DOUBLE_EQ(w[1], 1.5 * 10);
  EXPECT_DOUBLE_EQ(w[2], 1.5 * 10);
}
