// `lumenrig check SESSION`: the technician's verdict on a take.
#include <unistd.h>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>

#include "command.h"
#include "lumenrig/capture_io/atomic_file.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/session_check.h"

namespace lumenrig::cli {
namespace {

struct CheckArgs {
  std::string session;
  std::string out_dir;
  std::string json_path;
  std::string report_dir;
  std::vector<std::string> thresholds;
  std::string thresholds_file;
  bool force = false;
  bool list = false;
  int threads = 0;
  int max_findings = 8;
};

const char* Colour(solvers::Verdict v) {
  switch (v) {
    case solvers::Verdict::kPass: return "\033[32m";
    case solvers::Verdict::kSkip: return "\033[90m";
    case solvers::Verdict::kWarn: return "\033[33m";
    case solvers::Verdict::kFail: return "\033[31;1m";
  }
  return "";
}

int ListThresholds() {
  solvers::CheckOptions defaults;
  for (const auto& spec : solvers::ThresholdTable())
    fmt::print("{:<36} {:>10} {:<12} {} [{}]\n", spec.key, defaults.*spec.field, spec.unit, spec.description,
               spec.source);
  return 0;
}

int Run(CheckArgs args) {
  const auto start = std::chrono::steady_clock::now();
  if (args.list) return ListThresholds();
  // --out DIR: both outputs into one folder, as the other commands do.
  if (!args.out_dir.empty()) {
    if (args.json_path.empty()) args.json_path = (std::filesystem::path(args.out_dir) / "check.json").string();
    if (args.report_dir.empty()) args.report_dir = args.out_dir;
  }
  if (args.session.empty()) return ReportError("check", io::Status::BadInput("SESSION is required"));

  solvers::CheckOptions options;
  if (!args.thresholds_file.empty()) {
    std::ifstream in(args.thresholds_file);
    if (!in) return ReportError("check", io::Status::BadInput(fmt::format("{}: cannot open", args.thresholds_file)));
    nlohmann::json j = nlohmann::json::parse(in, nullptr, false);
    if (j.is_discarded())
      return ReportError("check", io::Status::BadInput(fmt::format("{}: not valid JSON", args.thresholds_file)));
    if (auto st = solvers::SetThresholds(j, args.thresholds_file, &options); !st.ok()) return ReportError("check", st);
  }
  for (const auto& kv : args.thresholds)
    if (auto st = solvers::SetThreshold(kv, &options); !st.ok()) return ReportError("check", st);
  if (auto st = options.Validate(); !st.ok()) return ReportError("check", st);

  // Refuse to clobber outputs before any work (no partial output on bad input).
  const std::string html_path = args.report_dir.empty() ? "" : args.report_dir + "/check_report.html";
  if (!args.json_path.empty()) {
    if (auto st = io::CheckOutputPath(args.json_path, args.force); !st.ok()) return ReportError("check", st);
    const std::string parent = std::filesystem::path(args.json_path).parent_path().string();
    if (!parent.empty())
      if (auto st = io::EnsureDirectory(parent); !st.ok()) return ReportError("check", st);
  }
  if (!html_path.empty())
    if (auto st = io::CheckOutputPath(html_path, args.force); !st.ok()) return ReportError("check", st);

  io::LoadOptions load;
  load.require_files = false;  // a missing frame is a FAIL of the completeness check, not bad input
  auto session = io::LoadSession(args.session, load);
  if (!session.ok()) return ReportError("check", session.status());

  const bool tty = StderrIsTerminal();
  if (tty) {
    options.progress = [](int done, int total) {
      const int width = 40;
      const int filled = total > 0 ? done * width / total : width;
      fmt::print(stderr, "\r  reading frames [{}{}] {}/{}", std::string(filled, '#'), std::string(width - filled, '.'),
                 done, total);
      if (done == total) fmt::print(stderr, "\r\033[K");
      std::fflush(stderr);
    };
  }
  solvers::CheckResult result;
  if (auto st = solvers::CheckSession(*session, options, &result, args.threads); !st.ok())
    return ReportError("check", st);

  const bool colour = UseColor() && isatty(fileno(stdout));
  auto paint = [&](solvers::Verdict v) {
    return colour ? fmt::format("{}{}\033[0m", Colour(v), solvers::VerdictName(v))
                  : std::string(solvers::VerdictName(v));
  };
  fmt::print("lumenrig check: session {} ({} cameras, {} lights)\n", session->Id(), session->cameras.size(),
             session->rig.lights.size());
  for (const auto& line : result.checks) {
    fmt::print("{}  {:<24} {}\n", paint(line.verdict), line.key, line.summary);
    int shown = 0;
    for (const auto& f : line.findings) {
      if (f.verdict != solvers::Verdict::kFail && f.verdict != solvers::Verdict::kWarn) continue;
      if (shown++ == args.max_findings) {
        fmt::print("        ... {} more (see --json / --report)\n", line.findings.size() - args.max_findings);
        break;
      }
      fmt::print("        {} {}\n", solvers::VerdictName(f.verdict), f.message);
    }
  }

  if (!args.json_path.empty()) {
    if (auto st = solvers::WriteCheckJson(result, args.json_path, args.force); !st.ok())
      return ReportError("check", st);
    fmt::print("json: {}\n", args.json_path);
  }
  if (!args.report_dir.empty()) {
    std::string written;
    if (auto st = solvers::WriteCheckReport(result, args.report_dir, args.force, &written); !st.ok())
      return ReportError("check", st);
    fmt::print("report: {}\n", written);
  }
  int fails = 0, warns = 0;
  for (const auto& line : result.checks) {
    fails += line.verdict == solvers::Verdict::kFail;
    warns += line.verdict == solvers::Verdict::kWarn;
  }
  const std::string detail =
      result.verdict == solvers::Verdict::kFail
          ? fmt::format("{} check(s) failed, {} warning(s): recapture before the subject leaves", fails, warns)
          : fmt::format("session usable, {} warning(s)", warns);
  fmt::print("verdict: {}  {}\n", paint(result.verdict), detail);
  const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  fmt::print("lumenrig check: {}\n", TimeAndMemoryLine(wall));
  return solvers::ExitCodeFor(result.verdict);
}

std::function<int()> Setup(CLI::App* sub) {
  auto args = std::make_shared<CheckArgs>();
  sub->add_option("session", args->session, "Session folder or its session.json");
  sub->add_option("--out", args->out_dir,
                  "Write DIR/check.json and DIR/check_report.html (unless --json / --report say otherwise)");
  sub->add_option("--json", args->json_path,
                  "Write every check, value, threshold, verdict and offending frame as JSON");
  sub->add_option("--report", args->report_dir, "Write a self-contained HTML report DIR/check_report.html");
  sub->add_option("--threshold", args->thresholds,
                  "Override one threshold, KEY=VALUE (repeatable; see --list-thresholds)");
  sub->add_option("--thresholds", args->thresholds_file, "JSON file of {\"KEY\": VALUE} threshold overrides");
  sub->add_flag("--list-thresholds", args->list, "Print every threshold with its default, unit and source, then exit");
  sub->add_option("--threads", args->threads, "Worker threads (0 = all cores)")->check(CLI::NonNegativeNumber);
  sub->add_option("--max-findings", args->max_findings, "Findings printed per check on the terminal")
      ->check(CLI::NonNegativeNumber);
  sub->add_flag("--force", args->force, "Overwrite existing --out / --json / --report outputs");
  sub->footer("Exit code: 0 pass (warnings allowed), 1 a check failed, 2 bad input.");
  return [args] { return Run(*args); };
}

const CommandRegistrar kRegistrar({"check",
                                   "Check a captured session: completeness, exposure, lights, stability, "
                                   "calibration, matting prerequisites (PASS/WARN/FAIL, HTML report)",
                                   10, Setup});

}  // namespace
}  // namespace lumenrig::cli
