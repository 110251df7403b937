/// A render job: one scenario rendered into an output directory — the calibrated WAV, a normalised copy
/// when the calibrated one would clip, and a JSON sidecar — every file written atomically.
#pragma once

#include "galena/render.hpp"
#include "galena/scenario.hpp"

#include <filesystem>
#include <functional>
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
    std::vector<std::string> warnings;
};

/// Renders `s` into `out_dir` (created if missing). Refuses to write over the scenario's own audio input.
/// Throws config_error, audio_error or integration_error; on any failure no output file is left behind.
/// @param analysis_limit_s at most this much of the earpiece voltage is kept in analysis_v, s
job_outcome run_render_job(const scenario& s, const std::filesystem::path& out_dir, const job_options& opt,
                           double analysis_limit_s = 60.0);

} // namespace galena
