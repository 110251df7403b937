// AM synthesis and programme conditioning: spectrum of the AM wave, tone normalisation, clip band-limiting,
// resampling and interpolation, overmodulation guard.
#include "galena/error.hpp"
#include "galena/signal.hpp"

#include <doctest/doctest.h>
#include <unsupported/Eigen/FFT>
#include <cmath>
#include <complex>
#include <vector>

using namespace galena;

namespace {
constexpr double k_pi = 3.14159265358979323846;

/// Single-sided amplitude spectrum with a rectangular window (exact for whole-cycle, bin-centred tones).
std::vector<double> amplitude_spectrum(const std::vector<double>& x)
{
    Eigen::FFT<double> fft;
    std::vector<std::complex<double>> spec;
    fft.fwd(spec, x);
    std::vector<double> a(x.size() / 2);
    for (std::size_t k = 0; k < a.size(); ++k) a[k] = (k == 0 ? 1.0 : 2.0) * std::abs(spec[k]) / static_cast<double>(x.size());
    return a;
}
} // namespace

TEST_CASE("DSB full-carrier AM: carrier at A, each sideband at A m / 2")
{
    // s(t) = A (1 + m cos(wm t)) cos(wc t) = A cos(wc t) + (A m / 2) [cos((wc-wm)t) + cos((wc+wm)t)]
    // [any communications text; product-to-sum identity]. The sideband share of power is m^2/(2+m^2).
    const double fs = 4.0e6, fc = 500e3, fm = 1000.0, a = 0.8, m = 0.3;
    tone_modulation tone({fm}, {1.0}, 1.0);
    am_params p;
    p.carrier_hz = fc;
    p.carrier_peak_v = a;
    p.modulation_index = m;
    const am_source src(p, &tone);
    const std::size_t n = 40000; // 10 ms: whole cycles of fm and fc, bins 100 Hz apart
    std::vector<double> x(n);
    for (std::size_t i = 0; i < n; ++i) x[i] = src.voltage(static_cast<double>(i) / fs);
    const auto spec = amplitude_spectrum(x);
    const double bin = fs / static_cast<double>(n);
    auto at = [&](double f) { return spec[static_cast<std::size_t>(std::lround(f / bin))]; };
    CHECK(at(fc) == doctest::Approx(a).epsilon(1e-9).scale(0.0));
    CHECK(at(fc - fm) == doctest::Approx(a * m / 2.0).epsilon(1e-9).scale(0.0));
    CHECK(at(fc + fm) == doctest::Approx(a * m / 2.0).epsilon(1e-9).scale(0.0));
    double total = 0.0, sidebands = 0.0;
    for (std::size_t k = 1; k < spec.size(); ++k) total += spec[k] * spec[k];
    sidebands = at(fc - fm) * at(fc - fm) + at(fc + fm) * at(fc + fm);
    CHECK(sidebands / total == doctest::Approx(m * m / (2.0 + m * m)).epsilon(1e-9).scale(0.0));
}

TEST_CASE("tone modulation: peak-normalised amplitudes and a 4:1 pair")
{
    tone_modulation pair({60.0, 7000.0}, {4.0, 1.0}, 1.0);
    CHECK(pair.amplitude(0) == doctest::Approx(0.8).scale(0.0));
    CHECK(pair.amplitude(1) == doctest::Approx(0.2).scale(0.0));
    double peak = 0.0;
    for (int i = 0; i < 100000; ++i) peak = std::max(peak, std::fabs(pair.value(i * 1e-5)));
    CHECK(peak <= 1.0);
    CHECK(peak > 0.99); // the two tones line up somewhere within a second
    CHECK(pair.value(-1e-3) == 0.0);
    CHECK(pair.value(1.5) == 0.0);
    CHECK_THROWS_AS(tone_modulation({0.0}, {1.0}, 1.0), config_error);
}

