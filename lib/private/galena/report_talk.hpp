/// The talk parts of the pack page (not installed): the presenter view (one comparison per screen), the
/// blind listening test (A/B/X and "which is which"), their style and their script; all inline, offline.
#pragma once

#include "galena/report_conclusions.hpp"

#include <cstdint>
#include <string>
#include <vector>

namespace galena::detail {

/// One variant as the talk parts show it.
struct talk_item {
    std::string name;
    std::string label;
    std::string wav;            ///< level-consistent file, relative to the page
    std::string matched_wav;    ///< loudness-matched copy, relative; empty when there is none
};

/// Everything the talk parts need. `measures` and `conclusions` may be empty (no WAV analysis): the
/// presenter then shows the labels only and the quiz gives no note.
struct talk_data {
    std::vector<talk_item> items;
    std::vector<listening_measure> measures;
    listening_conclusions conclusions;
    listening_thresholds thresholds;
    std::uint32_t seed = 1;
};

/// The variant item i is compared with (B) in the presenter view: its context's reference, or for the
/// reference itself the next variant of its context (else the next variant).
[[nodiscard]] std::size_t partner_of(const talk_data& d, std::size_t i);
/// CSS of the presenter overlay and the quiz.
[[nodiscard]] std::string talk_css();
/// The quiz section (heading, controls, players, answer, score), HTML.
[[nodiscard]] std::string quiz_html(const talk_data& d);
/// The presenter overlay (hidden until opened), one slide per item with its plot, HTML.
[[nodiscard]] std::string presenter_html(const talk_data& d);
/// The inline script: the data as JSON and the presenter and quiz logic; deterministic text.
[[nodiscard]] std::string talk_script(const talk_data& d);
/// One item's plot for its slide: the levels of all items (this one highlighted) and this item's band
/// spectrum against the reference's, inline SVG; empty when there are no measures.
[[nodiscard]] std::string slide_svg(const talk_data& d, std::size_t i);

} // namespace galena::detail
