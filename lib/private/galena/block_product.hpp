/// The RF integrator's per-block matrix-vector products, built for the host's vector unit.
#pragma once

#include <cstddef>

namespace galena::detail {

/// y = M x, or y += M x with `accumulate`, for a column-major M (rows x cols, leading dimension ld >= rows),
/// in tiles of rows whose sums stay in registers across the columns (the even and odd columns summed apart,
/// then added). On x86-64 with GCC it is compiled twice, for the baseline and for x86-64-v3 (AVX2, FMA), and
/// the loader picks the one the processor runs (target clones): the two may differ in the last bits (fused
/// multiply-adds); each is deterministic.
void column_major_product(const double* m, std::ptrdiff_t ld, std::ptrdiff_t rows, std::ptrdiff_t cols, const double* x, double* y,
                          bool accumulate) noexcept;

} // namespace galena::detail
