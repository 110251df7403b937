// The page's plain-language conclusions: third-octave band levels against the standard's band centres and
// Parseval's theorem, and the generated sentences from constructed measures (levels and spectra chosen by
// hand, the expected wording and figures worked out by hand in the comments).
#include "galena/report_conclusions.hpp"

#include <doctest/doctest.h>

#include <cmath>
#include <random>
#include <string>
#include <vector>

using namespace galena;

namespace {

constexpr double pi = 3.141592653589793;

/// A measure with 20 flat bands (100 Hz .. 8 kHz) at `band_db`, the bands from 2 kHz up (indices 13..19)
/// raised by `high_db`, and one band (index 5, 315 Hz) raised by `bump_db`.
listening_measure flat(const std::string& name, double rms_dbfs, double high_db = 0.0, double bump_db = 0.0, double band_db = -30.0)
{
    listening_measure m;
    m.name = name;
    m.rms_dbfs = rms_dbfs;
    m.band_db.assign(20, band_db);
    for (std::size_t i = 13; i < 20; ++i) m.band_db[i] += high_db;
    m.band_db[5] += bump_db;
    return m;
}

bool has(const std::vector<std::string>& v, const std::string& s)
{
    for (const auto& x : v)
        if (x == s) return true;
    return false;
}

} // namespace

TEST_CASE("third-octave centres are the standard's nominal bands 100 Hz .. 8 kHz")
{
    // IEC 61260-1 (and ANSI S1.11) nominal third-octave midband frequencies; the exact base-10 values
    // 1000 * 10^(k/10) round to these within 1 %.
    const std::vector<double> nominal{100, 125, 160, 200, 250, 315, 400, 500, 630, 800,
                                      1000, 1250, 1600, 2000, 2500, 3150, 4000, 5000, 6300, 8000};
    const auto c = third_octave_centres_hz(10e3);  // the 10 kHz band's upper edge (11.2 kHz) is above 10 kHz
    REQUIRE(c.size() == nominal.size());
    for (std::size_t i = 0; i < c.size(); ++i) CHECK(std::abs(c[i] / nominal[i] - 1.0) < 0.01);
    CHECK(third_octave_centres_hz(8000.0).size() == 19);  // at fs = 16 kHz the 8 kHz band (to 8.9 kHz) is left out
}

TEST_CASE("band levels: a sine reads its mean square in its own band; white noise its share of the spectrum")
{
    const double fs = 48000.0;
    // Parseval: a sine of amplitude a has mean square a^2 / 2, so a = 0.5 reads 20 log10(0.5 / sqrt 2) = -9.03 dB.
    std::vector<float> x(48000);
    for (std::size_t n = 0; n < x.size(); ++n) x[n] = static_cast<float>(0.5 * std::sin(2.0 * pi * 1000.0 * n / fs) + 0.2);  // DC removed
    const auto db = band_levels_db(x, fs);
    REQUIRE(db.size() == 20);
    CHECK(std::abs(db[10] - 20.0 * std::log10(0.5 / std::sqrt(2.0))) < 0.002);
    CHECK(db[0] < -80.0);   // the 0.2 DC offset leaks nowhere: segment means are removed
    CHECK(db[8] < -60.0);   // 630 Hz: far outside the Hann window's main lobe
    // White noise of variance s^2 spreads evenly over 0..fs/2: the bands 89 Hz .. 8913 Hz (the 100 Hz band's
    // lower edge to the 8 kHz band's upper edge, f_c * 10^(-+1/20)) hold s^2 (8913 - 89) / 24000.
    std::mt19937 gen(7);
    std::normal_distribution<double> nd(0.0, 0.1);
    std::vector<float> w(480000);
    for (auto& v : w) v = static_cast<float>(nd(gen));
    const auto wd = band_levels_db(w, fs);
    double p = 0.0;
    for (double d : wd) p += std::pow(10.0, d / 10.0);
    const double lo = 100.0 * std::pow(10.0, -0.05), hi = 7943.28 * std::pow(10.0, 0.05);
    CHECK(std::abs(10.0 * std::log10(p) - 10.0 * std::log10(0.01 * (hi - lo) / 24000.0)) < 0.05);
    CHECK(band_levels_db(std::vector<float>(100, 0.1f), fs).empty());
}

TEST_CASE("spectral distance and brightness of constructed spectra")
{
    // 20 bands at -30 dB against the same with the 7 bands from 2 kHz up at -26 dB. Levels taken out:
    // flat: every band at -30 - 10 log10(20 * 1e-3) = -13.010 dB; raised: total 10 log10(13e-3 + 7 * 10^-2.6)
    // = -15.145 dB, so low bands at -14.855 and high bands at -10.855: distances 1.845 and 2.155 dB.
    const auto a = flat("a", -20.0), b = flat("b", -29.0, 4.0);
    CHECK(std::abs(spectral_distance_db(b, a) - 2.155) < 0.001);
    // Share of power from 2 kHz up: 7/20 -> -4.559 dB flat; 0.017584 / 0.030584 -> -2.404 dB raised: +2.155 dB.
    CHECK(std::abs(brightness_db(b, a) - 2.155) < 0.001);
    CHECK(std::abs(brightness_db(a, b) + 2.155) < 0.001);
    // A band more than band_floor_db (40 dB) below the loudest band in both spectra does not count: 5 dB
    // apart at 45 and 50 dB down leaves only the totals' 1e-8 / 20e-3 shift (2e-6 dB).
    auto q1 = flat("q1", -20.0), q2 = flat("q2", -20.0);
    q1.band_db[0] = -75.0;
    q2.band_db[0] = -80.0;
    CHECK(spectral_distance_db(q1, q2) < 1e-4);
    q1.band_db[0] = -65.0;  // 35 dB down: counts
    CHECK(std::abs(spectral_distance_db(q1, q2) - 15.0) < 0.01);
    const auto v = compare_for_listening(b, a);
    CHECK(std::abs(v.level_db + 9.0) < 1e-12);
    CHECK_FALSE(v.same_level);
    CHECK_FALSE(v.same_spectrum);
    // Unknown spectra are never "the same".
    listening_measure none{"n", -20.0, {}, std::nan("")};
    CHECK_FALSE(compare_for_listening(none, a).same_spectrum);
}

