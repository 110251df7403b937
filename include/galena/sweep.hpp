/// Sweeps and named variants: one base scenario, a list of variants (each a set of "section.key=value"
/// overrides) rendered on all cores into per-variant directories, and the table of their metrics.
#pragma once

#include "galena/job.hpp"
#include "galena/loudness_match.hpp"
#include "galena/scenario.hpp"

#include <cstddef>
#include <filesystem>
#include <functional>
#include <nlohmann/json.hpp>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// One swept key and its values (TOML value text, as --set takes them).
struct sweep_axis {
    std::string key;                 ///< "section.key"
    std::vector<std::string> values; ///< e.g. {"inf", "10e3", "47e3"}
};

/// Parses "section.key=SPEC" where SPEC is
/// - a comma list: `load.bleeder_ohm=inf,10e3,47e3`;
/// - a log range `log:LO:HI:COUNT` (COUNT >= 2 values from LO to HI, 0 < LO < HI, geometric spacing):
///   `load.bleeder_ohm=log:10e3:1e6:5`;
/// - `presets` for the key diode.preset: every built-in diode preset.
/// Throws config_error naming the text and the rule.
[[nodiscard]] sweep_axis parse_sweep_axis(const std::string& spec);

/// One variant of a comparison.
struct variant_spec {
    std::string name;                    ///< directory-safe: [A-Za-z0-9._-], unique in a sweep
    std::string label;                   ///< for humans (tables, page)
    std::vector<std::string> overrides;  ///< "section.key=value", applied after the base overrides
    /// Where each override was written ("pack.toml:12"), for messages; empty for command-line variants.
    std::vector<std::string> origins;
};

/// Names galena itself gives to files and folders in a sweep's or pack's output folder (tables, page,
/// playlists, the loudness-matched folder, plots). A variant may not be named like one of these (compared
/// without regard to case, for case-insensitive file systems), nor start with '.' (staging and temporary
/// files), so no variant folder can collide with them.
[[nodiscard]] const std::vector<std::string>& reserved_output_names();

/// True when `n` is a usable variant name: non-empty, not "." or "..", only [A-Za-z0-9._-].
[[nodiscard]] bool is_variant_name(const std::string& n);

/// Parses "NAME:key=value,key=value" (NAME directory-safe). Throws config_error otherwise.
[[nodiscard]] variant_spec parse_variant(const std::string& spec);

/// Variants one sweep or pack may render without an explicit opt-in (`--allow-large`).
inline constexpr std::size_t sweep_confirm_limit = 50;
/// Variants one sweep may hold at all (names are numbered with up to four digits).
inline constexpr std::size_t sweep_hard_limit = 1000;

/// The Cartesian product of the axes, first axis slowest; names "01-bleeder_ohm-10k-...", labels
/// "bleeder_ohm = 10k, ...". Throws config_error for no axes, an empty axis or more than sweep_hard_limit
/// variants.
[[nodiscard]] std::vector<variant_spec> expand_sweep(const std::vector<sweep_axis>& axes);

/// Formats an SI value compactly for names and labels: 47000 -> "47k", inf -> "none", 1e-8 -> "10n".
[[nodiscard]] std::string short_si(double v);

/// The tone a clip variant is also rendered with for its distortion figures, unless a pack or the
/// command line says otherwise, Hz (1 kHz: the common-practice receiver test tone).
inline constexpr double default_measure_tone_hz = 1000.0;
/// Length of that tone render, s.
inline constexpr double default_measure_duration_s = 0.3;

/// One progress report of a sweep. Reports of finished variants come in variant order, each once (a
/// variant finished early on another thread is reported when those before it are); ticks in between
/// report the share of the work done. The library formats nothing: the caller draws a bar or lines.
struct sweep_progress {
    double fraction = 0.0;        ///< share of the sweep's programme time rendered (tone measurements included), 0..1
    double elapsed_s = 0.0;       ///< wall time since the sweep started, s
    std::size_t reported = 0;     ///< variants reported finished so far (in variant order)
    std::size_t total = 0;        ///< variants in the sweep
    std::string_view finished;    ///< name of the variant this report finishes; empty for a tick
};

/// Options of a sweep run.
struct sweep_options {
    unsigned threads = 0;            ///< worker threads; 0 = std::thread::hardware_concurrency()
    bool overwrite = false;          ///< replace existing output files
    double measure_tone_hz = 0.0;    ///< > 0: clip variants are also rendered as this tone for metrics
    double measure_duration_s = default_measure_duration_s; ///< length of that tone render, s
    /// Optional: called (serialised, from worker threads) as the sweep advances. See sweep_progress.
    std::function<void(const sweep_progress&)> progress;
    /// Optional: this sweep's own cancel token (non-owning), polled with the process-wide flag between
    /// variants and solver blocks; a request stops this sweep alone with cancelled_error.
    const cancel_token* cancel = nullptr;
    bool allow_large = false;        ///< render more than sweep_confirm_limit variants
    bool allow_long = false;         ///< render more than long_render_limit_s of programme in all
};

