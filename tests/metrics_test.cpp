// The metrics module against signals with analytic answers, numpy's FFT and IEC 61672-1 Table 3.
#include "galena/metrics.hpp"

#include "galena/error.hpp"

#include <boost/math/quadrature/gauss_kronrod.hpp>
#include <doctest/doctest.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <random>
#include <string>
#include <vector>

using namespace galena;

namespace {
constexpr double k_pi = 3.14159265358979323846;
constexpr double fs = 48000.0;

double db(double ratio) { return 20.0 * std::log10(ratio); }

std::vector<double> sample(std::size_t n, auto&& f)
{
    std::vector<double> y(n);
    for (std::size_t i = 0; i < n; ++i) y[i] = f(static_cast<double>(i) / fs);
    return y;
}
} // namespace

TEST_CASE("half-wave rectified sine: DC 1/pi, H1 1/2, even harmonics 2/(pi(k^2-1)), no odd harmonics")
{
    // Fourier series of max(0, sin wt) (any table of Fourier series, e.g. a mathematics handbook):
    //   1/pi + (1/2) sin wt - (2/pi) sum_{k even} cos(k wt) / (k^2 - 1).
    // f0 = 997 Hz is not commensurate with fs, so the record holds no whole number of cycles and the aliases
    // of the (infinite) series do not land on the harmonics.
    const double f0 = 997.0;
    const auto y = sample(48000, [&](double t) { return std::max(0.0, std::sin(2 * k_pi * f0 * t)); });
    const auto m = analyze_tone(y, fs, f0, 20.0, 0.49 * fs);
    REQUIRE(m.harmonics_fitted == 9);
    CHECK(std::fabs(db(m.fundamental_v / 0.5)) < 0.01);
    CHECK(m.dc_v == doctest::Approx(1.0 / k_pi).epsilon(1e-3).scale(0.0));
    double hsum = 0.0;
    for (int k = 2; k <= 9; ++k) {
        const double expected = (k % 2 == 0) ? 2.0 / (k_pi * (k * k - 1.0)) : 0.0;
        hsum += expected * expected;
        INFO("harmonic " << k);
        if (expected > 0.0) CHECK(m.harmonic_v[k] == doctest::Approx(expected).epsilon(0.01).scale(0.0));
        else CHECK(m.harmonic_v[k] < 1e-4 * 0.5);
    }
    const double thd_expected = 100.0 * std::sqrt(hsum) / 0.5;
    CHECK(m.thd_percent == doctest::Approx(thd_expected).epsilon(0.01).scale(0.0));
}

TEST_CASE("symmetric clipped sine: odd harmonics from the closed form, checked by quadrature")
{
    // y = clamp(sin th, -s, s) with s = sin(alpha). Odd symmetry and half-wave symmetry leave odd sine terms:
    //   b_n = (4/pi) int_0^{pi/2} y sin(n th) dth  (derived: split at th = alpha)
    //   b_1 = (2 alpha + sin 2 alpha) / pi
    //   b_n = (4/pi) [ (sin((n-1)a)/(n-1) - sin((n+1)a)/(n+1)) / 2 + sin(a) cos(n a) / n ],  n = 3, 5, ...
    // The closed form is cross-checked here by Gauss-Kronrod quadrature (Boost.Math) of the same integral.
    const double alpha = 0.9;
    const double s = std::sin(alpha);
    auto clipped = [&](double th) { return std::clamp(std::sin(th), -s, s); };
    auto bn_closed = [&](int n) {
        if (n == 1) return (2 * alpha + std::sin(2 * alpha)) / k_pi;
        return 4 / k_pi * (0.5 * (std::sin((n - 1) * alpha) / (n - 1) - std::sin((n + 1) * alpha) / (n + 1)) +
                           s * std::cos(n * alpha) / n);
    };
    for (int n : {1, 3, 5, 7, 9}) {
        auto f = [&](double th) { return clipped(th) * std::sin(n * th); };
        const double q = 4 / k_pi *
                         (boost::math::quadrature::gauss_kronrod<double, 61>::integrate(f, 0.0, alpha) +
                          boost::math::quadrature::gauss_kronrod<double, 61>::integrate(f, alpha, k_pi / 2));
        REQUIRE(bn_closed(n) == doctest::Approx(q).epsilon(1e-10).scale(0.0));
    }
    const double f0 = 1013.0;
    const auto y = sample(36000, [&](double t) { return clipped(2 * k_pi * f0 * t); });
    const auto m = analyze_tone(y, fs, f0, 20.0, 0.49 * fs);
    CHECK(std::fabs(db(m.fundamental_v / bn_closed(1))) < 0.01);
    double hsum = 0.0;
    for (int k = 2; k <= 9; ++k) {
        const double e = (k % 2 == 1) ? std::fabs(bn_closed(k)) : 0.0;
        hsum += e * e;
        INFO("harmonic " << k);
        if (e > 0.0) CHECK(m.harmonic_v[k] == doctest::Approx(e).epsilon(0.01).scale(0.0));
        else CHECK(m.harmonic_v[k] < 1e-5);
    }
    CHECK(m.thd_percent == doctest::Approx(100.0 * std::sqrt(hsum) / bn_closed(1)).epsilon(0.01).scale(0.0));
}

