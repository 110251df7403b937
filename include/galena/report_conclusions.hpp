/// What a listener can tell apart in a pack: each variant's level and third-octave band spectrum, the
/// pairs closer than the ear resolves, and plain-language conclusions with their thresholds stated.
#pragma once

#include "galena/sweep.hpp"

#include <cstddef>
#include <filesystem>
#include <limits>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// Nominal third-octave band centres, Hz, base-10 series f = 1000 * 10^(k/10) (IEC 61260-1 exact
/// midband frequencies), from 100 Hz up to the highest band whose upper edge lies below `max_hz`.
[[nodiscard]] std::vector<double> third_octave_centres_hz(double max_hz);

/// Band levels, dB re digital full scale (mean square of the band; a full-scale sine in one band reads
/// -3.01 dB), of `samples` (digital, full scale 1) at `fs_hz`, in the bands of third_octave_centres_hz(
/// min(fs/2, 10 kHz)), the 100 Hz band first: Welch's averaged periodogram (Hann window, half-overlapped segments of up to 8192
/// samples, each segment's mean removed), each bin's power summed into the band that holds its frequency
/// (edges f_c * 10^(+-1/20)). An empty band reads -200 dB. Returns no bands for fewer than 256 samples.
[[nodiscard]] std::vector<double> band_levels_db(std::span<const float> samples, double fs_hz);

/// One variant as the listener meets it.
struct listening_measure {
    std::string name;
    double rms_dbfs = 0.0;                    ///< RMS of the level-consistent file, dB re full scale
    std::vector<double> band_db;              ///< band_levels_db of that file (same bands for every variant)
    double thd_percent = std::numeric_limits<double>::quiet_NaN(); ///< from the metrics when a tone was measured
    /// What makes variants comparable ("at the 150 mV carrier"): conclusions compare variants of one context
    /// only, and prefix their sentences with it. Empty: one context for the whole pack.
    std::string context;
};

/// Thresholds of the conclusions and of the quiz note. The values are rules of thumb (common practice),
/// stated on the page next to every sentence that uses them.
struct listening_thresholds {
    /// Two levels closer than this, dB, count as equally loud. About 1 dB is the just-noticeable change in
    /// level of broadband sound at moderate levels (Zwicker & Fastl, Psychoacoustics, ch. 7; value from
    /// memory, used as common practice).
    double same_level_db = 1.0;
    /// Spectral just-noticeable difference, dB: the spectral distance (see spectral_distance_db) below
    /// which two spectra count as the same tone colour. The 1 dB level JND applied per third-octave band
    /// (third-octave bands as a stand-in for the ear's critical bands above about 500 Hz): common practice.
    double spectral_jnd_db = 1.0;
    /// Bands more than this far, dB, below the loudest band of both variants are left out of the distance
    /// (masked or inaudible next to the loud bands; common practice).
    double band_floor_db = 40.0;
    /// A change of brightness (brightness_db) of at least this, dB, is called brighter or duller.
    double brightness_db = 1.0;
    /// THD above this, %, is called audible distortion (a few per cent: common practice, from memory).
    double audible_thd_percent = 3.0;
};

/// Spectral distance of a and b, dB: the largest |(a_i - b_i) - (La - Lb)| over the bands, where La, Lb
/// are the overall levels (the level difference is taken out: tone colour, not loudness), counting only
/// bands where either spectrum, its level taken out, lies within band_floor_db of the loudest such band of
/// the two. Only the bands both measures hold count; NaN when there are none (unknown, never "the same").
[[nodiscard]] double spectral_distance_db(const listening_measure& a, const listening_measure& b,
                                          const listening_thresholds& t = {});

/// Brightness of a relative to b, dB: the share of power in the bands centred at 2 kHz and above in a,
/// minus that share in b (10 log10 of each share; a share below -100 dB counts as -100 dB). Positive:
/// a is brighter. 0 when there are no bands at or above 2 kHz.
[[nodiscard]] double brightness_db(const listening_measure& a, const listening_measure& b);

/// How two variants compare for a listener.
struct pair_verdict {
    double level_db = 0.0;          ///< a's level minus b's, dB
    double spectral_db = 0.0;       ///< spectral_distance_db(a, b)
    double brightness_db = 0.0;     ///< brightness_db(a, b)
    bool same_level = false;        ///< |level_db| < same_level_db
    bool same_spectrum = false;     ///< spectral_db < spectral_jnd_db (false when it is NaN)
    [[nodiscard]] bool indistinguishable() const { return same_level && same_spectrum; }
};

[[nodiscard]] pair_verdict compare_for_listening(const listening_measure& a, const listening_measure& b,
                                                 const listening_thresholds& t = {});

/// The generated text: conclusions for the whole pack and one sentence per variant.
struct listening_conclusions {
    /// Groups of variants (indices, in variant order) that sound the same: every pair in a group is
    /// indistinguishable. Built greedily in variant order; single variants are groups of one.
    std::vector<std::vector<std::size_t>> groups;
    std::size_t reference = 0;              ///< the first context's reference (first variant of its largest group)
    std::vector<std::size_t> reference_of;  ///< per variant: its context's reference, which it is described against
    std::vector<std::string> sentences;     ///< plain-language conclusions, the thresholds sentence last
    std::vector<std::string> summaries;     ///< one sentence per variant (the presenter view)
};

/// Conclusions from the measures. Within each context (in order of first appearance): which variants sound
/// the same, how the others differ from the context's reference in level (dB, one decimal) and brightness.
/// Then, over all: the loudest and quietest and their spread, and which distort audibly; every threshold
/// used is stated in the last sentence. A context starts its sentence with a capital letter;
/// names keep their own spelling.
[[nodiscard]] listening_conclusions conclude(const std::vector<listening_measure>& m, const listening_thresholds& t = {});

/// The measure of one WAV file (its level and band levels), named `name`. Throws audio_error.
[[nodiscard]] listening_measure measure_listening(const std::filesystem::path& wav, const std::string& name,
                                                  double thd_percent = std::numeric_limits<double>::quiet_NaN());

/// measure_listening of every variant's level-consistent WAV, named by the variant, with its metrics'
/// thd_percent (NaN where there is none); on the bench layout with differing generator levels, each
/// variant's context is its carrier level. Throws audio_error.
[[nodiscard]] std::vector<listening_measure> measure_listening(const sweep_result& sw);

} // namespace galena
