/// Component models of the detector stage: Shockley diode, earpieces, output network and source.
///
/// Every model is a plain value type validated at construction (`validated()` / factory functions):
/// an out-of-range field throws `config_error` naming the field, the value and the rule.
/// The models are stateless; the circuit module turns them into state equations.
#pragma once

#include <algorithm>
#include <cmath>
#include <limits>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

namespace galena {

inline constexpr double infinite_ohm = std::numeric_limits<double>::infinity();

/// Conductance, S, of a resistance in ohms; infinity (an open circuit) gives 0.
[[nodiscard]] constexpr double conductance_s(double resistance_ohm) noexcept
{
    return resistance_ohm == std::numeric_limits<double>::infinity() ? 0.0 : 1.0 / resistance_ohm;
}

/// Parameters of a Shockley junction diode with series resistance, leakage and depletion capacitance.
///
/// Junction current (SPICE level-1 form):
///   I(v) = Is(T) (exp(v / (n Vt)) - 1) + v / R_leak  [- I_bv exp(-(v + BV) / (n Vt)) when breakdown is on]
/// Depletion capacitance: Cj(v) = Cj0 (1 - v/Vj)^-M for v < Fc Vj, linearly extended above (Fc = 0.5).
/// Saturation-current temperature scaling (SPICE): Is(T) = Is (T/Tnom)^(XTI/n) exp((T/Tnom - 1) Eg / (n Vt)).
struct diode_params {
    std::string name = "custom";            ///< preset name, for reports
    double saturation_current_a = 1e-8;     ///< Is at nominal temperature, A; (0, 1e-2]
    double emission_coefficient = 1.0;      ///< n; [0.5, 10]
    double series_resistance_ohm = 0.0;     ///< Rs, ohm; [0, 1e6]
    double leakage_resistance_ohm = infinite_ohm; ///< shunt across the junction, ohm; > 0, inf = none
    double junction_capacitance_f = 0.0;    ///< Cj0 at zero bias, F; [0, 1e-9]
    double junction_potential_v = 0.5;      ///< Vj, V; [0.05, 2]
    double grading_coefficient = 0.5;       ///< M; [0.05, 0.95]
    double breakdown_voltage_v = std::numeric_limits<double>::infinity(); ///< BV, V; > 0, inf = none
    double breakdown_current_a = 1e-9;      ///< I_bv at v = -BV, A; (0, 1]
    double temperature_c = 25.0;            ///< junction temperature, deg C; [-60, 150]
    double nominal_temperature_c = 25.0;    ///< temperature at which Is was given, deg C; [-60, 150]
    double energy_gap_ev = 1.11;            ///< Eg for Is(T), eV; [0.1, 4]
    double saturation_current_exponent = 3.0; ///< XTI for Is(T); [0, 10]

