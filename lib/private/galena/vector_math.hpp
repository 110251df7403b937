/// Elementary functions written as straight-line arithmetic so that loops over arrays vectorise: exp and
/// log to about one unit in the last place. libm's versions are calls the compiler cannot vectorise.
#pragma once

#include <bit>
#include <cstdint>

namespace galena::vmath {

/// e^x for x in [-708, 709], relative error <= 2.3e-16 (checked against libm in vector_math_test).
/// Below -708 it returns e^-708 (about 3e-308), above 709 it is not defined (callers clamp first).
/// Method: Cody-Waite reduction x = n ln2 + r with |r| <= ln2/2 (ln2 split in two parts), a degree-13
/// Taylor polynomial for e^r (truncation error < 5e-18, evaluated in Estrin's form), and 2^n assembled in the
/// exponent bits.
[[nodiscard, gnu::always_inline]] inline double exp(double x) noexcept
{
    constexpr double log2e = 1.4426950408889634074;
    constexpr double ln2_hi = 6.93147180369123816490e-01; // ln 2 to 32 bits, so n * ln2_hi is exact
    constexpr double ln2_lo = 1.90821492927058770002e-10;
    constexpr double round_magic = 6755399441055744.0; // 1.5 * 2^52: adding it rounds to an integer
    x = x < -708.0 ? -708.0 : x;
    const double t = x * log2e + round_magic;
    const double n = t - round_magic;
    const std::int64_t ni = std::bit_cast<std::int64_t>(t) - std::bit_cast<std::int64_t>(round_magic);
    const double r = (x - n * ln2_hi) - n * ln2_lo;
    // The terms from r^3 on in Estrin's form (pairs, then r^2, r^4, r^8), the first three in Horner's form
    // (which keeps the rounding of the large terms as before): a dependency chain of about 6 multiply-adds
    // instead of 14, which a scalar Newton iteration waits on.
    const double r2 = r * r, r4 = r2 * r2, r8 = r4 * r4;
    const double q01 = 1.0 / 6.0 + r * (1.0 / 24.0), q23 = 1.0 / 120.0 + r * (1.0 / 720.0);
    const double q45 = 1.0 / 5040.0 + r * (1.0 / 40320.0), q67 = 1.0 / 362880.0 + r * (1.0 / 3628800.0);
    const double q89 = 1.0 / 39916800.0 + r * (1.0 / 479001600.0);
    const double q = (q01 + r2 * q23) + r4 * (q45 + r2 * q67) + r8 * (q89 + r2 * (1.0 / 6227020800.0));
    const double p = 1.0 + r * (1.0 + r * (0.5 + r * q));
    return p * std::bit_cast<double>((ni + 1023) << 52);
}

/// Natural logarithm for normal positive x (1e-300 .. 1e300), relative error <= 2.3e-16 away from x = 1
/// and absolute error <= 1.2e-16 near it (checked against libm). Not for zero, negatives, denormals,
/// infinities or NaN (callers keep their arguments in range).
/// Method: x = 2^e m with m in [sqrt(1/2), sqrt(2)), ln m = 2 atanh(s) with s = (m - 1)/(m + 1),
/// |s| <= 0.1716, odd series to s^23 (truncation error < 1e-19), e ln2 added in two parts.
[[nodiscard, gnu::always_inline]] inline double log(double x) noexcept
{
    constexpr double ln2_hi = 6.93147180369123816490e-01;
    constexpr double ln2_lo = 1.90821492927058770002e-10;
    constexpr std::int64_t mantissa_mask = (std::int64_t{1} << 52) - 1;
    constexpr std::int64_t sqrt_half_bits = 0x3FE6A09E667F3BCD; // bit pattern of sqrt(1/2)
    const std::int64_t bits = std::bit_cast<std::int64_t>(x);
    // Exponent relative to sqrt(1/2): m = x / 2^e lands in [sqrt(1/2), sqrt(2)).
    const std::int64_t shifted = bits - sqrt_half_bits;
    const std::int64_t e = shifted >> 52;
    const double m = std::bit_cast<double>((shifted & mantissa_mask) + sqrt_half_bits);
    const double s = (m - 1.0) / (m + 1.0);
    const double s2 = s * s;
    double p = 1.0 / 23.0;
    p = p * s2 + 1.0 / 21.0;
    p = p * s2 + 1.0 / 19.0;
    p = p * s2 + 1.0 / 17.0;
    p = p * s2 + 1.0 / 15.0;
    p = p * s2 + 1.0 / 13.0;
    p = p * s2 + 1.0 / 11.0;
    p = p * s2 + 1.0 / 9.0;
    p = p * s2 + 1.0 / 7.0;
    p = p * s2 + 1.0 / 5.0;
    p = p * s2 + 1.0 / 3.0;
    // e as a double without an int64 -> double conversion (which AVX2 lacks): add the rounding constant's bits.
    constexpr double round_magic = 6755399441055744.0;
    const double ed = std::bit_cast<double>(e + std::bit_cast<std::int64_t>(round_magic)) - round_magic;
    return ed * ln2_hi + (2.0 * s + (2.0 * s * s2 * p + ed * ln2_lo));
}

} // namespace galena::vmath
