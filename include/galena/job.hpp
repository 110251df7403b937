/// A render job: one scenario rendered into an output directory — the calibrated WAV, a normalised copy
/// when the calibrated one would clip, a JSON sidecar and the metrics — every file written atomically.
#pragma once

#include "galena/render.hpp"
#include "galena/scenario.hpp"

#include <filesystem>
#include <functional>
#include <nlohmann/json.hpp>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// Options of a job.
struct job_options {
    bool overwrite = false;         ///< replace existing output files
    double fade_s = 0.01;           ///< raised-cosine fade at both ends of the WAV, s; [0, 1]
    std::function<void(double fraction)> progress; ///< optional, called with 0..1
};

/// What a job wrote and measured.
struct job_outcome {
    std::filesystem::path wav;             ///< the calibrated WAV
    std::filesystem::path normalised_wav;  ///< empty unless the calibrated WAV clipped
    std::filesystem::path sidecar;         ///< JSON with the calibration and solver figures
    double full_scale_v = 0.0;
    double peak_audio_v = 0.0;             ///< largest |audio| (DC removed), V
    std::size_t clipped_samples = 0;       ///< in the calibrated WAV
    double normalised_gain_db = 0.0;       ///< gain applied in the normalised copy, dB
    render_result render;
    std::vector<float> analysis_v;         ///< the earpiece voltage (DC included) for metrics; bounded
    std::filesystem::path metrics_file;    ///< DIR/metrics.json
    nlohmann::json metrics;                ///< what metrics.json holds (flat keys, SI units)
    std::vector<std::string> warnings;
};

/// Flat metrics of a rendered earpiece voltage (measure_render of the characterize module, with the request
/// the programme implies): levels always; tone figures for a tone programme, IMD for two tones, clipping
/// limits; the contract's keys fundamental_v, h2_ratio, h3_ratio, thd_percent, thd_n_percent, sinad_db are
/// null when the programme is not one tone. `warnings` gathers the given ones and the analysis's.
/// @param earpiece_v earpiece voltage, V, DC included, at s.render.audio_rate_hz, programme-aligned
/// Throws config_error when the span is too short to analyse after the settling window.
[[nodiscard]] nlohmann::json job_metrics(const scenario& s, std::span<const float> earpiece_v,
                                         const std::vector<std::string>& warnings);

/// Renders `s` into `out_dir` (created if missing). Refuses to write over the scenario's own audio input.
/// Throws config_error, audio_error or integration_error; on any failure no output file is left behind.
/// @param analysis_limit_s at most this much of the earpiece voltage is kept in analysis_v, s
job_outcome run_render_job(const scenario& s, const std::filesystem::path& out_dir, const job_options& opt,
                           double analysis_limit_s = 60.0);

} // namespace galena
