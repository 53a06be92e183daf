#include "lumenrig/capture_io/content_hash.h"

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <vector>

#include <sys/stat.h>
#include <xxhash.h>
#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/atomic_file.h"

namespace fs = std::filesystem;

namespace lumenrig::io {

uint64_t HashBytes(const void* data, size_t size, uint64_t seed) { return XXH3_64bits_withSeed(data, size, seed); }

Expected<uint64_t> HashFile(const std::string& path) {
  std::FILE* f = std::fopen(path.c_str(), "rb");
  if (f == nullptr) return Status::BadInput(fmt::format("{}: cannot open for hashing", path));
  XXH3_state_t* state = XXH3_createState();
  XXH3_64bits_reset(state);
  std::vector<char> buffer(size_t{4} << 20);
  size_t n = 0;
  while ((n = std::fread(buffer.data(), 1, buffer.size(), f)) > 0) XXH3_64bits_update(state, buffer.data(), n);
  const bool failed = std::ferror(f) != 0;
  std::fclose(f);
  const uint64_t h = XXH3_64bits_digest(state);
  XXH3_freeState(state);
  if (failed) return Status::BadInput(fmt::format("{}: read error while hashing", path));
  return h;
}

std::string HashHex(uint64_t hash) { return fmt::format("{:016x}", hash); }

uint64_t CombineHashes(uint64_t a, uint64_t b) {
  const uint64_t both[2] = {a, b};
  return HashBytes(both, sizeof(both));
}

FileHashCache::FileHashCache(std::string cache_path) : cache_path_(std::move(cache_path)) {
  std::ifstream in(cache_path_);
  if (!in) return;
  try {
    const auto j = nlohmann::json::parse(in);
    for (const auto& [path, e] : j.at("files").items()) {
      entries_[path] = Entry{e.at("size").get<uint64_t>(), e.at("mtime_ns").get<int64_t>(),
                             std::stoull(e.at("xxh3").get<std::string>(), nullptr, 16)};
    }
  } catch (const std::exception&) {
    entries_.clear();  // a damaged cache only costs a re-hash
  }
}

Expected<uint64_t> FileHashCache::Hash(const std::string& path) {
  struct stat st {};
  if (::stat(path.c_str(), &st) != 0) return Status::BadInput(fmt::format("{}: file not found", path));
  const uint64_t size = static_cast<uint64_t>(st.st_size);
  const int64_t mtime_ns = static_cast<int64_t>(st.st_mtim.tv_sec) * 1000000000LL + st.st_mtim.tv_nsec;
  {
    std::lock_guard<std::mutex> lock(mutex_);
    auto it = entries_.find(path);
    if (it != entries_.end() && it->second.size == size && it->second.mtime_ns == mtime_ns) {
      ++hits_;
      return it->second.hash;
    }
  }
  auto h = HashFile(path);
  if (!h.ok()) return h.status();
  std::lock_guard<std::mutex> lock(mutex_);
  entries_[path] = Entry{size, mtime_ns, *h};
  ++misses_;
  return *h;
}

Status FileHashCache::Save() const {
  if (cache_path_.empty()) return Status::Ok();
  nlohmann::json j;
  j["format"] = "lumenrig.hashcache/1";
  auto& files = j["files"];
  files = nlohmann::json::object();
  {
    std::lock_guard<std::mutex> lock(mutex_);
    for (const auto& [path, e] : entries_)
      files[path] = {{"size", e.size}, {"mtime_ns", e.mtime_ns}, {"xxh3", HashHex(e.hash)}};
  }
  return WriteTextFile(cache_path_, j.dump(1), /*overwrite=*/true);
}

}  // namespace lumenrig::io