TEST_CASE("the thresholds are strict: 0.9 dB is the same level, 1.1 dB is not; likewise the spectral JND")
{
    const auto a = flat("a", -20.0);
    CHECK(compare_for_listening(flat("b", -20.9), a).indistinguishable());
    CHECK_FALSE(compare_for_listening(flat("b", -21.1), a).indistinguishable());
    // A bump of x dB in one of 20 bands moves that band by x - 10 log10((19 + 10^(x/10)) / 20) against the
    // others: 0.97 -> 0.9160 dB (same), 1.2 -> 1.1314 dB (not the same).
    CHECK(std::abs(spectral_distance_db(flat("b", -20.0, 0.0, 0.97), a) - 0.9160) < 0.0005);
    CHECK(compare_for_listening(flat("b", -20.0, 0.0, 0.97), a).indistinguishable());
    CHECK_FALSE(compare_for_listening(flat("b", -20.0, 0.0, 1.2), a).indistinguishable());
}

TEST_CASE("conclusions: three bleeders that sound the same, one quieter and brighter, one louder and duller")
{
    std::vector<listening_measure> m{flat("220k", -20.0), flat("1M", -20.4, 0.0, 0.3), flat("10k", -29.0, 4.0),
                                     flat("none", -20.7), flat("schottky", -16.0, -4.0)};
    m[2].thd_percent = 0.8;
    m[4].thd_percent = 7.25;
    const auto c = conclude(m);
    REQUIRE(c.groups.size() == 3);
    CHECK(c.groups[0] == std::vector<std::size_t>{0, 1, 3});
    CHECK(c.reference == 0);
    CHECK(has(c.sentences, "220k, 1M and none sound the same (levels within 1 dB, same tone colour)."));
    CHECK(has(c.sentences, "10k is 9.0 dB quieter than 220k and brighter."));
    CHECK(has(c.sentences, "schottky is 4.0 dB louder than 220k and duller."));
    CHECK(has(c.sentences, "The loudest is schottky (-16.0 dBFS RMS), the quietest 10k (-29.0 dBFS RMS): 13.0 dB apart."));
    CHECK(has(c.sentences, "Audible distortion (THD above 3 %): schottky (7.2 %)."));
    CHECK(c.sentences.back().rfind("Thresholds (rules of thumb, common practice): the same loudness within 1 dB;", 0) == 0);
    CHECK(c.summaries[1] == "Sounds the same as 220k and none (within 1 dB, same tone colour); -20.4 dBFS RMS.");
    CHECK(c.summaries[2] == "9.0 dB quieter than 220k and brighter; -29.0 dBFS RMS, the quietest; THD 0.8 %.");
    CHECK(c.summaries[4] == "4.0 dB louder than 220k and duller; -16.0 dBFS RMS, the loudest; THD 7.2 % (audible).");
}

TEST_CASE("conclusions: equal levels but a different colour, all within 1 dB, no distortion")
{
    std::vector<listening_measure> m{flat("ge", -20.0), flat("schottky", -20.5, 3.0)};
    m[0].thd_percent = 1.0;
    m[1].thd_percent = 2.0;
    const auto c = conclude(m);
    CHECK(c.groups.size() == 2);
    CHECK(has(c.sentences, "schottky is as loud as ge (within 1 dB) but brighter."));
    CHECK(has(c.sentences, "All 2 variants lie within 1 dB of each other in level."));
    CHECK(has(c.sentences, "No variant distorts audibly (THD at or below 3 % wherever it was measured)."));
    CHECK(c.summaries[0] == "The reference the others are compared with; -20.0 dBFS RMS; THD 1.0 %.");
}

TEST_CASE("conclusions compare within a context only: the Schottky is quieter at the weak carrier, equal at the strong one")
{
    std::vector<listening_measure> m{flat("ge-weak", -48.0), flat("schottky-weak", -52.0, 2.0), flat("ge-strong", -28.0),
                                     flat("schottky-strong", -28.4)};
    m[0].context = m[1].context = "at the 150 mV carrier";
    m[2].context = m[3].context = "at the 1.5 V carrier";
    const auto c = conclude(m);
    CHECK(has(c.sentences, "At the 150 mV carrier, schottky-weak is 4.0 dB quieter than ge-weak and brighter."));
    CHECK(has(c.sentences, "At the 1.5 V carrier, ge-strong and schottky-strong sound the same (levels within 1 dB, same tone colour)."));
    CHECK(c.reference_of == std::vector<std::size_t>{0, 0, 2, 2});
    // Nothing compares the strong carrier with the weak one (20 dB apart).
    for (const auto& s : c.sentences) CHECK(s.find("20.0 dB") == std::string::npos);
    CHECK(c.summaries[3] == "Sounds the same as ge-strong (within 1 dB, same tone colour); -28.4 dBFS RMS.");
}
