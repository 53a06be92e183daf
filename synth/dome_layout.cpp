#include "lumenrig/synth/dome_layout.h"

#include <cmath>

namespace lumenrig::synth {

std::vector<Eigen::Vector3d> FibonacciDome(int count, double min_elevation_deg) {
  std::vector<Eigen::Vector3d> dirs;
  if (count <= 0) return dirs;
  dirs.reserve(static_cast<size_t>(count));
  const double y_min = std::sin(min_elevation_deg * M_PI / 180.0);
  const double golden_angle = M_PI * (3.0 - std::sqrt(5.0));
  for (int i = 0; i < count; ++i) {
    // Equal-area: y uniform in [y_min, 1] at band centres.
    const double y = 1.0 - (1.0 - y_min) * (i + 0.5) / count;
    const double r = std::sqrt(std::max(0.0, 1.0 - y * y));
    const double phi = golden_angle * i;
    dirs.emplace_back(r * std::sin(phi), y, r * std::cos(phi));
  }
  return dirs;
}

}  // namespace lumenrig::synth
