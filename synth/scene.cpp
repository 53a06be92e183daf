#include "lumenrig/synth/scene.h"

#include <algorithm>
#include <cmath>
#include <limits>

namespace lumenrig::synth {
namespace {

Primitive Ellipsoid(Eigen::Vector3d centre, Eigen::Vector3d radii, Material material = Material::kPlaster) {
  Primitive p;
  p.kind = Primitive::Kind::kEllipsoid;
  p.centre = centre;
  p.radii = radii;
  p.inv_radii = radii.cwiseInverse();
  p.material = material;
  return p;
}

Primitive CylinderY(double x, double z, double radius, double y_min, double y_max) {
  Primitive p;
  p.kind = Primitive::Kind::kCylinderY;
  p.centre = Eigen::Vector3d(x, 0.5 * (y_min + y_max), z);
  p.radii = Eigen::Vector3d(radius, radius, radius);
  p.inv_radii = p.radii.cwiseInverse();
  p.y_min = y_min;
  p.y_max = y_max;
  return p;
}

// Roots t0 <= t1 of the ray against a primitive's quadric; false if none.
bool QuadricRoots(const Primitive& prim, const Eigen::Vector3d& o, const Eigen::Vector3d& d, double* t0, double* t1) {
  double a, b, c;
  if (prim.kind == Primitive::Kind::kEllipsoid) {
    const Eigen::Vector3d oc = (o - prim.centre).cwiseProduct(prim.inv_radii);
    const Eigen::Vector3d dc = d.cwiseProduct(prim.inv_radii);
    a = dc.squaredNorm();
    b = 2.0 * oc.dot(dc);
    c = oc.squaredNorm() - 1.0;
  } else {
    const double ox = o.x() - prim.centre.x(), oz = o.z() - prim.centre.z();
    a = d.x() * d.x() + d.z() * d.z();
    if (a < 1e-300) return false;
    b = 2.0 * (ox * d.x() + oz * d.z());
    c = ox * ox + oz * oz - prim.radii.x() * prim.radii.x();
  }
  const double disc = b * b - 4.0 * a * c;
  if (disc < 0.0) return false;
  const double sq = std::sqrt(disc);
  // Numerically stable pair (avoids cancellation).
  const double q = -0.5 * (b + std::copysign(sq, b));
  double r0 = q / a;
  double r1 = (q != 0.0) ? c / q : r0;
  if (r0 > r1) std::swap(r0, r1);
  *t0 = r0;
  *t1 = r1;
  return true;
}

bool InYRange(const Primitive& prim, const Eigen::Vector3d& o, const Eigen::Vector3d& d, double t) {
  if (prim.kind != Primitive::Kind::kCylinderY) return true;
  const double y = o.y() + t * d.y();
  return y >= prim.y_min && y <= prim.y_max;
}

Eigen::Vector3d NormalAt(const Primitive& prim, const Eigen::Vector3d& p) {
  if (prim.kind == Primitive::Kind::kEllipsoid) {
    const Eigen::Vector3d r2 = prim.radii.cwiseProduct(prim.radii);
    return (p - prim.centre).cwiseQuotient(r2).normalized();
  }
  return Eigen::Vector3d(p.x() - prim.centre.x(), 0.0, p.z() - prim.centre.z()).normalized();
}

double BoundRadius(const Primitive& prim) {
  if (prim.kind == Primitive::Kind::kEllipsoid) return prim.radii.maxCoeff();
  const double h = 0.5 * (prim.y_max - prim.y_min);
  return std::sqrt(prim.radii.x() * prim.radii.x() + h * h);
}

double SmoothStep(double e0, double e1, double x) {
  const double t = std::clamp((x - e0) / (e1 - e0), 0.0, 1.0);
  return t * t * (3.0 - 2.0 * t);
}

}  // namespace

Scene::Scene(const Eigen::Vector3d& subject_offset_rig, bool with_hair)
    : offset_(subject_offset_rig), with_hair_(with_hair) {
  const Eigen::Vector3d o = subject_offset_rig;
  const Eigen::Vector3d head_c(0.0, 0.10, 0.0), head_r(0.072, 0.095, 0.085);
  primitives_ = {
      Ellipsoid(o + head_c, head_r),                                                                // head
      Ellipsoid(o + Eigen::Vector3d(0.0, 0.083, 0.081), Eigen::Vector3d(0.013, 0.028, 0.022)),      // nose
      Ellipsoid(o + Eigen::Vector3d(0.0, 0.030, 0.040), Eigen::Vector3d(0.030, 0.025, 0.028)),      // chin
      Ellipsoid(o + Eigen::Vector3d(0.0, 0.125, 0.064), Eigen::Vector3d(0.050, 0.014, 0.024)),      // brow
      Ellipsoid(o + Eigen::Vector3d(0.071, 0.095, -0.005), Eigen::Vector3d(0.012, 0.028, 0.018)),   // ear +x
      Ellipsoid(o + Eigen::Vector3d(-0.071, 0.095, -0.005), Eigen::Vector3d(0.012, 0.028, 0.018)),  // ear -x
      CylinderY(o.x(), o.z() - 0.005, 0.042, o.y() - 0.10, o.y() + 0.05),                           // neck
      Ellipsoid(o + Eigen::Vector3d(0.0, -0.19, -0.01), Eigen::Vector3d(0.19, 0.11, 0.095)),        // shoulders
      Ellipsoid(o + kGreySphereCentre, Eigen::Vector3d::Constant(kGreySphereRadius_m), Material::kGreySphere),
  };
  hair_centre_ = o + head_c + Eigen::Vector3d(0.0, 0.008, -0.006);
  hair_radii_ = head_r.cwiseProduct(Eigen::Vector3d(1.12, 1.10, 1.12));

  bound_centre_ = o + Eigen::Vector3d(0.0, -0.05, 0.0);
  bound_radius_ = 0.0;
  for (const auto& p : primitives_) {
    bound_radius_ = std::max(bound_radius_, (p.centre - bound_centre_).norm() + BoundRadius(p));
  }
  bound_radius_ *= 1.001;
}

bool Scene::Intersect(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_min, double t_max,
                      SurfaceHit* hit) const {
  int best = -1;
  double best_t = t_max;
  for (size_t i = 0; i < primitives_.size(); ++i) {
    const Primitive& prim = primitives_[i];
    double t0, t1;
    if (!QuadricRoots(prim, origin, dir, &t0, &t1)) continue;
    // Camera rays start outside every solid, so the entry root is the visible one.
    if (t0 > t_min && t0 < best_t && InYRange(prim, origin, dir, t0)) {
      best_t = t0;
      best = static_cast<int>(i);
    }
  }
  if (best < 0) return false;
  const Primitive& prim = primitives_[best];
  hit->t = best_t;
  hit->position = origin + best_t * dir;
  hit->normal = NormalAt(prim, hit->position);
  hit->material = prim.material;
  hit->primitive = best;
  return true;
}

bool Scene::Occluded(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_min, double t_max) const {
  // Bounding-sphere early out.
  {
    const Eigen::Vector3d oc = origin - bound_centre_;
    const double b = oc.dot(dir);
    const double c = oc.squaredNorm() - bound_radius_ * bound_radius_;
    if (c > 0.0 && (b > 0.0 || b * b - c < 0.0)) return false;
  }
  for (const Primitive& prim : primitives_) {
    double t0, t1;
    if (!QuadricRoots(prim, origin, dir, &t0, &t1)) continue;
    if (t0 > t_min && t0 < t_max && InYRange(prim, origin, dir, t0)) return true;
    if (t1 > t_min && t1 < t_max && InYRange(prim, origin, dir, t1)) return true;
  }
  return false;
}

bool Scene::IntersectHair(const Eigen::Vector3d& origin, const Eigen::Vector3d& dir, double t_max, HairHit* hit) const {
  if (!with_hair_) return false;
  Primitive shell = Ellipsoid(hair_centre_, hair_radii_);
  double t0, t1;
  if (!QuadricRoots(shell, origin, dir, &t0, &t1) || t0 <= 0.0 || t0 >= t_max) return false;
  const Eigen::Vector3d p = origin + t0 * dir;
  const Eigen::Vector3d q = (p - hair_centre_).cwiseQuotient(hair_radii_);
  // Hair covers the crown and the back of the head, with a fringe at the brow.
  const double boundary = 0.42 - 0.55 * std::max(0.0, -q.z());
  const double base = SmoothStep(0.0, 0.30, q.y() - boundary);
  if (base <= 0.0) return false;
  const double phi = std::atan2(q.x(), q.z());
  const double strand = 0.5 + 0.5 * std::sin(140.0 * phi + 9.0 * std::sin(5.0 * q.y() + 2.0 * phi));
  const double coverage = std::min(0.95, base * (0.12 + 0.83 * strand * strand * strand));
  if (coverage <= 1e-4) return false;
  hit->t = t0;
  hit->coverage = coverage;
  hit->position = p;
  hit->normal = NormalAt(shell, p);
  return true;
}

Eigen::Vector3f Scene::Albedo(Material material, const Eigen::Vector3d& position_rig) const {
  switch (material) {
    case Material::kGreySphere: return Eigen::Vector3f::Constant(kGreySphereAlbedo);
    case Material::kHair: return Eigen::Vector3f(0.22f, 0.15f, 0.09f);
    case Material::kPlaster: break;
  }
  // Solid procedural texture attached to the subject (moves with it).
  const Eigen::Vector3d p = position_rig - offset_;
  const double f = 0.5 + 0.5 * std::sin(41.0 * p.x() + 2.5 * std::sin(27.0 * p.y() + 13.0 * p.z())) *
                             std::sin(33.0 * p.z() - 19.0 * p.y() + 1.7 * std::sin(23.0 * p.x()));
  const double tint = 0.5 + 0.5 * std::sin(9.0 * p.x() + 7.0 * p.y());
  const double shade = 0.78 + 0.22 * f;
  return Eigen::Vector3f(static_cast<float>(0.80 * shade * (0.95 + 0.08 * tint)), static_cast<float>(0.76 * shade),
                         static_cast<float>(0.70 * shade * (1.03 - 0.08 * tint)));
}

Eigen::Vector3f BackdropRadiance(Backdrop backdrop, double x, double y) {
  auto wave = [](double v) { return 0.5 + 0.5 * std::sin(v); };
  switch (backdrop) {
    case Backdrop::kBlack: return Eigen::Vector3f::Zero();
    case Backdrop::kStudioWall: {
      // Painted panels with a soft vertical gradient.
      const double panel = std::sin(2.0 * M_PI * x / 0.25) * std::sin(2.0 * M_PI * y / 0.30);
      const double grad = 0.10 * (y + 0.5);
      const double hue = 0.05 * std::sin(7.0 * x + 3.0 * y);
      return Eigen::Vector3f(static_cast<float>(0.30 + 0.08 * panel + grad + hue),
                             static_cast<float>(0.32 + 0.08 * panel + grad),
                             static_cast<float>(0.35 + 0.06 * panel + grad - hue));
    }
    case Backdrop::kMatteA:
      return Eigen::Vector3f(static_cast<float>(0.05 + 0.25 * wave(17.0 * x + 5.0 * y)),
                             static_cast<float>(0.05 + 0.25 * wave(23.0 * y - 7.0 * x + 1.0)),
                             static_cast<float>(0.05 + 0.25 * wave(29.0 * (x + y) + 2.0)));
    case Backdrop::kMatteB:
      return Eigen::Vector3f(static_cast<float>(0.45 + 0.35 * wave(13.0 * y + 11.0 * x + 0.5)),
                             static_cast<float>(0.45 + 0.35 * wave(19.0 * x + 3.0)),
                             static_cast<float>(0.45 + 0.35 * wave(31.0 * y - 17.0 * x + 4.0)));
  }
  return Eigen::Vector3f::Zero();
}

}  // namespace lumenrig::synth
