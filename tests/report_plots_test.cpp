// The choices behind the pack's plots (issue 14, "plots that teach"): palette, zoom window, spectrum cleaning,
// the transfer curve's levels, and a small bench pack's curves at the scenario's own carrier.
#include "galena/plot_choices.hpp"
#include "galena/report.hpp"
#include "galena/sweep.hpp"

#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <numbers>
#include <set>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

std::string read_text(const fs::path& p)
{
    std::ifstream in(p);
    return std::string(std::istreambuf_iterator<char>(in), {});
}

} // namespace

TEST_CASE("the palette is the published colour-blind-safe set, and styles stay distinct past eight entries")
{
    // Okabe & Ito, "Color Universal Design (CUD): how to make figures and presentations that are friendly to
    // colorblind people" (2008): black, orange E69F00, sky blue 56B4E9, bluish green 009E73, yellow F0E442,
    // blue 0072B2, vermillion D55E00, reddish purple CC79A7.
    const std::set<std::string> published = {"000000", "E69F00", "56B4E9", "009E73", "F0E442", "0072B2", "D55E00", "CC79A7"};
    const std::set<std::string> ours(detail::plot_palette.begin(), detail::plot_palette.end());
    CHECK(ours == published);
    // Line styles as the second cue: 16 circuits with 3 levels each all differ in colour or dash pattern,
    // and the members of one circuit share its colour but differ in dash.
    std::set<std::string> styles;
    for (std::size_t g = 0; g < 16; ++g)
        for (std::size_t m = 0; m < 3; ++m) styles.insert(detail::plot_line_style(g, m));
    CHECK(styles.size() == 48);
    CHECK(detail::plot_line_style(3, 0).substr(0, 16) == detail::plot_line_style(3, 1).substr(0, 16)); // "lc rgb '#CC79A7'"
    CHECK(detail::plot_line_style(3, 0) != detail::plot_line_style(3, 1));
    CHECK(detail::plot_line_style(0, 0) != detail::plot_line_style(8, 0));
}

TEST_CASE("the zoom window lands where the earpiece fails to follow its envelope, not on near-silence")
{
    // A speech-like programme: a loud 200 Hz burst (0.10-0.40 s), near-silence, then a quiet burst. The
    // earpiece follows the envelope (y = 0.2 + 0.1 x) except between 0.30 and 0.32 s, where it fails to
    // follow the falling envelope and decays as an RC discharge, exp(-t / RC), instead: the shape of
    // diagonal clipping (Terman, Radio Engineers' Handbook, 1943, the diode detector's failure to follow).
    constexpr double fs = 16000.0, rc = 10e-3;
    const std::size_t n = 12000; // 0.75 s
    std::vector<double> x(n, 0.0), y(n, 0.2), quiet(n, 0.0);
    for (std::size_t k = 0; k < n; ++k) {
        const double t = static_cast<double>(k) / fs;
        const double s = std::sin(2.0 * std::numbers::pi * 200.0 * t);
        x[k] = (t >= 0.10 && t < 0.40) ? s : (t >= 0.55 && t < 0.70) ? 0.01 * s : 0.0;
        y[k] = 0.2 + 0.1 * x[k];
        // A second variant ten times quieter that follows everywhere, with a little even-order distortion.
        quiet[k] = 0.02 + 0.01 * x[k] + 0.0005 * x[k] * x[k];
        if (t >= 0.30 && t < 0.32) y[k] = std::max(y[k], y[k - 1] * std::exp(-1.0 / (fs * rc)));
    }
    const double span = 0.01;
    const double t0 = detail::choose_zoom_start({y, quiet}, {x, x}, fs, 0.02, span);
    CHECK(t0 > 0.30 - span);
    CHECK(t0 < 0.32);
    // With no failure anywhere, the quiet variant's distortion is largest in its loud burst, never in silence.
    const double t1 = detail::choose_zoom_start({quiet}, {x}, fs, 0.02, span);
    CHECK(t1 > 0.10 - span);
    CHECK(t1 < 0.40);
}

