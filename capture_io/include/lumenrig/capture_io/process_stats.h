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

}  // namespace lumenrig::io