TEST_CASE("log sweep: the instantaneous frequency follows the exponential law f1 (f2/f1)^(t/T) at several points")
{
    // The exponential sine sweep (Farina, "Simultaneous measurement of impulse response and distortion with
    // a swept-sine technique", AES 108th Convention, 2000, preprint 5093): f(t) = f1 (f2/f1)^(t/T). The law
    // is written here, not taken from the code; the frequency is measured from the waveform itself as the
    // rate of its zero crossings (linearly interpolated) over two cycles around each point.
    const double f1 = 100.0, f2 = 4000.0, T = 2.0;
    log_sweep_modulation sw(f1, f2, T);
    for (const double t : {0.1, 0.5, 1.0, 1.5, 1.9}) {
        CAPTURE(t);
        const double f_law = f1 * std::pow(f2 / f1, t / T); // sets the window and the sampling step
        const double half = 1.0 / f_law, dt = 1.0 / (f_law * 4000.0);
        std::vector<double> zc;
        double prev = sw.value(t - half);
        for (double u = t - half + dt; u <= t + half; u += dt) {
            const double v = sw.value(u);
            if ((v > 0.0) != (prev > 0.0)) zc.push_back(u - dt * v / (v - prev));
            prev = v;
        }
        REQUIRE(zc.size() >= 3);
        // Mean frequency between the first and last crossing, against the law at their midpoint.
        const double f_meas = static_cast<double>(zc.size() - 1) / (2.0 * (zc.back() - zc.front()));
        const double f_mid = f1 * std::pow(f2 / f1, 0.5 * (zc.front() + zc.back()) / T);
        MESSAGE("t = " << t << " s: measured " << f_meas << " Hz, law " << f_mid << " Hz, relative " << f_meas / f_mid - 1.0);
        // Measured 2.2e-5 at t = 0.1 s falling to 3e-8 at 1.9 s (the window's mean of a rising frequency against its midpoint
        // value, and the crossing interpolation); a linear sweep between the same ends is 3x off at t = 1 s.
        CHECK(f_meas == doctest::Approx(f_mid).epsilon(1e-4));
    }
    CHECK(sw.frequency_at(1.0) == doctest::Approx(f1 * std::pow(f2 / f1, 0.5)).epsilon(1e-12));
}

TEST_CASE("overmodulation is refused unless allowed")
{
    am_params p;
    p.modulation_index = 1.2;
    CHECK_THROWS_WITH_AS(p.validate(), doctest::Contains("signal.modulation_index = 1.2"), config_error);
    p.allow_overmodulation = true;
    CHECK_NOTHROW(p.validate());
}

TEST_CASE("clip conditioning: a pass-band tone comes through at peak 1, aligned in time")
{
    // A 1 kHz sine of amplitude 0.25 at 48 kHz: after band-limiting (5 kHz), resampling and normalisation
    // x(t) must equal sin(2 pi 1000 t) (delay of the linear-phase FIR removed, gain 4).
    const double fs = 48000.0;
    std::vector<float> s(static_cast<std::size_t>(fs * 0.2));
    for (std::size_t i = 0; i < s.size(); ++i) s[i] = static_cast<float>(0.25 * std::sin(2.0 * k_pi * 1000.0 * i / fs));
    conditioning_settings cs;
    cs.cutoff_hz = 5000.0;
    clip_modulation clip(std::make_unique<buffer_reader>(s, fs), cs);
    CHECK(clip.duration_s() == doctest::Approx(0.2).scale(0.0));
    CHECK(clip.normalisation_gain() == doctest::Approx(4.0).epsilon(2e-3).scale(0.0));
    double worst = 0.0;
    for (double t0 = 0.02; t0 < 0.18; t0 += 0.01) {
        clip.prepare(t0, t0 + 0.01);
        for (int i = 0; i < 1000; ++i) {
            const double t = t0 + 0.01 * i / 1000.0;
            worst = std::max(worst, std::fabs(clip.value(t) - std::sin(2.0 * k_pi * 1000.0 * t)));
        }
    }
    CHECK(worst < 2e-3);
}

