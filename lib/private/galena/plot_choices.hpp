/// The choices behind the pack's plots that can be checked without drawing (report_plots.cpp): the palette,
/// the zoom window, the spectrum's cleaning and the transfer curve's levels. Not installed.
#pragma once

#include <array>
#include <cstddef>
#include <span>
#include <string>
#include <vector>

namespace galena::detail {

/// The eight colours of Okabe & Ito, "Color Universal Design" (2008), as RRGGBB hex, in plot order.
extern const std::array<const char*, 8> plot_palette;

/// gnuplot line style of member `m` of group `g`: the group's colour (g mod 8) and dash pattern
/// (3 (g / 8) + m) mod 8 of eight as the second cue: distinct for up to 16 groups of 3 members (48 entries).
[[nodiscard]] std::string plot_line_style(std::size_t g, std::size_t m, double width = 2.5);

/// The zoom window's start, s: over windows of span_s from t_min_s on (hop span / 4), the largest departure
/// of an earpiece trace from its programme's envelope (residual RMS of the fit y ~ a + b x + c dx, over the
/// trace's own RMS), the first window within 5 % of the largest. `earpiece[i]` and `programme[i]` are
/// sampled at fs_hz from t = 0 (programme x in [-1, 1]); traces too short for one window are skipped.
[[nodiscard]] double choose_zoom_start(const std::vector<std::span<const double>>& earpiece,
                                       const std::vector<std::vector<double>>& programme, double fs_hz, double t_min_s,
                                       double span_s);

/// The spectrum as plotted: the least-squares line (DC bias and slow drift) removed, the 4-term
/// Blackman-Harris window, bins from max(20 Hz, 5 bins) (past the window's main lobe) to band_high_hz.
struct plotted_spectrum {
    std::vector<double> frequency_hz;
    std::vector<double> level_dbv; ///< 20 log10 amplitude, V
    double lowest_hz = 0.0;        ///< the first frequency shown, Hz
};
[[nodiscard]] plotted_spectrum spectrum_for_plot(std::span<const double> v, double fs_hz, double band_high_hz);

/// The carrier levels of a transfer curve, V: 7 from 10 mV to 3 V, with `operating` levels put in (a grid
/// level within 15 % of an operating level gives way to it), ascending.
[[nodiscard]] std::vector<double> transfer_levels(const std::vector<double>& operating);

} // namespace galena::detail
