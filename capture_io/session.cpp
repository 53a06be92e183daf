#include "lumenrig/capture_io/session.h"

#include <cmath>
#include <filesystem>
#include <fstream>
#include <set>
#include <sstream>

#include <Eigen/Dense>

namespace fs = std::filesystem;
using nlohmann::json;

namespace lumenrig::io {

namespace {

/// Produces "file: path: problem" messages while walking a JSON document.
class JsonContext {
 public:
  explicit JsonContext(std::string file) : file_(std::move(file)) {}
  Status Error(const std::string& where, const std::string& problem) const {
    if (where.empty()) return Status::BadInput(fmt::format("{}: {}", file_, problem));
    return Status::BadInput(fmt::format("{}: {}: {}", file_, where, problem));
  }
  const std::string& file() const { return file_; }

 private:
  std::string file_;
};

const char* TypeName(const json& j) {
  if (j.is_null()) return "null";
  if (j.is_boolean()) return "a boolean";
  if (j.is_number()) return "a number";
  if (j.is_string()) return "a string";
  if (j.is_array()) return "an array";
  return "an object";
}

Expected<json> ReadJsonFile(const std::string& path) {
  std::error_code ec;
  if (!fs::exists(path, ec)) return Status::BadInput(fmt::format("{}: file not found", path));
  if (fs::is_directory(path, ec)) return Status::BadInput(fmt::format("{}: is a folder, expected a JSON file", path));
  std::ifstream in(path, std::ios::binary);
  if (!in) return Status::BadInput(fmt::format("{}: cannot open for reading", path));
  std::stringstream ss;
  ss << in.rdbuf();
  try {
    return json::parse(ss.str());
  } catch (const json::parse_error& e) {
    return Status::BadInput(fmt::format("{}: invalid JSON at byte {}", path, e.byte));
  }
}

Status RequireString(const JsonContext& ctx, const json& obj, const std::string& key, const std::string& where,
                     bool required, std::string* out) {
  const std::string at = where.empty() ? key : where + "." + key;
  if (!obj.contains(key)) {
    if (required) return ctx.Error(at, "missing required key");
    return Status::Ok();
  }
  const json& v = obj.at(key);
  if (!v.is_string()) return ctx.Error(at, fmt::format("expected a string, found {}", TypeName(v)));
  *out = v.get<std::string>();
  return Status::Ok();
}

Status ReadFiniteNumber(const JsonContext& ctx, const json& v, const std::string& at, double* out) {
  if (v.is_null()) return ctx.Error(at, "not a number (null or NaN)");
  if (!v.is_number()) return ctx.Error(at, fmt::format("expected a number, found {}", TypeName(v)));
  const double d = v.get<double>();
  if (!std::isfinite(d)) return ctx.Error(at, "not a finite number");
  *out = d;
  return Status::Ok();
}

Status ReadVector3(const JsonContext& ctx, const json& v, const std::string& at, Eigen::Vector3d* out) {
  if (!v.is_array() || v.size() != 3)
    return ctx.Error(at, fmt::format("expected an array of 3 numbers, found {}",
                                     v.is_array() ? fmt::format("{} elements", v.size()) : TypeName(v)));
  for (int i = 0; i < 3; ++i) {
    LUMENRIG_RETURN_IF_ERROR(
        ReadFiniteNumber(ctx, v[static_cast<size_t>(i)], fmt::format("{}[{}]", at, i), &(*out)(i)));
  }
  return Status::Ok();
}

Status ReadInt(const JsonContext& ctx, const json& obj, const std::string& key, const std::string& where, int* out) {
  const std::string at = where + "." + key;
  if (!obj.contains(key)) return ctx.Error(at, "missing required key");
  const json& v = obj.at(key);
  if (!v.is_number_integer()) return ctx.Error(at, fmt::format("expected an integer, found {}", TypeName(v)));
  *out = v.get<int>();
  return Status::Ok();
}

Status CheckFormat(const JsonContext& ctx, const json& j, const char* expected) {
  std::string format;
  LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, j, "format", "", true, &format));
  if (format != expected)
    return ctx.Error("format", fmt::format("unsupported format \"{}\" (expected \"{}\")", format, expected));
  return Status::Ok();
}

