#pragma once
/// \file process_stats.h
/// Resource figures of the running process, for the time and memory lines
/// the commands print and for `run --stats`.

#include <cstdint>

namespace lumenrig::io {

/// CPU time of the whole process (all threads), seconds.
double ProcessCpuSeconds();

/// Peak resident set size of the process so far, bytes.
int64_t PeakRssBytes();

/// PeakRssBytes() in MiB.
double PeakRssMib();

/// Asks glibc's malloc to serve blocks of up to 1 GiB from its heaps and to
/// keep up to 1 GiB of freed memory instead of returning it to the kernel
/// (mallopt M_MMAP_THRESHOLD and M_TRIM_THRESHOLD). By default every block
/// above 32 MiB (a 2048x2048 RGB float image is 48 MiB) is a fresh mapping
/// whose pages the kernel zeroes on first touch, once per image; this way a
/// freed image's pages are reused as they are. Peak RSS is unchanged (memory
/// is kept, not added); freed memory stays resident until the process ends.
/// Call once at the start of main, before any thread starts. No effect
/// outside glibc.
void ReuseLargeBlocks();

}  // namespace lumenrig::io
