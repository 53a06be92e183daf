#pragma once
/// \file color.h
/// Colour transfer functions from published standards.

#include <opencv2/core.hpp>

namespace lumenrig::io {

/// sRGB decoding, IEC 61966-2-1: c/12.92 for c <= 0.04045, else
/// ((c + 0.055)/1.055)^2.4. Input and output in [0, 1]; values outside are
/// clamped to the curve's domain.
float SrgbToLinear(float encoded);

/// sRGB encoding, IEC 61966-2-1: 12.92 l for l <= 0.0031308, else
/// 1.055 l^(1/2.4) - 0.055.
float LinearToSrgb(float linear);

/// Applies SrgbToLinear / LinearToSrgb to every element of a CV_32F image in place.
void SrgbToLinearInPlace(cv::Mat* image);
void LinearToSrgbInPlace(cv::Mat* image);

/// ITU-R BT.709 luma weights for linear RGB: Y = 0.2126 R + 0.7152 G + 0.0722 B.
constexpr float kBt709R = 0.2126f;
constexpr float kBt709G = 0.7152f;
constexpr float kBt709B = 0.0722f;
inline float Bt709Luminance(float r, float g, float b) { return kBt709R * r + kBt709G * g + kBt709B * b; }

/// Linear float image (1 or 3 channels, RGB order) to an 8-bit BGR image for
/// PNG preview: multiply by `exposure`, sRGB-encode, clamp, round.
cv::Mat ToPreview8(const cv::Mat& linear, float exposure = 1.0f);

}  // namespace lumenrig::io
