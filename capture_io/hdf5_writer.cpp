// HDF5 writer on the HDF5 1.10 C API: extendible sample-axis datasets,
// gzip + shuffle, IEEE half floats, attributes, temp-then-rename finalisation.
#include "lumenrig/capture_io/hdf5_writer.h"

#include "hdf5_common.h"

#include <fcntl.h>
#include <unistd.h>

#include <algorithm>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <map>
#include <mutex>
#include <numeric>

#include <hdf5.h>
#include <zlib.h>
#include <opencv2/core.hpp>

#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/parallel.h"

namespace fs = std::filesystem;

namespace lumenrig::io {
namespace {

herr_t CollectError(unsigned n, const H5E_error2_t* err, void* client) {
  auto* parts = static_cast<std::vector<std::string>*>(client);
  (void)n;
  if (err != nullptr && err->desc != nullptr && err->desc[0] != '\0') parts->push_back(err->desc);
  return 0;
}

// The innermost (most specific) and outermost messages of the current HDF5
// error stack, e.g. "unable to create dataset (name already exists)".
std::string Hdf5ErrorText() {
  std::vector<std::string> parts;
  H5Ewalk2(H5E_DEFAULT, H5E_WALK_UPWARD, CollectError, &parts);
  H5Eclear2(H5E_DEFAULT);
  if (parts.empty()) return "unknown HDF5 error";
  if (parts.size() == 1 || parts.front() == parts.back()) return parts.front();
  return parts.back() + " (" + parts.front() + ")";
}

Status H5Fail(const std::string& file, const std::string& what) {
  return Status::BadInput(fmt::format("{}: {}: {}", file, what, Hdf5ErrorText()));
}

// An HDF5 identifier closed with its matching H5xclose at scope exit.
class Hid {
 public:
  using Closer = herr_t (*)(hid_t);
  Hid() = default;
  Hid(hid_t id, Closer closer) : id_(id), closer_(closer) {}
  ~Hid() { Reset(); }
  Hid(Hid&& o) noexcept : id_(o.id_), closer_(o.closer_) { o.id_ = H5I_INVALID_HID; }
  Hid& operator=(Hid&& o) noexcept {
    if (this != &o) {
      Reset();
      id_ = o.id_;
      closer_ = o.closer_;
      o.id_ = H5I_INVALID_HID;
    }
    return *this;
  }
  Hid(const Hid&) = delete;
  Hid& operator=(const Hid&) = delete;
  hid_t get() const { return id_; }
  bool valid() const { return id_ >= 0; }
  void Reset() {
    if (id_ >= 0 && closer_ != nullptr) closer_(id_);
    id_ = H5I_INVALID_HID;
  }

