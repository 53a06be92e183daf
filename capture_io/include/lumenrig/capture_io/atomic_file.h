#pragma once
/// \file atomic_file.h
/// Output files appear complete or not at all: write to a temporary sibling
/// name, then rename over the final name. Nothing the user had is overwritten
/// unless they asked (`overwrite`).

#include <string>
#include <vector>

#include "lumenrig/capture_io/status.h"

namespace lumenrig::io {

/// A temporary sibling of `final_path` ("<dir>/.<name>.tmp-<pid>-<n>").
/// Commit() renames it onto final_path; the destructor removes an
/// uncommitted temporary.
class AtomicFile {
 public:
  explicit AtomicFile(std::string final_path);
  ~AtomicFile();
  AtomicFile(const AtomicFile&) = delete;
  AtomicFile& operator=(const AtomicFile&) = delete;

  const std::string& temp_path() const { return temp_path_; }
  const std::string& final_path() const { return final_path_; }
  /// fsyncs the temporary and renames it to the final name.
  Status Commit();

 private:
  std::string final_path_;
  std::string temp_path_;
  bool committed_ = false;
};

/// OK when `path` does not exist, or exists and `overwrite` is true; otherwise
/// a BadInput naming the file and saying how to proceed (--force).
Status CheckOutputPath(const std::string& path, bool overwrite);

/// Creates a folder and its parents; error names the folder.
Status EnsureDirectory(const std::string& dir);

/// Writes text atomically.
Status WriteTextFile(const std::string& path, const std::string& text, bool overwrite);

/// Outputs written as a set (a stage's files, some written concurrently):
/// `status[i]` is what the write of `files[i]` returned.
/// The first failure in list order, or OK.
Status FirstError(const std::vector<Status>& status);
/// Removes every file whose write succeeded, so a set with a failure leaves
/// no partial output behind.
void RemoveWrittenFiles(const std::vector<std::string>& files, const std::vector<Status>& status);

}  // namespace lumenrig::io
