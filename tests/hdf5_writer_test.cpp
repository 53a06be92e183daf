// H5Writer: files are checked by h5py (Debian python3-h5py, run with
// /usr/bin/python3) as the outside reader; half-float rounding is checked
// against numpy's float32 -> float16 conversion (IEEE 754 round to nearest even).
#include <signal.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cmath>
#include <filesystem>
#include <fstream>
#include <limits>

#include <gtest/gtest.h>

#include "lumenrig/capture_io/hdf5_writer.h"
#include "test_support.h"

namespace fs = std::filesystem;
using lumenrig::io::H5DatasetSpec;
using lumenrig::io::H5Type;
using lumenrig::io::H5Writer;
using lumenrig::test::TempDir;

namespace {

// Runs `script` with Debian's python3 (h5py, numpy) and the given arguments.
lumenrig::test::CommandResult RunPython(const TempDir& dir, const std::string& script, const std::string& args) {
  const std::string path = dir / "check.py";
  std::ofstream(path) << script;
  return lumenrig::test::RunShell(lumenrig::test::Python() + " " + path + " " + args);
}

void WriteRaw(const std::string& path, const std::vector<float>& v) {
  std::ofstream out(path, std::ios::binary);
  out.write(reinterpret_cast<const char*>(v.data()), static_cast<std::streamsize>(v.size() * sizeof(float)));
}

// Deterministic test values covering normal, subnormal, rounding and
// overflow cases of binary16.
std::vector<float> TestValues(size_t n, float offset) {
  std::vector<float> v(n);
  for (size_t i = 0; i < n; ++i) v[i] = offset + std::sin(0.37f * static_cast<float>(i)) * 3.0f;
  v[0] = 1e-6f;     // subnormal in binary16
  v[1] = 70000.0f;  // above binary16 max (65504): +inf
  v[2] = -0.0f;
  v[3] = 1.0f / 3.0f;
  v[4] = 2049.0f;  // halfway between 2048 and 2050: ties to even
  return v;
}

}  // namespace