 private:
  hid_t id_ = H5I_INVALID_HID;
  Closer closer_ = nullptr;
};

// IEEE 754 binary16 as an HDF5 float type: sign bit 15, exponent bits 10..14
// (bias 15), mantissa bits 0..9. h5py maps exactly this layout to float16.
Hid MakeHalfType() {
  hid_t t = H5Tcopy(H5T_IEEE_F32LE);
  H5Tset_fields(t, 15, 10, 5, 0, 10);
  H5Tset_size(t, 2);
  H5Tset_ebias(t, 15);
  return Hid(t, H5Tclose);
}

Hid MakeStringType() {
  hid_t t = H5Tcopy(H5T_C_S1);
  H5Tset_size(t, H5T_VARIABLE);
  H5Tset_cset(t, H5T_CSET_UTF8);
  return Hid(t, H5Tclose);
}

// File type for an element type (a fresh copy the caller owns).
Hid FileType(H5Type type) {
  switch (type) {
    case H5Type::kFloat16: return MakeHalfType();
    case H5Type::kFloat32: return Hid(H5Tcopy(H5T_IEEE_F32LE), H5Tclose);
    case H5Type::kFloat64: return Hid(H5Tcopy(H5T_IEEE_F64LE), H5Tclose);
    case H5Type::kUInt8: return Hid(H5Tcopy(H5T_STD_U8LE), H5Tclose);
    case H5Type::kInt32: return Hid(H5Tcopy(H5T_STD_I32LE), H5Tclose);
    case H5Type::kInt64: return Hid(H5Tcopy(H5T_STD_I64LE), H5Tclose);
    case H5Type::kString: return MakeStringType();
  }
  return Hid();
}

const char* TypeName(H5Type type) {
  switch (type) {
    case H5Type::kFloat16: return "float16";
    case H5Type::kFloat32: return "float32";
    case H5Type::kFloat64: return "float64";
    case H5Type::kUInt8: return "uint8";
    case H5Type::kInt32: return "int32";
    case H5Type::kInt64: return "int64";
    case H5Type::kString: return "string";
  }
  return "?";
}

// Element type of an existing dataset's file type.
std::optional<H5Type> TypeOf(hid_t file_type) {
  const H5T_class_t cls = H5Tget_class(file_type);
  const size_t size = H5Tget_size(file_type);
  if (cls == H5T_FLOAT) {
    if (size == 2) return H5Type::kFloat16;
    if (size == 4) return H5Type::kFloat32;
    if (size == 8) return H5Type::kFloat64;
  } else if (cls == H5T_INTEGER) {
    const bool is_signed = H5Tget_sign(file_type) == H5T_SGN_2;
    if (size == 1 && !is_signed) return H5Type::kUInt8;
    if (size == 4 && is_signed) return H5Type::kInt32;
    if (size == 8 && is_signed) return H5Type::kInt64;
  } else if (cls == H5T_STRING && H5Tis_variable_str(file_type) > 0) {
    return H5Type::kString;
  }
  return std::nullopt;
}

uint64_t Product(const std::vector<uint64_t>& v) {
  return std::accumulate(v.begin(), v.end(), uint64_t{1}, std::multiplies<uint64_t>());
}

// float -> IEEE half with OpenCV's vectorised conversion (round to nearest
// even; out-of-range values become +-inf), in rows of at most 2^30 values
// (a cv::Mat's int column count).
void FloatsToHalves(const float* src, uint64_t n, uint16_t* dst) {
  constexpr uint64_t kRow = uint64_t{1} << 30;
  for (uint64_t begin = 0; begin < n; begin += kRow) {
    const uint64_t len = std::min(kRow, n - begin);
    cv::Mat out(1, static_cast<int>(len), CV_16F, dst + begin);
    cv::Mat(1, static_cast<int>(len), CV_32F, const_cast<float*>(src + begin)).convertTo(out, CV_16F);
  }
}

// The bytes HDF5's shuffle then deflate filters store for one chunk of
// `raw` (H5Z_filter_shuffle: byte k of every element together;
// H5Z_filter_deflate: zlib compress2 at the dataset's level).
int ShuffleDeflate(const unsigned char* raw, size_t bytes, size_t elem, int level, std::vector<unsigned char>* shuffled,
                   std::vector<unsigned char>* out) {
  shuffled->resize(bytes);
  const size_t n = bytes / elem;
  for (size_t j = 0; j < elem; ++j)
    for (size_t i = 0; i < n; ++i) (*shuffled)[j * n + i] = raw[i * elem + j];
  uLongf out_bytes = compressBound(static_cast<uLong>(bytes));
  out->resize(out_bytes);
  const int rc = compress2(out->data(), &out_bytes, shuffled->data(), static_cast<uLong>(bytes), std::min(level, 9));
  out->resize(out_bytes);
  return rc;
}

}  // namespace

struct H5Writer::Impl {
  struct Dataset {
    Hid id;
    H5DatasetSpec spec;
    uint64_t samples = 0;
    // Deflate level when the chunk is one whole sample and the filters are
    // exactly shuffle then deflate (chunks may be packed off the HDF5
    // thread); -1 when not; -2 until looked up.
    int packable_level = -2;
  };
  Hid file;
  std::string path;  // temp path, for messages
  std::map<std::string, Dataset> datasets;
  bool finalized = false;

  // Every call goes through here: a writer may be used from another thread
  // than the one that created it (a TBB pipeline's serial stage), and that
  // thread must be silenced too.
  Status CheckOpen() const {
    internal::SilenceHdf5();
    if (finalized || !file.valid()) return Status::Internal(path + ": HDF5 writer already finalized");
    return Status::Ok();
  }

  // Opens (and caches) an existing dataset of the file.
  Expected<Dataset*> Find(const std::string& name) {
    auto it = datasets.find(name);
    if (it != datasets.end()) return &it->second;
    if (H5Lexists(file.get(), name.c_str(), H5P_DEFAULT) <= 0) {
      H5Eclear2(H5E_DEFAULT);
      return Status::BadInput(fmt::format("{}: dataset {} does not exist", path, name));
    }
    Hid id(H5Dopen2(file.get(), name.c_str(), H5P_DEFAULT), H5Dclose);
    if (!id.valid()) return H5Fail(path, "cannot open dataset " + name);
    Hid type(H5Dget_type(id.get()), H5Tclose);
    Hid space(H5Dget_space(id.get()), H5Sclose);
    const int rank = H5Sget_simple_extent_ndims(space.get());
    if (rank < 1) return Status::BadInput(fmt::format("{}: dataset {} is not a sample dataset", path, name));
    std::vector<hsize_t> dims(rank);
    H5Sget_simple_extent_dims(space.get(), dims.data(), nullptr);
    auto element = TypeOf(type.get());
    if (!element) return Status::BadInput(fmt::format("{}: dataset {} has an unsupported element type", path, name));
    Dataset d;
    d.spec.name = name;
    d.spec.type = *element;
    d.spec.sample_shape.assign(dims.begin() + 1, dims.end());
    d.samples = dims[0];
    d.id = std::move(id);
    return &datasets.emplace(name, std::move(d)).first->second;
  }