/// What one variant produced.
struct variant_result {
    variant_spec spec;
    scenario scene;                          ///< the base with the variant's overrides
    std::filesystem::path dir;               ///< OUT/NAME
    job_outcome job;                         ///< the programme render (analysis_v kept)
    bool measured_separately = false;        ///< metrics come from a tone render in OUT/NAME/measure
    scenario measure_scene;                  ///< that tone scenario (when measured_separately)
    job_outcome measure;                     ///< that tone render's outcome (analysis_v moved to measure_earpiece_v)
    std::vector<float> measure_earpiece_v;   ///< its earpiece voltage, V (when measured_separately)
    nlohmann::json metrics;                  ///< the flat metrics of the variant
    std::vector<warning> warnings;           ///< what metrics' warnings / warning_codes hold, typed
};

/// Results, in variant order.
struct sweep_result {
    std::vector<variant_result> variants;
    std::vector<std::filesystem::path> inputs; ///< files the sweep reads (scenario, clips): never replaced
    std::filesystem::path csv;       ///< OUT/table.csv
    std::filesystem::path markdown;  ///< OUT/table.md
    std::vector<matched_gain> matched; ///< OUT/matched: loudness-matched copies (run_sweep; a pack writes its own)
};

/// Loads the base scenario with `base_overrides` and each variant's overrides (all validated before any
/// render starts), renders every variant into OUT/NAME on `threads` workers, and writes the table and the
/// loudness-matched copies (OUT/matched, write_loudness_matched). Variants with the automatic full scale
/// share one, chosen from the loudest peak of them all (choose_full_scale_v); each scene then holds it.
/// Each variant is computed independently and stored at its index, so the results and files are identical
/// whatever the thread count. The whole output is staged and published as one unit (staged_output): the
/// first failure or a cancel (Ctrl-C) stops every variant, is rethrown, and leaves no output file behind.
/// Refuses more than sweep_confirm_limit variants without opt.allow_large and more than
/// long_render_limit_s of programme without opt.allow_long (config_error, with the estimated wall time).
/// Throws config_error, audio_error, integration_error, cancelled_error.
[[nodiscard]] sweep_result run_sweep(const std::filesystem::path& base_file, const std::vector<std::string>& base_overrides,
                                     const std::vector<variant_spec>& variants, const std::filesystem::path& out_dir,
                                     const sweep_options& opt);

/// Step one of run_sweep: loads and validates every variant and applies the size and length limits; renders
/// nothing and touches no file but the inputs. `where` names the command's input file in messages.
[[nodiscard]] sweep_result prepare_sweep(const std::filesystem::path& base_file, const std::vector<std::string>& base_overrides,
                                         const std::vector<variant_spec>& variants, const sweep_options& opt);
/// Refuses early when an output of the prepared sweep (a table, a variant's files) clashes in `staged`.
void check_sweep_outputs(const sweep_result& res, staged_output& staged);
/// Step two: renders the prepared variants into `dir` (an existing folder the caller stages) and writes the
/// tables there. Throws as run_sweep.
void render_sweep(sweep_result& res, const std::filesystem::path& dir, const sweep_options& opt);
/// Rewrites the result's paths from the staging folder to their published places.
void relocate(sweep_result& res, const staged_output& staged);

/// One line for a person about the calibration of a sweep's WAVs: "full scale 500 mV peak for every
/// variant (chosen automatically; headroom 7.3 dB above the loudest peak)", or the explicit value(s).
[[nodiscard]] std::string full_scale_text(const sweep_result& res);

/// Table columns: key names of the metrics (in this order) shown in the CSV and Markdown tables.
[[nodiscard]] const std::vector<std::string>& table_columns();
/// The columns instead when any variant is a whole receiver (tuner.layout other than bench): the front
/// end's figures, the wanted station's tone and the loudest neighbour relative to it.
[[nodiscard]] const std::vector<std::string>& receiver_table_columns();

/// The table as CSV (header line; variant, label, then table_columns() or receiver_table_columns(); empty
/// cell for null).
[[nodiscard]] std::string table_csv(const std::vector<variant_result>& rows);
/// The table as a Markdown pipe table with units in the header, numbers to 4 significant digits.
[[nodiscard]] std::string table_markdown(const std::vector<variant_result>& rows);

} // namespace galena