TEST(Hdf5Writer, H5pyReadsShapesDtypesValuesAttributesChunksAndFilters) {
  TempDir dir;
  const int h = 8, w = 6;
  const std::string final_path = dir / "pairs.h5";
  auto writer = H5Writer::Create(final_path, false);
  ASSERT_TRUE(writer.ok()) << writer.status().message();
  H5Writer& wr = **writer;
  ASSERT_TRUE(wr.CreateDataset({"/pairs/input", {uint64_t(h), uint64_t(w), 3}, H5Type::kFloat16}).ok());
  ASSERT_TRUE(wr.CreateDataset({"/pairs/alpha", {uint64_t(h), uint64_t(w), 1}, H5Type::kFloat16}).ok());
  ASSERT_TRUE(wr.CreateDataset({"/pairs/depth", {uint64_t(h), uint64_t(w)}, H5Type::kFloat32, 0}).ok());
  ASSERT_TRUE(wr.CreateDataset({"/pairs/exposure", {}, H5Type::kFloat64}).ok());
  ASSERT_TRUE(wr.CreateDataset({"/pairs/index", {}, H5Type::kInt64}).ok());
  ASSERT_TRUE(wr.CreateDataset({"/pairs/subject", {}, H5Type::kString}).ok());

  const size_t per = static_cast<size_t>(h * w * 3);
  const std::vector<float> input = TestValues(3 * per, 0.25f);
  WriteRaw(dir / "input.f32", input);
  // Appended as 1 + 2 samples to exercise extension.
  ASSERT_TRUE(wr.AppendFloat("/pairs/input", input.data(), 1).ok());
  ASSERT_TRUE(wr.AppendFloat("/pairs/input", input.data() + per, 2).ok());
  const std::vector<float> alpha = TestValues(3 * h * w, 0.5f);
  WriteRaw(dir / "alpha.f32", alpha);
  ASSERT_TRUE(wr.AppendFloat("/pairs/alpha", alpha.data(), 3).ok());
  const std::vector<float> depth = TestValues(3 * h * w, 10.0f);
  WriteRaw(dir / "depth.f32", depth);
  ASSERT_TRUE(wr.AppendFloat("/pairs/depth", depth.data(), 3).ok());
  const std::vector<double> exposure{0.5, 1.0, 2.0};
  ASSERT_TRUE(wr.AppendDouble("/pairs/exposure", exposure.data(), 3).ok());
  const std::vector<int64_t> index{7, 8, 9};
  ASSERT_TRUE(wr.AppendInt64("/pairs/index", index.data(), 3).ok());
  ASSERT_TRUE(wr.AppendStrings("/pairs/subject", {"kh-bust-03", "grey-sphere", "kh-bust-\xc3\xa9"}).ok());
  EXPECT_EQ(wr.NumSamples("/pairs/input"), 3u);

  ASSERT_TRUE(wr.SetAttribute("/", "format", "lumenrig.pairs/1").ok());
  ASSERT_TRUE(wr.SetAttribute("/", "seed", uint64_t{12345678901234ULL}).ok());
  ASSERT_TRUE(wr.SetAttribute("/", "count", 3).ok());
  ASSERT_TRUE(wr.SetAttribute("/", "scale", 0.125).ok());
  ASSERT_TRUE(wr.SetAttribute("/pairs/input", "encoding", "linear").ok());
  ASSERT_TRUE(wr.SetAttribute("/pairs", "specular_exponents", std::vector<double>{8.0, 32.0, 128.0}).ok());
  ASSERT_TRUE(wr.SetAttribute("/", "sessions", std::vector<std::string>{"kh-bust-03", "kh-sphere-01"}).ok());
  ASSERT_TRUE(wr.SetJsonAttribute("/", "config", nlohmann::json{{"lights", 156}, {"env", "kh-yard"}}).ok());
  // Replacing an attribute keeps only the new value.
  ASSERT_TRUE(wr.SetAttribute("/pairs/input", "encoding", "srgb").ok());
  auto enc = wr.GetStringAttribute("/pairs/input", "encoding");
  ASSERT_TRUE(enc.ok()) << enc.status().message();
  EXPECT_EQ(*enc, "srgb");

  // Before Finalize nothing exists at the final path.
  EXPECT_FALSE(fs::exists(final_path));
  ASSERT_TRUE(wr.Finalize().ok());
  EXPECT_TRUE(fs::exists(final_path));
  EXPECT_FALSE(fs::exists(H5Writer::TempPathFor(final_path)));

  // Source: h5py/numpy as the reference reader; float16 rounding by numpy.
  const std::string script = R"PY(
import sys, json, h5py, numpy as np
path, d = sys.argv[1], sys.argv[2]
h, w = 8, 6
with h5py.File(path, "r") as f:
    x = f["/pairs/input"]
    assert x.shape == (3, h, w, 3), x.shape
    assert x.dtype == np.float16, x.dtype
    assert x.chunks == (1, h, w, 3), x.chunks
    assert x.compression == "gzip", x.compression
    assert x.shuffle, "shuffle off"
    assert x.maxshape == (None, h, w, 3), x.maxshape
    ref = np.fromfile(d + "/input.f32", dtype=np.float32).reshape(3, h, w, 3).astype(np.float16)
    got = x[...]
    assert np.array_equal(got.view(np.uint16), ref.view(np.uint16)), "input bits differ"
    assert np.isinf(got.flat[1]) and got.flat[2] == 0 and np.signbit(got.flat[2])
    assert got.flat[4] == 2048.0
    a = f["/pairs/alpha"]
    assert a.shape == (3, h, w, 1) and a.dtype == np.float16
    ref = np.fromfile(d + "/alpha.f32", dtype=np.float32).reshape(3, h, w, 1).astype(np.float16)
    assert np.array_equal(a[...].view(np.uint16), ref.view(np.uint16)), "alpha differs"
    z = f["/pairs/depth"]
    assert z.dtype == np.float32 and z.shape == (3, h, w) and z.compression is None and not z.shuffle
    ref = np.fromfile(d + "/depth.f32", dtype=np.float32).reshape(3, h, w)
    assert np.array_equal(z[...], ref)
    e = f["/pairs/exposure"]
    assert e.dtype == np.float64 and e[...].tolist() == [0.5, 1.0, 2.0]
    assert e.chunks == (1024,), e.chunks
    assert f["/pairs/index"].dtype == np.int64 and f["/pairs/index"][...].tolist() == [7, 8, 9]
    s = [v.decode("utf-8") for v in f["/pairs/subject"][...]]
    assert s == ["kh-bust-03", "grey-sphere", "kh-bust-\u00e9"], s
    assert h5py.check_string_dtype(f["/pairs/subject"].dtype).encoding == "utf-8"
    assert f.attrs["format"] == "lumenrig.pairs/1", f.attrs["format"]
    assert int(f.attrs["seed"]) == 12345678901234
    assert int(f.attrs["count"]) == 3 and f.attrs["count"].dtype == np.int64
    assert float(f.attrs["scale"]) == 0.125
    assert json.loads(f.attrs["config"]) == {"lights": 156, "env": "kh-yard"}
    assert list(f.attrs["sessions"]) == ["kh-bust-03", "kh-sphere-01"], f.attrs["sessions"]
    assert x.attrs["encoding"] == "srgb"
    assert f["/pairs"].attrs["specular_exponents"].tolist() == [8.0, 32.0, 128.0]
print("ok")
)PY";
  auto r = RunPython(dir, script, final_path + " " + dir.path());
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
  EXPECT_NE(r.out.find("ok"), std::string::npos) << r.out << r.err;
}

