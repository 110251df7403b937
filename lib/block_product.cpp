#include "galena/block_product.hpp"

#include <cstring>

namespace galena::detail {

#if defined(__x86_64__) && defined(__GNUC__) && !defined(__clang__)
#define GALENA_VECTOR_CLONES __attribute__((target_clones("arch=x86-64-v3", "default")))
#else
#define GALENA_VECTOR_CLONES
#endif

namespace {

/// Four doubles (GCC's generic vectors: one AVX register on x86-64-v3, two SSE2 registers on the baseline).
typedef double four __attribute__((vector_size(32)));

// Vectors pass by reference only, so no vector crosses a call boundary by value (no ABI question).
[[gnu::always_inline]] inline void load(four& v, const double* p) noexcept { std::memcpy(&v, p, sizeof v); }

[[gnu::always_inline]] inline void store(double* p, const four& v) noexcept { std::memcpy(p, &v, sizeof v); }

/// 4 V rows of y = M x (+ y): the sums of the even and of the odd columns kept in registers across all
/// columns (two independent chains per vector hide the multiply-add latency), one store per row at the end.
template <int V>
[[gnu::always_inline]] inline void row_tile(const double* m, std::ptrdiff_t ld, std::ptrdiff_t cols, const double* x, double* y,
                                            bool accumulate) noexcept
{
    four a[V], b[V];
    for (int i = 0; i < V; ++i) a[i] = b[i] = four{0.0, 0.0, 0.0, 0.0};
    std::ptrdiff_t c = 0;
    for (; c + 1 < cols; c += 2) {
        const double* p = m + c * ld;
        const four x0 = four{1.0, 1.0, 1.0, 1.0} * x[c], x1 = four{1.0, 1.0, 1.0, 1.0} * x[c + 1];
        for (int i = 0; i < V; ++i) {
            four u, w;
            load(u, p + 4 * i);
            load(w, p + ld + 4 * i);
            a[i] += u * x0;
            b[i] += w * x1;
        }
    }
    if (c < cols) {
        const double* p = m + c * ld;
        const four x0 = four{1.0, 1.0, 1.0, 1.0} * x[c];
        for (int i = 0; i < V; ++i) {
            four u;
            load(u, p + 4 * i);
            a[i] += u * x0;
        }
    }
    for (int i = 0; i < V; ++i) {
        four sum = a[i] + b[i];
        if (accumulate) {
            four old;
            load(old, y + 4 * i);
            sum = old + sum;
        }
        store(y + 4 * i, sum);
    }
}

} // namespace

GALENA_VECTOR_CLONES
void column_major_product(const double* m, std::ptrdiff_t ld, std::ptrdiff_t rows, std::ptrdiff_t cols, const double* x, double* y,
                          bool accumulate) noexcept
{
    std::ptrdiff_t r = 0;
    for (; r + 16 <= rows; r += 16) row_tile<4>(m + r, ld, cols, x, y + r, accumulate);
    if (r + 8 <= rows) {
        row_tile<2>(m + r, ld, cols, x, y + r, accumulate);
        r += 8;
    }
    if (r + 4 <= rows) {
        row_tile<1>(m + r, ld, cols, x, y + r, accumulate);
        r += 4;
    }
    for (; r < rows; ++r) {
        double s = 0.0;
        for (std::ptrdiff_t c = 0; c < cols; ++c) s += m[r + c * ld] * x[c];
        y[r] = (accumulate ? y[r] : 0.0) + s;
    }
}

} // namespace galena::detail
