#include "galena/transducer.hpp"

#include "galena/constants.hpp"

#include <cmath>
#include <numbers>

namespace galena {

bool has_diaphragm_drive(const earpiece_params& e) noexcept
{
    return e.kind == earpiece_kind::piezo || e.kind == earpiece_kind::magnetic;
}

std::string_view diaphragm_drive_quantity(const earpiece_params& e) noexcept
{
    if (e.kind == earpiece_kind::magnetic) return "force Bl i_L from the current through the winding's inductance";
    if (e.has_motional_branch()) return "force N q_m / C_m from the motional (BVD) branch's charge";
    if (e.kind == earpiece_kind::piezo) return "force N v from the terminal voltage (no motional branch)";
    return "";
}

std::complex<double> diaphragm_drive_per_volt(const earpiece_params& e, double f)
{
    using c = std::complex<double>;
    const double w = 2.0 * std::numbers::pi * f;
    switch (e.kind) {
    case earpiece_kind::piezo:
        if (!e.has_motional_branch()) return e.piezo_force_factor_n_per_volt;
        // q_m (1/Cm + j w Rm - w^2 Lm) = v, F = N q_m / Cm.
        return e.piezo_force_factor_n_per_volt /
               c(1.0 - w * w * e.motional_inductance_h * e.motional_capacitance_f, w * e.motional_resistance_ohm * e.motional_capacitance_f);
    case earpiece_kind::magnetic: {
        // i = v / (R + jwL || R_loss); i_L = i R_loss / (R_loss + jwL).
        const double gp = std::isfinite(e.loss_resistance_ohm) ? 1.0 / e.loss_resistance_ohm : 0.0;
        return e.magnetic_force_factor_tm / c(e.resistance_ohm, w * e.inductance_h * (1.0 + e.resistance_ohm * gp));
    }
    case earpiece_kind::resistor: return 0.0;
    }
    return 0.0;
}

} // namespace galena
