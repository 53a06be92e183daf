// lumenrig command-line entry point: parses, dispatches to one registered
// subcommand, maps errors to the exit codes of DESIGN.md.
#include <unistd.h>
#include <algorithm>
#include <cstdio>
#include <cstdlib>
#include <exception>

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

}  // namespace lumenrig::cli

int main(int argc, char** argv) {
  using lumenrig::cli::Commands;
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