/// Resolves a path written in the session relative to `base_dir`, refusing
/// absolute paths and paths that climb out of the folder.
Status ResolveInside(const JsonContext& ctx, const std::string& base_dir, const std::string& rel, const std::string& at,
                     bool require_exists, std::string* out) {
  if (rel.empty()) return ctx.Error(at, "empty path");
  const fs::path p(rel);
  if (p.is_absolute())
    return ctx.Error(at, fmt::format("path \"{}\" is absolute; paths must be relative to the session folder", rel));
  const fs::path normal = p.lexically_normal();
  if (!normal.empty() && *normal.begin() == "..")
    return ctx.Error(at, fmt::format("path \"{}\" escapes the session folder", rel));
  const fs::path full = fs::path(base_dir) / normal;
  std::error_code ec;
  if (require_exists && !fs::exists(full, ec)) return ctx.Error(at, fmt::format("file not found: {}", full.string()));
  *out = full.string();
  return Status::Ok();
}

Status ParseLight(const JsonContext& ctx, const json& jl, const std::string& at, Light* light) {
  if (!jl.is_object()) return ctx.Error(at, fmt::format("expected an object, found {}", TypeName(jl)));
  LUMENRIG_RETURN_IF_ERROR(ReadInt(ctx, jl, "id", at, &light->id));
  const bool has_dir = jl.contains("direction");
  const bool has_pos = jl.contains("position");
  if (has_dir == has_pos) return ctx.Error(at, "needs exactly one of \"direction\" or \"position\"");
  if (has_dir) {
    Eigen::Vector3d d;
    LUMENRIG_RETURN_IF_ERROR(ReadVector3(ctx, jl.at("direction"), at + ".direction", &d));
    const double n = d.norm();
    if (n < 1e-9) return ctx.Error(at + ".direction", "zero vector");
    // Tolerance for unit length: 1e-3 relative (common practice for
    // directions stored with ~4-6 decimals).
    if (std::abs(n - 1.0) > 1e-3)
      return ctx.Error(at + ".direction", fmt::format("not a unit vector (length {:.6f})", n));
    light->direction = d / n;
  } else {
    Eigen::Vector3d p;
    LUMENRIG_RETURN_IF_ERROR(ReadVector3(ctx, jl.at("position"), at + ".position", &p));
    light->position = p;
  }
  if (!jl.contains("intensity")) return ctx.Error(at + ".intensity", "missing required key");
  Eigen::Vector3d intensity;
  LUMENRIG_RETURN_IF_ERROR(ReadVector3(ctx, jl.at("intensity"), at + ".intensity", &intensity));
  for (int c = 0; c < 3; ++c) {
    if (intensity(c) < 0) return ctx.Error(fmt::format("{}.intensity[{}]", at, c), "negative intensity");
    if (intensity(c) == 0)
      return ctx.Error(fmt::format("{}.intensity[{}]", at, c), "zero intensity (frames are divided by it)");
  }
  light->intensity = intensity;
  if (jl.contains("solid_angle_sr")) {
    double sr = 0;
    LUMENRIG_RETURN_IF_ERROR(ReadFiniteNumber(ctx, jl.at("solid_angle_sr"), at + ".solid_angle_sr", &sr));
    if (sr <= 0 || sr > 4 * M_PI) return ctx.Error(at + ".solid_angle_sr", "must be in (0, 4*pi]");
    light->solid_angle_sr = sr;
  }
  return Status::Ok();
}

