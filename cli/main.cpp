// lumenrig command-line entry point: parses, dispatches to one registered
// subcommand, maps errors to the exit codes of DESIGN.md.
#include <unistd.h>
#include <algorithm>
#include <cstdio>
#include <cstdlib>
#include <exception>
#include <string>

#include <fmt/format.h>

#include "command.h"
#include "lumenrig/capture_io/process_stats.h"

namespace lumenrig::cli {

std::vector<CommandDef>& Commands() {
  static std::vector<CommandDef> commands;
  return commands;
}

int ReportError(const std::string& command, const io::Status& status) {
  fmt::print(stderr, "lumenrig {}: error: {}\n", command, status.message());
  return status.exit_code();
}

bool UseColor() {
  const char* no_color = std::getenv("NO_COLOR");
  if (no_color != nullptr && no_color[0] != '\0') return false;
  return isatty(fileno(stderr)) != 0;
}

bool StderrIsTerminal() { return isatty(fileno(stderr)) != 0; }

std::string TimeAndMemoryLine(double wall_s) {
  return fmt::format("{:.2f} s, peak RSS {:.0f} MiB", wall_s, io::PeakRssMib());
}

/// Large buffers (frame bands, output maps, solver vectors) come from
/// glibc's malloc. Its tunable glibc.malloc.hugetlb=1 (glibc >= 2.35) asks
/// for transparent huge pages on them: a 2048x2048 normals stage took 200k
/// page faults on 4 KiB pages and 33k with it, and its depth solve ran in
/// 1.5 s instead of 2.7 s. Tunables are read at process start only, so the
/// process re-executes itself once with the tunable added. Skipped when the
/// tunable is already set (any value), when LUMENRIG_HUGE_PAGES=0, and when
/// LD_PRELOAD is set (valgrind and profilers preload themselves); a failed
/// exec just carries on.
void AskForHugePages(char** argv) {
#if defined(__linux__) && defined(__GLIBC__)
  const char* opt_out = std::getenv("LUMENRIG_HUGE_PAGES");
  if (opt_out != nullptr && std::string(opt_out) == "0") return;
  const char* tunables = std::getenv("GLIBC_TUNABLES");
  std::string value = tunables != nullptr ? tunables : "";
  if (value.find("glibc.malloc.hugetlb") != std::string::npos) return;
  // Not under a tool that preloads itself (valgrind, heap profilers): the
  // new process could escape it.
  const char* preload = std::getenv("LD_PRELOAD");
  if (preload != nullptr && preload[0] != '\0') return;
  value += (value.empty() ? "" : ":") + std::string("glibc.malloc.hugetlb=1");
  if (setenv("GLIBC_TUNABLES", value.c_str(), 1) != 0) return;
  execv("/proc/self/exe", argv);
  // exec failed (no /proc): run on as we are.
#else
  (void)argv;
#endif
}

}  // namespace lumenrig::cli

int main(int argc, char** argv) {
  using lumenrig::cli::Commands;
  lumenrig::cli::AskForHugePages(argv);
  CLI::App app{
      "lumenrig: checks one-light-at-a-time (OLAT) dome captures and turns them into\n"
      "ground-truth maps and relit training data."};
  app.set_version_flag("--version", std::string("lumenrig ") + LUMENRIG_VERSION);
  app.require_subcommand(1);
  app.fallthrough(false);

  auto& commands = Commands();
  std::stable_sort(commands.begin(), commands.end(), [](const auto& a, const auto& b) { return a.order < b.order; });
  std::vector<std::pair<CLI::App*, std::function<int()>>> runners;
  for (auto& def : commands) {
    CLI::App* sub = app.add_subcommand(def.name, def.description);
    runners.emplace_back(sub, def.setup(sub));
  }

  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    int code = app.exit(e);
    // CLI11 returns 0 for --help/--version; any real usage error is exit 2.
    return code == 0 ? 0 : 2;
  }

  try {
    for (auto& [sub, run] : runners) {
      if (sub->parsed()) return run();
    }
  } catch (const std::exception& e) {
    fmt::print(stderr, "lumenrig: internal error: {}\n", e.what());
    return 3;
  }
  return 2;
}
