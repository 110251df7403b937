/// Warnings that results carry: a stable code for programs and a sentence for people.
///
/// Every result that can warn (render_result, render_metrics, transfer_curve, job_outcome, a sweep's
/// variants) holds `std::vector<warning>`. Code that decides anything looks at `code`; `message` is only
/// shown. metrics.json writes the sentences under `warnings` and the codes, in the same order, under
/// `warning_codes` (set_warnings, metrics.hpp); the code names are listed in DEVELOPERS.md.
#pragma once

#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// What a warning is about. The names that to_string() gives are stable: files and programs rely on them.
enum class warning_code {
    adaptive_fallback,       ///< "adaptive-fallback": phase-locked asked, no series resistance: the adaptive solver ran
    coarse_step_floor,       ///< "coarse-step-floor": solver.carrier_steps_floor below 30 steps per cycle
    step_count_fallback,     ///< "step-count-fallback": the automatic step count failed; a fixed one was used
    dc_tolerance_not_met,    ///< "dc-tolerance-not-met": the automatic step count did not reach solver.dc_tolerance
    samples_missing,         ///< "samples-missing": fewer audio samples were produced than the programme holds
    channels_mixed,          ///< "channels-mixed": a multichannel clip was mixed to mono
    clip_shortened,          ///< "clip-shortened": signal.duration_s renders only the start of the clip
    output_clipped,          ///< "output-clipped": the calibrated WAV clips; a normalised copy was written
    no_distortion_figures,   ///< "no-distortion-figures": the programme is not a single test tone
    unmodulated_tone,        ///< "unmodulated-tone": a tone programme with m = 0; tone figures are null
    diagonal_clipping,       ///< "diagonal-clipping": m exceeds the diagonal-clipping limit
    negative_peak_clipping,  ///< "negative-peak-clipping": m exceeds R_ac / R_dc
    failure_to_follow,       ///< "failure-to-follow": the output was observed falling at the free-discharge rate
    station_tone_unmeasured, ///< "station-tone-unmeasured": a station's tone cannot be told apart; no level
    transfer_one_region,     ///< "transfer-one-region": the transfer curve's slopes do not show two regions
    plots_left_out,          ///< "plots-left-out": drawing the plots failed; the rest of the output stands
    quiet_output,            ///< "quiet-output": a written WAV sits below -60 dBFS RMS
    speech_unavailable,      ///< "speech-unavailable": espeak-ng could not speak the announcements; the tone code was used
};

/// One warning: its code and the sentence shown to people (which may name files, values and rules).
struct warning {
    warning_code code = warning_code::samples_missing;
    std::string message;
    bool operator==(const warning&) const = default;
};

/// The stable name of a code ("output-clipped"): lower case, words joined by '-'.
[[nodiscard]] std::string_view to_string(warning_code code) noexcept;
/// The code named `name` (as to_string writes it); nullopt for any other text.
[[nodiscard]] std::optional<warning_code> parse_warning_code(std::string_view name) noexcept;
/// Every code, in declaration order (for documentation checks and round-trips).
[[nodiscard]] const std::vector<warning_code>& all_warning_codes();

/// The same warning with `context` put before its sentence ("tone measurement: ..."); the code is kept.
[[nodiscard]] warning with_context(std::string_view context, warning w);
/// The sentences of `ws`, in order.
[[nodiscard]] std::vector<std::string> warning_messages(const std::vector<warning>& ws);
/// The code names of `ws` (to_string), in order.
[[nodiscard]] std::vector<std::string> warning_code_names(const std::vector<warning>& ws);
/// True when some warning in `ws` has `code`.
[[nodiscard]] bool has_warning(const std::vector<warning>& ws, warning_code code) noexcept;

} // namespace galena
