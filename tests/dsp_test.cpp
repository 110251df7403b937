// Filters of the audio path: Kaiser FIR design, box integration of piecewise cubics, Butterworth biquads.
#include "galena/dsp.hpp"

#include <doctest/doctest.h>
#include <cmath>
#include <complex>
#include <vector>

using namespace galena;

namespace {
constexpr double k_pi = 3.14159265358979323846;
double gain_at(const std::vector<double>& h, double f_cycles)
{
    std::complex<double> acc = 0.0;
    for (std::size_t k = 0; k < h.size(); ++k) acc += h[k] * std::polar(1.0, -2.0 * k_pi * f_cycles * static_cast<double>(k));
    return std::abs(acc);
}
} // namespace

TEST_CASE("Kaiser low-pass meets its stopband attenuation and has unit DC gain")
{
    // Design rule: Kaiser window method (Oppenheim & Schafer, Discrete-Time Signal Processing, sec. 7.5).
    const double cutoff = 0.115, transition = 0.02, atten = 90.0;
    const auto h = kaiser_lowpass(cutoff, transition, atten);
    CHECK(h.size() % 2 == 1);
    CHECK(gain_at(h, 0.0) == doctest::Approx(1.0).epsilon(1e-12).scale(0.0));
    for (double f = cutoff + transition / 2 + 1e-4; f < 0.5; f += 0.003) CHECK(20 * std::log10(gain_at(h, f)) < -atten + 3.0);
    for (double f = 0.0; f < cutoff - transition / 2; f += 0.005) CHECK(std::fabs(20 * std::log10(gain_at(h, f))) < 0.01);
    // Symmetric (linear phase).
    for (std::size_t i = 0; i < h.size() / 2; ++i) CHECK(h[i] == doctest::Approx(h[h.size() - 1 - i]).scale(0.0));
}

TEST_CASE("B-spline kernel has nulls at multiples of 1/L")
{
    const auto k = bspline_kernel(10, 3);
    CHECK(k.size() == 28);
    CHECK(gain_at(k, 0.0) == doctest::Approx(1.0).scale(0.0));
    CHECK(gain_at(k, 0.1) < 1e-12);
    CHECK(gain_at(k, 0.2) < 1e-12);
    // sinc^3 law at a general frequency: |sin(pi f L)/(L sin(pi f))|^3.
    const double f = 0.037;
    const double expect = std::pow(std::fabs(std::sin(k_pi * f * 10) / (10 * std::sin(k_pi * f))), 3);
    CHECK(gain_at(k, f) == doctest::Approx(expect).epsilon(1e-10).scale(0.0));
}

TEST_CASE("decimating FIR: ones in give the DC gain out, one output per M inputs")
{
    fir_decimator d(std::vector<double>(8, 0.125), 4);
    std::vector<double> in(64, 1.0), out;
    d.process(in, out);
    CHECK(out.size() == 16);
    CHECK(out.back() == doctest::Approx(1.0).scale(0.0));
    CHECK(out[0] == doctest::Approx(0.5).scale(0.0)); // 4 ones seen of 8 taps
}

TEST_CASE("box sampler: exact bin means of a piecewise cubic")
{
    // p(t) = t^3 - 2 t delivered as irregular Hermite segments; bin mean over [a,b] = (F(b)-F(a))/(b-a)
    // with F(t) = t^4/4 - t^2.
    auto p = [](double t) { return t * t * t - 2 * t; };
    auto dp = [](double t) { return 3 * t * t - 2; };
    auto F = [](double t) { return t * t * t * t / 4 - t * t; };
    box_sampler b(0.1, 0.05);
    std::vector<double> out;
    double t = 0.0;
    for (double h : {0.013, 0.07, 0.21, 0.004, 0.3, 0.09, 0.33}) {
        b.add_segment(t, t + h, p(t), p(t + h), dp(t), dp(t + h), out);
        t += h;
    }
    REQUIRE(out.size() == static_cast<std::size_t>((t - 0.05) / 0.1));
    for (std::size_t k = 0; k < out.size(); ++k) {
        const double a = 0.05 + 0.1 * k;
        CHECK(out[k] == doctest::Approx((F(a + 0.1) - F(a)) / 0.1).epsilon(1e-12).scale(0.0));
    }
}

TEST_CASE("Butterworth biquads: -3.01 dB at the corner, settle_to removes the start-up transient")
{
    // Bilinear transform with pre-warping places the analog corner exactly at the digital corner.
    const double fs = 48000.0, fc = 1000.0;
    for (bool high : {true, false}) {
        biquad bq = high ? biquad::butterworth_highpass(fc, fs) : biquad::butterworth_lowpass(fc, fs);
        double peak = 0.0;
        for (int i = 0; i < 48000; ++i) {
            const double y = bq.process(std::sin(2 * k_pi * fc * i / fs));
            if (i > 24000) peak = std::max(peak, std::fabs(y));
        }
        CHECK(20 * std::log10(peak) == doctest::Approx(-3.0103).epsilon(0.002).scale(0.0));
    }
    biquad hp = biquad::butterworth_highpass(10.0, fs);
    hp.settle_to(0.7);
    for (int i = 0; i < 100; ++i) CHECK(std::fabs(hp.process(0.7)) < 1e-12);
}

TEST_CASE("sinc resampler: DC exact, a passband sine reproduced in amplitude and time, a stopband sine removed")
{
    // Reference: the analytic sine at the output times. From 1 MHz to 192 kHz with arbitrary offsets
    // between the grids (the render's stage B), pass 21.6 kHz, stop 168 kHz, 90 dB: a 5 kHz sine must come
    // out at the output times within the passband ripple (90 dB Kaiser: about 3e-5), and a 400 kHz sine
    // must fall below -85 dB (90 dB design, less the table interpolation's -110 dB).
    // Both forms: 1 MHz / 192 kHz = 125 / 24 takes the polyphase form (24 phases); a rate 3e-9 off it has
    // no small period and takes the direct one.
    const double fin = 1e6, t_in0 = 0.5e-6, t_out0 = 0.37e-6;
    for (const double fout : {192e3, 192e3 * (1.0 + 3e-9)}) {
        CAPTURE(fout);
        auto run = [&](auto&& signal) {
            sinc_resampler rs(fin, t_in0, fout, t_out0, 21.6e3, 168e3, 90.0);
            CHECK(rs.phases() == (fout == 192e3 ? 24u : 0u));
            std::vector<double> out;
            for (std::size_t i = 0; i < 20000; ++i) rs.push(signal(t_in0 + static_cast<double>(i) / fin), out);
            return out;
        };
        const auto dc = run([](double) { return 0.75; });
        REQUIRE(dc.size() > 3000);
        for (double v : dc) CHECK(v == doctest::Approx(0.75).epsilon(1e-14).scale(0.0));
        const double f = 5e3;
        const auto s = run([&](double t) { return std::sin(2 * k_pi * f * t); });
        double worst = 0.0;
        for (std::size_t j = 200; j < s.size(); ++j) { // after the start-up (inputs before 0 are held)
            const double t = t_out0 + static_cast<double>(j) / fout;
            worst = std::max(worst, std::fabs(s[j] - std::sin(2 * k_pi * f * t)));
        }
        CHECK(worst <= 1e-4);
        const auto hi = run([&](double t) { return std::sin(2 * k_pi * 400e3 * t); });
        double peak = 0.0;
        for (std::size_t j = 200; j < hi.size(); ++j) peak = std::max(peak, std::fabs(hi[j]));
        CHECK(20 * std::log10(peak) < -85.0);
    }
}
