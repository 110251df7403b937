#include "galena/transducer.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"

#include <cmath>
#include <fmt/format.h>
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

std::vector<double> diaphragm_drive_n(const earpiece_params& e, std::span<const double> v, double fs)
{
    if (!(fs > 0.0) || !std::isfinite(fs)) throw config_error(fmt::format("diaphragm drive: fs = {} Hz: must be > 0", fs));
    std::vector<double> out(v.size(), 0.0);
    if (!has_diaphragm_drive(e)) return out;
    const double pi = std::numbers::pi;
    // Bilinear transform s -> k (1 - z^-1) / (1 + z^-1), k = w_p / tan(w_p / (2 fs)) prewarped at w_p.
    auto warp = [&](double fp) { return fp < 0.45 * fs ? 2.0 * pi * fp / std::tan(pi * fp / fs) : 2.0 * fs; };
    double b0 = 0, b1 = 0, b2 = 0, a1 = 0, a2 = 0; // y[n] = b0 x[n] + b1 x[n-1] + b2 x[n-2] - a1 y[n-1] - a2 y[n-2]
    if (e.kind == earpiece_kind::piezo && !e.has_motional_branch()) {
        b0 = e.piezo_force_factor_n_per_volt;
    } else if (e.kind == earpiece_kind::piezo) {
        // H(s) = N / (A s^2 + B s + 1), A = Lm Cm, B = Rm Cm.
        const double A = e.motional_inductance_h * e.motional_capacitance_f, B = e.motional_resistance_ohm * e.motional_capacitance_f;
        const double k = warp(1.0 / (2.0 * pi * std::sqrt(A)));
        const double d0 = A * k * k + B * k + 1.0, d1 = 2.0 - 2.0 * A * k * k, d2 = A * k * k - B * k + 1.0;
        const double n = e.piezo_force_factor_n_per_volt;
        b0 = n / d0, b1 = 2.0 * n / d0, b2 = n / d0, a1 = d1 / d0, a2 = d2 / d0;
    } else {
        // H(s) = (Bl / R) / (1 + s tau), tau = L (1 + R / R_loss) / R.
        const double gp = std::isfinite(e.loss_resistance_ohm) ? 1.0 / e.loss_resistance_ohm : 0.0;
        const double tau = e.inductance_h * (1.0 + e.resistance_ohm * gp) / e.resistance_ohm;
        const double k = warp(1.0 / (2.0 * pi * tau));
        const double g = e.magnetic_force_factor_tm / e.resistance_ohm;
        const double d0 = 1.0 + k * tau;
        b0 = g / d0, b1 = g / d0, a1 = (1.0 - k * tau) / d0;
    }
    double x1 = 0, x2 = 0, y1 = 0, y2 = 0; // from rest
    for (std::size_t i = 0; i < v.size(); ++i) {
        const double x = v[i];
        const double y = b0 * x + b1 * x1 + b2 * x2 - a1 * y1 - a2 * y2;
        x2 = x1, x1 = x, y2 = y1, y1 = y;
        out[i] = y;
    }
    return out;
}

} // namespace galena
