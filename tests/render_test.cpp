// The render loop: programme alignment through the decimation chain, carrier rejection, DC removal.
#include "galena/render.hpp"

#include <doctest/doctest.h>
#include <unsupported/Eigen/FFT>
#include <complex>
#include <cmath>
#include <vector>

using namespace galena;

namespace {
constexpr double k_pi = 3.14159265358979323846;

/// Least-squares amplitude and phase of a sinusoid at f over samples [from, to) at rate fs.
std::pair<double, double> fit_tone(const std::vector<double>& y, double fs, double f, std::size_t from, std::size_t to)
{
    double ss = 0, cc = 0, sc = 0, ys = 0, yc = 0, s0 = 0, c0 = 0, y0 = 0;
    const double n = static_cast<double>(to - from);
    for (std::size_t i = from; i < to; ++i) {
        const double s = std::sin(2 * k_pi * f * i / fs), c = std::cos(2 * k_pi * f * i / fs);
        ss += s * s; cc += c * c; sc += s * c; ys += y[i] * s; yc += y[i] * c; s0 += s; c0 += c; y0 += y[i];
    }
    (void)n; (void)s0; (void)c0; (void)y0;
    const double det = ss * cc - sc * sc;
    const double a = (ys * cc - yc * sc) / det, b = (yc * ss - ys * sc) / det;
    return {std::hypot(a, b), std::atan2(b, a)}; // y ~ A sin(wt + phi): a = A cos phi, b = A sin phi
}

circuit_params fast_detector()
{
    // Resistive load, only the 10 pF stray across it: the output follows the envelope within ~1 us.
    circuit_params c;
    c.source.resistance_ohm = 1e3;
    c.diode = find_diode_preset("small-signal-schottky").params;
    c.diode.junction_capacitance_f = 0.0;
    c.earpiece.kind = earpiece_kind::resistor;
    c.earpiece.resistance_ohm = 100e3;
    return c;
}
} // namespace

TEST_CASE("programme time is preserved: a tone through a fast detector arrives in phase")
{
    // An envelope detector whose output time constant is ~1 us delays a 1 kHz envelope by ~6 mrad; an
    // error of one audio sample in the chain's delay bookkeeping would show as 130 mrad at 48 kHz.
    tone_modulation tone({1000.0}, {1.0}, 0.05);
    am_params am;
    am.carrier_hz = 500e3;
    am.carrier_peak_v = 2.0;
    am.modulation_index = 0.3;
    render_settings rs;
    rs.preroll_s = 0.005;
    const auto out = render_to_memory(fast_detector(), am, tone, rs);
    REQUIRE(out.audio_v.size() == 2400);
    const auto [amp, phase] = fit_tone(out.audio_v, 48000.0, 1000.0, 480, 2400);
    CHECK(std::fabs(phase) < 0.02);
    // Strong-signal (linear) detection: the recovered tone is close to m A times the detection
    // efficiency (below 1: conduction angle and the source/load divider); it is not tiny and not above m A.
    CHECK(amp > 0.5 * 0.3 * 2.0);
    CHECK(amp < 0.3 * 2.0);
    for (double v : out.earpiece_v) REQUIRE(std::isfinite(v));
}

