#pragma once
// Internal to synth: the take plan shared by SimulateCamera and
// SimulateSession (progress of each frame and the gains faults apply).
#include <string>

#include "lumenrig/synth/simulator.h"

namespace lumenrig::synth::internal {

/// Progress through the take of the OLAT frame at capture index k: k / (N - 1).
double Progress(const SimOptions& options, int light_index);

/// Gain on a light's calibrated intensity for camera `camera_id`'s frame of
/// light `light_id` at progress t: drift, dead (0) and saturated faults.
double OlatGain(const SimOptions& options, const std::string& camera_id, int light_id, double t);

/// Gain on every light at progress t (drift only): tracking frames.
double DriftGain(const SimOptions& options, double t);

/// Sensor seed keys of the frames of one camera.
enum : uint64_t {
  kKeyTrackingBase = 100000,
  kKeyDark = 200000,
  kKeyPlate,
  kKeyBacklit,
  kKeyLit,
  kKeyMattePlateA,
  kKeyMatteFrameA,
  kKeyMattePlateB,
  kKeyMatteFrameB,
};

/// All rig lights with one gain.
std::vector<LitLight> AllLights(const io::Rig& rig, double gain);

}  // namespace lumenrig::synth::internal
