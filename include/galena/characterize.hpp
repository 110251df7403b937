/// Characterisation of a detector circuit by simulation, and the metrics of a render: the detector
/// transfer curve over carrier level, the frequency response by stepped tones, the carrier ripple, and
/// measure_render (the one call behind metrics.json), with their JSON.
///
/// Everything here runs render_to_memory (the production solver) or takes a rendered waveform; the circuit's
/// own constants (settling window, clipping limits) come from detector_analysis.hpp and the numbers from
/// the metrics module. Results are plain structs with to_json() helpers that
/// produce flat keys in SI units (transfer curve and response as arrays, for plotting).
#pragma once

#include "galena/circuit.hpp"
#include "galena/detector_analysis.hpp"
#include "galena/metrics.hpp"
#include "galena/render.hpp"

#include <nlohmann/json.hpp>

#include <span>
#include <string>
#include <vector>

namespace galena {

/// Common settings of the simulated sweeps.
struct characterize_settings {
    double carrier_hz = 200e3;      ///< carrier, Hz (laws hold while R C >> 1/fc); >= 2.5 x audio Nyquist
    double tone_hz = 400.0;         ///< modulating tone, Hz
    double modulation_index = 0.3;  ///< m; (0, 1]
    double analysis_s = 0.02;       ///< analysed span after settling, s; at least 4 periods are used
    double band_low_hz = 20.0;      ///< audio band of the tone analysis, Hz
    double band_high_hz = 10000.0;
    render_settings render;         ///< audio rate, tolerances (absolute tolerance is scaled down for weak signals)
};

/// The detector output for one carrier level.
struct transfer_point {
    double carrier_peak_v = 0.0;    ///< open-circuit carrier peak, V
    double dc_v = 0.0;              ///< mean earpiece voltage, V
    double audio_v = 0.0;           ///< recovered tone peak amplitude, V
    double h2_ratio = 0.0;          ///< H2 / H1
    double thd_percent = 0.0;
    double efficiency = 0.0;        ///< audio_v / (m x carrier_peak_v)
};

/// Audio output and DC against carrier level, with the two asymptotic slopes and their crossing.
struct transfer_curve {
    double tone_hz = 0.0;
    double modulation_index = 0.0;
    std::vector<transfer_point> points;
    double low_slope_db_per_db = 0.0;   ///< least-squares slope of 20 log10 audio_v vs 20 log10 V, lowest 3 points
    double high_slope_db_per_db = 0.0;  ///< same, highest 3 points
    double low_dc_slope_db_per_db = 0.0;  ///< DC slopes, same points (needs a DC path to be meaningful)
    double high_dc_slope_db_per_db = 0.0;
    /// Square-law-to-linear transition: carrier level where the two fitted asymptotes cross, V.
    double transition_v = 0.0;
    std::vector<warning> warnings;
};

/// Logarithmically spaced values from lo to hi inclusive (count >= 2, 0 < lo < hi).
[[nodiscard]] std::vector<double> log_spaced(double lo, double hi, int count);

/// Simulates one tone render per carrier level (ascending, >= 6 levels so that each region has 3 points)
/// and measures DC and the recovered tone after the settling window.
/// Throws config_error on bad settings, integration_error from the solver.
[[nodiscard]] transfer_curve measure_transfer_curve(const circuit_params& circuit, const std::vector<double>& carrier_peak_v,
                                                    const characterize_settings& s);

/// One point of a frequency response.
struct response_point {
    double frequency_hz = 0.0;
    double amplitude_v = 0.0;       ///< recovered tone peak amplitude at the earpiece, V
    double gain_db = 0.0;           ///< 20 log10(amplitude_v / (m A)): earpiece volts per volt of envelope swing
    double relative_db = 0.0;       ///< gain re the largest gain of the sweep, dB
};

/// Magnitude response of the whole chain, audio in to earpiece voltage, and its -3 dB corners.
struct frequency_response {
    std::vector<response_point> points;
    double carrier_peak_v = 0.0;
    double modulation_index = 0.0;
    double peak_gain_db = 0.0;
    double low_corner_hz = 0.0;     ///< -3 dB re peak, below the peak (log interpolation); NaN when not in range
    double high_corner_hz = 0.0;    ///< -3 dB re peak, above the peak; NaN when not in range
    double settle_s = 0.0;          ///< skipped at the start of each step, s
};

/// Stepped tones (one render of stepped_tone_modulation) at `frequencies_hz` (ascending, > 0) with carrier
/// `carrier_peak_v`; each step dwells settle + max(analysis_s, 4 periods) + 2 fades.
[[nodiscard]] frequency_response measure_frequency_response(const circuit_params& circuit, double carrier_peak_v,
                                                            const std::vector<double>& frequencies_hz,
                                                            const characterize_settings& s);

/// Carrier ripple left at the earpiece with an unmodulated carrier, from a direct solver run sampled at
/// 64 points per carrier period (the render's audio output cannot show it: the decimation chain removes it).
struct carrier_ripple {
    double carrier_hz = 0.0;
    double carrier_peak_v = 0.0;
    double dc_v = 0.0;                 ///< mean earpiece voltage over the window, V
    double ripple_rms_v = 0.0;         ///< RMS of (v - mean) over whole carrier cycles, V
    std::vector<double> harmonic_rms_v; ///< RMS at fc, 2 fc, 3 fc (least-squares fit), V
    double settle_s = 0.0;             ///< unmodulated run before the window, s
};

/// Runs the circuit on an unmodulated carrier for the settling window, then measures `cycles` carrier
/// cycles (>= 10). Cost: about settle_s x fc x 40 solver steps. Throws config_error, integration_error.
[[nodiscard]] carrier_ripple measure_carrier_ripple(const circuit_params& circuit, double carrier_hz, double carrier_peak_v,
                                                    int cycles = 200, const step_settings& stepper = {});

/// The earpiece's diaphragm drive force waveform, N (transducer.hpp: piezo N v, BVD N q_m / C_m, magnetic
/// Bl i_L), from its terminal voltage samples `terminal_v` (V, DC included, at fs_hz > 0, from rest as renders
/// start): diaphragm_drive_per_volt applied per FFT bin (exact at every frequency; zero-padded so that the
/// branch's response does not wrap). All zeros for the resistor. Throws config_error for a bad rate.
[[nodiscard]] std::vector<double> diaphragm_drive_n(const earpiece_params& e, std::span<const double> terminal_v, double fs_hz);

/// What the programme of a render was, for measure_render().
struct metrics_request {
    double tone_hz = 0.0;           ///< > 0: the programme is one tone at this frequency (tone analysis)
    double tone2_hz = 0.0;          ///< > 0 together with tone_hz: a two-tone programme (tone_hz < tone2_hz, IMD)
    double tone_ratio = 4.0;        ///< amplitude ratio tone_hz : tone2_hz of the programme (two-tone)
    /// For clips: the programme x(t) at the same rate and length as the earpiece samples (optional); gives
    /// the fidelity figures. Empty = none.
    std::span<const double> reference;
    /// For clips: highest programme frequency, Hz, at which the clipping limits are evaluated (0 = skip).
    double clip_top_hz = 0.0;
    double band_low_hz = 20.0;      ///< audio band, Hz (the upper edge is clamped to fs/2)
    double band_high_hz = 10000.0;
};

/// Every number of one render, and the same as one flat JSON object with `warnings`.
struct render_metrics {
    settling_window settling;
    level_metrics levels;
    bool has_tone = false;
    tone_metrics tone;
    double detection_efficiency = 0.0; ///< tone amplitude / (m x carrier peak x tone amplitude in x); tone only
    bool has_imd = false;
    imd_metrics imd;
    bool has_fidelity = false;
    fidelity_metrics fidelity;
    bool has_clipping = false;
    clipping_diagnosis clipping;
    /// RMS in the audio band of the earpiece's diaphragm drive force (transducer.hpp), N; NaN for the
    /// resistor load. The quantity each earpiece kind's drive is computed from: diaphragm_drive_quantity().
    double diaphragm_drive_rms_n = 0.0;
    std::vector<warning> warnings;
    /// Flat keys: every key of the metrics to_json() helpers present above, plus carrier_hz, carrier_peak_v,
    /// modulation_index, detection_efficiency, analysed_s, diaphragm_drive_rms_n, diaphragm_drive_db_re_1mn,
    /// diaphragm_drive_quantity (null for the resistor load), warnings and warning_codes.
    nlohmann::json json;
};

/// Measures a finished render: skips the settling window (choose_settling_window) at the start of the
/// programme-aligned earpiece samples, then computes levels, the tone or two-tone figures or the fidelity
/// as `request` says, and the clipping diagnosis for the programme's highest tone (predicted and observed).
/// @param earpiece_v rendered_audio::earpiece_v (DC included), V, at fs_hz
/// Throws config_error when too little remains after the settling window for the requested analysis.
[[nodiscard]] render_metrics measure_render(std::span<const double> earpiece_v, double fs_hz, const circuit_params& circuit,
                                            const am_params& am, const metrics_request& request);

/// Flat keys: settle_s, settle_basis, output_tau_s, charge_tau_s, earpiece_tau_s.
[[nodiscard]] nlohmann::json to_json(const settling_window& w);
/// Flat keys: clip_dc_load_ohm, clip_node_capacitance_f, diagonal_clip_m_max, ac_coupled_load, ac_load_ohm,
/// negative_peak_m_max, combined_clip_m_max, diagonal_clip_tone_hz (the tone the limits apply to),
/// m_above_diagonal_formula (information), diagonal_clipping (diagonal_clipping_status), clipping_notes,
/// exceeds_negative_peak_clip, failure_to_follow_fraction (null when not observed), failure_to_follow_observed.
[[nodiscard]] nlohmann::json to_json(const clipping_diagnosis& d);
/// Keys: transfer_tone_hz, transfer_modulation_index, transfer_low_slope_db_per_db, transfer_high_slope_db_per_db,
/// transfer_transition_v, and arrays transfer_carrier_peak_v, transfer_audio_v, transfer_dc_v, transfer_h2_ratio.
[[nodiscard]] nlohmann::json to_json(const transfer_curve& c);
/// Keys: response_low_corner_hz, response_high_corner_hz, response_peak_gain_db, arrays response_frequency_hz,
/// response_gain_db, response_relative_db.
[[nodiscard]] nlohmann::json to_json(const frequency_response& r);
/// Keys: ripple_carrier_hz, ripple_rms_v, ripple_fc_rms_v, ripple_2fc_rms_v, ripple_3fc_rms_v, ripple_dc_v.
[[nodiscard]] nlohmann::json to_json(const carrier_ripple& r);

} // namespace galena
