/// The pack page: one self-contained offline HTML file (inline SVG plots, relative audio links, tables).
#pragma once

#include "galena/report_playlist.hpp"
#include "galena/sweep.hpp"
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
    std::vector<std::string> plot_stems;        ///< SVGs in dir/plots, inlined
    std::string note;                           ///< free text under the title
    std::string extra_html;                     ///< HTML placed under the note (e.g. a ranking); trusted
};

/// The page as HTML: inline SVG plots, <audio> players with relative links, the metrics, gains and
/// playlist tables; no external resources.
[[nodiscard]] std::string render_page(const pack_page& p);

} // namespace galena
