#pragma once
/// \file hdf5_reader.h
/// A small read-only HDF5 reader (C API) for finished lumenrig files: list
/// datasets with shape, element type, chunking and filters; read attributes;
/// read samples (first axis) converted to float, and string datasets.
/// Not thread-safe: one reader, one thread.

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

struct H5DatasetInfo {
  std::string name;             ///< absolute path, e.g. "/pairs/input"
  std::vector<uint64_t> shape;  ///< full shape, first axis = samples
  std::vector<uint64_t> chunk;  ///< empty when contiguous
  std::string type;             ///< "float16", "float32", "float64", "int64", "int32", "uint8", "string", "other"
  bool gzip = false;
  bool shuffle = false;
};

class H5Reader {
 public:
  ~H5Reader();
  H5Reader(const H5Reader&) = delete;
  H5Reader& operator=(const H5Reader&) = delete;

  /// Opens `path` read-only; errors name the file.
  static Expected<std::unique_ptr<H5Reader>> Open(const std::string& path);

  /// Every dataset in the file, sorted by name.
  Expected<std::vector<H5DatasetInfo>> ListDatasets() const;
  Expected<H5DatasetInfo> Dataset(const std::string& name) const;

  /// Names of the attributes of an object ("/" or a dataset/group path).
  Expected<std::vector<std::string>> AttributeNames(const std::string& object) const;
  /// A string attribute (fixed or variable length).
  Expected<std::string> StringAttribute(const std::string& object, const std::string& key) const;
  /// A numeric attribute (scalar or 1-D) converted to double.
  Expected<std::vector<double>> NumericAttribute(const std::string& object, const std::string& key) const;
  /// A string-array attribute.
  Expected<std::vector<std::string>> StringArrayAttribute(const std::string& object, const std::string& key) const;

  /// Samples [first, first + count) of a numeric dataset converted to float.
  Status ReadFloat(const std::string& name, uint64_t first, uint64_t count, std::vector<float>* out) const;
  /// Samples [first, first + count) of a string dataset (1-D).
  Status ReadStrings(const std::string& name, uint64_t first, uint64_t count, std::vector<std::string>* out) const;

  const std::string& path() const { return path_; }

 private:
  H5Reader() = default;
  int64_t file_ = -1;
  std::string path_;
};

}  // namespace lumenrig::io
