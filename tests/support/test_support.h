#pragma once
// Shared helpers for the test suite: temporary folders, running the CLI,
// locating the open datasets under ../shared/data.
#include <string>

namespace lumenrig::test {

/// A fresh empty folder under the system temp dir, removed at destruction.
class TempDir {
 public:
  TempDir();
  ~TempDir();
  const std::string& path() const { return path_; }
  std::string operator/(const std::string& name) const { return path_ + "/" + name; }

 private:
  std::string path_;
};

struct CommandResult {
  int exit_code = -1;
  std::string out;  ///< stdout
  std::string err;  ///< stderr
};

/// Runs the built `lumenrig` CLI with `args` (shell-quoted by the caller).
CommandResult RunCli(const std::string& args);
/// Runs any shell command, capturing stdout/stderr.
CommandResult RunShell(const std::string& command);

/// Absolute folder of an open dataset under ../shared/data, or "" if absent.
std::string SharedDataDir(const std::string& name);

/// Path of Debian's python3 (with h5py/numpy/cv2), e.g. /usr/bin/python3.
std::string Python();

/// Number of files directly inside `dir` (to assert no partial outputs).
int CountFiles(const std::string& dir);

}  // namespace lumenrig::test
