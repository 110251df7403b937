/// Analysis of a detector network from its linear constants, without simulating it: the settling window
/// of the analysis, the clipping limits (diagonal, negative-peak, combined) and, given a rendered waveform,
/// the observed failure to follow the envelope. The simulated sweeps and the metrics of a render that use
/// these live in characterize.hpp.
#pragma once

#include "galena/circuit.hpp"
#include "galena/warning.hpp"

#include <span>
#include <string>
#include <vector>

namespace galena {

/// The analysis window's start-up skip, chosen from the circuit's time constants.
struct settling_window {
    double settle_s = 0.0;          ///< samples before this programme time are skipped, s
    double output_tau_s = 0.0;      ///< C_node / G_dc, s (inf without a DC path)
    double charge_tau_s = 0.0;      ///< (R_src + R_s) C_node, s: the charging path through a conducting diode
    double earpiece_tau_s = 0.0;    ///< decay time of the earpiece branch (BVD 2 Lm / Rm; magnetic L / R), s; 0 when none
    std::string basis;              ///< which constant set settle_s, for reports
};

/// settle_s = 5 x the slowest of the envelope time constant (output_tau_s, or charge_tau_s when there is
/// no DC path) and the earpiece decay, clamped to [1 ms, 0.2 s]. Five time constants leave e^-5 < 1 % of a
/// step (common practice). The render's preroll already settles the unmodulated DC; this window covers the
/// programme onset (tone start, level steps).
[[nodiscard]] settling_window choose_settling_window(const detector_network& net);

/// Clipping limits of an envelope detector for a tone of frequency wm and modulation index m.
///
/// The load seen by the detector is Y(jw) = G_node + jw C_node + Y_earpiece(jw). Following requires the
/// load current never to reverse: V (G_dc + m |Y(jwm)| cos(.)) >= 0, so the detector follows only while
/// m <= G_dc / |Y(jwm)| (combined limit). Its two classic special cases (standard communications texts,
/// e.g. Haykin, Communication Systems; Kennedy & Davis, Electronic Communication Systems):
/// - diagonal clipping, R C load: m_max = 1 / sqrt(1 + (wm R C)^2), with R = R_dc and C = C_node;
/// - negative-peak clipping, AC-coupled load: m_max = R_ac / R_dc, with R_ac = 1 / Re Y_load(jwm) (the
///   load without C_node; the BVD motional branch is the AC-coupled part here).
struct clipping_diagnosis {
    double tone_hz = 0.0;
    double modulation_index = 0.0;
    double dc_load_ohm = 0.0;             ///< R_dc, ohm (inf without a DC path)
    double node_capacitance_f = 0.0;      ///< C, F
    double diagonal_m_max = 1.0;          ///< 1 / sqrt(1 + (wm R_dc C)^2)
    bool ac_coupled_load = false;         ///< true when part of the load blocks DC (BVD motional branch)
    double ac_load_ohm = 0.0;             ///< R_ac, ohm
    double negative_peak_m_max = 1.0;     ///< R_ac / R_dc (1 when there is no AC-coupled load)
    double combined_m_max = 1.0;          ///< G_dc / |Y(jwm)|
    bool exceeds_diagonal = false;        ///< m > diagonal_m_max
    bool exceeds_negative_peak = false;   ///< m > negative_peak_m_max
    bool observation_available = false;   ///< the waveform check below ran
    /// Fraction of samples in the analysed waveform in which the output falls at >= 95 % of the free
    /// discharge rate of the node (diode off for the whole sample interval): the detector is not following.
    double free_discharge_fraction = 0.0;
    bool observed_failure_to_follow = false; ///< free_discharge_fraction > 2 %
};

/// Computes the limits for a tone at tone_hz (> 0) and index m (>= 0). Never throws for a valid network.
[[nodiscard]] clipping_diagnosis diagnose_clipping(const detector_network& net, double tone_hz, double m);

/// Adds the waveform check: the earpiece voltage (DC included, V) at fs_hz over the analysis window.
/// free discharge over one sample: v_{k+1} = v_k exp(-h / tau_free) with tau_free = C_node / G_free, where
/// G_free = G_node + 1 / (R_leak,diode + R_src + R_s). Only for loads without earpiece states (piezo without
/// motional branch, resistor); otherwise observation_available stays false.
void observe_failure_to_follow(clipping_diagnosis& d, const detector_network& net, std::span<const double> earpiece_v,
                               double fs_hz);

/// The warnings a render's metrics should carry for this tone. Clipping is reported as observed when the
/// waveform check observed it (failure_to_follow: "diagonal clipping observed", with the formula's limit
/// and its frequency as context). The diagonal formula alone warns (diagonal_clipping, "predicted, not
/// checked") only when the check is not available for this load; when the check ran and found the render
/// clean, the formula's limit is information (clipping_notes), not a warning. negative_peak_clipping when
/// m exceeds R_ac / R_dc (a formula for AC-coupled loads, where the check does not apply).
[[nodiscard]] std::vector<warning> clipping_warnings(const clipping_diagnosis& d);

/// Information for a person, not warnings: today the diagonal formula's limit with its tone frequency when
/// m is above it but the render measures clean.
[[nodiscard]] std::vector<std::string> clipping_notes(const clipping_diagnosis& d);

/// "observed", "not observed" (the check ran), "predicted, not checked" (no check for this load, m above
/// the formula's limit) or "not predicted".
[[nodiscard]] std::string diagonal_clipping_status(const clipping_diagnosis& d);

} // namespace galena
