#pragma once
/// \file zlib_libdeflate.h
/// Faster zlib streams for OpenEXR's ZIP blocks, from libdeflate.
///
/// OpenEXR 3.1 (the Debian 12 package) inflates every ZIP/ZIPS block with
/// zlib's one-shot `uncompress()` and deflates it with `compress2()`. On OLAT
/// sessions that inflate was about half of the normals stage's CPU, and the
/// deflate of the stage EXRs about a tenth of a whole `run`. lumenrig defines
/// both functions itself (capture_io/zlib_libdeflate.cpp); the dynamic linker
/// binds OpenEXR's calls to the executable's definitions, which use libdeflate
/// (Debian `libdeflate-dev`; the same zlib stream format, RFC 1950).
///
/// - `uncompress()`, for every caller: a stream libdeflate accepts inflates
///   to the bytes zlib would give (lossless format, Adler-32 checked); any
///   other stream is handed to zlib's own `uncompress()`, so errors and
///   partial outputs are exactly zlib's.
/// - `compress2()`, for callers inside OpenEXR only, at the level OpenEXR
///   asks for: a valid zlib stream, not zlib's exact bytes. Every other
///   caller (HDF5's deflate filter, lumenrig's HDF5 chunk packer) gets zlib
///   itself, so HDF5 files keep the bytes HDF5's own filters store.
/// - Streaming `inflate()`/`deflate()` (PNG, HDF5 reading) stay with zlib.
///
/// `LUMENRIG_LIBDEFLATE=0` in the environment sends every call to zlib, so
/// benchmarks can show both side by side.

#include <cstdint>

namespace lumenrig::io {

struct LibdeflateCounts {
  std::uint64_t inflated = 0;         ///< uncompress() calls libdeflate completed
  std::uint64_t inflate_to_zlib = 0;  ///< uncompress() calls handed to zlib
  std::uint64_t deflated = 0;         ///< compress2() calls (from OpenEXR) libdeflate completed
  std::uint64_t deflate_to_zlib = 0;  ///< compress2() calls handed to zlib
};
/// Counts since the process started (all threads).
LibdeflateCounts ZlibLibdeflateCounts();

/// True unless LUMENRIG_LIBDEFLATE=0: libdeflate serves the calls above.
bool LibdeflateEnabled();

}  // namespace lumenrig::io
