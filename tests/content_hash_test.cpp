// File hashes for provenance and resumable runs, against the xxHash
// library's one-shot XXH3-64 of the same bytes (io::HashBytes calls
// XXH3_64bits_withSeed, seed 0, which is XXH3_64bits by the library's
// definition).
#include <cstdint>
#include <fstream>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include <gtest/gtest.h>
#include <sys/stat.h>

#include "lumenrig/capture_io/content_hash.h"
#include "test_support.h"

namespace lumenrig {
namespace {

std::vector<char> RandomBytes(size_t n, uint32_t seed) {
  std::mt19937 rng(seed);
  std::vector<char> bytes(n);
  for (auto& b : bytes) b = static_cast<char>(rng() & 0xff);
  return bytes;
}

void WriteBytes(const std::string& path, const std::vector<char>& bytes) {
  std::ofstream out(path, std::ios::binary);
  out.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
}

TEST(ContentHashTest, FileHashIsTheLibraryHashOfItsBytes) {
  test::TempDir tmp;
  // Sizes around XXH3's internal block and stripe lengths and above the old
  // 4 MiB read block; 0 bytes too.
  for (size_t n : {size_t{0}, size_t{1}, size_t{240}, size_t{1025}, size_t{(4u << 20) + 17}}) {
    const auto bytes = RandomBytes(n, static_cast<uint32_t>(n));
    const std::string path = tmp / ("f" + std::to_string(n));
    WriteBytes(path, bytes);
    const auto h = io::HashFile(path);
    ASSERT_TRUE(h.ok()) << h.status().message();
    EXPECT_EQ(*h, io::HashBytes(bytes.data(), bytes.size())) << n << " bytes";
  }
}

TEST(ContentHashTest, APipeIsHashedAsItsStream) {
  test::TempDir tmp;
  const std::string path = tmp / "pipe";
  ASSERT_EQ(::mkfifo(path.c_str(), 0600), 0);
  const auto bytes = RandomBytes(3 << 20, 7);
  std::thread writer([&] { WriteBytes(path, bytes); });
  const auto h = io::HashFile(path);
  writer.join();
  ASSERT_TRUE(h.ok()) << h.status().message();
  EXPECT_EQ(*h, io::HashBytes(bytes.data(), bytes.size()));
}

TEST(ContentHashTest, AMissingFileIsNamed) {
  test::TempDir tmp;
  const auto h = io::HashFile(tmp / "absent.exr");
  ASSERT_FALSE(h.ok());
  EXPECT_NE(h.status().message().find("absent.exr"), std::string::npos) << h.status().message();
}

TEST(ContentHashTest, CacheRehashesAFileWhoseSizeChanged) {
  test::TempDir tmp;
  const std::string path = tmp / "frame.bin";
  WriteBytes(path, RandomBytes(1000, 1));
  io::FileHashCache cache;
  const auto a = cache.Hash(path), again = cache.Hash(path);
  ASSERT_TRUE(a.ok() && again.ok());
  EXPECT_EQ(*a, *again);
  EXPECT_EQ(cache.misses(), 1);
  EXPECT_EQ(cache.hits(), 1);
  const auto changed = RandomBytes(1001, 2);
  WriteBytes(path, changed);
  const auto b = cache.Hash(path);
  ASSERT_TRUE(b.ok());
  EXPECT_EQ(*b, io::HashBytes(changed.data(), changed.size()));
  EXPECT_EQ(cache.misses(), 2);
}

}  // namespace
}  // namespace lumenrig
