/// Filtering a record by a frequency response through the FFT (defined in metrics.cpp, beside its FFT).
#pragma once

#include <complex>
#include <functional>
#include <span>
#include <vector>

namespace galena::detail {

/// Filters a record by a linear system given as its frequency response: x (sampled at fs_hz > 0, zero
/// before its first sample) is zero-padded to a power of two of at least twice its length, each FFT bin is
/// multiplied by h(f) (bins 0..M/2 by h(k fs / M), the rest by the conjugates, so the output is real), and
/// the first x.size() samples of the inverse are returned. Exact at every bin: no warping of a discretised
/// filter. For systems whose impulse response dies out within x.size() samples (else the tail wraps).
/// Throws config_error for a bad rate, resource_error when the transform's memory is not there.
[[nodiscard]] std::vector<double> filter_by_response(std::span<const double> x, double fs_hz,
                                                     const std::function<std::complex<double>(double)>& h);

} // namespace galena::detail
