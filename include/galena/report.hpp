/// Reports of a comparison: the pack (sweep, announced playlist, loudness-matched set, plots and page),
/// staged and published as one unit. The parts live in report_playlist, report_plots and report_page.
#pragma once

#include "galena/pack_file.hpp"
#include "galena/report_page.hpp"
#include "galena/report_playlist.hpp"
#include "galena/report_plots.hpp"
#include "galena/sweep.hpp"
#include <filesystem>
#include <functional>
#include <string>
#include <vector>

namespace galena {

/// A recording that a pack's extras add to the playlists after the variants (a band sweep): at the
/// variants' sample rate and calibration.
struct pack_extra_item {
    std::filesystem::path wav;
    std::string name;   ///< for the playlist tables and the matched copy's file name (unique in the pack)
    std::string label;  ///< announced
};

/// What a pack's extras give the pack: HTML for the page (under the note) and playlist items.
struct pack_extras {
    std::string html;
    std::vector<pack_extra_item> playlist_items;
    pack_extras() = default;
    pack_extras(std::string h) : html(std::move(h)) {} // NOLINT(google-explicit-constructor): extras may return HTML only
};

/// Options of a whole pack.
struct pack_options {
    sweep_options sweep;
    bool loudness_matched = true;
    bool curves = true;                         ///< simulate response and transfer curves
    std::string title = "galena comparison";
    std::string note;
    std::vector<std::filesystem::path> protect; ///< more files never to be replaced (the pack file)
    /// Optional: called after the variants are rendered with the sweep and the staging folder, before the
    /// page is written; what it writes there is published with the pack, the HTML it returns goes on the
    /// page under the note, and its playlist items follow the variants in both playlists. `extra_outputs`
    /// (relative names) are checked for clashes before rendering.
    std::function<pack_extras(sweep_result&, const std::filesystem::path& staged_dir)> extras;
    std::vector<std::string> extra_outputs;
};

/// Everything a pack wrote.
struct pack_outcome {
    sweep_result sweep;
    std::filesystem::path page;                 ///< OUT/index.html
    std::filesystem::path playlist_wav;
    std::filesystem::path playlist_csv;
    std::vector<playlist_segment> playlist;
    std::vector<matched_gain> matched;
    /// Parts left out (plots that could not be drawn: plots_left_out); the caller shows them.
    std::vector<warning> warnings;
};

/// The comparison pack: the sweep, the playlist, the matched set, the plots and the page, in `out_dir`,
/// staged and published as one unit (no partial pack on a failure or Ctrl-C). Limits and refusals as
/// run_sweep. Throws config_error, audio_error, integration_error, cancelled_error.
pack_outcome make_pack(const std::filesystem::path& base_file, const std::vector<std::string>& base_overrides,
                       const std::vector<variant_spec>& variants, const std::filesystem::path& out_dir, const pack_options& opt);

} // namespace galena