TEST_CASE("the plotted spectrum has the DC bias and a slow drift removed before the window")
{
    // 1 V of DC with a slow linear drift (the earpiece's bias and its settling) and a 1 mV tone at 1 kHz,
    // 1 s at 16 kHz. The 4-term Blackman-Harris window's highest side lobe is -92 dB and its main lobe spans
    // +-4 bins (Harris, "On the use of windows for harmonic analysis with the discrete Fourier transform",
    // Proc. IEEE 66, 1978): left in, the 1 V would leak at about -92 dBV into every low bin; removed, what
    // remains below 500 Hz is the tone's own side lobes (-60 - 92 = -152 dBV) and round-off.
    constexpr double fs = 16000.0;
    std::vector<double> v(16000);
    for (std::size_t k = 0; k < v.size(); ++k) {
        const double t = static_cast<double>(k) / fs;
        v[k] = 1.0 - 0.05 * t + 1e-3 * std::sin(2.0 * std::numbers::pi * 1000.0 * t);
    }
    const detail::plotted_spectrum sp = detail::spectrum_for_plot(v, fs, 8000.0);
    REQUIRE_FALSE(sp.frequency_hz.empty());
    CHECK(sp.lowest_hz == 20.0);
    CHECK(sp.frequency_hz.front() >= 20.0);
    double low_max = -400.0, tone = -400.0;
    for (std::size_t k = 0; k < sp.frequency_hz.size(); ++k) {
        if (sp.frequency_hz[k] < 500.0) low_max = std::max(low_max, sp.level_dbv[k]);
        if (std::fabs(sp.frequency_hz[k] - 1000.0) < 0.5) tone = sp.level_dbv[k];
    }
    CHECK(low_max < -130.0);
    CHECK(tone == doctest::Approx(-60.0).epsilon(0.002)); // 1 mV peak, on a bin
    // A bias still settling, 1 - 0.2 exp(-t / 0.5 s) (the detector's output capacitor charging through a
    // bleeder): off every bin, so its windowed spectrum spreads over the low bins unless the trend goes first.
    std::vector<double> settling(16000);
    for (std::size_t k = 0; k < settling.size(); ++k) {
        const double t = static_cast<double>(k) / fs;
        settling[k] = 1.0 - 0.2 * std::exp(-t / 0.5) + 1e-3 * std::sin(2.0 * std::numbers::pi * 1000.0 * t);
    }
    const detail::plotted_spectrum ss = detail::spectrum_for_plot(settling, fs, 8000.0);
    double settle_max = -400.0;
    for (std::size_t k = 0; k < ss.frequency_hz.size(); ++k)
        if (ss.frequency_hz[k] < 500.0) settle_max = std::max(settle_max, ss.level_dbv[k]);
    MESSAGE("settling bias: largest level below 500 Hz " << settle_max << " dBV");
    // Measured: -156 dBV with the trend removed first, -136 dBV without (the window alone).
    CHECK(settle_max < -145.0);
    // Too short a record starts the plot further up: 5 bins of 16 Hz at 1000 samples.
    const detail::plotted_spectrum short_sp = detail::spectrum_for_plot(std::span<const double>(v).first(1000), fs, 8000.0);
    CHECK(short_sp.lowest_hz == doctest::Approx(80.0));
}

TEST_CASE("transfer levels hold the operating levels among a weak-to-strong grid")
{
    const std::vector<double> l = detail::transfer_levels({0.15, 1.5});
    CHECK(std::is_sorted(l.begin(), l.end()));
    CHECK(l.size() >= 6);
    CHECK(std::count(l.begin(), l.end(), 0.15) == 1);
    CHECK(std::count(l.begin(), l.end(), 1.5) == 1);
    CHECK(l.front() == doctest::Approx(0.01));
    CHECK(l.back() == doctest::Approx(3.0));
    for (std::size_t k = 1; k < l.size(); ++k) CHECK(l[k] / l[k - 1] > 1.15); // none crowds another
}

TEST_CASE("a bench pack's curves run at the scenario's own carrier and modulation, one transfer curve per circuit")
{
    // demo.toml: a 1 MHz carrier with m = 0.3. Two circuits (germanium, Schottky), the germanium one at two
    // levels: two transfer curves, three responses, the operating levels among the transfer points, and the
    // level-against-carrier chart for the two diodes.
    const fs::path out = fs::path(GALENA_TEST_TMP) / "plots-bench-pack";
    fs::remove_all(out);
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios/demo.toml";
    std::vector<variant_spec> variants = {{"ge-weak", "", {"signal.carrier_peak_v=0.15"}, {}},
                                          {"ge-strong", "", {"signal.carrier_peak_v=1.5"}, {}},
                                          {"schottky-weak", "", {"signal.carrier_peak_v=0.15", "diode.preset=small-signal-schottky"}, {}}};
    pack_options po;
    po.sweep.threads = 2;
    const pack_outcome o = make_pack(base, {"signal.duration_s=0.2"}, variants, out, po);
    CHECK(o.warnings.empty());
    const std::string transfer = read_text(out / "plots" / "transfer.gp");
    CHECK(transfer.find("1 MHz carrier, m = 0.3") != std::string::npos);
    CHECK(transfer.find("200 kHz") == std::string::npos);
    // Two curves (two data blocks) and the three operating points ringed.
    const std::string tdat = read_text(out / "plots" / "transfer.dat");
    std::size_t blocks = 0;
    for (std::size_t p = tdat.find("\n\n\n"); p != std::string::npos; p = tdat.find("\n\n\n", p + 3)) ++blocks;
    CHECK(blocks == 2);
    const std::string ops = read_text(out / "plots" / "transfer_operating.dat");
    CHECK(std::count(ops.begin(), ops.end(), '\n') == 3);
    CHECK(fs::exists(out / "plots" / "diode_levels.png"));
    const std::string dl = read_text(out / "plots" / "diode_levels.gp");
    CHECK(dl.find("germanium-point-contact and small-signal-schottky") != std::string::npos);
}
