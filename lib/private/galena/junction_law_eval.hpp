/// The junction law inlined with its switches fixed at compile time: the form the batch loops use
/// (vectorised exp and log from vector_math.hpp). Internal: junction_law::evaluate() (components.hpp) is the
/// public entry; both compute the same numbers.
#pragma once

#include "galena/components.hpp"
#include "galena/vector_math.hpp"

#include <algorithm>
#include <cmath>

namespace galena::detail {

/// junction_law::evaluate() with the law's switches fixed at compile time (Breakdown == law.breakdown, Charge ==
/// (law.cj0_f > 0), SquareRoot == law.square_root_grading), for loops that must not branch.
template <bool Breakdown, bool Charge, bool SquareRoot>
[[nodiscard, gnu::always_inline]] inline junction_values evaluate_law(const junction_law& law, double v_v) noexcept
{
    constexpr double linear_above = 80.0; // n Vt units
    junction_values r{};
    const double x = v_v * law.inv_emission_voltage;
    const double excess = std::max(x - linear_above, 0.0); // > 0 only on the linear continuation
    const double e = vmath::exp(x - excess);
    const double is_e = law.saturation_current_a * e;
    r.current_a = is_e * (1.0 + excess) - law.saturation_current_a + law.leakage_s * v_v;
    r.conductance_s = is_e * law.inv_emission_voltage + law.leakage_s;
    r.conductance_slope_s_per_v = (excess > 0.0 ? 0.0 : 1.0) * is_e * law.inv_emission_voltage * law.inv_emission_voltage;
    if constexpr (Breakdown) {
        const double xb = -(v_v + law.breakdown_voltage_v) * law.inv_emission_voltage;
        const double excess_b = std::max(xb - linear_above, 0.0);
        const double ib_e = law.breakdown_current_a * vmath::exp(xb - excess_b);
        r.current_a -= ib_e * (1.0 + excess_b);
        r.conductance_s += ib_e * law.inv_emission_voltage;
        r.conductance_slope_s_per_v -= (excess_b > 0.0 ? 0.0 : 1.0) * ib_e * law.inv_emission_voltage * law.inv_emission_voltage;
    }
    if constexpr (Charge) {
        const double vc = v_v < law.fc_v ? v_v : law.fc_v;
        const double base = 1.0 - vc / law.junction_potential_v; // >= 1 - Fc
        // M = 1/2 (the abrupt junction) is a square root; otherwise base^-M = exp(-M ln base).
        double pw;
        if constexpr (SquareRoot) pw = 1.0 / std::sqrt(base);
        else pw = vmath::exp(-law.grading * vmath::log(base));
        const double c_dep = law.cj0_f * pw;
        const double q_dep = law.cj0_f * law.junction_potential_v / (1.0 - law.grading) * (1.0 - base * pw);
        const double dc_dep = c_dep * law.grading / (law.junction_potential_v - vc);
        const bool above = v_v > law.fc_v;
        r.capacitance_f = above ? law.linear_a_f + law.linear_b_f_per_v * v_v : c_dep;
        r.charge_c = above ? law.charge_at_fc_c + (law.linear_a_f + 0.5 * law.linear_b_f_per_v * (v_v + law.fc_v)) * (v_v - law.fc_v) : q_dep;
        r.capacitance_slope_f_per_v = above ? law.linear_b_f_per_v : dc_dep;
    }
    return r;
}

/// junction_law::evaluate() inlined (the run-time dispatch on the law's switches, then evaluate_law): for
/// the library's scalar loops (step-count choice, per-step Newton), where a call per evaluation shows.
[[nodiscard]] inline junction_values evaluate_inline(const junction_law& law, double v_v) noexcept
{
    if (law.cj0_f > 0.0) {
        if (law.square_root_grading)
            return law.breakdown ? evaluate_law<true, true, true>(law, v_v) : evaluate_law<false, true, true>(law, v_v);
        return law.breakdown ? evaluate_law<true, true, false>(law, v_v) : evaluate_law<false, true, false>(law, v_v);
    }
    return law.breakdown ? evaluate_law<true, false, true>(law, v_v) : evaluate_law<false, false, true>(law, v_v);
}

} // namespace galena::detail