TEST(Hdf5Writer, KilledWriterLeavesNoFinalFileAndResumeAppends) {
  TempDir dir;
  const std::string final_path = dir / "run.h5";
  const int n = 16;
  std::vector<float> sample(n);
  for (int i = 0; i < n; ++i) sample[i] = 0.5f * static_cast<float>(i);

  const pid_t pid = fork();
  ASSERT_GE(pid, 0);
  if (pid == 0) {
    // Child: write two samples, flush, then die without Finalize.
    auto w = H5Writer::Create(final_path, false);
    if (!w.ok()) _exit(10);
    if (!(*w)->CreateDataset({"/x", {uint64_t(n)}, H5Type::kFloat16}).ok()) _exit(11);
    if (!(*w)->AppendFloat("/x", sample.data(), 1).ok()) _exit(12);
    if (!(*w)->AppendFloat("/x", sample.data(), 1).ok()) _exit(12);
    if (!(*w)->SetAttribute("/", "config", "{\"a\":1}").ok()) _exit(13);
    if (!(*w)->Flush().ok()) _exit(14);
    raise(SIGKILL);
    _exit(15);
  }
  int wstatus = 0;
  ASSERT_EQ(waitpid(pid, &wstatus, 0), pid);
  ASSERT_TRUE(WIFSIGNALED(wstatus) && WTERMSIG(wstatus) == SIGKILL) << "child exit " << WEXITSTATUS(wstatus);

  EXPECT_FALSE(fs::exists(final_path)) << "a killed writer left a file at the final path";
  ASSERT_TRUE(fs::exists(H5Writer::TempPathFor(final_path)));

  auto w = H5Writer::Resume(final_path);
  ASSERT_TRUE(w.ok()) << w.status().message();
  EXPECT_EQ((*w)->NumSamples("/x"), 2u);
  auto config = (*w)->GetStringAttribute("/", "config");
  ASSERT_TRUE(config.ok()) << config.status().message();
  EXPECT_EQ(*config, "{\"a\":1}");
  // Resume with a different shape is refused, naming the file.
  auto mismatch = (*w)->CreateDataset({"/x", {uint64_t(n + 1)}, H5Type::kFloat16});
  EXPECT_FALSE(mismatch.ok());
  EXPECT_NE(mismatch.message().find(final_path), std::string::npos) << mismatch.message();
  ASSERT_TRUE((*w)->CreateDataset({"/x", {uint64_t(n)}, H5Type::kFloat16}).ok());
  // Drop the second sample, append a different one.
  ASSERT_TRUE((*w)->Truncate("/x", 1).ok());
  EXPECT_FALSE((*w)->Truncate("/x", 5).ok());
  std::vector<float> other(n, 3.0f);
  ASSERT_TRUE((*w)->AppendFloat("/x", other.data(), 1).ok());
  std::vector<float> back;
  ASSERT_TRUE((*w)->ReadFloat("/x", 0, 2, &back).ok());
  ASSERT_EQ(back.size(), 2u * n);
  for (int i = 0; i < n; ++i) {
    EXPECT_EQ(back[i], sample[i]);  // multiples of 0.5 below 8 are exact in binary16
    EXPECT_EQ(back[n + i], 3.0f);
  }
  ASSERT_TRUE((*w)->Finalize().ok());
  EXPECT_FALSE((*w)->AppendFloat("/x", other.data(), 1).ok());

  // Source: h5py as the outside reader.
  auto r = RunPython(dir,
                     "import sys, h5py, numpy as np\n"
                     "f = h5py.File(sys.argv[1], 'r')\n"
                     "x = f['/x'][...]\n"
                     "assert x.shape == (2, 16) and x.dtype == np.float16, (x.shape, x.dtype)\n"
                     "assert x[0].tolist() == [0.5 * i for i in range(16)], x[0]\n"
                     "assert (x[1] == 3).all()\n"
                     "print('ok')\n",
                     final_path);
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
}

