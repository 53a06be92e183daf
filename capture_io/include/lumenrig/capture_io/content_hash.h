#pragma once
/// \file content_hash.h
/// Content hashes for provenance and resumable stages: XXH3-64 (libxxhash)
/// of file bytes, with a cache keyed by (path, size, modification time) so a
/// rerun does not re-read a terabyte of unchanged frames.

#include <cstdint>
#include <map>
#include <mutex>
#include <string>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

/// XXH3-64 of a byte string.
uint64_t HashBytes(const void* data, size_t size, uint64_t seed = 0);
inline uint64_t HashString(const std::string& s, uint64_t seed = 0) { return HashBytes(s.data(), s.size(), seed); }

/// XXH3-64 of a file's bytes, streamed in 4 MiB blocks; error names the file.
Expected<uint64_t> HashFile(const std::string& path);

/// 16 lowercase hex digits.
std::string HashHex(uint64_t hash);

/// Combines hashes in order (order matters).
uint64_t CombineHashes(uint64_t a, uint64_t b);

/// Thread-safe memo of file hashes. An entry is reused while the file's size
/// and modification time (ns) are unchanged. Persisted as JSON with Save().
class FileHashCache {
 public:
  FileHashCache() = default;
  /// Loads `cache_path` if it exists (a corrupt cache is ignored, not an error).
  explicit FileHashCache(std::string cache_path);
  Expected<uint64_t> Hash(const std::string& path);
  /// Writes the cache atomically (when a path was given).
  Status Save() const;
  int hits() const { return hits_; }
  int misses() const { return misses_; }

 private:
  struct Entry {
    uint64_t size = 0;
    int64_t mtime_ns = 0;
    uint64_t hash = 0;
  };
  std::string cache_path_;
  mutable std::mutex mutex_;
  std::map<std::string, Entry> entries_;
  int hits_ = 0;
  int misses_ = 0;
};

}  // namespace lumenrig::io
