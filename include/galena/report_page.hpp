/// The pack page: one self-contained offline HTML file (inline SVG plots, relative audio links, tables).
#pragma once

#include "galena/report_conclusions.hpp"
#include "galena/report_playlist.hpp"
#include "galena/sweep.hpp"
#include <cstdint>
#include <filesystem>
#include <string>
#include <vector>

namespace galena {

/// Text escaped for HTML element content and attribute values (& < > ").
[[nodiscard]] std::string html_escape(const std::string& s);

/// Everything a pack page shows.
struct pack_page {
    std::string title;
    std::filesystem::path dir;                  ///< the pack directory; links are relative to it
    const sweep_result* sweep = nullptr;
    std::vector<playlist_segment> playlist;
    std::filesystem::path playlist_wav;
    std::vector<matched_gain> matched;
    std::vector<playlist_segment> matched_playlist; ///< segments of the loudness-matched playlist
    std::filesystem::path matched_playlist_wav;     ///< empty: no matched playlist
    /// Each variant's level and band spectrum (measure_listening), in variant order; empty: the page has no
    /// conclusions, the presenter view no plots and the quiz no notes.
    std::vector<listening_measure> listening;
    std::uint32_t quiz_seed = 1;                ///< the blind test's shuffle seed, stated on the page
    std::vector<std::string> plot_stems;        ///< SVGs in dir/plots, inlined
    std::string note;                           ///< free text under the title
    std::string extra_html;                     ///< HTML placed under the note (e.g. a ranking); trusted
};

/// The page as HTML, in this order: title and note, plain-language conclusions (from `listening`), the
/// playlists (loudness-matched first, then level-consistent), the blind listening test, the variants table,
/// warnings, plots; a presenter view (one variant per screen, opened with its button or the P key) over it.
/// Inline SVG and script, <audio> players with relative links; no external resources. Deterministic: the
/// same inputs give the same text.
[[nodiscard]] std::string render_page(const pack_page& p);

} // namespace galena
