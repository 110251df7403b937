/// `galena dial`: a user's set swept across a band in one command: the audio of the sweep, the dial map
/// (tuned frequency against time with each station's level) and the band survey, staged and published as
/// one unit.
#pragma once

#include "galena/band_file.hpp"
#include "galena/dial.hpp"
#include "galena/pack_file.hpp"
#include "galena/report.hpp"
#include "galena/warning.hpp"

#include <filesystem>
#include <functional>
#include <optional>
#include <string>
#include <vector>

namespace galena {

struct dial_job_options {
    bool overwrite = false;
    std::optional<dial_path> path;       ///< replaces the band file's [dial] when given
    double retune_interval_s = 2e-3;     ///< dial_settings::retune_interval_s
    double level_window_s = 8e-3;        ///< dial_settings::level_window_s
    int steps_per_cycle = 32;            ///< dial_settings::steps_per_cycle
    std::function<void(double)> progress;
};

/// What a dial job wrote (published paths).
struct dial_outcome {
    dial_result dial;
    std::vector<survey_row> survey;
    std::filesystem::path wav;            ///< OUT/dial.wav, calibrated at output.full_scale_v
    std::filesystem::path normalised_wav; ///< OUT/dial-normalised.wav when dial.wav clips (else empty)
    double peak_audio_v = 0.0;
    std::vector<warning> warnings;        ///< plots left out, clipping
};

/// The files `run_dial_into` writes, relative to its folder.
[[nodiscard]] const std::vector<std::string>& dial_output_names();

/// Renders the sweep of `s` (a single-coil or coupled set; its [[station]]s replaced by the band's) into
/// `dir` (which must exist): dial.wav (+ dial-normalised.wav), dial-map.csv, survey.csv, survey.md,
/// dial-map.svg/png. For packs and for run_dial_job.
dial_outcome run_dial_into(const scenario& s, const band_spec& band, const std::filesystem::path& dir, const dial_job_options& opt);

/// `galena dial`: loads the scenario (with overrides) and the band, stages OUT, runs run_dial_into, publishes.
/// Throws config_error, audio_error, integration_error, cancelled_error.
dial_outcome run_dial_job(const std::filesystem::path& scenario_file, const std::vector<std::string>& overrides,
                          const std::filesystem::path& band_file, const std::filesystem::path& out_dir, const dial_job_options& opt);

/// Adds a pack's band sweeps ([[dial_sweep]]) to `po`: after the variants, each is rendered by
/// run_dial_into into OUT/dial/<name>/ (the pack's scenario with `base_overrides` and the sweep's own set),
/// and the page gets a "Turning the dial" section: each sweep's audio player, dial map and band survey. The
/// sweep's audio has its own automatic full scale (it is not in the level-consistent playlist). Nothing is
/// added when the pack has no sweeps. Band files are loaded here (config_error with file:line).
void add_pack_dial_sweeps(pack_options& po, const pack_spec& pack, const std::vector<std::string>& base_overrides,
                          const dial_job_options& opt = {});

/// The survey as CSV (header + one record per station) and as a Markdown table with the threshold stated.
[[nodiscard]] std::string survey_csv(const std::vector<survey_row>& rows);
[[nodiscard]] std::string survey_markdown(const std::vector<survey_row>& rows, const std::string& title);

} // namespace galena
