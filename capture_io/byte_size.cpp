#include "lumenrig/capture_io/byte_size.h"

#include <cctype>
#include <string>

namespace lumenrig::io {

Expected<int64_t> ParseByteSize(const std::string& text) {
  size_t pos = 0;
  double value = 0;
  try {
    value = std::stod(text, &pos);
  } catch (...) {
    return Status::BadInput(fmt::format("--mem-budget: '{}' is not a size (e.g. 1G, 512M, 1073741824)", text));
  }
  std::string unit = text.substr(pos);
  for (auto& c : unit) c = static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  double scale = 1;
  if (unit.empty() || unit == "B")
    scale = 1;
  else if (unit == "K" || unit == "KB" || unit == "KIB")
    scale = 1024.0;
  else if (unit == "M" || unit == "MB" || unit == "MIB")
    scale = 1024.0 * 1024;
  else if (unit == "G" || unit == "GB" || unit == "GIB")
    scale = 1024.0 * 1024 * 1024;
  else if (unit == "T" || unit == "TB" || unit == "TIB")
    scale = 1024.0 * 1024 * 1024 * 1024;
  else
    return Status::BadInput(fmt::format("--mem-budget: unknown unit '{}' in '{}' (use K, M, G or T)", unit, text));
  if (!(value > 0)) return Status::BadInput(fmt::format("--mem-budget: '{}' must be positive", text));
  return static_cast<int64_t>(value * scale);
}

}  // namespace lumenrig::io
