/// The loudness-matched set: copies of a command's WAVs scaled to one RMS (peaks held below full scale),
/// for listening side by side without touching the volume. Written by sweeps and packs.
#pragma once

#include "galena/audio_io.hpp"

#include <filesystem>
#include <string>
#include <vector>

namespace galena {

/// One entry of the loudness-matched set.
struct matched_gain {
    std::string name;
    std::filesystem::path wav;      ///< the matched copy
    double rms_dbfs = 0.0;          ///< RMS of the level-consistent file, dBFS (sine peak 0 dBFS = -3.01 dBFS)
    double gain_db = 0.0;           ///< gain applied
    bool peak_limited = false;      ///< the gain was reduced to keep the peak at -1 dBFS
};

/// Writes copies of `wavs` into `dir` scaled to a common RMS of target_rms_dbfs (peaks held at -1 dBFS,
/// silent files left at 0 dB), and `dir/gains.csv`. Throws audio_error.
std::vector<matched_gain> write_loudness_matched(const std::vector<std::filesystem::path>& wavs,
                                                 const std::vector<std::string>& names, const std::filesystem::path& dir,
                                                 wav_format format, double target_rms_dbfs = -26.0);

} // namespace galena
