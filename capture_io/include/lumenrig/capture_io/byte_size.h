#pragma once
/// \file byte_size.h
/// Memory budgets on the command line (`--mem-budget`).

#include <cstdint>
#include <string>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

/// Parses a byte size: plain bytes or a number with K/M/G/T (powers of
/// 1024; "KiB"/"KB"/"k" accepted alike), e.g. "1G", "512M", "1.5G".
/// Errors name the --mem-budget option.
Expected<int64_t> ParseByteSize(const std::string& text);

}  // namespace lumenrig::io