    /// Throws config_error naming the first field that breaks its range; returns *this otherwise.
    const diode_params& validate() const;
    /// Thermal voltage kT/q at `temperature_c`, V.
    [[nodiscard]] double thermal_voltage() const noexcept;
    /// Is scaled to `temperature_c`, A.
    [[nodiscard]] double saturation_current_at_temperature() const noexcept;
    /// Zero-bias small-signal ("video") resistance n Vt / Is, ohm.
    [[nodiscard]] double video_resistance_ohm() const noexcept;
};

/// A generic diode preset: typical values only; real specimens vary widely.
struct diode_preset {
    std::string_view name;        ///< e.g. "germanium-point-contact"
    std::string_view description; ///< one line: what it stands for and where its values come from
    diode_params params;
};

/// The built-in presets (germanium point-contact, small-signal Schottky, zero-bias Schottky detector,
/// silicon junction switching). Values are typical figures recalled from memory, not measurements.
[[nodiscard]] const std::vector<diode_preset>& diode_presets();
/// The preset with this name; throws config_error listing the valid names otherwise.
[[nodiscard]] const diode_preset& find_diode_preset(std::string_view name);

/// Evaluated junction: current, A, and its derivative, S, at a junction voltage.
struct junction_point {
    double current_a;
    double conductance_s;
};

/// Everything the junction equations give at one junction voltage (SI units).
struct junction_values {
    double current_a;                  ///< I(v), A (Shockley + leakage - breakdown)
    double conductance_s;              ///< dI/dv, S
    double conductance_slope_s_per_v;  ///< d2I/dv2, S/V
    double charge_c;                   ///< depletion charge q(v) = integral of Cj from 0 to v, C
    double capacitance_f;              ///< Cj(v) = dq/dv, F
    double capacitance_slope_f_per_v;  ///< dCj/dv, F/V
};

/// The junction equations with their constants precomputed: the one place where the diode's current,
/// charge and capacitance are written down. evaluate() is straight-line arithmetic (no calls into libm,
/// no data-dependent branches), so a loop that evaluates many voltages vectorises.
///
///   I(v) = Is (exp(v / nVt) - 1) + v / R_leak - I_bv exp(-(v + BV) / nVt)
///   Cj(v) = Cj0 (1 - v/Vj)^-M for v < Fc Vj (Fc = 0.5), continued linearly above (SPICE);
///   q(v) = Cj0 Vj / (1 - M) (1 - (1 - v/Vj)^(1 - M)) below Fc Vj, the integral of the linear piece above.
/// Exponentials are continued linearly beyond 80 nVt so that Newton iterates never overflow; physical
/// operating points never reach that region.
struct junction_law {
    double saturation_current_a = 0.0;   ///< Is at the operating temperature, A
    double inv_emission_voltage = 0.0;   ///< 1 / (n Vt), 1/V
    double leakage_s = 0.0;              ///< 1 / R_leak, S
    bool breakdown = false;              ///< reverse breakdown modelled
    double breakdown_voltage_v = 0.0;    ///< BV, V
    double breakdown_current_a = 0.0;    ///< I_bv, A
    double cj0_f = 0.0;                  ///< zero-bias depletion capacitance, F (0: no charge)
    double junction_potential_v = 0.5;   ///< Vj, V
    double grading = 0.5;                ///< M
    bool square_root_grading = true;     ///< M = 1/2: a square root instead of exp(-M log)
    double fc_v = 0.25;                  ///< Fc Vj, V: where the linear continuation starts
    double linear_a_f = 0.0;             ///< Cj = linear_a_f + linear_b_f_per_v v above Fc Vj
    double linear_b_f_per_v = 0.0;
    double charge_at_fc_c = 0.0;         ///< q(Fc Vj), C

    /// Current, charge, capacitance and slopes at junction voltage v_v, V. (The library's batch loops use
    /// the same law inlined with its switches fixed at compile time; that form is internal.)
    [[nodiscard]] junction_values evaluate(double v_v) const noexcept;
};

/// A diode ready for evaluation: derived constants precomputed from validated diode_params.
class diode_model {
public:
    explicit diode_model(const diode_params& p);