Expected<Rig> ParseRig(const json& j, const std::string& source) {
  JsonContext ctx(source);
  if (!j.is_object()) return ctx.Error("", "expected a JSON object at the top level");
  LUMENRIG_RETURN_IF_ERROR(CheckFormat(ctx, j, kRigFormat));
  Rig rig;
  rig.path = source;
  LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, j, "name", "", false, &rig.name));
  if (!j.contains("lights")) return ctx.Error("lights", "missing required key");
  const json& lights = j.at("lights");
  if (!lights.is_array()) return ctx.Error("lights", fmt::format("expected an array, found {}", TypeName(lights)));
  if (lights.empty()) return ctx.Error("lights", "no lights");
  std::set<int> ids;
  for (size_t i = 0; i < lights.size(); ++i) {
    Light light;
    const std::string at = fmt::format("lights[{}]", i);
    LUMENRIG_RETURN_IF_ERROR(ParseLight(ctx, lights[i], at, &light));
    if (!ids.insert(light.id).second) return ctx.Error(at + ".id", fmt::format("duplicate light id {}", light.id));
    rig.lights.push_back(light);
  }
  return rig;
}

Status ParseIntrinsics(const JsonContext& ctx, const json& v, const std::string& at, Intrinsics* k) {
  if (!v.is_object()) return ctx.Error(at, fmt::format("expected an object, found {}", TypeName(v)));
  double* fields[4] = {&k->fx, &k->fy, &k->cx, &k->cy};
  const char* names[4] = {"fx", "fy", "cx", "cy"};
  for (int i = 0; i < 4; ++i) {
    if (!v.contains(names[i])) return ctx.Error(at + "." + names[i], "missing required key");
    LUMENRIG_RETURN_IF_ERROR(ReadFiniteNumber(ctx, v.at(names[i]), at + "." + names[i], fields[i]));
  }
  if (k->fx <= 0) return ctx.Error(at + ".fx", "focal length must be positive");
  if (k->fy <= 0) return ctx.Error(at + ".fy", "focal length must be positive");
  return Status::Ok();
}

Status ParseTransform(const JsonContext& ctx, const json& v, const std::string& at, Eigen::Matrix4d* m) {
  if (!v.is_array() || v.size() != 4) return ctx.Error(at, "expected a 4x4 array of numbers");
  for (int r = 0; r < 4; ++r) {
    const json& row = v[static_cast<size_t>(r)];
    if (!row.is_array() || row.size() != 4) return ctx.Error(fmt::format("{}[{}]", at, r), "expected 4 numbers");
    for (int c = 0; c < 4; ++c)
      LUMENRIG_RETURN_IF_ERROR(
          ReadFiniteNumber(ctx, row[static_cast<size_t>(c)], fmt::format("{}[{}][{}]", at, r, c), &(*m)(r, c)));
  }
  const Eigen::Matrix3d rot = m->topLeftCorner<3, 3>();
  // Rigid transform check: orthonormal rotation with det +1 and a last row of
  // (0,0,0,1); 1e-4 tolerance is common practice for 6-decimal storage.
  if ((rot.transpose() * rot - Eigen::Matrix3d::Identity()).cwiseAbs().maxCoeff() > 1e-4 || rot.determinant() < 0)
    return ctx.Error(at, "rotation part is not orthonormal with determinant +1 (not a rigid transform)");
  if ((m->row(3) - Eigen::RowVector4d(0, 0, 0, 1)).cwiseAbs().maxCoeff() > 1e-9)
    return ctx.Error(at, "last row must be [0,0,0,1]");
  return Status::Ok();
}

}  // namespace

int Rig::IndexOfId(int id) const {
  for (size_t i = 0; i < lights.size(); ++i)
    if (lights[i].id == id) return static_cast<int>(i);
  return -1;
}

bool Rig::AllDirectional() const {
  for (const auto& l : lights)
    if (!l.direction) return false;
  return true;
}

const Camera* Session::FindCamera(const std::string& camera_id) const {
  for (const auto& c : cameras)
    if (c.id == camera_id) return &c;
  return nullptr;
}

std::string Session::Id() const {
  if (!subject.empty()) return subject;
  return fs::path(dir).filename().string();
}

Status ValidateRig(const json& j, const std::string& source) { return ParseRig(j, source).status(); }

