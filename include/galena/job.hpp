/// A render job: one scenario rendered into an output directory — the calibrated WAV, a normalised copy
/// when the calibrated one would clip, a JSON sidecar and the metrics — every file written atomically.
#pragma once

#include "galena/cancel.hpp"
#include "galena/render.hpp"
#include "galena/scenario.hpp"
#include "galena/staged_output.hpp"

#include <atomic>
#include <filesystem>
#include <functional>
#include <nlohmann/json.hpp>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// Programme time, s, that one command may render without an explicit opt-in (`--allow-long`): summed over
/// every render of the command (a sweep's variants and tone measurements). At the default 1 MHz carrier the
/// solver runs about ten times slower than real time, so this is some twenty minutes of wall time.
inline constexpr double long_render_limit_s = 120.0;
/// Solver steps (carrier cycles x steps per cycle, preroll included) that one command may take without
/// `--allow-long`: 120 s of programme at the default 1 MHz carrier and N = 32 (about 40 s of wall time at
/// the measured 10 ns per step on one core). Catches a high carrier or a stiff diode whose programme is short.
inline constexpr double long_render_limit_steps = 3.84e9;

struct job_outcome;

/// Headroom of the automatic full scale above the loudest peak of a command's renders, dB (at least): the
/// loudest peak lands at -1 dBFS or a little below, as in the normalised copy and the matched set.
inline constexpr double auto_headroom_db = 1.0;
/// A written WAV whose RMS lies below this, dBFS, raises a quiet_output warning (sine peak 0 dBFS = -3.01 dBFS).
inline constexpr double quiet_output_dbfs = -60.0;

/// The automatic full scale for renders whose loudest peak is `peak_v` (V, after fades): the smallest value
/// with two significant digits (0.14, 0.15, ..., 2.7 V) at least auto_headroom_db above it, so the headroom
/// is 1 to 1.9 dB and the calibration reads as a short number. Every render is known before any WAV is
/// written, so nothing can jump to full scale. 1 V for a silent render; clamped to [1e-9, 1e4] V, the
/// range output.full_scale_v accepts.
[[nodiscard]] double choose_full_scale_v(double peak_v);

/// Options of a job.
struct job_options {
    bool overwrite = false;         ///< replace existing output files
    double fade_s = 0.01;           ///< raised-cosine fade at both ends of the WAV, s; [0, 1]
    std::function<void(double fraction)> progress; ///< optional, called with 0..1
    bool allow_long = false;        ///< render programmes longer than long_render_limit_s
    /// Optional: called with the outcome and the staging folder after the render and before publishing
    /// (e.g. to draw plots there); whatever it writes into the folder is published with the rest, and the
    /// warnings it returns join the outcome's.
    std::function<std::vector<warning>(const job_outcome&, const std::filesystem::path& staged_dir)> extras;
    /// Optional: polled between solver blocks; once true the render stops with cancelled_error.
    const std::atomic<bool>* stop = nullptr;
    /// Optional: this job's own cancel token (non-owning), polled with the process-wide flag between solver
    /// blocks; a request stops this job alone with cancelled_error.
    const cancel_token* cancel = nullptr;
    /// A bench-layout render may take a second core when one is free (render_segmented: the programme split
    /// at a verified seam); the audio equals the serial render's to rounding. For single renders (the CLI's
    /// render, the workbench); sweeps keep one core per variant.
    bool use_second_core = false;
};

/// What a job wrote and measured.
struct job_outcome {
    std::filesystem::path wav;             ///< the calibrated WAV
    std::filesystem::path normalised_wav;  ///< empty unless the calibrated WAV clipped
    std::filesystem::path sidecar;         ///< JSON with the calibration and solver figures
    double full_scale_v = 0.0;             ///< volts at digital full scale of the written WAVs
    bool full_scale_auto = false;          ///< full_scale_v was chosen automatically (output.full_scale_v = "auto")
    double headroom_db = 0.0;              ///< 20 log10(full_scale_v / peak_audio_v), dB (inf for silence)
    double rms_dbfs = 0.0;                 ///< RMS of the calibrated WAV, dBFS (-inf for silence)
    double audio_rms_v = 0.0;              ///< RMS of the audio written (DC removed, fades applied), V
    double peak_audio_v = 0.0;             ///< largest |audio| written (DC removed, fades applied), V
    std::size_t clipped_samples = 0;       ///< in the calibrated WAV
    double normalised_gain_db = 0.0;       ///< gain applied in the normalised copy, dB
    render_result render;
    receiver_figures receiver;             ///< whole-receiver layouts: the front-end figures
    std::vector<float> analysis_v;         ///< the earpiece voltage (DC included) for metrics; bounded
    std::filesystem::path metrics_file;    ///< DIR/metrics.json
    nlohmann::json metrics;                ///< what metrics.json holds (flat keys, SI units)
    std::vector<warning> warnings;         ///< the job's (clip input, output clipping, quiet output), then the render's and the analysis's
    /// Between render_job_unscaled and finish_job: the hidden unscaled intermediate (float WAV, volts / 1000)
    /// and the render's and analysis's warnings; both empty once finished.
    std::filesystem::path unscaled;
    std::vector<warning> pending_warnings;
};

