#pragma once
/// \file scene.h
/// The invented "Kestrel Hollow Studio" scene the capture simulator renders:
/// a plaster bust "kh-bust-03" built from smooth analytic primitives
/// (ellipsoids and a cylinder), a thin wispy hair fringe with fractional
/// coverage, and a grey reference sphere of uniform albedo. All geometry is in
/// the rig frame (metres, +y up, subject near the origin).

#include <vector>

#include <Eigen/Core>

namespace lumenrig::synth {

/// Uniform Lambertian albedo of the grey reference sphere (all channels).
inline constexpr float kGreySphereAlbedo = 0.5f;

/// Grey reference sphere: centre (rig frame, metres) and radius.
inline const Eigen::Vector3d kGreySphereCentre{0.19, -0.02, 0.08};
inline constexpr double kGreySphereRadius_m = 0.05;

enum class Material { kPlaster, kGreySphere, kHair };

/// An axis-aligned ellipsoid or a y-axis cylinder (uncapped, finite in y).
struct Primitive {
  enum class Kind { kEllipsoid, kCylinderY };
  Kind kind = Kind::kEllipsoid;
  Eigen::Vector3d centre = Eigen::Vector3d::Zero();     ///< cylinder: x,z of the axis
  Eigen::Vector3d radii = Eigen::Vector3d::Ones();      ///< cylinder: radii.x() is the radius
  Eigen::Vector3d inv_radii = Eigen::Vector3d::Ones();  ///< 1 / radii (set by the scene)
  double y_min = 0, y_max = 0;                          ///< cylinder extent in y
  Material material = Material::kPlaster;
};

/// A ray hit on a solid surface.
struct SurfaceHit {
  double t = 0;              ///< ray parameter (ray direction is unit: metres)
  Eigen::Vector3d position;  ///< rig frame, metres
  Eigen::Vector3d normal;    ///< unit outward normal, rig frame
  Material material = Material::kPlaster;
  int primitive = -1;  ///< index into Scene::primitives()
};

/// A ray crossing the hair shell: coverage in [0, 1) and the shell point.
struct HairHit {
  double t = 0;
  double coverage = 0;
  Eigen::Vector3d position;
  Eigen::Vector3d normal;
};

class Scene {
 public:
  /// The Kestrel Hollow scene with the subject translated by `subject_offset_rig`
  /// (metres; used for the subject-motion fault). The grey sphere moves with it.
  explicit Scene(const Eigen::Vector3d& subject_offset_rig = Eigen::Vector3d::Zero(), bool with_hair = true);

  /// Nearest solid hit with t in (t_min, t_max); false when none.
  bool Intersect(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_min, double t_max,
                 SurfaceHit* hit) const;
  /// True when any solid blocks the segment origin + t dir, t in (t_min, t_max).
  bool Occluded(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_min, double t_max) const;
  /// Entry point of the hair shell before t_max with non-zero coverage.
  bool IntersectHair(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_max, HairHit* hit) const;

  /// Spatially varying diffuse albedo (linear RGB, 0..1) at a rig-frame point.
  Eigen::Vector3f Albedo(Material material, const Eigen::Vector3d& position_rig) const;

  const std::vector<Primitive>& primitives() const { return primitives_; }
  const Eigen::Vector3d& subject_offset() const { return offset_; }

 private:
  std::vector<Primitive> primitives_;
  Eigen::Vector3d offset_;
  bool with_hair_;
  Eigen::Vector3d hair_centre_, hair_radii_;
  Eigen::Vector3d bound_centre_;  ///< bounding sphere of all solids
  double bound_radius_ = 0;
};

/// Backdrop behind the subject as seen by a camera (a plane facing it).
enum class Backdrop {
  kBlack,       ///< unlit (OLAT, tracking, dark frames)
  kStudioWall,  ///< the lit studio wall: clean plate, backlit, lit frames
  kMatteA,      ///< first matting plate: every channel in [0.05, 0.30]
  kMatteB,      ///< second matting plate: every channel in [0.45, 0.80]
};

/// Emitted radiance of a backdrop at plane coordinates (x, y) in metres
/// (camera frame units on the backdrop plane).
Eigen::Vector3f BackdropRadiance(Backdrop backdrop, double x_m, double y_m);

}  // namespace lumenrig::synth
