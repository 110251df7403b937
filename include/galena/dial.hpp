/// Turning the dial: a whole receiver rendered while its tuning capacitor moves (charge-conserving, piecewise
/// constant over short intervals), with each station's RF level at the detector traced along the way, and
/// the band survey drawn from that trace.
#pragma once

#include "galena/render.hpp"
#include "galena/rf_integrator.hpp"

#include <cstddef>
#include <functional>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// How the dial moves between two frequencies.
enum class dial_law {
    frequency,   ///< the tuned frequency changes linearly in time
    capacitance, ///< the tuning capacitance changes linearly in time (a plain variable capacitor turned evenly)
};

/// The dial's path: either one glide from start_hz to end_hz over glide_s, or (stops_hz not empty) a dwell
/// of dwell_s on each stop with glides of glide_s between consecutive stops.
struct dial_path {
    dial_law law = dial_law::frequency;
    double start_hz = 530e3;          ///< tuned frequency at the start, Hz (glide mode)
    double end_hz = 1700e3;           ///< tuned frequency at the end, Hz (glide mode)
    std::vector<double> stops_hz;     ///< dwell stops, Hz, in dial order; empty for one glide
    double dwell_s = 3.0;             ///< time on each stop, s; [0, 3600] (stop mode)
    double glide_s = 10.0;            ///< one glide's length, s; (0, 3600]
    /// Length of the whole path, s.
    [[nodiscard]] double duration_s() const noexcept;
    /// Lowest and highest tuned frequency on the path, Hz.
    [[nodiscard]] double lowest_hz() const noexcept;
    [[nodiscard]] double highest_hz() const noexcept;
    /// Throws config_error on a bad path.
    const dial_path& validate() const;
};

/// The tuning capacitor against the loaded tuned frequency, tabulated once per render: `points` frequencies
/// over [lo_hz, hi_hz] (geometric), each solved as build_receiver_network solves tuner.tuned_hz; between
/// them 1 / sqrt(C) is interpolated linearly in frequency (exact for a bare LC; the table's spacing keeps the
/// loaded set's departure from it below 1e-6 relative in C for 64 points over 530-1700 kHz).
class dial_tuning {
public:
    /// Throws config_error when the set cannot reach a frequency of the range.
    dial_tuning(const circuit_params& circuit, const antenna_params& antenna, const tuner_params& tuner, double lo_hz, double hi_hz,
                int points = 64);
    /// Tuning capacitance for a tuned frequency (clamped to the table), F.
    [[nodiscard]] double capacitance_f(double tuned_hz) const noexcept;
    /// Tuned frequency for a tuning capacitance (inverse of capacitance_f), Hz.
    [[nodiscard]] double tuned_hz(double capacitance_f) const noexcept;

private:
    std::vector<double> m_f, m_u; // Hz, 1 / sqrt(C)
};

/// Settings of a dial render.
struct dial_settings {
    /// The network is re-assembled and re-tabulated with the capacitor's new value every this many seconds
    /// of simulated time (the value at the interval's middle is held through it; no re-tabulation while the
    /// dial rests on a stop); (0, 0.1]. 2 ms moves a
    /// 10 s sweep over 530-1700 kHz by 234 Hz per interval, about 1/20 of a loaded bandwidth.
    double retune_interval_s = 2e-3;
    /// Each station's level is measured over consecutive windows of this length (Hann), s; [1e-4, 1]. 8 ms
    /// resolves 125 Hz, so a programme's sidebands from 300 Hz up fall outside the window's main lobe
    /// and the carrier's level does not flutter with the programme.
    double level_window_s = 8e-3;
    /// N: the tuned carrier's cycle is cut into at least N steps everywhere on the dial; even, [8, 4096]. The
    /// grid's reference is the path's highest frequency; each retune interval gets the fewest steps per
    /// reference cycle that do this (N f_tuned / f_ref rounded up to a multiple of max(4, N / 16), at least
    /// 8; at most N), so the low end of a band costs fewer steps than the top.
    int steps_per_cycle = 32;
    double audio_rate_hz = 48000.0;
    double dc_block_hz = 10.0;
    double preroll_s = -1.0;      ///< s; < 0: automatic (the output's and the tuned circuit's settling)
    /// Optional, for checks against other simulators: called after every carrier cycle c of the reference
    /// (reference_hz) with the voltage at the detector's output (the earpiece node) at that cycle's step ends,
    /// V: output_v.size() = n, the cycle's grid (see steps_per_cycle), and step i (0-based) ends at
    /// simulation time (c + (i + 1) / n) / reference_hz, which is programme time plus preroll_s. Empty: not
    /// called.
    std::function<void(std::size_t cycle, std::span<const double> output_v)> output_probe;
};