/// Flat metrics of a rendered earpiece voltage (measure_render of the characterize module, with the request
/// the programme implies): levels always; tone figures for a tone programme, IMD for two tones, clipping
/// limits; the contract's keys fundamental_v, h2_ratio, h3_ratio, thd_percent, thd_n_percent, sinad_db are
/// null when the programme is not one tone. `warnings` and `warning_codes` (set_warnings) gather the given
/// ones and the analysis's.
/// @param earpiece_v earpiece voltage, V, DC included, at s.render.audio_rate_hz, programme-aligned
/// Throws config_error when the span is too short to analyse after the settling window.
[[nodiscard]] nlohmann::json job_metrics(const scenario& s, std::span<const float> earpiece_v,
                                         const std::vector<warning>& warnings);
/// Metrics of a whole-receiver render (tuner.layout other than bench): levels, the wanted station's tone
/// figures (when a tone), tuned_hz, loaded_q, rf_bandwidth_hz, detector_rf_peak_v, the `stations` list
/// (name, carrier_hz, tone_hz, tone_v, level_db relative to the wanted station), wanted_tone_v (the first
/// station's tone_v), loudest_neighbour_db (the largest level_db of the other stations; null when none is
/// measured) and the carrier-difference `whistles` (frequency_hz, level_v).
[[nodiscard]] nlohmann::json receiver_job_metrics(const scenario& s, std::span<const float> earpiece_v, const receiver_figures& fig,
                                                  const std::vector<warning>& warnings);

/// Renders `s` into `out_dir` (created if missing) as one unit (full scale: output.full_scale_v, or when it
/// is "auto" (0) choose_full_scale_v of this render's peak): the files are staged beside it and
/// published together (staged_output), so on any failure or cancel no output file is left behind. Refuses
/// to replace the scenario file or its audio input (even with overwrite), and existing outputs unless
/// opt.overwrite; refuses a programme longer than long_render_limit_s unless opt.allow_long.
/// Polls cancel_requested() and opt.cancel between solver blocks. Throws config_error, audio_error, integration_error,
/// cancelled_error.
/// @param analysis_limit_s at most this much of the earpiece voltage is kept in analysis_v, s
job_outcome run_render_job(const scenario& s, const std::filesystem::path& out_dir, const job_options& opt,
                           double analysis_limit_s = 60.0);

/// The files of one render written straight into `dir`, an existing folder that the caller stages
/// (run_render_job and sweeps do). Same outputs and checks on the samples as run_render_job; no
/// staging, no length limit. Throws as run_render_job.
job_outcome render_job_into(const scenario& s, const std::filesystem::path& dir, const job_options& opt,
                            double analysis_limit_s = 60.0);

/// A few lines for a person after a render (the library prints nothing; the CLI prints these): the file
/// written with its length, rate, format and full scale; the level (RMS, A-weighted, peak, DC); THD, THD+N
/// and SINAD when the programme is a tone; the clipping note when the calibrated WAV clipped. Values in
/// engineering notation ("41.3 mV"). Warnings are not included: they are in o.warnings, for the caller to
/// show once. The full figures are in o.metrics (metrics.json).
[[nodiscard]] std::string summary_text(const job_outcome& o, const scenario& s);

/// Step one of render_job_into, for commands that choose one full scale for several renders (sweeps,
/// packs): renders and measures `s` into `dir`, leaving only the hidden unscaled intermediate there
/// (o.unscaled) and the calibrated files unwritten. Throws as render_job_into; on a throw nothing is left.
job_outcome render_job_unscaled(const scenario& s, const std::filesystem::path& dir, const job_options& opt,
                                double analysis_limit_s = 60.0);
/// Step two: writes the calibrated WAV at `full_scale_v` (V; `automatic` says it was chosen, not given),
/// the normalised copy when it clips, the sidecar and metrics.json (with full_scale_v, full_scale_auto,
/// headroom_db, rms_dbfs), adds output_clipped / quiet_output warnings, and removes the intermediate.
/// Throws audio_error.
void finish_job(job_outcome& o, const scenario& s, double full_scale_v, bool automatic, const job_options& opt);

/// Output file names of one render job, relative to its directory.
[[nodiscard]] const std::vector<std::string>& job_file_names();

/// Rewrites the outcome's paths from the staging folder to their published places.
void relocate(job_outcome& o, const staged_output& staged);

/// The files a scenario reads (scenario file, audio clip): never to be replaced by an output.
[[nodiscard]] std::vector<std::filesystem::path> scenario_inputs(const scenario& s);

/// Wall time of rendering `programme_s` of programme with the scenario's circuit and carrier on this
/// machine, s: a short pilot render (30 ms of simulated time, tone programme) gives the wall seconds per
/// simulated second, which is scaled by the programme plus each render's automatic preroll and divided
/// among `threads` workers. An estimate: the solver's step count depends on the programme.
/// Throws config_error naming `where` and signal.duration_s when the programme is shorter than the
/// settling window plus 64 samples that the metrics need: refused before anything is rendered.
void check_measurable(const scenario& s, const std::string& where);

[[nodiscard]] double estimate_render_wall_s(const scenario& s, double programme_s, std::size_t renders = 1, unsigned threads = 1);

/// Throws config_error naming `where`, the work, the limits and the estimated wall time when !allow_long
/// and either programme_s > long_render_limit_s or the solver steps (carrier cycles x steps per cycle,
/// the latter from a pilot render when it matters) exceed long_render_limit_steps.
void check_render_length(const scenario& s, const std::string& where, double programme_s, std::size_t renders,
                         unsigned threads, bool allow_long);

} // namespace galena
