// The vectorisable elementary functions against the C library's (an outside implementation).
#include "galena/vector_math.hpp"

#include <doctest/doctest.h>
#include <cmath>
#include <random>

TEST_CASE("vmath::exp agrees with libm's exp to one unit in the last place over its whole range")
{
    // Reference: glibc's exp, correctly rounded to within 1 ulp. The bound, 2.3e-16 relative (about one
    // ulp of 2^-52), holds for the degree-13 polynomial on |r| <= ln2/2 with Cody-Waite reduction.
    std::mt19937_64 gen(2026);
    std::uniform_real_distribution<double> x(-708.0, 709.0);
    double worst = 0.0;
    for (int i = 0; i < 2000000; ++i) {
        const double v = x(gen);
        const double e = std::exp(v);
        worst = std::max(worst, std::fabs(galena::vmath::exp(v) - e) / e);
    }
    for (double v : {0.0, 1.0, -1.0, 80.0, -80.0, 0.5 * std::log(2.0), -0.5 * std::log(2.0)})
        worst = std::max(worst, std::fabs(galena::vmath::exp(v) - std::exp(v)) / std::exp(v));
    CHECK(worst <= 2.3e-16);
    CHECK(galena::vmath::exp(0.0) == 1.0);
    // Below -708 the result is clamped at e^-708 instead of underflowing into denormals.
    CHECK(galena::vmath::exp(-1000.0) == doctest::Approx(std::exp(-708.0)).epsilon(1e-15).scale(0.0));
}

TEST_CASE("vmath::log agrees with libm's log: 1 ulp relative, and absolute near x = 1")
{
    // Reference: glibc's log. Away from 1 the bound is relative (one ulp); near 1 the result is small and
    // the bound is absolute, 1.2e-16.
    std::mt19937_64 gen(7);
    std::uniform_real_distribution<double> e(-690.0, 690.0), near1(0.7, 1.4);
    double worst_rel = 0.0, worst_abs = 0.0;
    for (int i = 0; i < 2000000; ++i) {
        const double v = std::exp(e(gen));
        const double l = std::log(v);
        if (std::fabs(l) > 0.5) worst_rel = std::max(worst_rel, std::fabs(galena::vmath::log(v) - l) / std::fabs(l));
        const double w = near1(gen);
        worst_abs = std::max(worst_abs, std::fabs(galena::vmath::log(w) - std::log(w)));
    }
    CHECK(worst_rel <= 2.3e-16);
    CHECK(worst_abs <= 1.2e-16);
    CHECK(galena::vmath::log(1.0) == 0.0);
    CHECK(galena::vmath::log(2.0) == doctest::Approx(std::log(2.0)).epsilon(1e-16).scale(0.0));
}
