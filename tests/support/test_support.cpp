#include "test_support.h"

#include <sys/wait.h>
#include <unistd.h>
#include <array>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>

namespace fs = std::filesystem;

namespace lumenrig::test {

TempDir::TempDir() {
  std::random_device rd;
  for (int attempt = 0; attempt < 100; ++attempt) {
    fs::path p = fs::temp_directory_path() / ("lumenrig-test-" + std::to_string(getpid()) + "-" + std::to_string(rd()));
    std::error_code ec;
    if (fs::create_directory(p, ec)) {
      path_ = p.string();
      return;
    }
  }
  std::abort();
}

TempDir::~TempDir() {
  std::error_code ec;
  if (std::getenv("LUMENRIG_KEEP_TEST_DIRS") == nullptr) fs::remove_all(path_, ec);
}

static std::string Slurp(const std::string& path) {
  std::ifstream in(path);
  std::stringstream ss;
  ss << in.rdbuf();
  return ss.str();
}

CommandResult RunShell(const std::string& command) {
  TempDir scratch;
  std::string out_path = scratch / "out.txt";
  std::string err_path = scratch / "err.txt";
  std::string full = command + " >" + out_path + " 2>" + err_path;
  int raw = std::system(full.c_str());
  CommandResult r;
  r.exit_code = WIFEXITED(raw) ? WEXITSTATUS(raw) : 128 + (WIFSIGNALED(raw) ? WTERMSIG(raw) : 0);
  r.out = Slurp(out_path);
  r.err = Slurp(err_path);
  return r;
}

CommandResult RunCli(const std::string& args) {
  return RunShell(std::string("NO_COLOR=1 ") + LUMENRIG_CLI_PATH + " " + args + " </dev/null");
}

std::string SharedDataDir(const std::string& name) {
  fs::path p = fs::path(LUMENRIG_SHARED_DATA_DIR) / name;
  std::error_code ec;
  if (fs::is_directory(p, ec)) return fs::canonical(p).string();
  return "";
}

std::string Python() { return LUMENRIG_PYTHON; }

int CountFiles(const std::string& dir) {
  int n = 0;
  std::error_code ec;
  for (const auto& e : fs::directory_iterator(dir, ec)) {
    (void)e;
    ++n;
  }
  return n;
}

}  // namespace lumenrig::test