TEST(Hdf5Writer, ExistingFinalPathRefusedWithoutOverwrite) {
  TempDir dir;
  const std::string final_path = dir / "keep.h5";
  std::ofstream(final_path) << "precious";
  auto w = H5Writer::Create(final_path, false);
  ASSERT_FALSE(w.ok());
  EXPECT_EQ(w.status().code(), lumenrig::io::StatusCode::kBadInput);
  EXPECT_NE(w.status().message().find(final_path), std::string::npos) << w.status().message();
  std::ifstream in(final_path);
  std::string content;
  in >> content;
  EXPECT_EQ(content, "precious");
  EXPECT_FALSE(fs::exists(H5Writer::TempPathFor(final_path)));

  auto over = H5Writer::Create(final_path, true);
  ASSERT_TRUE(over.ok()) << over.status().message();
  ASSERT_TRUE((*over)->CreateDataset({"/v", {}, H5Type::kInt32}).ok());
  const int32_t v = 5;
  ASSERT_TRUE((*over)->AppendInt32("/v", &v, 1).ok());
  ASSERT_TRUE((*over)->Finalize().ok());
  EXPECT_GT(fs::file_size(final_path), 100u);
}

TEST(Hdf5Writer, ErrorsAreOneLineNamingTheFileAndPrintNothing) {
  TempDir dir;
  testing::internal::CaptureStderr();
  // Missing folder: HDF5 cannot create the temporary.
  auto missing = H5Writer::Create(dir / "no-such-dir/out.h5", false);
  // Nothing to resume.
  auto nothing = H5Writer::Resume(dir / "never.h5");
  // A corrupt partial file.
  std::ofstream(H5Writer::TempPathFor(dir / "junk.h5")) << "not an hdf5 file";
  auto junk = H5Writer::Resume(dir / "junk.h5");
  auto ok = H5Writer::Create(dir / "a.h5", false);
  ASSERT_TRUE(ok.ok());
  lumenrig::io::Status dup_status;
  ASSERT_TRUE((*ok)->CreateDataset({"/d", {2}, H5Type::kFloat32}).ok());
  const lumenrig::io::Status no_ds = (*ok)->AppendFloat("/nope", nullptr, 1);
  const lumenrig::io::Status no_obj = (*ok)->SetAttribute("/nope", "k", "v");
  const std::string err = testing::internal::GetCapturedStderr();
  EXPECT_EQ(err, "") << "HDF5 printed its error stack";

  for (const auto* s : {&missing.status(), &nothing.status(), &junk.status(), &no_ds, &no_obj}) {
    EXPECT_FALSE(s->ok());
    EXPECT_EQ(s->message().find('\n'), std::string::npos) << s->message();
  }
  EXPECT_NE(missing.status().message().find("no-such-dir/out.h5"), std::string::npos) << missing.status().message();
  EXPECT_NE(nothing.status().message().find("never.h5"), std::string::npos) << nothing.status().message();
  EXPECT_NE(junk.status().message().find("junk.h5"), std::string::npos) << junk.status().message();
  EXPECT_NE(no_ds.message().find("/nope"), std::string::npos) << no_ds.message();
  EXPECT_NE(no_obj.message().find("a.h5"), std::string::npos) << no_obj.message();
}