TEST_CASE("sum of chosen harmonics: THD, THD+N and SINAD from the chosen amplitudes")
{
    // y = 0.1 + 0.8 cos(w t) + 0.05 sin(2 w t + 0.3) + 0.02 cos(3 w t + 1) + 0.01 sin(5 w t).
    // THD_F = sqrt(0.05^2 + 0.02^2 + 0.01^2) / 0.8 (definition, IEC 60268-3 style, fundamental reference).
    // With no noise and every term in the band, THD+N (AES17: residual over total, in the band) is
    // sqrt(sum_{k>=2} V_k^2) / sqrt(sum_{k>=1} V_k^2); the DC is outside the band.
    const double f0 = 1000.0;
    const double w = 2 * k_pi * f0;
    const auto y = sample(24000, [&](double t) {
        return 0.1 + 0.8 * std::cos(w * t) + 0.05 * std::sin(2 * w * t + 0.3) + 0.02 * std::cos(3 * w * t + 1.0) +
               0.01 * std::sin(5 * w * t);
    });
    const auto m = analyze_tone(y, fs, f0, 20.0, 20000.0);
    const double h = std::sqrt(0.05 * 0.05 + 0.02 * 0.02 + 0.01 * 0.01);
    CHECK(std::fabs(db(m.fundamental_v / 0.8)) < 0.01);
    CHECK(std::fabs(m.fundamental_phase_rad) < 1e-6);
    CHECK(m.harmonic_ratio[2] == doctest::Approx(0.05 / 0.8).epsilon(1e-3).scale(0.0));
    CHECK(m.harmonic_ratio[3] == doctest::Approx(0.02 / 0.8).epsilon(1e-3).scale(0.0));
    CHECK(m.harmonic_ratio[4] < 1e-6);
    CHECK(m.harmonic_ratio[5] == doctest::Approx(0.01 / 0.8).epsilon(1e-3).scale(0.0));
    CHECK(m.thd_percent == doctest::Approx(100.0 * h / 0.8).epsilon(0.01).scale(0.0));
    const double thdn = h / std::sqrt(h * h + 0.8 * 0.8);
    CHECK(m.thd_n_percent == doctest::Approx(100.0 * thdn).epsilon(0.01).scale(0.0));
    CHECK(m.sinad_db == doctest::Approx(-20.0 * std::log10(thdn)).epsilon(1e-3).scale(0.0));
    // A band that excludes the 5th harmonic (5 kHz) drops it from THD+N and from the harmonic fit.
    const auto mb = analyze_tone(y, fs, f0, 20.0, 4500.0);
    const double h4 = std::sqrt(0.05 * 0.05 + 0.02 * 0.02);
    CHECK(mb.thd_n_percent == doctest::Approx(100.0 * h4 / std::sqrt(h4 * h4 + 0.64)).epsilon(0.01).scale(0.0));
    CHECK(mb.harmonics_fitted == 4);
}

