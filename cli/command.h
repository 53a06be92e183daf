#pragma once
/// \file command.h
/// Subcommand registry: each cmd_*.cpp registers one subcommand with a static
/// `CommandRegistrar`. Options are declared once with their help text (CLI11),
/// so `--help` and usage errors come from the same declarations.

#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include <CLI/CLI.hpp>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::cli {

/// Declares options on `sub` and returns the function that runs the command
/// (returning the process exit code) once parsing succeeded.
using CommandSetup = std::function<std::function<int()>(CLI::App* sub)>;

struct CommandDef {
  std::string name;
  std::string description;
  int order = 100;  ///< position in --help
  CommandSetup setup;
};

std::vector<CommandDef>& Commands();

struct CommandRegistrar {
  explicit CommandRegistrar(CommandDef def) { Commands().push_back(std::move(def)); }
};

/// Prints "lumenrig <command>: error: <message>" on stderr and returns the
/// status's exit code (DESIGN.md: 1 check failed, 2 bad input, 3 internal).
int ReportError(const std::string& command, const io::Status& status);

/// True when stderr is a terminal and NO_COLOR is unset.
bool UseColor();

/// True when stderr is a terminal (progress displays go there).
bool StderrIsTerminal();

/// "3.2 s, peak RSS 812 MiB": the final line every long stage prints.
std::string TimeAndMemoryLine(double wall_s);

}  // namespace lumenrig::cli