TEST_CASE("clip conditioning: content above the cutoff is removed (Kaiser FIR, 60 dB design)")
{
    const double fs = 48000.0;
    std::vector<float> s(static_cast<std::size_t>(fs * 0.2));
    // 1 kHz at 0.5 plus 9 kHz at 0.5: after the 5 kHz band limit only the 1 kHz part is left.
    for (std::size_t i = 0; i < s.size(); ++i)
        s[i] = static_cast<float>(0.5 * std::sin(2 * k_pi * 1000.0 * i / fs) + 0.5 * std::sin(2 * k_pi * 9000.0 * i / fs));
    conditioning_settings cs;
    cs.cutoff_hz = 5000.0;
    clip_modulation clip(std::make_unique<buffer_reader>(s, fs), cs);
    clip.prepare(0.05, 0.15);
    // Least-squares fit of a 1 kHz sine/cosine pair over whole cycles; the residual is what is left of
    // the 9 kHz tone (the normalisation gain depends on the FIR's start-up overshoot, so fit, not assume).
    const int n = 20000;
    double ss = 0, sc = 0, xs = 0, xc = 0, cc = 0;
    std::vector<double> t(n), v(n);
    for (int i = 0; i < n; ++i) {
        t[i] = 0.05 + 0.1 * i / n;
        v[i] = clip.value(t[i]);
        const double si = std::sin(2 * k_pi * 1000.0 * t[i]), ci = std::cos(2 * k_pi * 1000.0 * t[i]);
        ss += si * si; cc += ci * ci; sc += si * ci; xs += v[i] * si; xc += v[i] * ci;
    }
    const double det = ss * cc - sc * sc;
    const double a = (xs * cc - xc * sc) / det, b = (xc * ss - xs * sc) / det;
    double res = 0, sig = 0;
    for (int i = 0; i < n; ++i) {
        const double fit = a * std::sin(2 * k_pi * 1000.0 * t[i]) + b * std::cos(2 * k_pi * 1000.0 * t[i]);
        res += (v[i] - fit) * (v[i] - fit);
        sig += fit * fit;
    }
    CHECK(std::sqrt(res / sig) < 2e-3); // 9 kHz residue below -54 dB of the 1 kHz tone
    CHECK(std::fabs(b) < 1e-3 * std::fabs(a)); // no time shift: the FIR delay is removed
}

TEST_CASE("clip conditioning rejects silent and non-finite clips")
{
    std::vector<float> zeros(4800, 0.0f);
    CHECK_THROWS_AS(clip_modulation(std::make_unique<buffer_reader>(zeros, 48000.0), conditioning_settings{}), audio_error);
    std::vector<float> bad(4800, 0.1f);
    bad[100] = std::nanf("");
    CHECK_THROWS_WITH_AS(clip_modulation(std::make_unique<buffer_reader>(bad, 48000.0), conditioning_settings{}),
                         doctest::Contains("not finite"), audio_error);
}

TEST_CASE("clip conditioning: the clip's scale does not matter, up to finite samples near FLT_MAX")
{
    // Conditioning is linear and ends in peak normalisation, so a clip scaled by any finite factor must give
    // the same programme (up to float rounding). A float WAV may hold samples near FLT_MAX (3.4e38): unscaled,
    // the band-limiting FIR overflowed to Inf and the normalisation to NaN (found by wav_fuzz); the same clip
    // scaled down by 1e38, and a clip of subnormal-scale samples (1e-40), must condition alike.
    const double fs = 48000.0;
    std::vector<float> base(static_cast<std::size_t>(fs * 0.1));
    for (std::size_t i = 0; i < base.size(); ++i)
        base[i] = static_cast<float>(0.5 * std::sin(2.0 * k_pi * 700.0 * i / fs) + 0.25 * std::sin(2.0 * k_pi * 2300.0 * i / fs));
    auto programme = [&](float scale) {
        std::vector<float> s(base);
        for (float& v : s) v *= scale;
        clip_modulation clip(std::make_unique<buffer_reader>(s, fs), conditioning_settings{});
        clip.prepare(0.0, clip.duration_s());
        std::vector<double> out;
        for (int i = 0; i < 2000; ++i) out.push_back(clip.value(clip.duration_s() * i / 2000.0));
        return out;
    };
    const auto ref = programme(1.0f);
    for (const float scale : {3.0e38f, 4e-40f}) {
        const auto x = programme(scale);
        double worst = 0.0;
        for (std::size_t i = 0; i < x.size(); ++i) {
            REQUIRE(std::isfinite(x[i]));
            CHECK(std::fabs(x[i]) <= 1.0);
            worst = std::max(worst, std::fabs(x[i] - ref[i]));
        }
        // Subnormal floats keep only a few significant bits (0.75 * 4e-40 has about 12 bits left), so the
        // small clip agrees to about 2^-10; the large one to float rounding.
        CHECK(worst < (scale < 1.0f ? 2e-3 : 1e-6));
    }
}