Expected<Rig> LoadRig(const std::string& rig_json_path) {
  auto j = ReadJsonFile(rig_json_path);
  if (!j.ok()) return j.status();
  std::error_code ec;
  return ParseRig(*j, fs::absolute(rig_json_path, ec).string());
}

Expected<Session> LoadSession(const std::string& session_path_or_dir, const LoadOptions& options) {
  std::error_code ec;
  fs::path path(session_path_or_dir);
  if (fs::is_directory(path, ec)) path /= "session.json";
  path = fs::absolute(path, ec).lexically_normal();
  auto parsed = ReadJsonFile(path.string());
  if (!parsed.ok()) {
    // A frame or another file given where the session goes.
    if (fs::is_regular_file(path, ec) && path.extension() != ".json")
      return Status::BadInput(
          fmt::format("{}: not a session (expected a session folder or its session.json)", path.string()));
    return parsed.status();
  }
  const json& j = *parsed;
  JsonContext ctx(path.string());
  if (!j.is_object()) return ctx.Error("", "expected a JSON object at the top level");
  LUMENRIG_RETURN_IF_ERROR(CheckFormat(ctx, j, kSessionFormat));

  Session s;
  s.path = path.string();
  s.dir = path.parent_path().string();
  LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, j, "subject", "", false, &s.subject));

  // Rig.
  LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, j, "rig", "", true, &s.rig_file));
  std::string rig_path;
  LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, s.rig_file, "rig", true, &rig_path));
  auto rig = LoadRig(rig_path);
  if (!rig.ok()) return rig.status();
  s.rig = std::move(rig).value();

  // Encoding and black level.
  std::string encoding = "linear";
  LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, j, "encoding", "", false, &encoding));
  if (encoding == "linear") {
    s.encoding = Encoding::kLinear;
  } else if (encoding == "srgb") {
    s.encoding = Encoding::kSrgb;
  } else {
    return ctx.Error("encoding", fmt::format("unknown encoding \"{}\" (expected \"linear\" or \"srgb\")", encoding));
  }
  if (j.contains("black_level")) {
    LUMENRIG_RETURN_IF_ERROR(ReadFiniteNumber(ctx, j.at("black_level"), "black_level", &s.black_level));
    if (s.black_level < 0 || s.black_level >= 1) return ctx.Error("black_level", "must be in [0, 1)");
  }

  // Cameras.
  if (!j.contains("cameras")) return ctx.Error("cameras", "missing required key");
  const json& cams = j.at("cameras");
  if (!cams.is_array()) return ctx.Error("cameras", fmt::format("expected an array, found {}", TypeName(cams)));
  if (cams.empty()) return ctx.Error("cameras", "no cameras");
  std::set<std::string> camera_ids;
  const bool must_exist = options.require_files;
  for (size_t ci = 0; ci < cams.size(); ++ci) {
    const json& jc = cams[ci];
    const std::string at = fmt::format("cameras[{}]", ci);
    if (!jc.is_object()) return ctx.Error(at, fmt::format("expected an object, found {}", TypeName(jc)));
    Camera cam;
    LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, jc, "id", at, true, &cam.id));
    if (cam.id.empty()) return ctx.Error(at + ".id", "empty camera id");
    if (!camera_ids.insert(cam.id).second)
      return ctx.Error(at + ".id", fmt::format("duplicate camera id \"{}\"", cam.id));
    if (jc.contains("intrinsics")) {
      Intrinsics k;
      LUMENRIG_RETURN_IF_ERROR(ParseIntrinsics(ctx, jc.at("intrinsics"), at + ".intrinsics", &k));
      cam.intrinsics = k;
    }
    if (jc.contains("camera_from_rig")) {
      LUMENRIG_RETURN_IF_ERROR(
          ParseTransform(ctx, jc.at("camera_from_rig"), at + ".camera_from_rig", &cam.camera_from_rig));
      cam.has_camera_from_rig = true;
    }
    // OLAT frames.
    if (!jc.contains("olat")) return ctx.Error(at + ".olat", "missing required key");
    const json& olat = jc.at("olat");
    if (!olat.is_array()) return ctx.Error(at + ".olat", fmt::format("expected an array, found {}", TypeName(olat)));
    if (olat.empty()) return ctx.Error(at + ".olat", "no OLAT frames");
    std::set<int> slots;
    for (size_t k = 0; k < olat.size(); ++k) {
      const std::string fat = fmt::format("{}.olat[{}]", at, k);
      const json& jf = olat[k];
      if (!jf.is_object()) return ctx.Error(fat, fmt::format("expected an object, found {}", TypeName(jf)));
      OlatFrame f;
      LUMENRIG_RETURN_IF_ERROR(ReadInt(ctx, jf, "light", fat, &f.light));
      if (s.rig.IndexOfId(f.light) < 0)
        return ctx.Error(fat + ".light", fmt::format("unknown light id {} (not in {})", f.light, s.rig_file));
      if (!slots.insert(f.light).second)
        return ctx.Error(fat + ".light", fmt::format("duplicate OLAT slot for light {}", f.light));
      std::string rel;
      LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, jf, "path", fat, true, &rel));
      LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, rel, fat + ".path", must_exist, &f.path));
      cam.olat.push_back(f);
    }
    // Optional single frames.
    struct Single {
      const char* key;
      std::string* dst;
    } singles[] = {{"dark", &cam.dark},
                   {"clean_plate", &cam.clean_plate},
                   {"backlit", &cam.backlit},
                   {"lit", &cam.lit},
                   {"mask", &cam.mask}};
    for (const auto& single : singles) {
      std::string rel;
      LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, jc, single.key, at, false, &rel));
      if (!rel.empty())
        LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, rel, at + "." + single.key, must_exist, single.dst));
    }
    // Tracking frames.
    if (jc.contains("tracking")) {
      const json& tr = jc.at("tracking");
      if (!tr.is_array()) return ctx.Error(at + ".tracking", fmt::format("expected an array, found {}", TypeName(tr)));
      for (size_t k = 0; k < tr.size(); ++k) {
        const std::string tat = fmt::format("{}.tracking[{}]", at, k);
        if (!tr[k].is_object()) return ctx.Error(tat, fmt::format("expected an object, found {}", TypeName(tr[k])));
        TrackingFrame t;
        LUMENRIG_RETURN_IF_ERROR(ReadInt(ctx, tr[k], "after_light", tat, &t.after_light));
        if (s.rig.IndexOfId(t.after_light) < 0)
          return ctx.Error(tat + ".after_light", fmt::format("unknown light id {}", t.after_light));
        std::string rel;
        LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, tr[k], "path", tat, true, &rel));
        LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, rel, tat + ".path", must_exist, &t.path));
        cam.tracking.push_back(t);
      }
    }
    // Matte pairs (triangulation matting).
    if (jc.contains("matte_pairs")) {
      const json& mp = jc.at("matte_pairs");
      if (!mp.is_array())
        return ctx.Error(at + ".matte_pairs", fmt::format("expected an array, found {}", TypeName(mp)));
      for (size_t k = 0; k < mp.size(); ++k) {
        const std::string pat = fmt::format("{}.matte_pairs[{}]", at, k);
        if (!mp[k].is_object()) return ctx.Error(pat, fmt::format("expected an object, found {}", TypeName(mp[k])));
        MattePair pair;
        std::string plate, frame;
        LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, mp[k], "plate", pat, true, &plate));
        LUMENRIG_RETURN_IF_ERROR(RequireString(ctx, mp[k], "frame", pat, true, &frame));
        LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, plate, pat + ".plate", must_exist, &pair.plate));
        LUMENRIG_RETURN_IF_ERROR(ResolveInside(ctx, s.dir, frame, pat + ".frame", must_exist, &pair.frame));
        cam.matte_pairs.push_back(pair);
      }
    }
    s.cameras.push_back(std::move(cam));
  }
  return s;
}