  // See Dataset::packable_level.
  int PackableLevel(Dataset& d) {
    if (d.packable_level != -2) return d.packable_level;
    d.packable_level = -1;
    Hid dcpl(H5Dget_create_plist(d.id.get()), H5Pclose);
    if (!dcpl.valid() || H5Pget_layout(dcpl.get()) != H5D_CHUNKED) return -1;
    const int rank = static_cast<int>(d.spec.sample_shape.size()) + 1;
    std::vector<hsize_t> chunk(static_cast<size_t>(rank));
    if (H5Pget_chunk(dcpl.get(), rank, chunk.data()) != rank || chunk[0] != 1) return -1;
    for (int k = 1; k < rank; ++k)
      if (chunk[static_cast<size_t>(k)] != d.spec.sample_shape[static_cast<size_t>(k - 1)]) return -1;
    if (H5Pget_nfilters(dcpl.get()) != 2) return -1;
    unsigned flags = 0, values[8] = {};
    size_t nvalues = 8;
    if (H5Pget_filter2(dcpl.get(), 0, &flags, &nvalues, values, 0, nullptr, nullptr) != H5Z_FILTER_SHUFFLE) return -1;
    nvalues = 8;
    if (H5Pget_filter2(dcpl.get(), 1, &flags, &nvalues, values, 0, nullptr, nullptr) != H5Z_FILTER_DEFLATE ||
        nvalues < 1)
      return -1;
    d.packable_level = static_cast<int>(values[0]);
    return d.packable_level;
  }

  // Appends count samples of raw memory laid out as `mem_type`.
  Status Append(const std::string& name, hid_t mem_type_or_neg, const void* data, uint64_t count,
                std::optional<H5Type> expect_a, std::optional<H5Type> expect_b = std::nullopt) {
    LUMENRIG_RETURN_IF_ERROR(CheckOpen());
    auto found = Find(name);
    if (!found.ok()) return found.status();
    Dataset& d = **found;
    if (d.spec.type != expect_a && d.spec.type != expect_b) {
      return Status::Internal(
          fmt::format("{}: dataset {} holds {}, appended data of another type", path, name, TypeName(d.spec.type)));
    }
    if (count == 0) return Status::Ok();
    std::vector<hsize_t> new_dims{d.samples + count};
    for (uint64_t s : d.spec.sample_shape) new_dims.push_back(s);
    if (H5Dset_extent(d.id.get(), new_dims.data()) < 0) return H5Fail(path, "cannot extend dataset " + name);
    Hid file_space(H5Dget_space(d.id.get()), H5Sclose);
    std::vector<hsize_t> start(new_dims.size(), 0), block(new_dims);
    start[0] = d.samples;
    block[0] = count;
    H5Sselect_hyperslab(file_space.get(), H5S_SELECT_SET, start.data(), nullptr, block.data(), nullptr);
    Hid mem_space(H5Screate_simple(static_cast<int>(block.size()), block.data(), nullptr), H5Sclose);
    Hid file_type = FileType(d.spec.type);
    const hid_t mem_type = mem_type_or_neg >= 0 ? mem_type_or_neg : file_type.get();
    if (H5Dwrite(d.id.get(), mem_type, mem_space.get(), file_space.get(), H5P_DEFAULT, data) < 0) {
      return H5Fail(path, "cannot write dataset " + name);
    }
    d.samples += count;
    return Status::Ok();
  }

  // Reads samples [first, first+count) into memory laid out as mem_type.
  Status Read(const std::string& name, uint64_t first, uint64_t count, hid_t mem_type, void* out,
              const Dataset** info) {
    LUMENRIG_RETURN_IF_ERROR(CheckOpen());
    auto found = Find(name);
    if (!found.ok()) return found.status();
    Dataset& d = **found;
    *info = &d;
    if (first + count > d.samples) {
      return Status::BadInput(fmt::format("{}: dataset {}: samples [{}, {}) requested, {} stored", path, name, first,
                                          first + count, d.samples));
    }
    if (count == 0) return Status::Ok();
    std::vector<hsize_t> start{first}, block{count};
    for (uint64_t s : d.spec.sample_shape) {
      start.push_back(0);
      block.push_back(s);
    }
    Hid file_space(H5Dget_space(d.id.get()), H5Sclose);
    H5Sselect_hyperslab(file_space.get(), H5S_SELECT_SET, start.data(), nullptr, block.data(), nullptr);
    Hid mem_space(H5Screate_simple(static_cast<int>(block.size()), block.data(), nullptr), H5Sclose);
    if (H5Dread(d.id.get(), mem_type, mem_space.get(), file_space.get(), H5P_DEFAULT, out) < 0) {
      return H5Fail(path, "cannot read dataset " + name);
    }
    return Status::Ok();
  }

  Expected<Hid> OpenObject(const std::string& object) {
    LUMENRIG_RETURN_IF_ERROR(CheckOpen());
    if (object != "/" && H5Lexists(file.get(), object.c_str(), H5P_DEFAULT) <= 0) {
      H5Eclear2(H5E_DEFAULT);
      return Status::BadInput(fmt::format("{}: object {} does not exist", path, object));
    }
    Hid obj(H5Oopen(file.get(), object.c_str(), H5P_DEFAULT), H5Oclose);
    if (!obj.valid()) return H5Fail(path, "cannot open object " + object);
    return obj;
  }

