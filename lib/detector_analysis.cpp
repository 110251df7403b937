#include "galena/detector_analysis.hpp"

#include "galena/constants.hpp"

#include <algorithm>
#include <cmath>
#include <complex>
#include <fmt/format.h>
#include <limits>

namespace galena {

settling_window choose_settling_window(const detector_network& net)
{
    settling_window w;
    w.output_tau_s = net.output_time_constant_s();
    w.charge_tau_s = net.series_ohm() * net.node_capacitance_f();
    const auto& e = net.params().earpiece;
    if (e.has_motional_branch())
        w.earpiece_tau_s = e.motional_resistance_ohm > 0.0 ? 2.0 * e.motional_inductance_h / e.motional_resistance_ohm
                                                           : std::numeric_limits<double>::infinity();
    else if (e.kind == earpiece_kind::magnetic) {
        const double r = std::isfinite(e.loss_resistance_ohm)
                             ? e.resistance_ohm * e.loss_resistance_ohm / (e.resistance_ohm + e.loss_resistance_ohm)
                             : e.resistance_ohm;
        w.earpiece_tau_s = e.inductance_h / r;
    }
    double tau = w.output_tau_s;
    w.basis = "output_tau";
    if (!std::isfinite(tau)) {
        tau = w.charge_tau_s;
        w.basis = "charge_tau (no DC path)";
    }
    if (w.earpiece_tau_s > tau) {
        tau = w.earpiece_tau_s;
        w.basis = "earpiece_tau";
    }
    w.settle_s = std::clamp(5.0 * tau, 1e-3, 0.2);
    if (w.settle_s == 1e-3 && 5.0 * tau < 1e-3) w.basis += " (floor 1 ms)";
    if (w.settle_s == 0.2 && 5.0 * tau > 0.2) w.basis += " (cap 0.2 s)";
    return w;
}

clipping_diagnosis diagnose_clipping(const detector_network& net, double tone_hz, double m)
{
    clipping_diagnosis d;
    d.tone_hz = tone_hz;
    d.modulation_index = m;
    const double w = two_pi * tone_hz;
    d.dc_load_ohm = net.dc_load_ohm();
    d.node_capacitance_f = net.node_capacitance_f();
    const double g_dc = std::isfinite(d.dc_load_ohm) ? 1.0 / d.dc_load_ohm : 0.0;
    // Diagonal clipping: 1 / sqrt(1 + (wm R C)^2) with the DC load and the node capacitance (Haykin, Communication Systems).
    const double wrc = w * d.dc_load_ohm * d.node_capacitance_f;
    d.diagonal_m_max = std::isfinite(wrc) ? 1.0 / std::sqrt(1.0 + wrc * wrc) : 0.0;
    // The load's admittance at the tone from the network (node capacitance, bleeder, earpiece and its branches).
    const std::complex<double> y_total = net.load_admittance_s(tone_hz);
    // AC-coupled: the load conducts more at the tone than at DC (a motional branch behind a capacitor).
    d.ac_coupled_load = y_total.real() > g_dc * (1.0 + 1e-9);
    d.ac_load_ohm = y_total.real() > 0.0 ? 1.0 / y_total.real() : std::numeric_limits<double>::infinity();
    // Negative-peak clipping: R_ac / R_dc (Haykin, Communication Systems); only an AC-coupled load makes it bind.
    d.negative_peak_m_max = d.ac_coupled_load && std::isfinite(d.dc_load_ohm) ? d.ac_load_ohm / d.dc_load_ohm : 1.0;
    const double y_abs = std::abs(y_total);
    d.combined_m_max = y_abs > 0.0 ? g_dc / y_abs : 1.0;
    d.exceeds_diagonal = m > d.diagonal_m_max;
    d.exceeds_negative_peak = m > d.negative_peak_m_max;
    return d;
}

void observe_failure_to_follow(clipping_diagnosis& d, const detector_network& net, std::span<const double> v, double fs)
{
    d.observation_available = false;
    if (net.earpiece_states() != 0 || v.size() < 3 || !(fs > 0.0)) return;
    const double leak = net.diode().leakage_s();
    const double g_free = net.node_conductance_s() + (leak > 0.0 ? 1.0 / (1.0 / leak + net.series_ohm()) : 0.0);
    if (!(g_free > 0.0)) return;
    const double decay = std::exp(-g_free / (net.node_capacitance_f() * fs)); // free discharge over one sample
    std::size_t count = 0, eligible = 0;
    for (std::size_t k = 0; k + 1 < v.size(); ++k) {
        if (!(v[k] > 0.0)) continue;
        ++eligible;
        const double free_fall = v[k] * (1.0 - decay);
        if (v[k] - v[k + 1] >= 0.95 * free_fall) ++count;
    }
    if (eligible == 0) return;
    d.observation_available = true;
    d.free_discharge_fraction = static_cast<double>(count) / static_cast<double>(eligible);
    d.observed_failure_to_follow = d.free_discharge_fraction > 0.02;
}

namespace {
std::string diagonal_formula_text(const clipping_diagnosis& d)
{
    return fmt::format("the diagonal-clipping formula 1/sqrt(1+(wm R C)^2) gives m <= {:.3g} for a full-depth tone at {:.0f} Hz "
                       "(R = {:.4g} ohm, C = {:.4g} F)",
                       d.diagonal_m_max, d.tone_hz, d.dc_load_ohm, d.node_capacitance_f);
}
} // namespace

std::string diagonal_clipping_status(const clipping_diagnosis& d)
{
    if (d.observation_available) return d.observed_failure_to_follow ? "observed" : "not observed";
    return d.exceeds_diagonal ? "predicted, not checked" : "not predicted";
}

std::vector<warning> clipping_warnings(const clipping_diagnosis& d)
{
    std::vector<warning> w;
    // Observed when it is observed: one warning, with the formula's limit as context.
    if (d.observed_failure_to_follow)
        w.push_back({warning_code::failure_to_follow,
                     fmt::format("diagonal clipping observed: the detector fails to follow the envelope (the output falls at the "
                                 "free-discharge rate in {:.1f} % of samples); m = {:.3g}, and {}",
                                 100.0 * d.free_discharge_fraction, d.modulation_index, diagonal_formula_text(d))});
    // The formula alone is a warning only where the waveform cannot be checked (earpiece states).
    if (d.exceeds_diagonal && !d.observation_available)
        w.push_back({warning_code::diagonal_clipping,
                     fmt::format("modulation index {:.3g} exceeds the diagonal-clipping limit {:.3g} for a full-depth tone at {:.0f} Hz "
                                 "(1/sqrt(1+(wm R C)^2), R = {:.4g} ohm, C = {:.4g} F); predicted, not checked on the waveform "
                                 "(the free-discharge check needs a load without earpiece states)",
                                 d.modulation_index, d.diagonal_m_max, d.tone_hz, d.dc_load_ohm, d.node_capacitance_f)});
    if (d.exceeds_negative_peak)
        w.push_back({warning_code::negative_peak_clipping,
                     fmt::format("modulation index {:.3g} exceeds the negative-peak clipping limit R_ac/R_dc = {:.3g} at {:.0f} Hz",
                                 d.modulation_index, d.negative_peak_m_max, d.tone_hz)});
    return w;
}

std::vector<std::string> clipping_notes(const clipping_diagnosis& d)
{
    std::vector<std::string> n;
    if (d.exceeds_diagonal && d.observation_available && !d.observed_failure_to_follow)
        n.push_back(fmt::format("information: m = {:.3g} is above the formula's limit, but the render measures clean (free discharge "
                                "in {:.2f} % of samples, 2 % counts as clipping): {}; the formula assumes a full-depth tone at "
                                "that frequency, and the programme's energy there is lower",
                                d.modulation_index, 100.0 * d.free_discharge_fraction, diagonal_formula_text(d)));
    return n;
}

} // namespace galena