namespace {
std::string RelativeTo(const std::string& dir, const std::string& path) {
  if (path.empty()) return path;
  return fs::path(path).lexically_relative(dir).generic_string();
}
json Vec3(const Eigen::Vector3d& v) { return json::array({v(0), v(1), v(2)}); }
}  // namespace

json RigToJson(const Rig& rig) {
  json j;
  j["format"] = kRigFormat;
  if (!rig.name.empty()) j["name"] = rig.name;
  json lights = json::array();
  for (const auto& l : rig.lights) {
    json jl;
    jl["id"] = l.id;
    if (l.direction) jl["direction"] = Vec3(*l.direction);
    if (l.position) jl["position"] = Vec3(*l.position);
    jl["intensity"] = Vec3(l.intensity);
    if (l.solid_angle_sr) jl["solid_angle_sr"] = *l.solid_angle_sr;
    lights.push_back(jl);
  }
  j["lights"] = lights;
  return j;
}

json SessionToJson(const Session& s) {
  json j;
  j["format"] = kSessionFormat;
  if (!s.subject.empty()) j["subject"] = s.subject;
  j["rig"] = s.rig_file;
  j["encoding"] = s.encoding == Encoding::kSrgb ? "srgb" : "linear";
  j["black_level"] = s.black_level;
  json cams = json::array();
  for (const auto& c : s.cameras) {
    json jc;
    jc["id"] = c.id;
    if (c.intrinsics) {
      jc["intrinsics"] = {
          {"fx", c.intrinsics->fx}, {"fy", c.intrinsics->fy}, {"cx", c.intrinsics->cx}, {"cy", c.intrinsics->cy}};
    }
    if (c.has_camera_from_rig) {
      json m = json::array();
      for (int r = 0; r < 4; ++r)
        m.push_back(json::array(
            {c.camera_from_rig(r, 0), c.camera_from_rig(r, 1), c.camera_from_rig(r, 2), c.camera_from_rig(r, 3)}));
      jc["camera_from_rig"] = m;
    }
    json olat = json::array();
    for (const auto& f : c.olat) olat.push_back({{"light", f.light}, {"path", RelativeTo(s.dir, f.path)}});
    jc["olat"] = olat;
    if (!c.dark.empty()) jc["dark"] = RelativeTo(s.dir, c.dark);
    if (!c.clean_plate.empty()) jc["clean_plate"] = RelativeTo(s.dir, c.clean_plate);
    if (!c.backlit.empty()) jc["backlit"] = RelativeTo(s.dir, c.backlit);
    if (!c.lit.empty()) jc["lit"] = RelativeTo(s.dir, c.lit);
    if (!c.tracking.empty()) {
      json tr = json::array();
      for (const auto& t : c.tracking)
        tr.push_back({{"after_light", t.after_light}, {"path", RelativeTo(s.dir, t.path)}});
      jc["tracking"] = tr;
    }
    if (!c.mask.empty()) jc["mask"] = RelativeTo(s.dir, c.mask);
    if (!c.matte_pairs.empty()) {
      json mp = json::array();
      for (const auto& p : c.matte_pairs)
        mp.push_back({{"plate", RelativeTo(s.dir, p.plate)}, {"frame", RelativeTo(s.dir, p.frame)}});
      jc["matte_pairs"] = mp;
    }
    cams.push_back(jc);
  }
  j["cameras"] = cams;
  return j;
}

Eigen::Vector3d LightDirectionInCamera(const Light& light, const Camera& camera, const Eigen::Vector3d& point_camera) {
  if (light.direction) return (camera.RotationCameraFromRig() * *light.direction).normalized();
  const Eigen::Vector4d p_rig(light.position->x(), light.position->y(), light.position->z(), 1.0);
  const Eigen::Vector3d p_cam = (camera.camera_from_rig * p_rig).head<3>();
  return (p_cam - point_camera).normalized();
}

}  // namespace lumenrig::io