  // Writes attribute `key` on `object` (replacing an existing one).
  Status WriteAttribute(const std::string& object, const std::string& key, hid_t type, hid_t space, const void* data) {
    auto obj = OpenObject(object);
    if (!obj.ok()) return obj.status();
    if (H5Aexists(obj->get(), key.c_str()) > 0) H5Adelete(obj->get(), key.c_str());
    Hid attr(H5Acreate2(obj->get(), key.c_str(), type, space, H5P_DEFAULT, H5P_DEFAULT), H5Aclose);
    if (!attr.valid()) return H5Fail(path, fmt::format("cannot create attribute {} on {}", key, object));
    if (H5Awrite(attr.get(), type, data) < 0) {
      return H5Fail(path, fmt::format("cannot write attribute {} on {}", key, object));
    }
    return Status::Ok();
  }

  void Close() {
    datasets.clear();
    file.Reset();
  }
};

H5Writer::~H5Writer() {
  if (impl_) impl_->Close();
}

std::string H5Writer::TempPathFor(const std::string& final_path) {
  const fs::path p(final_path);
  return (p.parent_path() / ("." + p.filename().string() + ".partial")).string();
}

Expected<std::unique_ptr<H5Writer>> H5Writer::Create(const std::string& final_path, bool overwrite) {
  internal::SilenceHdf5();
  LUMENRIG_RETURN_IF_ERROR(CheckOutputPath(final_path, overwrite));
  const fs::path parent = fs::path(final_path).parent_path();
  std::error_code ec;
  if (!parent.empty() && !fs::is_directory(parent, ec)) {
    return Status::BadInput(fmt::format("{}: output folder {} does not exist", final_path, parent.string()));
  }
  std::unique_ptr<H5Writer> w(new H5Writer());
  w->final_path_ = final_path;
  w->temp_path_ = TempPathFor(final_path);
  w->impl_ = std::make_unique<Impl>();
  w->impl_->path = final_path;
  // A stale temporary of an earlier run is replaced (H5F_ACC_TRUNC).
  w->impl_->file = Hid(H5Fcreate(w->temp_path_.c_str(), H5F_ACC_TRUNC, H5P_DEFAULT, H5P_DEFAULT), H5Fclose);
  if (!w->impl_->file.valid()) return H5Fail(final_path, "cannot create temporary " + w->temp_path_);
  return w;
}

Expected<std::unique_ptr<H5Writer>> H5Writer::Resume(const std::string& final_path, bool overwrite) {
  internal::SilenceHdf5();
  LUMENRIG_RETURN_IF_ERROR(CheckOutputPath(final_path, overwrite));
  std::unique_ptr<H5Writer> w(new H5Writer());
  w->final_path_ = final_path;
  w->temp_path_ = TempPathFor(final_path);
  std::error_code ec;
  if (!fs::exists(w->temp_path_, ec)) {
    return Status::BadInput(fmt::format("{}: nothing to resume: no partial file {}", final_path, w->temp_path_));
  }
  w->impl_ = std::make_unique<Impl>();
  w->impl_->path = final_path;
  w->impl_->file = Hid(H5Fopen(w->temp_path_.c_str(), H5F_ACC_RDWR, H5P_DEFAULT), H5Fclose);
  if (!w->impl_->file.valid()) {
    return H5Fail(final_path, "cannot reopen partial file " + w->temp_path_ + " (delete it to start over)");
  }
  return w;
}

Status H5Writer::CreateGroup(const std::string& path) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  if (path == "/" || H5Lexists(impl_->file.get(), path.c_str(), H5P_DEFAULT) > 0) return Status::Ok();
  H5Eclear2(H5E_DEFAULT);
  Hid lcpl(H5Pcreate(H5P_LINK_CREATE), H5Pclose);
  H5Pset_create_intermediate_group(lcpl.get(), 1);
  Hid group(H5Gcreate2(impl_->file.get(), path.c_str(), lcpl.get(), H5P_DEFAULT, H5P_DEFAULT), H5Gclose);
  if (!group.valid()) return H5Fail(impl_->path, "cannot create group " + path);
  return Status::Ok();
}

