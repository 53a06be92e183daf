#pragma once
/// \file session.h
/// Session manifest (`session.json`, format `lumenrig.session/1`) and rig
/// calibration (`rig.json`, format `lumenrig.rig/1`), per shared DESIGN.md and
/// docs/formats.md. Loading validates everything that can be checked without
/// decoding pixels and reports the first problem as a one-line Status naming
/// the file, the JSON path and the problem.

#include <optional>
#include <string>
#include <vector>

#include <Eigen/Core>
#include <nlohmann/json.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

inline constexpr const char* kSessionFormat = "lumenrig.session/1";
inline constexpr const char* kRigFormat = "lumenrig.rig/1";

/// One light of the rig. Exactly one of `direction` (unit, rig frame, from the
/// subject toward the light) or `position` (metres, rig frame) is set.
struct Light {
  int id = -1;
  std::optional<Eigen::Vector3d> direction;
  std::optional<Eigen::Vector3d> position;
  Eigen::Vector3d intensity{1.0, 1.0, 1.0};  ///< linear RGB; frames are divided by it
  std::optional<double> solid_angle_sr;      ///< share of the sphere for relighting
};

struct Rig {
  std::string name;
  std::string path;  ///< absolute path of rig.json it was loaded from (may be empty)
  std::vector<Light> lights;

  /// Index into `lights` of the light with this id, or -1.
  int IndexOfId(int id) const;
  /// True when every light has a direction (distant-light rig).
  bool AllDirectional() const;
};

/// Pinhole intrinsics in pixels; (cx, cy) from the top-left pixel corner.
struct Intrinsics {
  double fx = 0, fy = 0, cx = 0, cy = 0;
};

struct OlatFrame {
  int light = -1;    ///< lights[].id in the rig
  std::string path;  ///< absolute path (resolved, checked inside the session folder)
};

struct TrackingFrame {
  int after_light = -1;  ///< captured right after this light's OLAT frame
  std::string path;      ///< absolute path
};

/// Subject over a known background, for Smith-Blinn triangulation matting:
/// `plate` is the empty background, `frame` the subject in front of it, both
/// under the same illumination (docs/formats.md, key `matte_pairs`).
struct MattePair {
  std::string plate;
  std::string frame;
};

struct Camera {
  std::string id;
  std::optional<Intrinsics> intrinsics;
  Eigen::Matrix4d camera_from_rig = Eigen::Matrix4d::Identity();
  bool has_camera_from_rig = false;
  std::vector<OlatFrame> olat;
  // Optional frames; empty string = absent. All absolute paths.
  std::string dark;
  std::string clean_plate;
  std::string backlit;
  std::string lit;   ///< fully lit subject (docs/formats.md); optional
  std::string mask;  ///< non-zero = subject
  std::vector<TrackingFrame> tracking;
  std::vector<MattePair> matte_pairs;  ///< two or more for triangulation

  /// Rotation part of camera_from_rig (maps rig directions to camera directions).
  Eigen::Matrix3d RotationCameraFromRig() const { return camera_from_rig.topLeftCorner<3, 3>(); }
};

enum class Encoding { kLinear, kSrgb };

struct Session {
  std::string format = kSessionFormat;
  std::string subject;
  std::string dir;       ///< absolute folder holding session.json
  std::string path;      ///< absolute path of session.json
  std::string rig_file;  ///< the `rig` value as written (relative)
  Rig rig;
  Encoding encoding = Encoding::kLinear;
  double black_level = 0.0;  ///< in the file's normalised units [0,1]
  std::vector<Camera> cameras;

  /// Camera with this id, or nullptr.
  const Camera* FindCamera(const std::string& id) const;
  /// Session id used in output names: `subject` if set, else the folder name.
  std::string Id() const;
};

/// Parses and validates a rig calibration file.
Expected<Rig> LoadRig(const std::string& rig_json_path);
/// Validates an in-memory rig; `source` names the file in messages.
Status ValidateRig(const nlohmann::json& j, const std::string& source);

struct LoadOptions {
  /// When true (default) every referenced file must exist. The session check
  /// sets it to false so that a missing frame becomes a reported FAIL.
  bool require_files = true;
};

/// Loads `session.json` (or a folder containing it) and its rig. Checks keys,
/// types, light ids against the rig, duplicate slots, paths staying inside the
/// session folder and existing on disk. Does not decode images.
Expected<Session> LoadSession(const std::string& session_path_or_dir, const LoadOptions& options = {});

/// Serialises a session/rig back to JSON (paths made relative to session.dir).
nlohmann::json SessionToJson(const Session& session);
nlohmann::json RigToJson(const Rig& rig);

/// Light direction in the camera frame for a camera and a scene point
/// (camera frame, metres). For a distant light this is R * direction; for a
/// near-field light the unit vector from the point to the light position.
Eigen::Vector3d LightDirectionInCamera(const Light& light, const Camera& camera,
                                       const Eigen::Vector3d& point_camera = Eigen::Vector3d::Zero());

}  // namespace lumenrig::io
