#pragma once
/// \file status.h
/// Error handling for bad files, configurations and user input (tier 2 of
/// STYLE.md). Our own bugs use assert/CHECK; per-pixel numerical outcomes go
/// into confidence maps, never into a Status.

#include <optional>
#include <string>
#include <utility>

#include <fmt/format.h>

namespace lumenrig::io {

/// Kinds of failure; the numeric values are the CLI exit codes of DESIGN.md.
enum class StatusCode {
  kOk = 0,
  kDataFail = 1,  ///< the data was read but failed a check
  kBadInput = 2,  ///< bad usage, bad file, bad configuration
  kInternal = 3,  ///< our bug or an unexpected library failure
};

/// Result of an operation. Messages are one line and name the file, the
/// field (JSON path) and the problem, e.g.
/// "session.json: cameras[0].olat[3].light: unknown light id 57".
class [[nodiscard]] Status {
 public:
  Status() = default;
  static Status Ok() { return Status(); }
  static Status BadInput(std::string message) { return Status(StatusCode::kBadInput, std::move(message)); }
  static Status DataFail(std::string message) { return Status(StatusCode::kDataFail, std::move(message)); }
  static Status Internal(std::string message) { return Status(StatusCode::kInternal, std::move(message)); }

  bool ok() const { return code_ == StatusCode::kOk; }
  StatusCode code() const { return code_; }
  const std::string& message() const { return message_; }
  int exit_code() const { return static_cast<int>(code_); }

  /// Returns a copy whose message is "prefix: message" (same code).
  Status WithPrefix(const std::string& prefix) const {
    if (ok()) return *this;
    return Status(code_, prefix + ": " + message_);
  }

 private:
  Status(StatusCode code, std::string message) : code_(code), message_(std::move(message)) {}
  StatusCode code_ = StatusCode::kOk;
  std::string message_;
};

/// A value or the Status explaining why there is none.
template <class T>
class [[nodiscard]] Expected {
 public:
  Expected(T value) : value_(std::move(value)) {}          // NOLINT: implicit by design
  Expected(Status status) : status_(std::move(status)) {}  // NOLINT
  bool ok() const { return value_.has_value(); }
  const Status& status() const { return status_; }
  T& value() & { return *value_; }
  const T& value() const& { return *value_; }
  T&& value() && { return std::move(*value_); }
  T* operator->() { return &*value_; }
  const T* operator->() const { return &*value_; }
  T& operator*() { return *value_; }
  const T& operator*() const { return *value_; }

 private:
  std::optional<T> value_;
  Status status_;
};

}  // namespace lumenrig::io

/// Propagates a non-OK Status from the enclosing function.
#define LUMENRIG_RETURN_IF_ERROR(expr)                   \
  do {                                                   \
    ::lumenrig::io::Status lumenrig_status_ = (expr);    \
    if (!lumenrig_status_.ok()) return lumenrig_status_; \
  } while (0)