Status H5Writer::CreateDataset(const H5DatasetSpec& spec) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  const std::string& path = impl_->path;
  if (spec.name.empty() || spec.name[0] != '/') {
    return Status::Internal(fmt::format("{}: dataset name '{}' must be absolute", path, spec.name));
  }
  // Resume: an existing dataset must match.
  if (impl_->datasets.count(spec.name) != 0 || H5Lexists(impl_->file.get(), spec.name.c_str(), H5P_DEFAULT) > 0) {
    auto found = impl_->Find(spec.name);
    if (!found.ok()) return found.status();
    const H5DatasetSpec& have = (*found)->spec;
    if (have.type != spec.type || have.sample_shape != spec.sample_shape) {
      return Status::BadInput(fmt::format("{}: dataset {} exists as {} [{}], requested {} [{}]", path, spec.name,
                                          TypeName(have.type), fmt::join(have.sample_shape, ","), TypeName(spec.type),
                                          fmt::join(spec.sample_shape, ",")));
    }
    return Status::Ok();
  }
  H5Eclear2(H5E_DEFAULT);

  const int rank = static_cast<int>(spec.sample_shape.size()) + 1;
  std::vector<hsize_t> dims{0}, max_dims{H5S_UNLIMITED}, chunk;
  const uint64_t chunk_samples = spec.chunk_samples > 0 ? spec.chunk_samples : (spec.sample_shape.empty() ? 1024 : 1);
  chunk.push_back(chunk_samples);
  for (uint64_t s : spec.sample_shape) {
    if (s == 0) return Status::Internal(fmt::format("{}: dataset {} has a zero sample dimension", path, spec.name));
    dims.push_back(s);
    max_dims.push_back(s);
    chunk.push_back(s);
  }
  Hid space(H5Screate_simple(rank, dims.data(), max_dims.data()), H5Sclose);
  Hid dcpl(H5Pcreate(H5P_DATASET_CREATE), H5Pclose);
  H5Pset_chunk(dcpl.get(), rank, chunk.data());
  // No object timestamps: the same content gives the same bytes (resume and
  // thread-count determinism can then compare whole files).
  H5Pset_obj_track_times(dcpl.get(), 0);
  if (spec.gzip_level > 0 && spec.type != H5Type::kString) {
    // Shuffle before deflate: groups the bytes of each element so gzip sees
    // runs of similar high bytes (HDF5 filter pipeline order = call order).
    H5Pset_shuffle(dcpl.get());
    H5Pset_deflate(dcpl.get(), static_cast<unsigned>(std::min(spec.gzip_level, 9)));
  }
  Hid lcpl(H5Pcreate(H5P_LINK_CREATE), H5Pclose);
  H5Pset_create_intermediate_group(lcpl.get(), 1);
  Hid type = FileType(spec.type);
  Hid id(H5Dcreate2(impl_->file.get(), spec.name.c_str(), type.get(), space.get(), lcpl.get(), dcpl.get(), H5P_DEFAULT),
         H5Dclose);
  if (!id.valid()) return H5Fail(path, "cannot create dataset " + spec.name);
  Impl::Dataset d;
  d.id = std::move(id);
  d.spec = spec;
  impl_->datasets.emplace(spec.name, std::move(d));
  return Status::Ok();
}

Status H5Writer::WriteImage(const std::string& name, const cv::Mat& image, H5Type type, int gzip_level) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  const std::string& path = impl_->path;
  if (image.empty() || image.depth() != CV_32F || (type != H5Type::kFloat16 && type != H5Type::kFloat32))
    return Status::Internal(fmt::format("{}: WriteImage {} needs a CV_32F image and a float type", path, name));
  if (H5Lexists(impl_->file.get(), name.c_str(), H5P_DEFAULT) > 0)
    return Status::Internal(fmt::format("{}: dataset {} already exists", path, name));
  H5Eclear2(H5E_DEFAULT);
  const hsize_t dims[3] = {static_cast<hsize_t>(image.rows), static_cast<hsize_t>(image.cols),
                           static_cast<hsize_t>(image.channels())};
  // Chunks of 64 full rows: a reader of a row band touches few chunks.
  const hsize_t chunk[3] = {std::min<hsize_t>(dims[0], 64), dims[1], dims[2]};
  Hid space(H5Screate_simple(3, dims, nullptr), H5Sclose);
  Hid dcpl(H5Pcreate(H5P_DATASET_CREATE), H5Pclose);
  H5Pset_chunk(dcpl.get(), 3, chunk);
  H5Pset_obj_track_times(dcpl.get(), 0);
  if (gzip_level > 0) {
    H5Pset_shuffle(dcpl.get());
    H5Pset_deflate(dcpl.get(), static_cast<unsigned>(std::min(gzip_level, 9)));
  }
  Hid lcpl(H5Pcreate(H5P_LINK_CREATE), H5Pclose);
  H5Pset_create_intermediate_group(lcpl.get(), 1);
  Hid file_type = FileType(type);
  Hid id(H5Dcreate2(impl_->file.get(), name.c_str(), file_type.get(), space.get(), lcpl.get(), dcpl.get(), H5P_DEFAULT),
         H5Dclose);
  if (!id.valid()) return H5Fail(path, "cannot create dataset " + name);
  const cv::Mat src = image.isContinuous() ? image : image.clone();
  if (gzip_level <= 0) {
    herr_t rc;
    if (type == H5Type::kFloat16) {
      cv::Mat halves;
      src.convertTo(halves, CV_MAKETYPE(CV_16F, src.channels()));
      rc = H5Dwrite(id.get(), file_type.get(), H5S_ALL, H5S_ALL, H5P_DEFAULT, halves.data);
    } else {
      rc = H5Dwrite(id.get(), H5T_NATIVE_FLOAT, H5S_ALL, H5S_ALL, H5P_DEFAULT, src.data);
    }
    if (rc < 0) return H5Fail(path, "cannot write dataset " + name);
    return Status::Ok();
  }
  // HDF5 1.10 runs a dataset's filters on one thread, chunk after chunk. Here
  // every chunk is converted, shuffled and deflated on all threads, exactly
  // as the dataset's shuffle and deflate filters would (H5Z_filter_shuffle:
  // byte k of every element together; H5Z_filter_deflate: zlib compress2 at
  // the dataset's level), and stored with H5Dwrite_chunk, so any HDF5 reader
  // decodes the dataset as usual. Edge chunks are padded with the fill value
  // 0, as HDF5 pads them.
  const size_t elem = type == H5Type::kFloat16 ? 2 : 4;
  const size_t row_values = static_cast<size_t>(src.cols) * static_cast<size_t>(src.channels());
  const size_t chunk_rows = static_cast<size_t>(chunk[0]);
  const size_t chunk_bytes = chunk_rows * row_values * elem;
  const int64_t n_chunks = (src.rows + static_cast<int64_t>(chunk_rows) - 1) / static_cast<int64_t>(chunk_rows);
  std::vector<std::vector<unsigned char>> packed(static_cast<size_t>(n_chunks));
  std::vector<int> zlib_status(static_cast<size_t>(n_chunks), Z_OK);
  ParallelFor(0, n_chunks, 1, /*threads=*/0, [&](int64_t b, int64_t e) {
    std::vector<unsigned char> raw(chunk_bytes), shuffled(chunk_bytes);
    for (int64_t k = b; k < e; ++k) {
      const int y0 = static_cast<int>(k * static_cast<int64_t>(chunk_rows));
      const int y1 = std::min(src.rows, y0 + static_cast<int>(chunk_rows));
      const size_t used = static_cast<size_t>(y1 - y0) * row_values * elem;
      cv::Mat rows = src.rowRange(y0, y1);
      if (type == H5Type::kFloat16) {
        cv::Mat dst(y1 - y0, src.cols, CV_MAKETYPE(CV_16F, src.channels()), raw.data());
        rows.convertTo(dst, dst.type());
      } else {
        std::memcpy(raw.data(), rows.data, used);
      }
      std::fill(raw.begin() + static_cast<std::ptrdiff_t>(used), raw.end(), 0);  // edge chunk padding
      zlib_status[static_cast<size_t>(k)] =
          ShuffleDeflate(raw.data(), chunk_bytes, elem, gzip_level, &shuffled, &packed[static_cast<size_t>(k)]);
    }
  });
  for (int64_t k = 0; k < n_chunks; ++k) {
    if (zlib_status[static_cast<size_t>(k)] != Z_OK)
      return Status::Internal(fmt::format("{}: zlib failed to compress a chunk of {}", path, name));
    const hsize_t offset[3] = {static_cast<hsize_t>(k) * chunk[0], 0, 0};
    const std::vector<unsigned char>& bytes = packed[static_cast<size_t>(k)];
    if (H5Dwrite_chunk(id.get(), H5P_DEFAULT, /*filters=*/0, offset, bytes.size(), bytes.data()) < 0)
      return H5Fail(path, "cannot write dataset " + name);
  }
  return Status::Ok();
}

