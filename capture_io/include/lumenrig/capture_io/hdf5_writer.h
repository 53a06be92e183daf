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

#include <opencv2/core.hpp>

#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

/// Element types stored in the file.
enum class H5Type { kFloat16, kFloat32, kFloat64, kUInt8, kInt32, kInt64, kString };

struct H5DatasetSpec {
  std::string name;                    ///< absolute path, e.g. "/pairs/input"; groups are created
  std::vector<uint64_t> sample_shape;  ///< shape of one sample, e.g. {H, W, 3}; {} for scalars
  H5Type type = H5Type::kFloat16;
  int gzip_level = 4;  ///< 0 disables compression (and shuffle); ignored for kString
  /// Samples per chunk; 0 = one sample for array samples, 1024 for scalar
  /// samples (sample_shape {}), so per-sample metadata is not one chunk each.
  uint64_t chunk_samples = 0;
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
  /// An existing final_path is an error unless `overwrite`.
  static Expected<std::unique_ptr<H5Writer>> Resume(const std::string& final_path, bool overwrite = false);

  /// The deterministic temporary name used for `final_path`
  /// ("<dir>/.<name>.partial").
  static std::string TempPathFor(const std::string& final_path);

  /// Creates an extendible dataset with 0 samples (or opens it when resuming
  /// and the shape/type match; mismatch is an error).
  Status CreateDataset(const H5DatasetSpec& spec);

  /// Writes a whole image (CV_32F, H x W x C) as a fixed dataset [H, W, C]
  /// of kFloat16 or kFloat32, chunked by 64 rows, gzip + shuffle when
  /// gzip_level > 0. Intermediate groups are created; an existing dataset is
  /// an error.
  Status WriteImage(const std::string& name, const cv::Mat& image, H5Type type = H5Type::kFloat16, int gzip_level = 4);

  /// Appends `count` samples. `data` holds count * prod(sample_shape)
  /// elements of float (for kFloat16/kFloat32, converted to half here),
  /// double, uint8, int32 or int64 matching the dataset type.
  Status AppendFloat(const std::string& name, const float* data, uint64_t count);
  Status AppendDouble(const std::string& name, const double* data, uint64_t count);
  Status AppendUInt8(const std::string& name, const uint8_t* data, uint64_t count);
  Status AppendInt32(const std::string& name, const int32_t* data, uint64_t count);
  Status AppendInt64(const std::string& name, const int64_t* data, uint64_t count);
  Status AppendStrings(const std::string& name, const std::vector<std::string>& values);

  /// One float sample for a float dataset, compressed ahead of its append.
  struct FloatSample {
    std::string name;                  ///< dataset
    const float* data = nullptr;       ///< prod(sample_shape) values; must outlive AppendFloatSample
    std::vector<unsigned char> chunk;  ///< filled by PackFloatSamples
    bool packed = false;               ///< chunk holds the stored bytes
  };
  /// HDF5 runs a dataset's filters on the writing thread, chunk after
  /// chunk. For every sample whose dataset's chunk is exactly one sample with
  /// the shuffle and deflate filters (as CreateDataset makes them with
  /// chunk_samples 1), this converts, shuffles and deflates the chunk on up
  /// to `threads` threads (0 = all), bytes equal to HDF5's own filters'.
  /// Other samples are left for a plain AppendFloat.
  Status PackFloatSamples(std::vector<FloatSample>* samples, int threads = 0);
  /// Appends one sample: the packed chunk with H5Dwrite_chunk, else
  /// AppendFloat(name, data, 1). The file is the same either way.
  Status AppendFloatSample(const FloatSample& sample);

  /// Shrinks dataset `name` to its first `count` samples (used by resume to
  /// drop a partially appended sample). count > NumSamples is an error.
  Status Truncate(const std::string& name, uint64_t count);

  /// Reads samples [first, first+count) of a float16/float32/float64 dataset
  /// converted to float (count * prod(sample_shape) values).
  Status ReadFloat(const std::string& name, uint64_t first, uint64_t count, std::vector<float>* out) const;
  /// Reads samples [first, first+count) of a string dataset.
  Status ReadStrings(const std::string& name, uint64_t first, uint64_t count, std::vector<std::string>* out) const;

  /// Creates a group and its parents (no-op when it exists).
  Status CreateGroup(const std::string& path);

  /// Number of samples currently in a dataset (0 when it does not exist).
  uint64_t NumSamples(const std::string& name) const;

  /// Attributes on the root ("/") or any existing group/dataset path; an
  /// existing attribute of that name is replaced. Strings are stored as
  /// variable-length UTF-8 (h5py reads `str`), integers as 64-bit, doubles
  /// as IEEE 64-bit, vectors as 1-D arrays.
  Status SetAttribute(const std::string& object, const std::string& key, const std::string& value);
  Status SetAttribute(const std::string& object, const std::string& key, const char* value) {
    return SetAttribute(object, key, std::string(value));
  }
  Status SetAttribute(const std::string& object, const std::string& key, double value);
  Status SetAttribute(const std::string& object, const std::string& key, int64_t value);
  Status SetAttribute(const std::string& object, const std::string& key, int value) {
    return SetAttribute(object, key, static_cast<int64_t>(value));
  }
  Status SetAttribute(const std::string& object, const std::string& key, uint64_t value);
  Status SetAttribute(const std::string& object, const std::string& key, const std::vector<double>& values);
  Status SetAttribute(const std::string& object, const std::string& key, const std::vector<std::string>& values);
  /// Stores `value.dump()` as a string attribute (e.g. the run's options).
  Status SetJsonAttribute(const std::string& object, const std::string& key, const nlohmann::json& value);
  /// Reads a string attribute back (resume checks the stored config).
  Expected<std::string> GetStringAttribute(const std::string& object, const std::string& key) const;

  /// Flushes to disk (the temporary stays temporary). After a Flush, a
  /// process killed before the next one leaves a temporary that Resume opens
  /// with the samples present at the Flush.
  Status Flush();
  /// Closes the file, fsyncs it and renames it to the final path. Further
  /// calls on the writer fail. Destroying a writer without Finalize closes
  /// the temporary and leaves it for Resume; the final path is never touched.
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