    /// Junction current and conductance at junction voltage v_v (V), leakage and breakdown included.
    [[nodiscard]] junction_point junction(double v_v) const noexcept
    {
        const junction_values r = m_law.evaluate(v_v);
        return {r.current_a, r.conductance_s};
    }
    /// Depletion capacitance, F, at junction voltage v_v (V); 0 when Cj0 = 0.
    [[nodiscard]] double capacitance_f(double v_v) const noexcept { return m_law.evaluate(v_v).capacitance_f; }
    /// Depletion capacitance, F, and its slope dC/dv, F/V, at junction voltage v_v (V).
    [[nodiscard]] std::pair<double, double> capacitance_and_slope(double v_v) const noexcept
    {
        const junction_values r = m_law.evaluate(v_v);
        return {r.capacitance_f, r.capacitance_slope_f_per_v};
    }
    /// The junction equations with this diode's constants.
    [[nodiscard]] const junction_law& law() const noexcept { return m_law; }
    /// Leakage conductance across the junction, S.
    [[nodiscard]] double leakage_s() const noexcept { return m_law.leakage_s; }
    [[nodiscard]] double series_resistance_ohm() const noexcept { return m_params.series_resistance_ohm; }
    [[nodiscard]] bool has_capacitance() const noexcept { return m_params.junction_capacitance_f > 0.0; }
    /// n Vt, V.
    [[nodiscard]] double emission_voltage_v() const noexcept { return m_nvt; }
    /// Is at the operating temperature, A.
    [[nodiscard]] double saturation_current_a() const noexcept { return m_law.saturation_current_a; }
    [[nodiscard]] const diode_params& params() const noexcept { return m_params; }

private:
    diode_params m_params;
    double m_nvt;
    junction_law m_law;
};

/// The earpiece (or other load) across the output node.
enum class earpiece_kind {
    piezo,    ///< ceramic or crystal: capacitance + leakage, optional Butterworth-Van Dyke motional branch
    magnetic, ///< high-impedance magnetic phones: DC resistance in series with inductance || loss resistance
    resistor, ///< a plain resistance
};

[[nodiscard]] std::string_view to_string(earpiece_kind k) noexcept;
/// Parses "piezo", "magnetic" or "resistor"; throws config_error otherwise.
[[nodiscard]] earpiece_kind parse_earpiece_kind(std::string_view s);

/// Earpiece parameters. Fields that do not apply to `kind` are ignored.
struct earpiece_params {
    earpiece_kind kind = earpiece_kind::piezo;
    double capacitance_f = 10e-9;            ///< piezo C0, F; [0, 1e-5]
    double leakage_ohm = infinite_ohm;       ///< piezo leakage, ohm; > 0, inf = none
    double motional_resistance_ohm = 0.0;    ///< BVD Rm, ohm; >= 0
    double motional_inductance_h = 0.0;      ///< BVD Lm, H; 0 = no motional branch
    double motional_capacitance_f = 0.0;     ///< BVD Cm, F; > 0 when Lm > 0
    double resistance_ohm = 2000.0;          ///< magnetic DC resistance, or resistor value, ohm; > 0
    double inductance_h = 1.5;               ///< magnetic inductance, H; > 0
    double loss_resistance_ohm = 50e3;       ///< magnetic core/eddy loss in parallel with L, ohm; > 0, inf = none
    /// Piezo transduction ratio N: diaphragm force per volt across the motional branch, N/V; (0, 1e3].
    /// The default 0.02 N/V is a typical order of magnitude from memory, not a measured value.
    double piezo_force_factor_n_per_volt = 0.02;
    /// Magnetic phones' force factor Bl: diaphragm force per ampere through the winding's inductance, T m
    /// (= N/A); (0, 1e4]. The default 5 T m is a typical order of magnitude from memory, not a measured value.
    double magnetic_force_factor_tm = 5.0;

    /// Throws config_error naming the first field that breaks its range.
    const earpiece_params& validate() const;
    /// True for a piezo with a motional (BVD) branch.
    [[nodiscard]] bool has_motional_branch() const noexcept
    {
        return kind == earpiece_kind::piezo && motional_inductance_h > 0.0;
    }
};

/// Everything that hangs on the output node besides the earpiece.
struct load_params {
    double bleeder_ohm = infinite_ohm;       ///< resistor across the earpiece, ohm; > 0, inf = none
    double filter_capacitance_f = 0.0;       ///< capacitor across the output, F; [0, 1e-4]
    /// Wiring and cord capacitance at the output node, F; [0, 1e-6]. Always present so that the
    /// output node carries a state; 10 pF is a typical cord figure (from memory).
    double stray_capacitance_f = 10e-12;

    const load_params& validate() const;
};

/// Thevenin source: the AM voltage behind the tuned circuit's dynamic resistance at the tap.
struct source_params {
    double resistance_ohm = 20e3; ///< ohm; [0, 1e9]
    const source_params& validate() const;
};

} // namespace galena