Status H5Writer::AppendFloat(const std::string& name, const float* data, uint64_t count) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  auto found = impl_->Find(name);
  if (!found.ok()) return found.status();
  if ((*found)->spec.type == H5Type::kFloat16) {
    // Convert in memory and write with the file type.
    const uint64_t n = count * Product((*found)->spec.sample_shape);
    if (n == 0) return Status::Ok();
    std::vector<uint16_t> halves(n);
    FloatsToHalves(data, n, halves.data());
    return impl_->Append(name, -1, halves.data(), count, H5Type::kFloat16);
  }
  return impl_->Append(name, H5T_NATIVE_FLOAT, data, count, H5Type::kFloat32, H5Type::kFloat16);
}

Status H5Writer::PackFloatSamples(std::vector<FloatSample>* samples, int threads) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  struct Job {
    size_t index;
    size_t values;
    size_t elem;
    int level;
  };
  std::vector<Job> jobs;
  for (size_t k = 0; k < samples->size(); ++k) {
    FloatSample& s = (*samples)[k];
    s.packed = false;
    s.chunk.clear();
    auto found = impl_->Find(s.name);  // HDF5 calls stay on this thread
    if (!found.ok()) return found.status();
    Impl::Dataset& d = **found;
    if (d.spec.type != H5Type::kFloat16 && d.spec.type != H5Type::kFloat32) continue;
    const int level = impl_->PackableLevel(d);
    if (level < 0) continue;
    jobs.push_back({k, static_cast<size_t>(Product(d.spec.sample_shape)),
                    d.spec.type == H5Type::kFloat16 ? size_t{2} : size_t{4}, level});
  }
  std::vector<int> zlib_status(jobs.size(), Z_OK);
  ParallelFor(0, static_cast<int64_t>(jobs.size()), 1, threads, [&](int64_t b, int64_t e) {
    std::vector<unsigned char> raw, shuffled, deflated;
    for (int64_t j = b; j < e; ++j) {
      const Job& job = jobs[static_cast<size_t>(j)];
      FloatSample& s = (*samples)[job.index];
      raw.resize(job.values * job.elem);
      if (job.elem == 2) {
        FloatsToHalves(s.data, job.values, reinterpret_cast<uint16_t*>(raw.data()));  // as AppendFloat
      } else {
        std::memcpy(raw.data(), s.data, raw.size());
      }
      zlib_status[static_cast<size_t>(j)] =
          ShuffleDeflate(raw.data(), raw.size(), job.elem, job.level, &shuffled, &deflated);
      s.chunk.assign(deflated.begin(), deflated.end());  // held until written: no compressBound slack
    }
  });
  for (size_t j = 0; j < jobs.size(); ++j) {
    FloatSample& s = (*samples)[jobs[j].index];
    if (zlib_status[j] != Z_OK)
      return Status::Internal(fmt::format("{}: zlib failed to compress a chunk of {}", impl_->path, s.name));
    s.packed = true;
  }
  return Status::Ok();
}