TEST(Hdf5Writer, PackedSamplesStoreTheBytesOfHdf5sOwnFilters) {
  // Samples appended as chunks packed off the HDF5 thread (PackFloatSamples)
  // must give the datasets AppendFloat gives: same values and, chunk by
  // chunk, the bytes HDF5's own shuffle + deflate filters store (reference:
  // h5py writing the same data through HDF5). Datasets whose chunk is not
  // one sample, or that are not compressed, fall back to AppendFloat.
  TempDir dir;
  const int kSamples = 5;
  std::vector<float> data(static_cast<size_t>(kSamples) * 6 * 7 * 3);
  cv::Mat view(1, static_cast<int>(data.size()), CV_32F, data.data());
  cv::randu(view, -3.0f, 3.0f);
  const std::string path = dir / "p.h5";
  const std::vector<H5DatasetSpec> specs = {{"/pairs/half", {6, 7, 3}, H5Type::kFloat16, 1, 0},
                                            {"/pairs/single", {6, 7, 3}, H5Type::kFloat32, 3, 0},
                                            {"/pairs/two_per_chunk", {6, 7, 3}, H5Type::kFloat16, 1, 2},
                                            {"/pairs/plain", {6, 7, 3}, H5Type::kFloat16, 0, 0}};
  auto append = [&](H5Writer* w, int first, int last, size_t* packed_count) {
    std::vector<H5Writer::FloatSample> samples;
    for (int i = first; i < last; ++i)
      for (const auto& spec : specs) {
        H5Writer::FloatSample s;
        s.name = spec.name;
        s.data = data.data() + static_cast<size_t>(i) * 6 * 7 * 3;
        samples.push_back(std::move(s));
      }
    ASSERT_TRUE(w->PackFloatSamples(&samples, 2).ok());
    for (const auto& s : samples) {
      *packed_count += s.packed;
      ASSERT_TRUE(w->AppendFloatSample(s).ok()) << s.name;
    }
  };
  size_t packed = 0;
  {
    auto w = H5Writer::Create(path, false);
    ASSERT_TRUE(w.ok()) << w.status().message();
    for (const auto& spec : specs) ASSERT_TRUE((*w)->CreateDataset(spec).ok()) << spec.name;
    append(w->get(), 0, 3, &packed);
    ASSERT_TRUE((*w)->Flush().ok());
  }  // left unfinished, as a killed run leaves it
  {
    auto w = H5Writer::Resume(path);  // datasets reopened: filters read from the file
    ASSERT_TRUE(w.ok()) << w.status().message();
    for (const auto& spec : specs) ASSERT_TRUE((*w)->CreateDataset(spec).ok()) << spec.name;
    append(w->get(), 3, kSamples, &packed);
    ASSERT_TRUE((*w)->Finalize().ok());
  }
  EXPECT_EQ(packed, 2u * kSamples);  // only "half" and "single" qualify
  WriteRaw(dir / "data.f32", data);
  const std::string script = R"PY(
import sys, h5py, numpy as np
f = h5py.File(sys.argv[1], 'r')
src = np.fromfile(sys.argv[2], dtype=np.float32).reshape(5, 6, 7, 3)
g = h5py.File(sys.argv[3], 'w')
for name, dtype, level in (('half', np.float16, 1), ('single', np.float32, 3)):
    d = f['/pairs/' + name]
    assert d.shape == (5, 6, 7, 3) and d.dtype == dtype and d.chunks == (1, 6, 7, 3), (d.shape, d.dtype, d.chunks)
    assert d.compression == 'gzip' and d.compression_opts == level and d.shuffle
    assert np.array_equal(d[...], src.astype(dtype)), name
    ref = g.create_dataset(name, data=src.astype(dtype), chunks=(1, 6, 7, 3), shuffle=True, compression='gzip',
                           compression_opts=level)
    for i in range(5):
        assert d.id.read_direct_chunk((i, 0, 0, 0)) == ref.id.read_direct_chunk((i, 0, 0, 0)), (name, i)
for name in ('two_per_chunk', 'plain'):
    assert np.array_equal(f['/pairs/' + name][...], src.astype(np.float16)), name
print("ok")
)PY";
  auto r = RunPython(dir, script, path + " " + (dir / "data.f32") + " " + (dir / "ref.h5"));
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
}

