#include "galena/components.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/junction_law_eval.hpp"
#include "galena/validate.hpp"

#include <cmath>
#include <fmt/format.h>

namespace galena {

junction_values junction_law::evaluate(double v_v) const noexcept
{
    return detail::evaluate_inline(*this, v_v);
}

using detail::require_above;
using detail::require_range;

namespace {
constexpr double inf = std::numeric_limits<double>::infinity();
/// SPICE forward-bias depletion-capacitance coefficient Fc.
constexpr double depletion_fc = 0.5;
} // namespace

const diode_params& diode_params::validate() const
{
    require_above("diode.saturation_current_a", saturation_current_a, 0.0, 1e-2, "A");
    require_range("diode.emission_coefficient", emission_coefficient, 0.5, 10.0);
    require_range("diode.series_resistance_ohm", series_resistance_ohm, 0.0, 1e6, "ohm");
    require_above("diode.leakage_resistance_ohm", leakage_resistance_ohm, 0.0, inf, "ohm");
    require_range("diode.junction_capacitance_f", junction_capacitance_f, 0.0, 1e-9, "F");
    require_range("diode.junction_potential_v", junction_potential_v, 0.05, 2.0, "V");
    require_range("diode.grading_coefficient", grading_coefficient, 0.05, 0.95);
    require_above("diode.breakdown_voltage_v", breakdown_voltage_v, 0.0, inf, "V");
    require_above("diode.breakdown_current_a", breakdown_current_a, 0.0, 1.0, "A");
    require_range("diode.temperature_c", temperature_c, -60.0, 150.0, "degC");
    require_range("diode.nominal_temperature_c", nominal_temperature_c, -60.0, 150.0, "degC");
    require_range("diode.energy_gap_ev", energy_gap_ev, 0.1, 4.0, "eV");
    require_range("diode.saturation_current_exponent", saturation_current_exponent, 0.0, 10.0);
    return *this;
}

double diode_params::thermal_voltage() const noexcept
{
    return thermal_voltage_v(kelvin_from_celsius(temperature_c));
}

double diode_params::saturation_current_at_temperature() const noexcept
{
    const double t = kelvin_from_celsius(temperature_c);
    const double tn = kelvin_from_celsius(nominal_temperature_c);
    const double ratio = t / tn;
    const double nvt = emission_coefficient * thermal_voltage();
    return saturation_current_a * std::pow(ratio, saturation_current_exponent / emission_coefficient) *
           std::exp((ratio - 1.0) * energy_gap_ev / nvt);
}

double diode_params::video_resistance_ohm() const noexcept
{
    return emission_coefficient * thermal_voltage() / saturation_current_at_temperature();
}

const std::vector<diode_preset>& diode_presets()
{
    // All values are typical figures recalled from memory (see DEVELOPERS.md, "Presets"); specimens vary
    // widely, and users should enter their own measured Is, n and Rs.
    static const std::vector<diode_preset> presets = [] {
        std::vector<diode_preset> v;
        diode_params ge;
        ge.name = "germanium-point-contact";
        ge.saturation_current_a = 1e-6;
        ge.emission_coefficient = 1.3;
        ge.series_resistance_ohm = 15.0;
        ge.leakage_resistance_ohm = 500e3;
        ge.junction_capacitance_f = 0.8e-12;
        ge.junction_potential_v = 0.3;
        ge.grading_coefficient = 0.5;
        ge.energy_gap_ev = 0.67;
        ge.saturation_current_exponent = 3.0;
        v.push_back({"germanium-point-contact",
                     "germanium point-contact signal diode: low turn-on, noticeable reverse leakage (typical values)",
                     ge});
        diode_params sk;
        sk.name = "small-signal-schottky";
        sk.saturation_current_a = 20e-9;
        sk.emission_coefficient = 1.08;
        sk.series_resistance_ohm = 15.0;
        sk.junction_capacitance_f = 1.2e-12;
        sk.junction_potential_v = 0.5;
        sk.grading_coefficient = 0.5;
        sk.energy_gap_ev = 0.69;
        sk.saturation_current_exponent = 2.0;
        v.push_back({"small-signal-schottky",
                     "small-signal silicon Schottky barrier diode: very low leakage (typical values)", sk});
        diode_params zb;
        zb.name = "zero-bias-schottky-detector";
        zb.saturation_current_a = 4e-6;
        zb.emission_coefficient = 1.05;
        zb.series_resistance_ohm = 22.0;
        zb.junction_capacitance_f = 0.18e-12;
        zb.junction_potential_v = 0.35;
        zb.grading_coefficient = 0.5;
        zb.breakdown_voltage_v = 2.0;
        zb.breakdown_current_a = 1e-5;
        zb.energy_gap_ev = 0.69;
        zb.saturation_current_exponent = 2.0;
        v.push_back({"zero-bias-schottky-detector",
                     "zero-bias Schottky detector diode: high Is, low breakdown voltage (typical values)", zb});
        diode_params si;
        si.name = "silicon-junction-switching";
        si.saturation_current_a = 3e-9;
        si.emission_coefficient = 1.9;
        si.series_resistance_ohm = 0.7;
        si.junction_capacitance_f = 2e-12;
        si.junction_potential_v = 0.7;
        si.grading_coefficient = 0.33;
        si.breakdown_voltage_v = 100.0;
        si.breakdown_current_a = 1e-7;
        si.energy_gap_ev = 1.11;
        si.saturation_current_exponent = 3.0;
        v.push_back({"silicon-junction-switching",
                     "silicon junction switching diode: poor weak-signal detector, Rv in the tens of Mohm (typical values)",
                     si});
        return v;
    }();
    return presets;
}

const diode_preset& find_diode_preset(std::string_view name)
{
    std::string names;
    for (const auto& p : diode_presets()) {
        if (p.name == name) return p;
        names += names.empty() ? "" : ", ";
        names += p.name;
    }
    throw config_error(fmt::format("diode.preset = \"{}\": unknown preset; valid presets are {}", name, names));
}

diode_model::diode_model(const diode_params& p) : m_params(p)
{
    p.validate();
    m_nvt = p.emission_coefficient * p.thermal_voltage();
    junction_law& l = m_law;
    l.saturation_current_a = p.saturation_current_at_temperature();
    l.inv_emission_voltage = 1.0 / m_nvt;
    l.leakage_s = conductance_s(p.leakage_resistance_ohm);
    l.breakdown = std::isfinite(p.breakdown_voltage_v);
    l.breakdown_voltage_v = l.breakdown ? p.breakdown_voltage_v : 0.0;
    l.breakdown_current_a = p.breakdown_current_a;
    l.cj0_f = p.junction_capacitance_f;
    l.junction_potential_v = p.junction_potential_v;
    const double m = p.grading_coefficient;
    l.grading = m;
    l.square_root_grading = m == 0.5;
    l.fc_v = depletion_fc * p.junction_potential_v;
    // Linear continuation of Cj above Fc*Vj (SPICE): C(v) = Cj0 (1-Fc)^-(1+M) (1 - Fc(1+M) + M v / Vj).
    const double f2 = std::pow(1.0 - depletion_fc, -(1.0 + m));
    l.linear_a_f = p.junction_capacitance_f * f2 * (1.0 - depletion_fc * (1.0 + m));
    l.linear_b_f_per_v = p.junction_capacitance_f * f2 * m / p.junction_potential_v;
    l.charge_at_fc_c = p.junction_capacitance_f * p.junction_potential_v / (1.0 - m) *
                       (1.0 - std::pow(1.0 - depletion_fc, 1.0 - m));
}

std::string_view to_string(earpiece_kind k) noexcept
{
    switch (k) {
    case earpiece_kind::piezo: return "piezo";
    case earpiece_kind::magnetic: return "magnetic";
    case earpiece_kind::resistor: return "resistor";
    }
    return "?";
}

earpiece_kind parse_earpiece_kind(std::string_view s)
{
    if (s == "piezo") return earpiece_kind::piezo;
    if (s == "magnetic") return earpiece_kind::magnetic;
    if (s == "resistor") return earpiece_kind::resistor;
    throw config_error(fmt::format("earpiece.kind = \"{}\": must be one of piezo, magnetic, resistor", s));
}

const earpiece_params& earpiece_params::validate() const
{
    switch (kind) {
    case earpiece_kind::piezo:
        require_range("earpiece.capacitance_f", capacitance_f, 0.0, 1e-5, "F");
        require_above("earpiece.leakage_ohm", leakage_ohm, 0.0, inf, "ohm");
        require_range("earpiece.motional_inductance_h", motional_inductance_h, 0.0, 1e3, "H");
        if (motional_inductance_h > 0.0) {
            require_range("earpiece.motional_resistance_ohm", motional_resistance_ohm, 0.0, 1e9, "ohm");
            require_above("earpiece.motional_capacitance_f", motional_capacitance_f, 0.0, 1e-5, "F");
        }
        require_above("earpiece.piezo_force_factor_n_per_volt", piezo_force_factor_n_per_volt, 0.0, 1e3, "N/V");
        break;
    case earpiece_kind::magnetic:
        require_above("earpiece.resistance_ohm", resistance_ohm, 0.0, 1e9, "ohm");
        require_above("earpiece.inductance_h", inductance_h, 0.0, 1e3, "H");
        require_above("earpiece.loss_resistance_ohm", loss_resistance_ohm, 0.0, inf, "ohm");
        require_above("earpiece.magnetic_force_factor_tm", magnetic_force_factor_tm, 0.0, 1e4, "T m");
        break;
    case earpiece_kind::resistor:
        require_above("earpiece.resistance_ohm", resistance_ohm, 0.0, 1e12, "ohm");
        break;
    }
    return *this;
}

const load_params& load_params::validate() const
{
    require_above("load.bleeder_ohm", bleeder_ohm, 0.0, inf, "ohm");
    require_range("load.filter_capacitance_f", filter_capacitance_f, 0.0, 1e-4, "F");
    require_range("load.stray_capacitance_f", stray_capacitance_f, 0.0, 1e-6, "F");
    return *this;
}

const source_params& source_params::validate() const
{
    require_range("source.resistance_ohm", resistance_ohm, 0.0, 1e9, "ohm");
    return *this;
}

} // namespace galena