TEST_CASE("the spectrum matches numpy.fft.rfft with scipy's windows on the same data")
{
    // Independent reference: numpy/scipy from Debian, run by /usr/bin/python3 on the very samples.
    std::mt19937 rng(7);
    std::normal_distribution<double> noise(0.0, 0.01);
    const auto y = sample(3001, [&](double t) {
        return 0.3 + 0.7 * std::sin(2 * k_pi * 1234.5 * t) + 0.1 * std::cos(2 * k_pi * 7000 * t) + noise(rng);
    });
    const std::filesystem::path dir = GALENA_TEST_TMP;
    std::filesystem::create_directories(dir);
    const auto in = dir / "numpy_in.txt";
    {
        std::ofstream f(in);
        f.precision(17);
        for (double v : y) f << v << '\n';
    }
    const std::pair<spectrum_window, const char*> windows[] = {{spectrum_window::rectangular, "boxcar"},
                                                               {spectrum_window::hann, "hann"},
                                                               {spectrum_window::blackman_harris4, "blackmanharris"},
                                                               {spectrum_window::flat_top, "flattop"}};
    for (const auto& [win, name] : windows) {
        const auto out = dir / (std::string("numpy_out_") + name + ".txt");
        const std::string cmd = std::string("/usr/bin/python3 ") + GALENA_SOURCE_DIR + "/tests/numpy_fft_check.py " +
                                in.string() + " " + out.string() + " " + name;
        REQUIRE(std::system(cmd.c_str()) == 0);
        std::ifstream f(out);
        std::vector<double> ref;
        for (double v; f >> v;) ref.push_back(v);
        const auto s = compute_spectrum(y, fs, win);
        REQUIRE(ref.size() == s.amplitude_v.size());
        double worst = 0.0;
        for (std::size_t k = 0; k < ref.size(); ++k) worst = std::max(worst, std::fabs(ref[k] - s.amplitude_v[k]));
        INFO("window " << name);
        CHECK(worst < 1e-12);
    }
}

TEST_CASE("flat-top window reads an off-bin tone's amplitude within 0.02 dB")
{
    // Flat-top windows trade resolution for a flat main lobe (scalloping loss ~0.01 dB; common practice).
    const auto y = sample(4800, [&](double t) { return 0.5 * std::sin(2 * k_pi * 1005.0 * t); }); // bin 100.5
    const auto s = compute_spectrum(y, fs, spectrum_window::flat_top);
    double peak = 0.0;
    for (double a : s.amplitude_v) peak = std::max(peak, a);
    CHECK(std::fabs(db(peak / 0.5)) < 0.02);
}

TEST_CASE("A-weighting matches IEC 61672-1:2013 Table 3 within 0.1 dB")
{
    // IEC 61672-1:2013, Table 3.
    CHECK(std::fabs(a_weighting_db(100.0) - -19.1) < 0.1);
    CHECK(std::fabs(a_weighting_db(500.0) - -3.2) < 0.1);
    CHECK(std::fabs(a_weighting_db(1000.0) - 0.0) < 0.1);
    CHECK(std::fabs(a_weighting_db(2000.0) - 1.2) < 0.1);
    CHECK(std::fabs(a_weighting_db(10000.0) - -2.5) < 0.1);
    CHECK_THROWS_AS((void)a_weighting_db(0.0), config_error);
}

