/// The announced playlist of a comparison (spoken or tone-coded announcements, level steps faded in,
/// segment table) and its loudness-matched set.
#pragma once

#include "galena/audio_io.hpp"
#include "galena/loudness_match.hpp"
#include "galena/speech.hpp"
#include "galena/warning.hpp"
#include <cstddef>
#include <filesystem>
#include <string>
#include <vector>

namespace galena {

/// How items are announced. By default each item is announced in synthesised speech (espeak-ng, see
/// speech.hpp): "Item three. <the label read aloud>." at the playlist's announcement level (the median
/// item RMS, clamped to [announce_min_dbfs, announce_max_dbfs]). When speech cannot be made (espeak-ng
/// missing or failing, or speak = false) the tone code announces instead: variant number k is played as
/// floor(k / 5) long beeps then k mod 5 short beeps (so 7 = one long, two short), all at one pitch.
/// Either way a pause follows before the variant's audio. An item whose RMS differs from the previous
/// item's by more than step_limit_db is announced as louder or quieter and faded in over step_fade_s
/// (raised cosine).
struct playlist_options {
    bool speak = true;              ///< spoken announcements (falls back to the tone code)
    speech_options speech;          ///< voice, speed; its rms_dbfs is replaced by the announcement level
    double announce_min_dbfs = -45.0; ///< announcement RMS floor, dBFS
    double announce_max_dbfs = -20.0; ///< announcement RMS ceiling, dBFS
    double step_limit_db = 10.0;    ///< neighbouring items further apart than this (RMS, dB) are announced and faded in
    double step_fade_s = 3.0;       ///< raised-cosine fade-in of such an item, s
    double beep_hz = 880.0;         ///< Hz; (50, fs/2)
    double short_s = 0.08;          ///< short beep length, s
    double long_s = 0.30;           ///< long beep length, s
    double beep_gap_s = 0.12;       ///< silence between beeps, s
    double beep_peak = 0.1;         ///< beep peak, fraction of digital full scale (-20 dBFS): never startling
    double beep_fade_s = 0.005;     ///< raised-cosine edges of each beep, s
    double lead_in_s = 0.5;         ///< silence at the very start, s
    double after_code_s = 0.5;      ///< silence between the code and the audio, s
    double after_audio_s = 1.0;     ///< silence after each variant, s
};

/// Beep lengths of the code for variant number k >= 1, s.
[[nodiscard]] std::vector<double> tone_code(int k, const playlist_options& o = {});

/// Where one variant lies in the playlist, s from the start of the playlist file.
struct playlist_segment {
    int number = 0;                 ///< 1-based variant number (the tone code)
    std::string name;
    std::string label;
    double code_start_s = 0.0;      ///< first beep starts
    double audio_start_s = 0.0;     ///< first sample of the variant's WAV
    double audio_end_s = 0.0;       ///< one past its last sample
    std::size_t audio_start_sample = 0;
    std::size_t audio_samples = 0;
    bool spoken = false;            ///< announced in speech (false: tone code)
    std::string announcement;       ///< the spoken text (empty for the tone code)
    double rms_dbfs = 0.0;          ///< RMS of the item as it sits in the playlist before any fade, dBFS (-inf: silent)
    double step_db = 0.0;           ///< rms_dbfs minus the previous item's (0 for the first)
    double fade_in_s = 0.0;         ///< length of the item's fade-in, s (0: none)
};

/// The announcement text of item `number` (>= 1) with `label`: "Item three. Germanium, forty-seven k ohm
/// bleeder, weak signal." plus, when |step_db| > o.step_limit_db, "Twenty-eight decibels louder, fading in."
[[nodiscard]] std::string announcement_text(int number, const std::string& label, double step_db, const playlist_options& o = {});

/// Builds the playlist from WAV files (all at one sample rate; their digital samples copied unchanged, so
/// their relative levels stay as they are, except the fade-in of an item after a step larger than
/// o.step_limit_db) and writes it atomically as `out_wav` (format of the inputs' choice: `format`), plus
/// the segment table as CSV `out_csv`. Segment starts are whole samples. espeak-ng's scratch files go
/// beside out_wav and are removed. When speech was asked for and could not be made, a speech_unavailable
/// warning is appended to `*warnings` (when given) and the tone code is used for every item.
/// Throws audio_error for unreadable inputs or mismatched rates, cancelled_error on a cancel.
std::vector<playlist_segment> write_playlist(const std::vector<std::filesystem::path>& wavs, const std::vector<std::string>& names,
                                             const std::vector<std::string>& labels, const std::filesystem::path& out_wav,
                                             const std::filesystem::path& out_csv, wav_format format,
                                             const playlist_options& o = {}, std::vector<warning>* warnings = nullptr);

/// Reads a segment table written by write_playlist. Throws audio_error on a malformed file.
[[nodiscard]] std::vector<playlist_segment> read_playlist_table(const std::filesystem::path& csv);

} // namespace galena
