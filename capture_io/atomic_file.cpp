#include "lumenrig/capture_io/atomic_file.h"

#include <fcntl.h>
#include <unistd.h>
#include <atomic>
#include <cerrno>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>

namespace fs = std::filesystem;

namespace lumenrig::io {

namespace {
std::atomic<int> g_temp_counter{0};
}

AtomicFile::AtomicFile(std::string final_path) : final_path_(std::move(final_path)) {
  const fs::path p(final_path_);
  const fs::path dir = p.has_parent_path() ? p.parent_path() : fs::path(".");
  temp_path_ = (dir / ("." + p.filename().string() + ".tmp-" + std::to_string(getpid()) + "-" +
                       std::to_string(g_temp_counter.fetch_add(1))))
                   .string();
}

AtomicFile::~AtomicFile() {
  if (!committed_) std::remove(temp_path_.c_str());
}

Status AtomicFile::Commit() {
  const int fd = ::open(temp_path_.c_str(), O_RDONLY);
  if (fd < 0) return Status::Internal(fmt::format("{}: temporary output vanished before commit", final_path_));
  ::fsync(fd);
  ::close(fd);
  if (std::rename(temp_path_.c_str(), final_path_.c_str()) != 0) {
    return Status::BadInput(
        fmt::format("{}: cannot rename finished output into place: {}", final_path_, std::strerror(errno)));
  }
  committed_ = true;
  return Status::Ok();
}

Status CheckOutputPath(const std::string& path, bool overwrite) {
  std::error_code ec;
  if (fs::exists(path, ec) && !overwrite) {
    return Status::BadInput(fmt::format("{}: output exists; refusing to overwrite (use --force)", path));
  }
  return Status::Ok();
}

Status EnsureDirectory(const std::string& dir) {
  std::error_code ec;
  if (fs::is_directory(dir, ec)) return Status::Ok();
  if (fs::exists(dir, ec)) return Status::BadInput(fmt::format("{}: exists and is not a folder", dir));
  fs::create_directories(dir, ec);
  if (ec) return Status::BadInput(fmt::format("{}: cannot create folder: {}", dir, ec.message()));
  return Status::Ok();
}

Status WriteTextFile(const std::string& path, const std::string& text, bool overwrite) {
  LUMENRIG_RETURN_IF_ERROR(CheckOutputPath(path, overwrite));
  AtomicFile file(path);
  {
    std::ofstream out(file.temp_path(), std::ios::binary);
    if (!out) return Status::BadInput(fmt::format("{}: cannot write: {}", path, std::strerror(errno)));
    out << text;
    out.flush();
    if (!out) return Status::BadInput(fmt::format("{}: write failed (disk full?)", path));
  }
  return file.Commit();
}

Status FirstError(const std::vector<Status>& status) {
  for (const auto& st : status) LUMENRIG_RETURN_IF_ERROR(st);
  return Status::Ok();
}

void RemoveWrittenFiles(const std::vector<std::string>& files, const std::vector<Status>& status) {
  for (size_t i = 0; i < files.size() && i < status.size(); ++i) {
    std::error_code ec;
    if (status[i].ok()) std::filesystem::remove(files[i], ec);
  }
}

}  // namespace lumenrig::io
