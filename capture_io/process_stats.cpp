#include "lumenrig/capture_io/process_stats.h"

#include <ctime>

#include <sys/resource.h>

namespace lumenrig::io {

double ProcessCpuSeconds() {
  timespec ts{};
  clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
  return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
}

int64_t PeakRssBytes() {
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  return static_cast<int64_t>(ru.ru_maxrss) * 1024;  // ru_maxrss is in KiB on Linux
}

double PeakRssMib() { return static_cast<double>(PeakRssBytes()) / 1048576.0; }

}  // namespace lumenrig::io
