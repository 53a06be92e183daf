#pragma once
/// \file band_readers_internal.h
/// Streaming BandReader implementations for PNG (libpng) and TIFF (libtiff),
/// used by BandReader::Open. Internal to capture_io.

#include <memory>
#include <string>

#include "lumenrig/capture_io/image_io.h"

namespace lumenrig::io {

/// PNG decoded row by row with libpng (png_read_row): 8/16-bit gray, RGB,
/// palette (expanded), alpha dropped; gray -> 1 channel, else 3 (RGB).
/// Values scale to [0, 1] (x/255, x/65535), then `options` apply (sRGB
/// decode, black level). Rows must be requested in increasing order; an
/// earlier row reopens the file and decodes up to it. Interlaced (Adam7)
/// PNGs cannot stream and are decoded whole on first use (ReadImage).
/// A truncated or corrupt file gives a one-line error naming it.
Expected<std::unique_ptr<BandReader>> OpenPngBandReader(const std::string& path, const DecodeOptions& options);

/// TIFF decoded scanline by scanline with libtiff (TIFFReadScanline) for
/// strip-organised, chunky (contiguous) 8/16-bit unsigned images with 1..4
/// samples (1-2: Y, 3-4: RGB; extra samples dropped), MinIsBlack or RGB.
/// Anything else (tiles, separate planes, float, palette, YCbCr...) is
/// decoded whole on first use (ReadImage). Same scaling and options as PNG.
Expected<std::unique_ptr<BandReader>> OpenTiffBandReader(const std::string& path, const DecodeOptions& options);

/// Decodes the whole file with OpenCV at open and serves bands from memory
/// (memory cost: one frame). Defined in image_io.cpp.
Expected<std::unique_ptr<BandReader>> OpenWholeImageBandReader(const std::string& path, FileFormat format,
                                                               const DecodeOptions& options);

}  // namespace lumenrig::io
