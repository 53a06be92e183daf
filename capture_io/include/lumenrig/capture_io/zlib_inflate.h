#pragma once
/// \file zlib_inflate.h
/// Faster inflate for OpenEXR's ZIP-compressed blocks.
///
/// OpenEXR 3.1 (the Debian 12 package) inflates every ZIP/ZIPS block with
/// zlib's one-shot `uncompress()`, and on OLAT sessions that inflate is
/// about half of all the CPU time of the normals stage. lumenrig defines
/// `uncompress()` itself (capture_io/zlib_inflate.cpp): the dynamic linker
/// then binds OpenEXR's calls to that definition, which inflates with
/// libdeflate (Debian `libdeflate-dev`, same zlib stream format, RFC 1950,
/// about twice as fast). The decoded bytes are the same by definition of a
/// lossless format; any stream libdeflate does not accept is handed to
/// zlib's own `uncompress()`, so errors and partial outputs are exactly
/// zlib's. Only the one-shot call is replaced: streaming `inflate()` (PNG,
/// HDF5) and all compression stay with zlib.
///
/// `LUMENRIG_INFLATE=zlib` in the environment sends every call to zlib, so
/// benchmarks can show both decoders side by side.

#include <cstdint>

namespace lumenrig::io {

struct InflateCounts {
  std::uint64_t libdeflate = 0;  ///< uncompress() calls libdeflate completed
  std::uint64_t zlib = 0;        ///< calls handed to zlib (rejected streams, or LUMENRIG_INFLATE=zlib)
};
/// Counts since the process started (all threads).
InflateCounts ZlibInflateCounts();

/// "libdeflate" or "zlib": which engine serves uncompress() in this process.
const char* ZlibInflateEngine();

}  // namespace lumenrig::io