TEST_CASE("the carrier does not reach the audio: nothing but harmonics above -70 dB")
{
    // Carrier components that alias through the decimation chain would appear at frequencies unrelated
    // to the 1 kHz tone (below 100 Hz sits the DC high-pass settling after the modulation shifts the
    // rectified DC, which is not aliasing). Blackman-Harris (4-term) window: sidelobes below -92 dB (Harris, Proc. IEEE 1978).
    // The carrier, 301.37 kHz, is chosen so that its harmonics and their 1 kHz sidebands fold to
    // frequencies away from every harmonic of the tone at 48 kHz (n fc mod 48 kHz: 13.37, 21.26, 7.89, ...
    // kHz), so an alias cannot hide in the bins excluded around the harmonics (300 kHz folds onto 12 kHz).
    tone_modulation tone({1000.0}, {1.0}, 0.1);
    am_params am;
    am.carrier_hz = 301.37e3;
    am.carrier_peak_v = 2.0;
    am.modulation_index = 0.3;
    render_settings rs;
    rs.preroll_s = 0.02;
    const auto out = render_to_memory(fast_detector(), am, tone, rs);
    const std::size_t n = 4096, from = out.audio_v.size() - n;
    std::vector<double> x(n);
    for (std::size_t i = 0; i < n; ++i) {
        const double u = 2 * k_pi * i / (n - 1);
        const double w = 0.35875 - 0.48829 * std::cos(u) + 0.14128 * std::cos(2 * u) - 0.01168 * std::cos(3 * u);
        x[i] = w * out.audio_v[from + i];
    }
    Eigen::FFT<double> fft;
    std::vector<std::complex<double>> spec;
    fft.fwd(spec, x);
    const double bin = 48000.0 / n;
    double fundamental = 0.0, spurious = 0.0, worst_f = 0.0;
    for (std::size_t k = 1; k < n / 2; ++k) {
        const double f = k * bin, mag = std::abs(spec[k]);
        const double nearest_harmonic = std::round(f / 1000.0) * 1000.0;
        if (std::fabs(f - 1000.0) < 5 * bin) fundamental = std::max(fundamental, mag);
        else if (f > 100.0 && (std::fabs(f - nearest_harmonic) > 5 * bin || nearest_harmonic == 0.0)) {
            if (mag > spurious) worst_f = f;
            spurious = std::max(spurious, mag);
        }
    }
    MESSAGE("largest non-harmonic component at " << worst_f << " Hz");
    CHECK(20 * std::log10(spurious / fundamental) < -70.0);
}

TEST_CASE("DC is removed from the audio and kept in the earpiece voltage")
{
    tone_modulation tone({400.0}, {1.0}, 0.1);
    am_params am;
    am.carrier_hz = 500e3;
    am.carrier_peak_v = 1.0;
    am.modulation_index = 0.3;
    const auto out = render_to_memory(fast_detector(), am, tone, render_settings{});
    double mean_e = 0, mean_a = 0;
    for (std::size_t i = 1200; i < out.audio_v.size(); ++i) {
        mean_e += out.earpiece_v[i];
        mean_a += out.audio_v[i];
    }
    mean_e /= static_cast<double>(out.audio_v.size() - 1200);
    mean_a /= static_cast<double>(out.audio_v.size() - 1200);
    CHECK(mean_e > 0.4);               // the rectified DC of a 1 V carrier: a large fraction of the peak
    CHECK(std::fabs(mean_a) < 0.01 * mean_e);
    CHECK(std::fabs(out.audio_v.front()) < 1e-3 * mean_e); // no start-up thump: the high-pass starts settled
}

TEST_CASE("the phase-locked and the adaptive solver give the same recovered audio")
{
    // Two integrators that share no stepping code (the phase-locked trapezoidal rule with its automatic N,
    // and the error-controlled TR-BDF2 with its per-cycle step bound) through the same audio chain. Their
    // accuracies against a converged solution are about 5e-6 and 7e-6 (DEVELOPERS.md, "Accuracy"), so the
    // recovered earpiece voltages must agree to a few 1e-5.
    tone_modulation tone({1000.0}, {1.0}, 0.03);
    am_params am;
    am.carrier_hz = 600e3;
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.5;
    circuit_params c;
    c.source.resistance_ohm = 20e3;
    c.diode = find_diode_preset("germanium-point-contact").params;
    c.load.bleeder_ohm = 47e3;
    c.earpiece.capacitance_f = 10e-9;
    render_settings rs;
    rs.preroll_s = 0.005;
    const auto a = render_to_memory(c, am, tone, rs);
    rs.method = solver_method::adaptive;
    const auto b = render_to_memory(c, am, tone, rs);
    CHECK(a.result.method == solver_method::phase_locked);
    CHECK(b.result.method == solver_method::adaptive);
    REQUIRE(a.earpiece_v.size() == b.earpiece_v.size());
    double num = 0.0, den = 0.0;
    for (std::size_t i = 0; i < a.earpiece_v.size(); ++i) {
        num += (a.earpiece_v[i] - b.earpiece_v[i]) * (a.earpiece_v[i] - b.earpiece_v[i]);
        den += b.earpiece_v[i] * b.earpiece_v[i];
    }
    const double rel = std::sqrt(num / den);
    MESSAGE("phase-locked (N = " << a.result.steps_per_cycle << ") vs adaptive: relRMS " << rel);
    CHECK(rel <= 5e-5);
}