TEST_CASE("levels: DC, band-limited RMS and peak, A-weighted level of a known mixture")
{
    // v = 0.5 + 0.1 sin(2 pi 2000 t) + 0.05 sin(2 pi 15000 t), whole cycles in 0.5 s. In a 20 Hz-10 kHz band:
    // RMS 0.1/sqrt 2, peak 0.1, A-weighted RMS 0.1/sqrt 2 * 10^(A(2 kHz)/20) with A = +1.2 dB (Table 3).
    const auto v = sample(24000, [&](double t) {
        return 0.5 + 0.1 * std::sin(2 * k_pi * 2000 * t) + 0.05 * std::sin(2 * k_pi * 15000 * t);
    });
    const auto m = measure_levels(v, fs, 20.0, 10000.0);
    CHECK(m.dc_v == doctest::Approx(0.5).epsilon(1e-9).scale(0.0));
    CHECK(m.audio_rms_v == doctest::Approx(0.1 / std::sqrt(2.0)).epsilon(1e-9).scale(0.0));
    CHECK(m.audio_peak_v == doctest::Approx(0.1).epsilon(1e-6).scale(0.0));
    CHECK(std::fabs(db(m.a_weighted_rms_v / (0.1 / std::sqrt(2.0))) - 1.2) < 0.1);
    CHECK(m.a_weighted_dbv == doctest::Approx(db(m.a_weighted_rms_v)).scale(0.0));
    CHECK_THROWS_AS((void)measure_levels(v, fs, 100.0, 30000.0), config_error);
    const auto j = to_json(m);
    CHECK(j.at("dc_v").get<double>() == m.dc_v);
}

TEST_CASE("two-tone IMD: an amplitude-modulated high tone gives sidebands of half the modulation depth")
{
    // 4:1 pair, 100 Hz + 4 kHz (the project's scaled SMPTE-style pair). The high tone is modulated by the
    // low one with depth mu: 0.2 (1 + mu cos w1 t) sin w2 t has sidebands 0.2 mu / 2 at f2 +- f1 (product
    // formula), so the RSS IMD is sqrt(2) mu / 2.
    const double f1 = 100.0, f2 = 4000.0, mu = 0.1;
    const auto y = sample(24000, [&](double t) {
        return 0.8 * std::cos(2 * k_pi * f1 * t) + 0.2 * (1.0 + mu * std::cos(2 * k_pi * f1 * t)) * std::sin(2 * k_pi * f2 * t);
    });
    const auto m = analyze_two_tone(y, fs, f1, f2, 4.0, 3);
    CHECK(m.f1_v == doctest::Approx(0.8).epsilon(1e-6).scale(0.0));
    CHECK(m.f2_v == doctest::Approx(0.2).epsilon(1e-6).scale(0.0));
    CHECK(m.sideband_v[0] == doctest::Approx(0.2 * mu / 2).epsilon(1e-6).scale(0.0));
    CHECK(m.sideband_v[1] == doctest::Approx(0.2 * mu / 2).epsilon(1e-6).scale(0.0));
    CHECK(m.sideband_v[2] < 1e-9);
    CHECK(m.imd_percent == doctest::Approx(100.0 * std::sqrt(2.0) * mu / 2).epsilon(1e-4).scale(0.0));
    CHECK_THROWS_AS((void)analyze_two_tone(y, fs, 4000.0, 100.0), config_error);
}

