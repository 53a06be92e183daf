// Read-only HDF5 access on the HDF5 1.10 C API (inspect, tests).
#include "lumenrig/capture_io/hdf5_reader.h"

#include <algorithm>
#include <filesystem>
#include <mutex>

#include <fmt/format.h>
#include <hdf5.h>

#include "hdf5_common.h"

namespace lumenrig::io {
namespace {

// Closes an HDF5 id with its matching close function at scope exit.
struct Id {
  hid_t id = -1;
  herr_t (*close)(hid_t) = nullptr;
  Id(hid_t i, herr_t (*c)(hid_t)) : id(i), close(c) {}
  ~Id() {
    if (id >= 0 && close) close(id);
  }
  Id(const Id&) = delete;
  Id& operator=(const Id&) = delete;
  bool ok() const { return id >= 0; }
};

std::string TypeName(hid_t type) {
  const H5T_class_t cls = H5Tget_class(type);
  const size_t size = H5Tget_size(type);
  if (cls == H5T_FLOAT) return size == 2 ? "float16" : size == 4 ? "float32" : size == 8 ? "float64" : "other";
  if (cls == H5T_INTEGER) {
    const bool sign = H5Tget_sign(type) == H5T_SGN_2;
    return fmt::format("{}int{}", sign ? "" : "u", size * 8);
  }
  if (cls == H5T_STRING) return "string";
  return "other";
}

herr_t CollectDataset(hid_t, const char* name, const H5O_info_t* info, void* data) {
  if (info->type == H5O_TYPE_DATASET) static_cast<std::vector<std::string>*>(data)->push_back(std::string("/") + name);
  return 0;
}

herr_t CollectAttr(hid_t, const char* name, const H5A_info_t*, void* data) {
  static_cast<std::vector<std::string>*>(data)->push_back(name);
  return 0;
}

}  // namespace

H5Reader::~H5Reader() {
  if (file_ >= 0) H5Fclose(file_);
}

Expected<std::unique_ptr<H5Reader>> H5Reader::Open(const std::string& path) {
  internal::SilenceHdf5();
  std::error_code ec;
  if (!std::filesystem::exists(path, ec)) return Status::BadInput(fmt::format("{}: file not found", path));
  if (H5Fis_hdf5(path.c_str()) <= 0) return Status::BadInput(fmt::format("{}: not an HDF5 file", path));
  const hid_t f = H5Fopen(path.c_str(), H5F_ACC_RDONLY, H5P_DEFAULT);
  if (f < 0) return Status::BadInput(fmt::format("{}: cannot open as HDF5", path));
  std::unique_ptr<H5Reader> r(new H5Reader());
  r->file_ = f;
  r->path_ = path;
  return r;
}

Expected<H5DatasetInfo> H5Reader::Dataset(const std::string& name) const {
  Id d(H5Dopen2(file_, name.c_str(), H5P_DEFAULT), H5Dclose);
  if (!d.ok()) return Status::BadInput(fmt::format("{}: no dataset {}", path_, name));
  H5DatasetInfo info;
  info.name = name;
  Id space(H5Dget_space(d.id), H5Sclose);
  const int rank = H5Sget_simple_extent_ndims(space.id);
  std::vector<hsize_t> dims(std::max(rank, 0));
  if (rank > 0) H5Sget_simple_extent_dims(space.id, dims.data(), nullptr);
  info.shape.assign(dims.begin(), dims.end());
  Id type(H5Dget_type(d.id), H5Tclose);
  info.type = TypeName(type.id);
  Id plist(H5Dget_create_plist(d.id), H5Pclose);
  if (H5Pget_layout(plist.id) == H5D_CHUNKED) {
    std::vector<hsize_t> chunk(std::max(rank, 0));
    H5Pget_chunk(plist.id, rank, chunk.data());
    info.chunk.assign(chunk.begin(), chunk.end());
  }
  const int nf = H5Pget_nfilters(plist.id);
  for (int i = 0; i < nf; ++i) {
    unsigned flags = 0, filter_config = 0;
    size_t nelem = 0;
    const H5Z_filter_t f =
        H5Pget_filter2(plist.id, static_cast<unsigned>(i), &flags, &nelem, nullptr, 0, nullptr, &filter_config);
    if (f == H5Z_FILTER_DEFLATE) info.gzip = true;
    if (f == H5Z_FILTER_SHUFFLE) info.shuffle = true;
  }
  return info;
}

Expected<std::vector<H5DatasetInfo>> H5Reader::ListDatasets() const {
  std::vector<std::string> names;
  if (H5Ovisit(file_, H5_INDEX_NAME, H5_ITER_INC, CollectDataset, &names) < 0) {
    return Status::BadInput(fmt::format("{}: cannot list datasets", path_));
  }
  std::sort(names.begin(), names.end());
  std::vector<H5DatasetInfo> out;
  for (const auto& n : names) {
    auto i = Dataset(n);
    if (!i.ok()) return i.status();
    out.push_back(*i);
  }
  return out;
}

Expected<std::vector<std::string>> H5Reader::AttributeNames(const std::string& object) const {
  Id o(H5Oopen(file_, object.c_str(), H5P_DEFAULT), H5Oclose);
  if (!o.ok()) return Status::BadInput(fmt::format("{}: no object {}", path_, object));
  std::vector<std::string> names;
  hsize_t idx = 0;
  H5Aiterate2(o.id, H5_INDEX_NAME, H5_ITER_INC, &idx, CollectAttr, &names);
  return names;
}

Expected<std::string> H5Reader::StringAttribute(const std::string& object, const std::string& key) const {
  auto v = StringArrayAttribute(object, key);
  if (!v.ok()) return v.status();
  if (v->size() != 1)
    return Status::BadInput(fmt::format("{}: {} attribute {}: not a single string", path_, object, key));
  return (*v)[0];
}

Expected<std::vector<std::string>> H5Reader::StringArrayAttribute(const std::string& object,
                                                                  const std::string& key) const {
  Id a(H5Aopen_by_name(file_, object.c_str(), key.c_str(), H5P_DEFAULT, H5P_DEFAULT), H5Aclose);
  if (!a.ok()) return Status::BadInput(fmt::format("{}: {} has no attribute {}", path_, object, key));
  Id type(H5Aget_type(a.id), H5Tclose);
  if (H5Tget_class(type.id) != H5T_STRING) {
    return Status::BadInput(fmt::format("{}: {} attribute {} is not a string", path_, object, key));
  }
  Id space(H5Aget_space(a.id), H5Sclose);
  const hssize_t n = H5Sget_simple_extent_npoints(space.id);
  std::vector<std::string> out;
  if (H5Tis_variable_str(type.id) > 0) {
    std::vector<char*> ptrs(static_cast<size_t>(n), nullptr);
    Id mem(H5Tcopy(H5T_C_S1), H5Tclose);
    H5Tset_size(mem.id, H5T_VARIABLE);
    H5Tset_cset(mem.id, H5Tget_cset(type.id));
    if (H5Aread(a.id, mem.id, ptrs.data()) < 0)
      return Status::BadInput(fmt::format("{}: cannot read attribute {}", path_, key));
    for (char* p : ptrs) out.emplace_back(p ? p : "");
    H5Dvlen_reclaim(mem.id, space.id, H5P_DEFAULT, ptrs.data());
  } else {
    const size_t size = H5Tget_size(type.id);
    std::vector<char> buf(size * static_cast<size_t>(n) + 1, '\0');
    if (H5Aread(a.id, type.id, buf.data()) < 0)
      return Status::BadInput(fmt::format("{}: cannot read attribute {}", path_, key));
    for (hssize_t i = 0; i < n; ++i) {
      std::string s(buf.data() + i * size, size);
      s.erase(std::find(s.begin(), s.end(), '\0'), s.end());
      out.push_back(s);
    }
  }
  return out;
}

Expected<std::vector<double>> H5Reader::NumericAttribute(const std::string& object, const std::string& key) const {
  Id a(H5Aopen_by_name(file_, object.c_str(), key.c_str(), H5P_DEFAULT, H5P_DEFAULT), H5Aclose);
  if (!a.ok()) return Status::BadInput(fmt::format("{}: {} has no attribute {}", path_, object, key));
  Id type(H5Aget_type(a.id), H5Tclose);
  const H5T_class_t cls = H5Tget_class(type.id);
  if (cls != H5T_FLOAT && cls != H5T_INTEGER) {
    return Status::BadInput(fmt::format("{}: {} attribute {} is not numeric", path_, object, key));
  }
  Id space(H5Aget_space(a.id), H5Sclose);
  std::vector<double> out(static_cast<size_t>(H5Sget_simple_extent_npoints(space.id)));
  if (H5Aread(a.id, H5T_NATIVE_DOUBLE, out.data()) < 0) {
    return Status::BadInput(fmt::format("{}: cannot read attribute {}", path_, key));
  }
  return out;
}

namespace {
// Selects samples [first, first+count) of dataset d; returns the memory space.
Status SelectSamples(const std::string& path, const std::string& name, hid_t d, uint64_t first, uint64_t count,
                     hid_t* file_space, hid_t* mem_space, uint64_t* per_sample) {
  *file_space = H5Dget_space(d);
  const int rank = H5Sget_simple_extent_ndims(*file_space);
  std::vector<hsize_t> dims(std::max(rank, 1));
  H5Sget_simple_extent_dims(*file_space, dims.data(), nullptr);
  if (rank < 1 || first + count > dims[0]) {
    H5Sclose(*file_space);
    return Status::BadInput(fmt::format("{}: dataset {}: samples [{}, {}) out of range (has {})", path, name, first,
                                        first + count, rank < 1 ? 0 : dims[0]));
  }
  std::vector<hsize_t> start(rank, 0), block(dims);
  start[0] = first;
  block[0] = count;
  H5Sselect_hyperslab(*file_space, H5S_SELECT_SET, start.data(), nullptr, block.data(), nullptr);
  *mem_space = H5Screate_simple(rank, block.data(), nullptr);
  *per_sample = 1;
  for (int i = 1; i < rank; ++i) *per_sample *= dims[i];
  return Status::Ok();
}
}  // namespace

Status H5Reader::ReadFloat(const std::string& name, uint64_t first, uint64_t count, std::vector<float>* out) const {
  Id d(H5Dopen2(file_, name.c_str(), H5P_DEFAULT), H5Dclose);
  if (!d.ok()) return Status::BadInput(fmt::format("{}: no dataset {}", path_, name));
  hid_t fs = -1, ms = -1;
  uint64_t per = 0;
  LUMENRIG_RETURN_IF_ERROR(SelectSamples(path_, name, d.id, first, count, &fs, &ms, &per));
  Id fsid(fs, H5Sclose), msid(ms, H5Sclose);
  out->assign(per * count, 0.0f);
  // HDF5 converts half/float/double/int to native float (H5T_conv_f_f, _i_f).
  if (H5Dread(d.id, H5T_NATIVE_FLOAT, ms, fs, H5P_DEFAULT, out->data()) < 0) {
    return Status::BadInput(fmt::format("{}: cannot read dataset {} as float", path_, name));
  }
  return Status::Ok();
}

Status H5Reader::ReadStrings(const std::string& name, uint64_t first, uint64_t count,
                             std::vector<std::string>* out) const {
  Id d(H5Dopen2(file_, name.c_str(), H5P_DEFAULT), H5Dclose);
  if (!d.ok()) return Status::BadInput(fmt::format("{}: no dataset {}", path_, name));
  Id type(H5Dget_type(d.id), H5Tclose);
  if (H5Tget_class(type.id) != H5T_STRING)
    return Status::BadInput(fmt::format("{}: dataset {} is not strings", path_, name));
  hid_t fs = -1, ms = -1;
  uint64_t per = 0;
  LUMENRIG_RETURN_IF_ERROR(SelectSamples(path_, name, d.id, first, count, &fs, &ms, &per));
  Id fsid(fs, H5Sclose), msid(ms, H5Sclose);
  out->clear();
  if (H5Tis_variable_str(type.id) > 0) {
    std::vector<char*> ptrs(count * per, nullptr);
    Id mem(H5Tcopy(H5T_C_S1), H5Tclose);
    H5Tset_size(mem.id, H5T_VARIABLE);
    H5Tset_cset(mem.id, H5Tget_cset(type.id));
    if (H5Dread(d.id, mem.id, ms, fs, H5P_DEFAULT, ptrs.data()) < 0) {
      return Status::BadInput(fmt::format("{}: cannot read dataset {}", path_, name));
    }
    for (char* p : ptrs) out->emplace_back(p ? p : "");
    H5Dvlen_reclaim(mem.id, ms, H5P_DEFAULT, ptrs.data());
  } else {
    const size_t size = H5Tget_size(type.id);
    std::vector<char> buf(size * count * per + 1, '\0');
    if (H5Dread(d.id, type.id, ms, fs, H5P_DEFAULT, buf.data()) < 0) {
      return Status::BadInput(fmt::format("{}: cannot read dataset {}", path_, name));
    }
    for (uint64_t i = 0; i < count * per; ++i) {
      std::string s(buf.data() + i * size, size);
      s.erase(std::find(s.begin(), s.end(), '\0'), s.end());
      out->push_back(s);
    }
  }
  return Status::Ok();
}

}  // namespace lumenrig::io
