/// The bracketed scalar Newton shared by the phase-locked stepper and the step-count choice. Internal.
#pragma once

#include <cmath>
#include <cstddef>
#include <limits>
#include <tuple>
#include <utility>

namespace galena::detail {

/// Root of an increasing function f(v) (f returns {F, F'}) near `guess`: bracket by doubling, then Newton
/// with bisection fallback. Returns NaN when no bracket is found within 200 doublings.
template <class F>
inline double solve_increasing(F&& f, double guess, double initial_span, std::size_t& iterations)
{
    double v = guess;
    auto [fv, dfv] = f(v);
    double lo = v, hi = v, flo = fv, fhi = fv;
    double span = initial_span;
    for (int it = 0; it < 200 && flo > 0.0; ++it, span *= 2.0) {
        lo -= span;
        flo = f(lo).first;
    }
    span = initial_span;
    for (int it = 0; it < 200 && fhi < 0.0; ++it, span *= 2.0) {
        hi += span;
        fhi = f(hi).first;
    }
    if (!(flo <= 0.0 && fhi >= 0.0)) return std::numeric_limits<double>::quiet_NaN();
    for (int it = 0; it < 200; ++it) {
        ++iterations;
        std::tie(fv, dfv) = f(v);
        if (fv > 0.0) hi = v;
        else lo = v;
        double vn = v - fv / dfv;
        if (!(vn > lo && vn < hi)) vn = 0.5 * (lo + hi);
        const bool done = std::fabs(vn - v) <= 1e-15 + 1e-13 * std::fabs(v) || hi - lo <= 1e-15 + 1e-13 * std::fabs(v);
        v = vn;
        if (done) break;
    }
    return v;
}

} // namespace galena::detail