Status H5Writer::AppendFloatSample(const FloatSample& sample) {
  if (!sample.packed) return AppendFloat(sample.name, sample.data, 1);
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  auto found = impl_->Find(sample.name);
  if (!found.ok()) return found.status();
  Impl::Dataset& d = **found;
  std::vector<hsize_t> dims{d.samples + 1}, offset(d.spec.sample_shape.size() + 1, 0);
  for (uint64_t s : d.spec.sample_shape) dims.push_back(s);
  offset[0] = d.samples;
  if (H5Dset_extent(d.id.get(), dims.data()) < 0) return H5Fail(impl_->path, "cannot extend dataset " + sample.name);
  if (H5Dwrite_chunk(d.id.get(), H5P_DEFAULT, /*filters=*/0, offset.data(), sample.chunk.size(), sample.chunk.data()) <
      0)
    return H5Fail(impl_->path, "cannot write dataset " + sample.name);
  d.samples += 1;
  return Status::Ok();
}

Status H5Writer::AppendDouble(const std::string& name, const double* data, uint64_t count) {
  return impl_->Append(name, H5T_NATIVE_DOUBLE, data, count, H5Type::kFloat64);
}
Status H5Writer::AppendUInt8(const std::string& name, const uint8_t* data, uint64_t count) {
  return impl_->Append(name, H5T_NATIVE_UINT8, data, count, H5Type::kUInt8);
}
Status H5Writer::AppendInt32(const std::string& name, const int32_t* data, uint64_t count) {
  return impl_->Append(name, H5T_NATIVE_INT32, data, count, H5Type::kInt32);
}
Status H5Writer::AppendInt64(const std::string& name, const int64_t* data, uint64_t count) {
  return impl_->Append(name, H5T_NATIVE_INT64, data, count, H5Type::kInt64);
}

Status H5Writer::AppendStrings(const std::string& name, const std::vector<std::string>& values) {
  std::vector<const char*> ptrs;
  ptrs.reserve(values.size());
  for (const auto& v : values) ptrs.push_back(v.c_str());
  return impl_->Append(name, -1, ptrs.data(), values.size(), H5Type::kString);
}

Status H5Writer::Truncate(const std::string& name, uint64_t count) {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  auto found = impl_->Find(name);
  if (!found.ok()) return found.status();
  Impl::Dataset& d = **found;
  if (count > d.samples) {
    return Status::BadInput(
        fmt::format("{}: dataset {}: cannot truncate {} samples to {}", impl_->path, name, d.samples, count));
  }
  std::vector<hsize_t> dims{count};
  for (uint64_t s : d.spec.sample_shape) dims.push_back(s);
  if (H5Dset_extent(d.id.get(), dims.data()) < 0) return H5Fail(impl_->path, "cannot truncate dataset " + name);
  d.samples = count;
  return Status::Ok();
}

uint64_t H5Writer::NumSamples(const std::string& name) const {
  if (!impl_->CheckOpen().ok()) return 0;
  auto found = impl_->Find(name);
  return found.ok() ? (*found)->samples : 0;
}

Status H5Writer::ReadFloat(const std::string& name, uint64_t first, uint64_t count, std::vector<float>* out) const {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  auto found = impl_->Find(name);
  if (!found.ok()) return found.status();
  const H5Type t = (*found)->spec.type;
  if (t != H5Type::kFloat16 && t != H5Type::kFloat32 && t != H5Type::kFloat64) {
    return Status::Internal(fmt::format("{}: dataset {} holds {}, not floats", impl_->path, name, TypeName(t)));
  }
  out->assign(count * Product((*found)->spec.sample_shape), 0.0f);
  const Impl::Dataset* info = nullptr;
  // HDF5's float conversion handles the half layout (H5T_conv_f_f).
  return impl_->Read(name, first, count, H5T_NATIVE_FLOAT, out->data(), &info);
}

