// zlib's one-shot uncompress(), served by libdeflate (see zlib_inflate.h).
//
// Contract kept from zlib.h (zlib 1.2.13 manual, "uncompress"): inflates the
// complete zlib stream source[0, sourceLen) into dest, whose size is
// *destLen on entry; on Z_OK *destLen is the decompressed size. Z_BUF_ERROR
// when dest is too small, Z_DATA_ERROR when the stream is corrupt or
// incomplete, Z_MEM_ERROR when out of memory. libdeflate checks the same
// header fields and the Adler-32 trailer (libdeflate.h,
// libdeflate_zlib_decompress), so a stream it accepts is one zlib accepts
// and inflates to the same bytes; everything else goes to zlib itself.

#include "lumenrig/capture_io/zlib_inflate.h"

#include <atomic>
#include <cstdlib>
#include <cstring>

#include <dlfcn.h>
#include <libdeflate.h>
#include <zlib.h>

namespace lumenrig::io {
namespace {

std::atomic<std::uint64_t> g_libdeflate_calls{0};
std::atomic<std::uint64_t> g_zlib_calls{0};

using UncompressFn = int (*)(Bytef*, uLongf*, const Bytef*, uLong);

bool UseZlibOnly() {
  static const bool zlib_only = [] {
    const char* v = std::getenv("LUMENRIG_INFLATE");
    return v != nullptr && std::strcmp(v, "zlib") == 0;
  }();
  return zlib_only;
}

// zlib's own definition: the next one after ours in symbol lookup order.
UncompressFn ZlibUncompress() {
  static const auto fn = reinterpret_cast<UncompressFn>(dlsym(RTLD_NEXT, "uncompress"));
  return fn;
}

// One decompressor per thread (libdeflate decompressors are not shareable).
struct ThreadDecompressor {
  libdeflate_decompressor* d = libdeflate_alloc_decompressor();
  ~ThreadDecompressor() {
    if (d != nullptr) libdeflate_free_decompressor(d);
  }
};

int ByZlib(Bytef* dest, uLongf* dest_len, const Bytef* source, uLong source_len) {
  g_zlib_calls.fetch_add(1, std::memory_order_relaxed);
  const UncompressFn fn = ZlibUncompress();
  if (fn == nullptr) return Z_DATA_ERROR;  // zlib not loaded: cannot happen when OpenEXR is
  return fn(dest, dest_len, source, source_len);
}

}  // namespace

InflateCounts ZlibInflateCounts() {
  return {g_libdeflate_calls.load(std::memory_order_relaxed), g_zlib_calls.load(std::memory_order_relaxed)};
}

const char* ZlibInflateEngine() { return UseZlibOnly() ? "zlib" : "libdeflate"; }

}  // namespace lumenrig::io

// Same declaration as zlib.h; defined here so the executable's definition is
// the one every shared library (OpenEXR) binds to.
extern "C" int uncompress(Bytef* dest, uLongf* destLen, const Bytef* source, uLong sourceLen) {
  using namespace lumenrig::io;
  if (UseZlibOnly()) return ByZlib(dest, destLen, source, sourceLen);
  thread_local ThreadDecompressor decompressor;
  if (decompressor.d != nullptr) {
    size_t produced = 0;
    const libdeflate_result r =
        libdeflate_zlib_decompress(decompressor.d, source, sourceLen, dest, *destLen, &produced);
    if (r == LIBDEFLATE_SUCCESS) {
      *destLen = static_cast<uLongf>(produced);
      g_libdeflate_calls.fetch_add(1, std::memory_order_relaxed);
      return Z_OK;
    }
  }
  return ByZlib(dest, destLen, source, sourceLen);
}
