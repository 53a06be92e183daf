#pragma once
// Private pieces of the session check shared by session_check.cpp and the
// check_*.cpp files. Not installed; not part of the public API.

#include <memory>
#include <string>
#include <vector>

#include <opencv2/core.hpp>

#include "lumenrig/capture_io/image_io.h"
#include "lumenrig/capture_io/session.h"
#include "lumenrig/solvers/session_check.h"

namespace lumenrig::solvers::check_detail {

/// A check line with its thresholds; value/verdict/summary filled later.
CheckLine MakeLine(const std::string& key, const std::string& title, const std::string& unit, double warn, double fail);
/// Adds a finding, raises the line's verdict and the frame's flag.
void AddFinding(CheckLine* line, Finding finding);

/// The check's single reading pass, in two halves around the OLAT frames:
/// ScanBegin reads mask, dark, clean plate, backlit and lit once per camera;
/// a caller that decodes the OLAT frames anyway streams their rows in
/// (ScanRows); ScanFinish reads every OLAT and tracking frame not streamed
/// completely, once, in parallel. Together they fill result->cameras and
/// result->frames; problems reading files become FAIL findings in
/// *integrity (completeness line).
///
/// Per camera, the reference geometry, mask and aux frames (phase A); *result
/// and *integrity must outlive the state.
io::Status ScanBegin(const io::Session& session, const CheckOptions& options, CheckResult* result, CheckLine* integrity,
                     int threads, std::unique_ptr<ScanState, ScanStateDeleter>* state);
/// Decoded rows [y0, y1) of OLAT frame `frame` of camera `camera`; see
/// StreamedCheck::Rows.
void ScanRows(ScanState* state, int camera, int frame, const io::ImageInfo& info, int y0, int y1, const cv::Mat& rows);
/// Accumulator bytes while camera `camera`'s OLAT frames are streamed.
int64_t ScanStreamBytes(const ScanState& state, int camera);
/// Every frame not yet summarised (phase B).
io::Status ScanFinish(ScanState* state);

/// Translation of `moved` against `reference` (both CV_32FC1, same size) by
/// OpenCV phase correlation with the given window (CV_32FC1, empty = Hann).
/// Positive x: content moved right; positive y: content moved down. Pixels of
/// the inputs' grid.
cv::Point2d EstimateShift(const cv::Mat& reference, const cv::Mat& moved, const cv::Mat& window,
                          double* response = nullptr);

void CheckCompleteness(const io::Session& session, CheckResult* result, CheckLine* line);
void CheckExposure(const io::Session& session, const CheckOptions& options, CheckResult* result,
                   std::vector<CheckLine>* lines);
void CheckLights(const io::Session& session, const CheckOptions& options, CheckResult* result,
                 std::vector<CheckLine>* lines);
void CheckStability(const io::Session& session, const CheckOptions& options, CheckResult* result,
                    std::vector<CheckLine>* lines);
void CheckMatting(const io::Session& session, const CheckOptions& options, CheckResult* result,
                  std::vector<CheckLine>* lines);

/// Formats a number for messages: up to 3 significant decimals, no trailing zeros.
std::string Num(double value, int decimals = 2);

}  // namespace lumenrig::solvers::check_detail