/// One level window: where the dial stood (at the window's middle) and each station's RF level at the
/// detector's input.
struct dial_point {
    double time_s = 0.0;          ///< middle of the window, programme time (0 = the path's start), s
    double tuned_hz = 0.0;        ///< the dial's tuned frequency, Hz
    double capacitance_f = 0.0;   ///< the tuning capacitor, F
    /// Per station (band order): the amplitude of its carrier at the detector's input (the tap), V, from a
    /// Hann-windowed DFT of the simulated voltage over the window.
    std::vector<double> level_v;
};

/// What a dial render measured.
struct dial_result {
    std::vector<std::string> names;       ///< stations, band order
    std::vector<double> carriers_hz;
    std::vector<dial_point> trace;        ///< one per level window inside the path
    std::size_t samples = 0;              ///< audio samples delivered
    double audio_rate_hz = 0.0;
    double reference_hz = 0.0;            ///< the grid's reference carrier, Hz
    int steps_per_cycle = 0;              ///< the grid's steps per reference cycle at the path's top (the setting)
    int fewest_steps_per_cycle = 0;       ///< and the fewest it used (at the path's low end)
    double preroll_s = 0.0;
    double simulated_s = 0.0;
    double wall_s = 0.0;
    double retune_wall_s = 0.0;           ///< of wall_s: re-assembling and re-tabulating, s
    std::size_t retunes = 0;              ///< intervals that re-tabulated (those where the capacitor or the grid moved)
    rf_stats solver;                      ///< the RF integrator's work over the whole render
};

/// Renders the whole receiver `spec` (its tuner's capacitor is set by the dial; tuned_hz and capacitance_f
/// are ignored) while the dial follows `path`, delivering programme-aligned audio to `sink` (as
/// render_receiver). The circuit equations carry the capacitor's change as d(C v)/dt: at each retune the
/// state is mapped by carry_charge (node charges and coil fluxes conserved). Memory is bounded by the trace
/// (one point per interval) and the chunk, not the RF. Every station's programme must last path.duration_s().
/// `progress` (optional) gets the fraction of the path rendered. Throws config_error, integration_error (and
/// whatever `sink` throws, to stop).
dial_result render_dial(const receiver_spec& spec, const dial_path& path, const dial_settings& settings, const audio_sink& sink,
                        const std::function<void(double)>& progress = {});

/// Separation threshold of the band survey: a station is separated where its strongest neighbour's level is
/// at least this far below its own at the dial position of its peak, dB (20 dB: a common-practice figure
/// for an interfering programme heard as faint background, not a standard).
inline constexpr double survey_separation_db = 20.0;

/// One station of the band survey.
struct survey_row {
    std::string name;
    double carrier_hz = 0.0;
    double peak_level_v = 0.0;      ///< its largest level at the detector along the trace, V
    double peak_dial_hz = 0.0;      ///< where the dial stood then, Hz
    std::string neighbour;          ///< the strongest other station at that position ("" if none)
    double neighbour_level_v = 0.0; ///< its level there, V
    double separation_db = 0.0;     ///< 20 log10(peak / neighbour), dB (inf without a neighbour)
    bool separated = false;         ///< separation_db >= survey_separation_db
};
/// The survey of a dial render's trace, one row per station in band order.
[[nodiscard]] std::vector<survey_row> band_survey(const dial_result& r);

} // namespace galena
