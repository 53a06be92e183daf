// zlib's one-shot uncompress() and OpenEXR's compress2() calls, served by
// libdeflate (see zlib_libdeflate.h).
//
// Contracts kept from zlib.h (zlib 1.2.13 manual, "uncompress", "compress2"):
// uncompress inflates the complete zlib stream source[0, sourceLen) into
// dest, whose size is *destLen on entry; on Z_OK *destLen is the inflated
// size; Z_BUF_ERROR when dest is too small, Z_DATA_ERROR when the stream is
// corrupt or incomplete. compress2 writes one complete zlib stream of
// source at `level` into dest (Z_OK, *destLen its size), Z_BUF_ERROR when it
// does not fit. libdeflate checks the same header fields and the Adler-32
// trailer (libdeflate.h, libdeflate_zlib_decompress), so a stream it
// accepts is one zlib accepts and inflates to the same bytes; everything
// else goes to zlib itself.

#include "lumenrig/capture_io/zlib_libdeflate.h"

#include <array>
#include <atomic>
#include <cstdlib>
#include <cstring>

#include <dlfcn.h>
#include <libdeflate.h>
#include <zlib.h>

namespace lumenrig::io {
namespace {

std::atomic<std::uint64_t> g_inflated{0};
std::atomic<std::uint64_t> g_inflate_to_zlib{0};
std::atomic<std::uint64_t> g_deflated{0};
std::atomic<std::uint64_t> g_deflate_to_zlib{0};

using UncompressFn = int (*)(Bytef*, uLongf*, const Bytef*, uLong);
using Compress2Fn = int (*)(Bytef*, uLongf*, const Bytef*, uLong, int);

// zlib's own definitions: the next ones after ours in symbol lookup order.
template <typename Fn>
Fn ZlibOwn(const char* name) {
  return reinterpret_cast<Fn>(dlsym(RTLD_NEXT, name));
}

// One decompressor, and one compressor per level, per thread (libdeflate's
// objects are not shareable between threads).
struct ThreadCodecs {
  libdeflate_decompressor* decompressor = libdeflate_alloc_decompressor();
  std::array<libdeflate_compressor*, 10> compressors{};
  ThreadCodecs() = default;
  ThreadCodecs(const ThreadCodecs&) = delete;
  ThreadCodecs& operator=(const ThreadCodecs&) = delete;
  ~ThreadCodecs() {
    if (decompressor != nullptr) libdeflate_free_decompressor(decompressor);
    for (libdeflate_compressor* c : compressors)
      if (c != nullptr) libdeflate_free_compressor(c);
  }
  libdeflate_compressor* Compressor(int level) {
    libdeflate_compressor*& c = compressors[static_cast<size_t>(level)];
    if (c == nullptr) c = libdeflate_alloc_compressor(level);
    return c;
  }
};

ThreadCodecs& Codecs() {
  thread_local ThreadCodecs codecs;
  return codecs;
}

// The caller's code lies in an OpenEXR library (libOpenEXR-*, libOpenEXRCore-*).
bool CalledFromOpenExr(const void* return_address) {
  Dl_info info{};
  return dladdr(return_address, &info) != 0 && info.dli_fname != nullptr &&
         std::strstr(info.dli_fname, "libOpenEXR") != nullptr;
}

}  // namespace

LibdeflateCounts ZlibLibdeflateCounts() {
  return {g_inflated.load(std::memory_order_relaxed), g_inflate_to_zlib.load(std::memory_order_relaxed),
          g_deflated.load(std::memory_order_relaxed), g_deflate_to_zlib.load(std::memory_order_relaxed)};
}

bool LibdeflateEnabled() {
  static const bool enabled = [] {
    const char* v = std::getenv("LUMENRIG_LIBDEFLATE");
    return v == nullptr || std::strcmp(v, "0") != 0;
  }();
  return enabled;
}

}  // namespace lumenrig::io

// Same declarations as zlib.h; defined here so the executable's definitions
// are the ones shared libraries (OpenEXR) bind to.
extern "C" int uncompress(Bytef* dest, uLongf* destLen, const Bytef* source, uLong sourceLen) {
  using namespace lumenrig::io;
  if (LibdeflateEnabled()) {
    libdeflate_decompressor* d = Codecs().decompressor;
    size_t produced = 0;
    if (d != nullptr &&
        libdeflate_zlib_decompress(d, source, sourceLen, dest, *destLen, &produced) == LIBDEFLATE_SUCCESS) {
      *destLen = static_cast<uLongf>(produced);
      g_inflated.fetch_add(1, std::memory_order_relaxed);
      return Z_OK;
    }
  }
  g_inflate_to_zlib.fetch_add(1, std::memory_order_relaxed);
  static const auto zlib_uncompress = ZlibOwn<UncompressFn>("uncompress");
  if (zlib_uncompress == nullptr) return Z_DATA_ERROR;  // zlib not loaded: cannot happen when OpenEXR is
  return zlib_uncompress(dest, destLen, source, sourceLen);
}

extern "C" int compress2(Bytef* dest, uLongf* destLen, const Bytef* source, uLong sourceLen, int level) {
  using namespace lumenrig::io;
  if (LibdeflateEnabled() && level >= 1 && level <= 9 && CalledFromOpenExr(__builtin_return_address(0))) {
    libdeflate_compressor* c = Codecs().Compressor(level);
    const size_t written = c == nullptr ? 0 : libdeflate_zlib_compress(c, source, sourceLen, dest, *destLen);
    if (written > 0) {
      *destLen = static_cast<uLongf>(written);
      g_deflated.fetch_add(1, std::memory_order_relaxed);
      return Z_OK;
    }
  }
  g_deflate_to_zlib.fetch_add(1, std::memory_order_relaxed);
  static const auto zlib_compress2 = ZlibOwn<Compress2Fn>("compress2");
  if (zlib_compress2 == nullptr) return Z_STREAM_ERROR;
  return zlib_compress2(dest, destLen, source, sourceLen, level);
}
