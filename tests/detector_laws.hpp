// Outside references shared by the physics tests: constants taken from the SI (not from galena) and the
// exact rectified-DC law of an exponential diode.
#pragma once

#include <boost/math/special_functions/bessel.hpp>
#include <boost/math/tools/roots.hpp>
#include <cmath>
#include <cstdint>

namespace galena_test {

// Independent constants: the tests do not take them from galena/constants.hpp.
inline constexpr double k_boltzmann = 1.380649e-23; // J/K, exact in the 2019 SI [pub: SI brochure, 9th ed.]
inline constexpr double k_charge = 1.602176634e-19; // C, exact in the 2019 SI [pub: SI brochure, 9th ed.]
/// kT/q at 25 deg C (galena's default junction temperature), V.
inline const double vt_25c = k_boltzmann * (25.0 + 273.15) / k_charge;

/// Solves Is (I0(V/(n Vt)) exp(-Vdc/(n Vt)) - 1) = Vdc / RL for Vdc (V) with TOMS 748 on the bracket
/// y = Vdc/(n Vt) in [0, ln I0(a)]: the left side minus the right is Is (I0 - 1) > 0 at y = 0 and
/// -ln(I0) n Vt / RL < 0 at y = ln I0, and strictly decreasing in between.
/// [pub: H. C. Torrey and C. A. Whitmer, Crystal Rectifiers, MIT Radiation Laboratory Series vol. 15, 1948 (from memory)]
inline double dc_law_v(double v_peak, double is_a, double n, double rl_ohm)
{
    const double nvt = n * vt_25c;
    const double a = v_peak / nvt;
    const double i0 = boost::math::cyl_bessel_i(0, a);
    auto f = [&](double y) { return is_a * (i0 * std::exp(-y) - 1.0) - y * nvt / rl_ohm; };
    std::uintmax_t iterations = 200;
    const auto [lo, hi] = boost::math::tools::toms748_solve(f, 0.0, std::log(i0), boost::math::tools::eps_tolerance<double>(50),
                                                            iterations);
    return nvt * 0.5 * (lo + hi);
}

} // namespace galena_test