TEST_CASE("fidelity: gain, sub-sample delay, residual and correlation of a scaled, delayed copy")
{
    // reference: 25 tones with pseudo-random frequencies (200 Hz - 4 kHz) and phases; recovered = g ref(t - D)
    // + an unrelated 6 kHz tone of amplitude b. The residual after the ideal fit is that tone, so
    // residual_db -> 10 log10((b^2/2) / (g^2 P_ref + b^2/2)) where P_ref = sum a_k^2 / 2.
    std::mt19937 rng(3);
    std::uniform_real_distribution<double> uf(200.0, 4000.0), up(0.0, 2 * k_pi), ua(0.2, 1.0);
    std::vector<double> fr(25), ph(25), am(25);
    double pref = 0.0;
    for (int k = 0; k < 25; ++k) {
        fr[k] = uf(rng);
        ph[k] = up(rng);
        am[k] = ua(rng);
        pref += am[k] * am[k] / 2;
    }
    auto ref_at = [&](double t) {
        double v = 0.0;
        for (int k = 0; k < 25; ++k) v += am[k] * std::sin(2 * k_pi * fr[k] * t + ph[k]);
        return v;
    };
    const double g = 0.37, delay = 23.4 / fs, b = 0.05;
    const auto ref = sample(24000, ref_at);
    const auto rec = sample(24000, [&](double t) { return g * ref_at(t - delay) + b * std::sin(2 * k_pi * 6000 * t); });
    const auto f = compare_to_reference(rec, ref, fs, 0.01, 20.0, 10000.0);
    CHECK(f.delay_s * fs == doctest::Approx(23.4).epsilon(0.01 / 23.4).scale(0.0));
    CHECK(f.gain == doctest::Approx(g).epsilon(2e-3).scale(0.0));
    const double expected_db = 10 * std::log10((b * b / 2) / (g * g * pref + b * b / 2));
    CHECK(f.residual_db == doctest::Approx(expected_db).epsilon(0.3 / std::fabs(expected_db)).scale(0.0));
    CHECK(f.correlation == doctest::Approx(std::sqrt(g * g * pref / (g * g * pref + b * b / 2))).epsilon(1e-3).scale(0.0));
    CHECK_THROWS_AS((void)compare_to_reference(rec, std::vector<double>(24000, 0.0), fs), audio_error);
}

TEST_CASE("merged JSON is flat, carries warnings and writes non-finite numbers as null")
{
    level_metrics l;
    l.a_weighted_dbv = -std::numeric_limits<double>::infinity();
    const auto j = merge_metrics({to_json(l), to_json(tone_metrics{})}, {{warning_code::samples_missing, "a warning"}});
    CHECK(j.at("a_weighted_dbv").is_null());
    CHECK(j.at("warnings").size() == 1);
    CHECK(j.at("warning_codes") == nlohmann::json::array({"samples-missing"}));
    for (const auto& [k, v] : j.items()) CHECK((!v.is_object()));
    CHECK(to_text(j).find("warning: a warning") != std::string::npos);
    CHECK(to_text(j).find("samples-missing") == std::string::npos); // the codes are for programs
}

TEST_CASE("fft_friendly_length: the largest 7-smooth length not above n")
{
    // By the definition (no prime factor above 7), checked against a direct search for every n up to 5000
    // and at the bench excerpt's analysis length: 71943 = 3 x 23981 -> 71680 = 2^11 x 5 x 7.
    auto smooth = [](std::size_t m) {
        for (const std::size_t p : {2u, 3u, 5u, 7u})
            while (m > 0 && m % p == 0) m /= p;
        return m == 1;
    };
    CHECK(fft_friendly_length(71943) == 71680);
    CHECK(fft_friendly_length(72000) == 72000);
    CHECK(fft_friendly_length(97) == 96);
    CHECK(fft_friendly_length(1) == 1);
    std::size_t last_smooth = 1;
    for (std::size_t n = 1; n <= 5000; ++n) {
        if (smooth(n)) last_smooth = n;
        REQUIRE(fft_friendly_length(n) == last_smooth);
    }
    for (std::size_t n : {2001u, 20011u, 71943u, 480001u}) CHECK(fft_friendly_length(n) >= n - n / 100);
}

TEST_CASE("fft_friendly_start: the window's start moved so its length is FFT-friendly, unless that cuts below the need")
{
    // 72000 samples with 57 to skip leave 71943 = 3 x 23981: the start moves to 72000 - 71680 = 320. A need of
    // 71681 samples keeps the start at 57; a need of exactly 71680 moves it. A 97-sample window needing 97
    // stays; a skip at the end stays.
    CHECK(fft_friendly_start(72000, 57, 64.0) == 320);
    CHECK(fft_friendly_start(72000, 57, 71681.0) == 57);
    CHECK(fft_friendly_start(72000, 57, 71680.0) == 320);
    CHECK(fft_friendly_start(197, 100, 97.0) == 100);
    CHECK(fft_friendly_start(197, 100, 96.0) == 101);
    CHECK(fft_friendly_start(50, 50, 1.0) == 50);
}
