#pragma once
/// \file dome_layout.h
/// Light layouts for simulated rigs.

#include <vector>

#include <Eigen/Core>

namespace lumenrig::synth {

/// `count` unit directions (rig frame, +y up) spread evenly over the part of
/// the sphere above elevation `min_elevation_deg` (-90 = whole sphere, 0 =
/// upper hemisphere) with the Fibonacci (golden-angle) spiral: equal-area
/// bands in y, azimuth advancing by the golden angle.
std::vector<Eigen::Vector3d> FibonacciDome(int count, double min_elevation_deg);

}  // namespace lumenrig::synth
