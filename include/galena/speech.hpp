/// Spoken announcements: labels made readable aloud (numbers with their units in words) and speech
/// synthesised by the espeak-ng program, run as a child process, resampled and level-normalised.
#pragma once

#include "galena/warning.hpp"

#include <filesystem>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// English words for a number as people read it: 47 -> "forty-seven", 4.7 -> "four point seven",
/// 0.3 -> "zero point three", -2 -> "minus two", 1200 -> "one thousand two hundred". Up to 6 significant
/// digits are spoken; magnitudes from 1e-6 to below 1e12 are written out, others in scientific words
/// ("one point five times ten to the fifteen"). "infinity" for inf; "not a number" for NaN.
[[nodiscard]] std::string spoken_number(double value);

/// A quantity in engineering form, in words: (47000, "ohm") -> "forty-seven k ohm", (1e-8, "farad") ->
/// "ten nano farad", (1e6, "hertz") -> "one mega hertz", (0.3, "") -> "zero point three". inf -> "none".
/// The prefix is chosen so the mantissa lies in [1, 1000) (pico to giga); the mantissa keeps up to 4
/// significant digits. `unit_word` is appended as given (empty: no unit).
[[nodiscard]] std::string spoken_quantity(double value, std::string_view unit_word);

/// A variant's label rewritten to be read aloud: engineering values ("47k", "47kΩ", "4.7e4", "10nF",
/// "1MHz", "0.3") become words with their units, key names lose their unit suffix and underscores and say
/// the unit after the value ("bleeder_ohm = 47k" -> "bleeder forty-seven k ohm"), '=' becomes a pause,
/// and other characters that a speech program would spell out are dropped. Plain words are kept.
[[nodiscard]] std::string speakable_label(std::string_view label);

/// How announcements are spoken. espeak-ng is deterministic for a fixed text, voice, speed and pitch,
/// so all four are explicit.
struct speech_options {
    std::string program = "espeak-ng";   ///< looked up on PATH (posix_spawnp)
    std::string voice = "en-us";         ///< espeak-ng -v
    int words_per_minute = 155;          ///< espeak-ng -s; [80, 450]
    int pitch = 50;                      ///< espeak-ng -p; [0, 99]
    double rms_dbfs = -26.0;             ///< RMS of the spoken segment (silences trimmed), dBFS (sine peak 0 dBFS = -3.01 dBFS)
    double peak_limit_dbfs = -6.0;       ///< the gain is lowered so no sample exceeds this, dBFS: never near full scale
};

/// Speech for `text` at `rate_hz`: espeak-ng writes a WAV into `work_dir` (a hidden file, removed after),
/// which is read back, trimmed of leading and trailing silence, resampled to rate_hz (band-limited sinc
/// resampler) and scaled to o.rms_dbfs RMS with its peak held at o.peak_limit_dbfs. Returns nullopt and
/// sets `why` (for a speech_unavailable warning) when the program is missing, fails or produces no sound.
/// Throws cancelled_error on a cancel (the child is stopped), resource_error when no process can be
/// started for a resource limit.
[[nodiscard]] std::optional<std::vector<double>> synthesize_speech(const std::string& text, double rate_hz,
                                                                   const std::filesystem::path& work_dir,
                                                                   const speech_options& o, std::string& why);

} // namespace galena