Status H5Writer::ReadStrings(const std::string& name, uint64_t first, uint64_t count,
                             std::vector<std::string>* out) const {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  auto found = impl_->Find(name);
  if (!found.ok()) return found.status();
  if ((*found)->spec.type != H5Type::kString) {
    return Status::Internal(fmt::format("{}: dataset {} does not hold strings", impl_->path, name));
  }
  std::vector<char*> ptrs(count, nullptr);
  Hid type = MakeStringType();
  const Impl::Dataset* info = nullptr;
  LUMENRIG_RETURN_IF_ERROR(impl_->Read(name, first, count, type.get(), ptrs.data(), &info));
  out->clear();
  for (char* p : ptrs) out->emplace_back(p != nullptr ? p : "");
  if (count > 0) {
    Hid space(H5Screate_simple(1, std::vector<hsize_t>{count}.data(), nullptr), H5Sclose);
    H5Dvlen_reclaim(type.get(), space.get(), H5P_DEFAULT, ptrs.data());
  }
  return Status::Ok();
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key, const std::string& value) {
  Hid type = MakeStringType();
  Hid space(H5Screate(H5S_SCALAR), H5Sclose);
  const char* p = value.c_str();
  return impl_->WriteAttribute(object, key, type.get(), space.get(), &p);
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key, double value) {
  Hid space(H5Screate(H5S_SCALAR), H5Sclose);
  return impl_->WriteAttribute(object, key, H5T_IEEE_F64LE, space.get(), &value);
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key, int64_t value) {
  Hid space(H5Screate(H5S_SCALAR), H5Sclose);
  return impl_->WriteAttribute(object, key, H5T_STD_I64LE, space.get(), &value);
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key, uint64_t value) {
  Hid space(H5Screate(H5S_SCALAR), H5Sclose);
  return impl_->WriteAttribute(object, key, H5T_STD_U64LE, space.get(), &value);
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key, const std::vector<double>& values) {
  const hsize_t n = values.size();
  Hid space(H5Screate_simple(1, &n, nullptr), H5Sclose);
  return impl_->WriteAttribute(object, key, H5T_IEEE_F64LE, space.get(), values.data());
}

Status H5Writer::SetAttribute(const std::string& object, const std::string& key,
                              const std::vector<std::string>& values) {
  const hsize_t n = values.size();
  Hid type = MakeStringType();
  Hid space(H5Screate_simple(1, &n, nullptr), H5Sclose);
  std::vector<const char*> ptrs;
  for (const auto& v : values) ptrs.push_back(v.c_str());
  return impl_->WriteAttribute(object, key, type.get(), space.get(), ptrs.data());
}

Status H5Writer::SetJsonAttribute(const std::string& object, const std::string& key, const nlohmann::json& value) {
  return SetAttribute(object, key, value.dump());
}

Expected<std::string> H5Writer::GetStringAttribute(const std::string& object, const std::string& key) const {
  auto obj = impl_->OpenObject(object);
  if (!obj.ok()) return obj.status();
  if (H5Aexists(obj->get(), key.c_str()) <= 0) {
    H5Eclear2(H5E_DEFAULT);
    return Status::BadInput(fmt::format("{}: {} has no attribute {}", impl_->path, object, key));
  }
  Hid attr(H5Aopen(obj->get(), key.c_str(), H5P_DEFAULT), H5Aclose);
  Hid stored(H5Aget_type(attr.get()), H5Tclose);
  if (H5Tget_class(stored.get()) != H5T_STRING || H5Tis_variable_str(stored.get()) <= 0) {
    return Status::BadInput(fmt::format("{}: attribute {} of {} is not a string", impl_->path, key, object));
  }
  Hid type = MakeStringType();
  char* p = nullptr;
  if (H5Aread(attr.get(), type.get(), &p) < 0) {
    return H5Fail(impl_->path, fmt::format("cannot read attribute {} of {}", key, object));
  }
  std::string value = p != nullptr ? p : "";
  H5free_memory(p);
  return value;
}

Status H5Writer::Flush() {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  if (H5Fflush(impl_->file.get(), H5F_SCOPE_GLOBAL) < 0) return H5Fail(impl_->path, "cannot flush");
  return Status::Ok();
}

Status H5Writer::Finalize() {
  LUMENRIG_RETURN_IF_ERROR(impl_->CheckOpen());
  impl_->datasets.clear();
  const herr_t closed = H5Fclose(impl_->file.get());
  impl_->file = Hid();
  impl_->finalized = true;
  if (closed < 0) return H5Fail(final_path_, "cannot close temporary " + temp_path_);
  // Data on disk before the name appears (rename is atomic on POSIX).
  const int fd = ::open(temp_path_.c_str(), O_RDONLY);
  if (fd >= 0) {
    ::fsync(fd);
    ::close(fd);
  }
  std::error_code ec;
  fs::rename(temp_path_, final_path_, ec);
  if (ec)
    return Status::BadInput(fmt::format("{}: cannot rename {} into place: {}", final_path_, temp_path_, ec.message()));
  return Status::Ok();
}

namespace internal {
// HDF5 prints its error stack to stderr by default; lumenrig turns errors
// into one-line Status messages instead.
// The error-printing switch is per thread in thread-safe HDF5 builds (as
// Debian's is), and stages call HDF5 from TBB worker threads, so every
// thread silences itself once. The library is not closed from an atexit
// handler (H5dont_atexit): files are closed explicitly, and closing at exit
// while worker threads hold error stacks makes HDF5 print "infinite loop
// closing library".
void SilenceHdf5() {
  static std::once_flag once;
  std::call_once(once, [] {
    H5dont_atexit();
    H5open();
  });
  thread_local bool silenced = false;
  if (!silenced) {
    H5Eset_auto2(H5E_DEFAULT, nullptr, nullptr);
    silenced = true;
  }
}

}  // namespace internal

}  // namespace lumenrig::io
