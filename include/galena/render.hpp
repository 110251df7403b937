/// One render: an AM source, the detector network and the solver run together in bounded chunks, with
/// the earpiece voltage taken to the audio rate through a three-stage anti-alias chain (the exact mean
/// over each carrier cycle, a Kaiser-windowed sinc resampler to 4 x audio rate, a 90 dB Kaiser FIR to
/// the audio rate) whose delays are removed, so output sample k is programme time k / fs.
#pragma once

#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/front_end.hpp"
#include "galena/integrator.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"
#include "galena/warning.hpp"

#include <complex>
#include <cstddef>
#include <functional>
#include <span>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// Which integrator a render uses.
enum class solver_method {
    phase_locked, ///< cycle_integrator: trapezoidal rule, N steps per carrier cycle (the default)
    adaptive,     ///< tr_bdf2: error-controlled TR-BDF2 (slower; the in-project cross-check)
};
[[nodiscard]] std::string_view to_string(solver_method m) noexcept;
/// Parses "phase-locked" or "adaptive"; throws config_error otherwise.
[[nodiscard]] solver_method parse_solver_method(std::string_view s);

/// Settings of the render loop.
struct render_settings {
    solver_method method = solver_method::phase_locked;
    /// Phase-locked: trapezoidal steps per carrier cycle; 0 = chosen automatically for dc_tolerance.
    int steps_per_cycle = 0;
    /// Phase-locked, automatic N: relative error allowed in the detected (rectified) level at the
    /// envelope's crest, mean and trough, estimated as |V(N) - V(2N)| / V(2N); (0, 0.1]
    double dc_tolerance = 2e-5;
    /// Phase-locked: Newton's remaining linearisation error, relative to the carrier crest; (0, 1e-3]
    double newton_tolerance = 1e-8;
    double audio_rate_hz = 48000.0;   ///< output sample rate, Hz; [8000, 192000]
    double preroll_s = -1.0;          ///< unmodulated carrier before the programme, s; < 0 = automatic
    double dc_block_hz = 10.0;        ///< corner of the 2nd-order DC-removing high-pass, Hz; (0, 200]
    double chunk_s = 5e-3;            ///< simulated time per chunk (memory bound), s; [1e-4, 1]
    step_settings stepper;            ///< adaptive method: tolerances; max_step_s is bounded by the carrier period
    /// Adaptive method: h_max = carrier period / this; [4, 1000]. Local error control alone lets the bias of many small
    /// per-cycle errors pile up on the slow output node (global error ~ cycles x local error), so the
    /// step is also bounded per carrier cycle: 40 steps per cycle keep the rectified DC within about 1e-5
    /// of the converged value (measured, DEVELOPERS.md "Accuracy").
    double carrier_steps_floor = 40.0;
};

/// One block of output at the audio rate.
struct audio_block {
    std::size_t first_sample;              ///< index of the first sample in the programme
    std::span<const double> earpiece_v;    ///< earpiece voltage, V, DC included
    std::span<const double> audio_v;       ///< earpiece voltage with DC removed, V
};

/// Called with consecutive blocks; may throw to abort the render.
using audio_sink = std::function<void(const audio_block&)>;

/// Summary of a finished render.
struct render_result {
    std::size_t samples = 0;          ///< audio samples delivered
    double audio_rate_hz = 0.0;
    double preroll_s = 0.0;           ///< preroll actually used, s
    double simulated_s = 0.0;         ///< total simulated time, preroll included, s
    double wall_s = 0.0;              ///< wall-clock time of the simulation, s
    double sample_rate_fine_hz = 0.0; ///< rate of the first decimation stage (the carrier-cycle means), Hz
    solver_method method = solver_method::phase_locked;
    int steps_per_cycle = 0;          ///< phase-locked: N used
    double estimated_dc_error = 0.0;  ///< phase-locked, automatic N: |V(N) - V(2N)| / V(2N) at the worst level
    double step_choice_s = 0.0;       ///< phase-locked, automatic N: wall time spent choosing N, s
    cycle_stats cycles;               ///< phase-locked work counters
    step_stats stats;                 ///< steps (phase-locked: N per cycle) and Newton work
    std::vector<warning> warnings;
};