TEST(Hdf5Writer, WriteImageIsReadByH5pyAndSameContentGivesSameBytes) {
  TempDir dir;
  cv::Mat img(70, 9, CV_32FC3);
  cv::randu(img, -2.0f, 2.0f);
  for (const char* name : {"a.h5", "b.h5"}) {
    auto writer = H5Writer::Create(dir / name, false);
    ASSERT_TRUE(writer.ok()) << writer.status().message();
    ASSERT_TRUE((*writer)->WriteImage("/cameras/cam00/normals", img).ok());
    ASSERT_TRUE((*writer)->WriteImage("/cameras/cam00/depth", img.reshape(1, 70 * 3), H5Type::kFloat32).ok());
    ASSERT_TRUE((*writer)->Finalize().ok());
  }
  // Object timestamps are off, so identical content gives identical files.
  auto ha = lumenrig::test::RunShell("cmp " + (dir / "a.h5") + " " + (dir / "b.h5"));
  EXPECT_EQ(ha.exit_code, 0) << ha.out;
  WriteRaw(dir / "img.f32", std::vector<float>(img.ptr<float>(0), img.ptr<float>(0) + img.total() * 3));
  // Reference: h5py + numpy's float32 -> float16 (IEEE 754 round to nearest even).
  const std::string script = R"PY(
import sys, h5py, numpy as np
f = h5py.File(sys.argv[1], 'r')
n = f['/cameras/cam00/normals']
assert n.shape == (70, 9, 3), n.shape
assert n.dtype == np.float16, n.dtype
assert n.chunks == (64, 9, 3), n.chunks
assert n.compression == 'gzip' and n.shuffle
ref = np.fromfile(sys.argv[2], dtype=np.float32).reshape(70, 9, 3).astype(np.float16)
assert np.array_equal(n[...], ref)
d = f['/cameras/cam00/depth']
assert d.dtype == np.float32 and d.shape == (210, 9, 1), (d.dtype, d.shape)
assert np.array_equal(d[...].reshape(-1), np.fromfile(sys.argv[2], dtype=np.float32))
# WriteImage deflates the chunks itself, on all threads: every stored chunk
# (the padded edge chunk too) must hold the bytes HDF5's own shuffle + deflate
# filters store for the same data (reference: h5py writing through HDF5).
g = h5py.File(sys.argv[3], 'w')
for name, src in (('normals', n), ('depth', d)):
    ref = g.create_dataset(name, data=src[...], chunks=src.chunks, shuffle=True, compression='gzip',
                           compression_opts=4)
    for row in range(0, src.shape[0], src.chunks[0]):
        ours = src.id.read_direct_chunk((row, 0, 0))
        theirs = ref.id.read_direct_chunk((row, 0, 0))
        assert ours == theirs, (name, row, ours[0], theirs[0], len(ours[1]), len(theirs[1]))
print("ok")
)PY";
  auto r = RunPython(dir, script, (dir / "a.h5") + " " + (dir / "img.f32") + " " + (dir / "ref.h5"));
  EXPECT_EQ(r.exit_code, 0) << r.out << r.err;
}
