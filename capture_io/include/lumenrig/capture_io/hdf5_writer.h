#pragma once
/// \file hdf5_writer.h
/// A small HDF5 writer for lumenrig outputs: datasets whose first axis is the
/// sample, extendible, chunked one sample per chunk, gzip + shuffle; IEEE half
/// floats that h5py reads as float16; string and JSON attributes; atomic
/// finalisation (the file is written under a temporary name and renamed on
/// Finalize, so a process that dies never leaves a readable half file at the
/// final path). Not thread-safe: one writer, one thread (HDF5 is serial here).

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

/// Element types stored in the file.
enum class H5Type { kFloat16, kFloat32, kFloat64, kUInt8, kInt32, kInt64, kString };

struct H5DatasetSpec {
  std::string name;                 ///< absolute path, e.g. "/pairs/input"; groups are created
  std::vector<uint64_t> sample_shape;  ///< shape of one sample, e.g. {H, W, 3}; {} for scalars
  H5Type type = H5Type::kFloat16;
  int gzip_level = 4;               ///< 0 disables compression (and shuffle)
};

class H5Writer {
 public:
  ~H5Writer();
  H5Writer(const H5Writer&) = delete;
  H5Writer& operator=(const H5Writer&) = delete;

  /// Starts a new file destined for `final_path` (written to a temporary
  /// sibling). An existing final_path is an error unless `overwrite`.
  static Expected<std::unique_ptr<H5Writer>> Create(const std::string& final_path, bool overwrite);

  /// Reopens the temporary file an interrupted run left for `final_path`
  /// (see TempPathFor) to append more samples. Error when none exists.
  static Expected<std::unique_ptr<H5Writer>> Resume(const std::string& final_path);

  /// The deterministic temporary name used for `final_path`
  /// ("<dir>/.<name>.partial").
  static std::string TempPathFor(const std::string& final_path);

  /// Creates an extendible dataset with 0 samples (or opens it when resuming
  /// and the shape/type match; mismatch is an error).
  Status CreateDataset(const H5DatasetSpec& spec);

  /// Appends `count` samples. `data` holds count * prod(sample_shape)
  /// elements of float (for kFloat16/kFloat32, converted to half here),
  /// double, uint8, int32 or int64 matching the dataset type.
  Status AppendFloat(const std::string& name, const float* data, uint64_t count);
  Status AppendDouble(const std::string& name, const double* data, uint64_t count);
  Status AppendUInt8(const std::string& name, const uint8_t* data, uint64_t count);
  Status AppendInt32(const std::string& name, const int32_t* data, uint64_t count);
  Status AppendInt64(const std::string& name, const int64_t* data, uint64_t count);
  Status AppendStrings(const std::string& name, const std::vector<std::string>& values);

  /// Truncates every sample dataset listed to `count` samples (used by resume
  /// to drop a partially appended sample).
  Status Truncate(const std::string& name, uint64_t count);

  /// Number of samples currently in a dataset (0 when it does not exist).
  uint64_t NumSamples(const std::string& name) const;

  /// Attributes on the root ("/") or any existing group/dataset path.
  Status SetAttribute(const std::string& object, const std::string& key, const std::string& value);
  Status SetAttribute(const std::string& object, const std::string& key, double value);
  Status SetAttribute(const std::string& object, const std::string& key, int64_t value);
  Status SetAttribute(const std::string& object, const std::string& key, const std::vector<double>& values);
  /// Reads a string attribute back (resume checks the stored config).
  Expected<std::string> GetStringAttribute(const std::string& object, const std::string& key) const;

  /// Flushes to disk (the temporary stays temporary).
  Status Flush();
  /// Closes the file and renames it to the final path.
  Status Finalize();

  const std::string& final_path() const { return final_path_; }
  const std::string& temp_path() const { return temp_path_; }

 private:
  H5Writer() = default;
  struct Impl;
  std::unique_ptr<Impl> impl_;
  std::string final_path_;
  std::string temp_path_;
};

}  // namespace lumenrig::io