/// Automatic preroll: five output time constants, clamped to [5 ms, 0.25 s] and at least the audio chain's
/// start-up (audio_chain_warm_up_s; the DC high-pass absorbs
/// slower drift), rounded up to a whole number of audio samples.
[[nodiscard]] double automatic_preroll_s(const detector_network& net, double audio_rate_hz);

/// Start-up of the audio chain's decimating FIR at `audio_rate_hz`, s: outputs before this time still hold
/// its empty history, so any preroll must be at least this long ((L - 4) / (4 fs) for L taps: 1.47 ms at
/// 48 kHz, 8.8 ms at 8 kHz). The automatic preroll never falls below it.
[[nodiscard]] double audio_chain_warm_up_s(double audio_rate_hz);

/// Runs the simulation of `programme` through the network, delivering programme-aligned audio to `sink`.
/// @param am carrier and modulation settings; its preroll/ramp fields are set by this function
/// Throws config_error (bad settings), integration_error (solver failure, with the simulated time).
render_result render(const circuit_params& circuit, am_params am, modulation& programme, const render_settings& settings,
                     const audio_sink& sink);

/// One station of a whole-receiver render: its parameters and its programme (non-owning; must outlive the render).
struct receiver_station {
    station_params params;
    modulation* programme = nullptr;
};

/// A whole receiver: detector, load and earpiece as in circuit_params (its source is unused), the antenna,
/// the tuned circuit (any layout but bench) and the stations, the first one wanted (the grid's reference).
struct receiver_spec {
    circuit_params circuit;
    antenna_params antenna;
    tuner_params tuner;
    std::vector<receiver_station> stations;
    /// Background noise at the antenna: a band_noise station around the wanted carrier, EMF density =
    /// field density x antenna.effective_height_m (as the stations' field). Off when field_density = 0.
    antenna_noise_params noise;
};

/// Front-end figures measured by a whole-receiver render (SI units).
struct receiver_figures {
    double tuned_hz = 0.0;             ///< response peak with the detector's measured RF loading, Hz (NaN: none)
    double loaded_q = 0.0;             ///< tuned_hz / rf_bandwidth_hz (NaN when untuned)
    double rf_bandwidth_hz = 0.0;      ///< -3 dB bandwidth at the detector, Hz (NaN when untuned)
    double unloaded_tuned_hz = 0.0;    ///< the same peak with the junction removed, Hz
    double detector_rf_peak_v = 0.0;   ///< largest |voltage| at the detector's input node over the programme, V
    std::complex<double> detector_admittance_s{}; ///< the junction's effective admittance at the wanted carrier, S
    double wanted_emf_peak_v = 0.0;    ///< the wanted station's unmodulated EMF peak, V
};

/// Renders a whole receiver at RF on the rf_integrator (N = settings.steps_per_cycle, 0 = 32, steps per cycle
/// of the wanted carrier), delivering programme-aligned audio like render(). The automatic preroll also
/// covers the tuned circuit's settling (12 x Q_u / (pi f0)). Throws config_error, integration_error.
render_result render_receiver(const receiver_spec& spec, const render_settings& settings, const audio_sink& sink,
                              receiver_figures& figures);

/// Convenience: renders and returns the whole earpiece (DC included) and audio (DC removed) signals.
struct rendered_audio {
    std::vector<double> earpiece_v;
    std::vector<double> audio_v;
    render_result result;
};
[[nodiscard]] rendered_audio render_to_memory(const circuit_params& circuit, const am_params& am, modulation& programme,
                                              const render_settings& settings);

} // namespace galena
