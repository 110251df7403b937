// Background noise at the antenna (band_noise, a complex-envelope station): its own spectral density, the
// noise voltage it leaves across a linear network, determinism, the scenario keys and noise-off renders.
// Sources beside each check.
#include "galena/error.hpp"
#include "galena/dial.hpp"
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/render.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/scenario.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <cmath>
#include <complex>
#include <cstring>
#include <string>
#include <vector>

using namespace galena;

namespace {
// Independent constant: the test does not take it from galena/constants.hpp.
constexpr double k_pi = 3.14159265358979323846;

/// A junction that carries no current (an open port): the network stays linear.
junction_law open_junction()
{
    junction_law j;
    j.inv_emission_voltage = 1.0 / 0.0257;
    return j;
}

/// Sample variance of x (mean removed).
double variance(const std::vector<double>& x)
{
    double m = 0.0;
    for (double v : x) m += v;
    m /= static_cast<double>(x.size());
    double s = 0.0;
    for (double v : x) s += (v - m) * (v - m);
    return s / static_cast<double>(x.size());
}

/// Runs `settle` then `record` reference cycles of an rf_integrator at N steps per cycle with an open junction
/// and returns output row (c, d) at every step end of the recorded cycles.
std::vector<double> run_linear(const state_space& ss, int input, const station_source& src, double f_ref, int n, std::size_t settle,
                               std::size_t record, const Eigen::RowVectorXd& c, double d)
{
    rf_settings st;
    st.steps_per_cycle = n;
    rf_integrator ig(ss, input, open_junction(), src, f_ref, st);
    ig.add_output(c, d, 0.0);
    ig.initialize();
    std::vector<double> out, buf(static_cast<std::size_t>(n));
    out.reserve(record * static_cast<std::size_t>(n));
    for (std::size_t k = 0; k < settle + record; ++k) {
        ig.advance_cycle(buf);
        if (k >= settle) out.insert(out.end(), buf.begin(), buf.end());
    }
    return out;
}

/// One-sided integrals over f of |H|^2 S and |H|^2^2 S^2 for a flat one-sided density S = d^2 over
/// [lo, hi] (Simpson's rule, `points` odd): the variance of the filtered noise (noise through a linear
/// system: var = int |H(f)|^2 S(f) df, Papoulis, Probability, Random Variables and Stochastic Processes,
/// ch. 9) and the integral that sets the variance of its sample estimate (below).
template <class Gain2>
std::pair<double, double> filtered(Gain2 h2, double d, double lo, double hi, int points)
{
    const double step = (hi - lo) / (points - 1);
    double a = 0.0, b = 0.0;
    for (int i = 0; i < points; ++i) {
        const double w = (i == 0 || i == points - 1) ? 1.0 : (i % 2 == 1 ? 4.0 : 2.0);
        const double g = h2(lo + step * i) * d * d;
        a += w * g;
        b += w * g * g;
    }
    return {a * step / 3.0, b * step / 3.0};
}

/// Relative standard deviation of the sample variance of a Gaussian process of one-sided density S(f) over
/// a record of T seconds: var(sigma_hat^2) = (1/T) int S(f)^2 df (Bendat & Piersol, Random Data, the
/// variance of mean-square estimates for long records), so rel = sqrt(int S^2 / T) / int S.
double relative_spread(double int_s, double int_s2, double t_s) { return std::sqrt(int_s2 / t_s) / int_s; }
} // namespace

TEST_CASE("band_noise: the variance over the band is density^2 x B; I and Q independent, mean zero")
{
    // Definition of a one-sided spectral density D (V/sqrt(Hz)): the noise power in a band B is D^2 B
    // (Parseval). The EMF Re((I + jQ) e^{jwt}) has variance (var I + var Q) / 2 = var I, so var I = var Q = D^2 B.
    const double d = 2e-6, half = 20e3, b = 2.0 * half;
    const band_noise nz(d, half, 7);
    // Sampled at a rate that is not a multiple of the generator's (3.1 B) over T = 2 s.
    const double t_s = 2.0, fs = 3.1 * b;
    const auto count = static_cast<std::size_t>(t_s * fs);
    std::vector<double> i_v(count), q_v(count);
    double cross = 0.0, mean_i = 0.0;
    for (std::size_t k = 0; k < count; ++k) {
        const std::complex<double> e = nz.envelope(static_cast<double>(k) / fs);
        i_v[k] = e.real();
        q_v[k] = e.imag();
        cross += e.real() * e.imag();
        mean_i += e.real();
    }
    const double want = d * d * b;
    const double vi = variance(i_v), vq = variance(q_v);
    // A flat two-sided density D^2 over |f| < B/2 (one-sided 2 D^2 over [0, B/2]): rel spread sqrt(2 / (T B)) for
    // each channel (Bendat & Piersol, as above): 0.35 %; 4 sigma = 1.4 %.
    const double rel = std::sqrt(2.0 / (t_s * b));
    MESSAGE(fmt::format("var I / (D^2 B) = {:.5f}, var Q / (D^2 B) = {:.5f}, 1 sigma = {:.4f}", vi / want, vq / want, rel));
    CHECK(std::fabs(vi / want - 1.0) < 4.0 * rel);
    CHECK(std::fabs(vq / want - 1.0) < 4.0 * rel);
    // Independent channels: the mean of I Q (var sigma^4 per product, about T B independent products) is
    // within 4 sigma^2 sqrt(2 / (T B)), a wider bound than its own spread (about 4 sigma^2 / sqrt(T B)).
    CHECK(std::fabs(cross / static_cast<double>(count)) / want < 4.0 * rel);
    CHECK(std::fabs(mean_i / static_cast<double>(count)) < 4.0 * std::sqrt(want / (t_s * b)));
}

TEST_CASE("band_noise through a series RLC: the variance across R is int |H|^2 S_e df")
{
    // Series RLC at 100 kHz (Q = 50) driven by the noise EMF, read across R: H(f) = R / (R + j(wL - 1/(wC)))
    // (the textbook series resonant circuit). Noise through a linear system (Papoulis, ch. 9): var = int
    // |H(f)|^2 S_e(f) df, with S_e = D^2 one-sided over f0 +- B/2.
    const double f0 = 100e3, l = 1e-3, q = 50.0;
    const double c = 1.0 / (std::pow(2.0 * k_pi * f0, 2) * l);
    const double r = 2.0 * k_pi * f0 * l / q;
    network net;
    const node_id e = net.add_node("emf"), a = net.add_node("a"), rn = net.add_node("r");
    net.add_voltage_source(e, ground_node);
    net.add_capacitor(e, a, c);
    net.add_inductor(a, rn, l);
    net.add_resistor(rn, ground_node, r);
    net.set_junction(rn, ground_node, 0.0);
    const state_space ss = net.assemble();
    const double d = 1e-6, half = 20e3;
    station_source src;
    src.add("noise", f0, band_noise(d, half, 11));
    // 1000 cycles (10 ms, 60 amplitude time constants Q / (pi f0)) to settle, then 2 s.
    const double t_s = 2.0;
    const auto v = run_linear(ss, 0, src, f0, 8, 1000, static_cast<std::size_t>(t_s * f0), ss.node_c(rn), ss.node_d(rn)(0));
    auto h2 = [&](double f) {
        const double w = 2.0 * k_pi * f;
        return std::norm(r / std::complex<double>(r, w * l - 1.0 / (w * c)));
    };
    const auto [want, s2] = filtered(h2, d, f0 - half, f0 + half, 40001);
    const double rel = relative_spread(want, s2, t_s);
    const double got = variance(v);
    MESSAGE(fmt::format("series RLC: var / int |H|^2 S = {:.5f} (1 sigma {:.4f}); want {:.6g} V^2", got / want, rel, want));
    CHECK(std::fabs(got / want - 1.0) < 4.0 * rel);
    // The same integral by the half-power noise bandwidth of a single tuned circuit, pi/2 x f0/Q (textbook),
    // less the two Lorentzian tails outside +-B/2, (2/pi) atan(f0 / (Q B)) of it: within 0.5 %.
    const double enbw = k_pi / 2.0 * f0 / q * (1.0 - 2.0 / k_pi * std::atan(f0 / q / (2.0 * half)));
    CHECK(std::fabs(want / (d * d * enbw) - 1.0) < 5e-3);
}

TEST_CASE("band_noise at the detector input of a single-coil set: int |H|^2 S_e df from the network's Y(jw)")
{
    // The single-coil set of receiver_test at 1 MHz, junction open (the detector's linear capacitance stays):
    // H(f) = v(detector) / EMF from detector_gain (the network's Y(jw); compute_selectivity draws the same).
    receiver_spec spec;
    spec.antenna.preset = "standard-dummy";
    spec.antenna.effective_height_m = 4.0;
    spec.tuner.layout = tuner_layout::single_coil;
    spec.tuner.coil_h = 240e-6;
    spec.tuner.coil_q = 150.0;
    spec.tuner.tuned_hz = 1.0e6;
    spec.tuner.detector_tap = 0.5;
    spec.tuner.antenna_tap = 0.2;
    const receiver_network rn = build_receiver_network(spec.circuit, spec.antenna, spec.tuner);
    const state_space ss = rn.net.assemble();
    const double field = 1e-6, half = 40e3, fc = 1.0e6;
    const double d = field * spec.antenna.effective_height_m; // EMF density = field density x effective height
    station_source src;
    src.add("noise", fc, band_noise(d, half, 3));
    const double t_s = 0.25;
    const auto v = run_linear(ss, rn.emf_input, src, fc, 8, 2000, static_cast<std::size_t>(t_s * fc), ss.node_c(rn.detector_node),
                              ss.node_d(rn.detector_node)(rn.emf_input));
    const auto [want, s2] = filtered([&](double f) { return std::pow(detector_gain(rn, 0.0, f), 2); }, d, fc - half, fc + half, 8001);
    const double rel = relative_spread(want, s2, t_s);
    const double got = variance(v);
    MESSAGE(fmt::format("single-coil: var / int |H|^2 S = {:.5f} (1 sigma {:.4f}); RMS {:.4g} V", got / want, rel, std::sqrt(got)));
    CHECK(std::fabs(got / want - 1.0) < 4.0 * rel);
}

TEST_CASE("band_noise: the envelope is its seeded samples through a Kaiser-windowed sinc, r int k^2 = B")
{
    // The definition (stations.hpp): I(t) = D sqrt(r) sum_n g_I(n) k(t r - n) with g the public seeded
    // samples and k(x) = sinc(x) I0(beta sqrt(1 - (x / L)^2)) / I0(beta), L = 32, beta = 8 (the Kaiser window:
    // Kaiser & Schafer, "On the use of the I0-sinh window for spectrum analysis", IEEE Trans. ASSP 28 (1980)),
    // evaluated here directly with std::cyl_bessel_i; r such that r int k^2 dx = B = 2 x half_band.
    const double density = 2e-6, half_band = 40e3;
    const band_noise noise(density, half_band, 77);
    constexpr int taps = 32;
    constexpr double beta = 8.0;
    const auto kaiser_sinc = [&](double x) {
        const double u = x / taps;
        if (std::fabs(u) >= 1.0) return 0.0;
        const double sinc = x == 0.0 ? 1.0 : std::sin(k_pi * x) / (k_pi * x);
        return sinc * std::cyl_bessel_i(0.0, beta * std::sqrt(1.0 - u * u)) / std::cyl_bessel_i(0.0, beta);
    };
    double energy = 0.0; // int k^2 dx by the midpoint rule over [-L, L]
    const int per_unit = 256;
    for (int i = 0; i < 2 * taps * per_unit; ++i) {
        const double k = kaiser_sinc(-taps + (i + 0.5) / per_unit);
        energy += k * k / per_unit;
    }
    const double r = noise.sample_rate_hz();
    CHECK(r * energy == doctest::Approx(2.0 * half_band).epsilon(1e-6));
    // At 2000 times spread over 40 samples (not on any grid), against the direct sum.
    double num = 0.0, den = 0.0;
    for (int i = 0; i < 2000; ++i) {
        const double t = (3.0 + 40.0 * i / 2000.0 + 0.0137 * std::sin(1.3 * i)) / r;
        const double x = t * r;
        const auto n0 = static_cast<long long>(std::floor(x));
        double si = 0.0, sq = 0.0;
        for (long long n = n0 - taps + 1; n <= n0 + taps; ++n) {
            const double k = kaiser_sinc(x - static_cast<double>(n));
            si += k * band_noise::gaussian(77, n, 0);
            sq += k * band_noise::gaussian(77, n, 1);
        }
        const std::complex<double> want = density * std::sqrt(r) * std::complex<double>(si, sq);
        num += std::norm(noise.envelope(t) - want);
        den += std::norm(want);
    }
    const double rel = std::sqrt(num / den);
    MESSAGE(fmt::format("envelope against the direct kernel sum: relRMS {:.2g}", rel));
    // Measured 3.5e-6: the quintic between the fine grid's points and the kernel table's linear interpolation
    // (1.6e-6 when the table was summed at every time; 1.4e-4 with a cubic between the fine points).
    CHECK(rel < 1e-5);
}

TEST_CASE("band_noise is deterministic: the same seed gives the same samples, another seed others")
{
    const band_noise a(1e-6, 40e3, 5), b(1e-6, 40e3, 5), c(1e-6, 40e3, 6);
    bool same = true, differ = false;
    for (int k = 0; k < 2000; ++k) {
        const double t = k * 1.0e-6;
        same = same && a.envelope(t) == b.envelope(t);
        differ = differ || a.envelope(t) != c.envelope(t);
    }
    CHECK(same);
    CHECK(differ);
    // Random access: evaluating out of order gives the same values (the samples depend on seed and index only).
    const band_noise fresh(1e-6, 40e3, 5);
    CHECK(fresh.envelope(1.5e-3) == a.envelope(1.5e-3));
}

namespace {
const std::string untuned_text = R"(
[signal]
duration_s = 0.02
[antenna]
effective_height_m = 4
[tuner]
layout = "untuned"
[[station]]
name = "Invented Weak"
carrier_hz = 1.0e6
field_v_per_m = 2e-3
modulation_index = 0.5
tone_hz = 1000
[load]
bleeder_ohm = 68e3
filter_capacitance_f = 1e-9
)";

std::vector<double> render_audio(const scenario& s)
{
    auto programmes = make_station_programmes(s);
    receiver_spec spec;
    spec.circuit = s.circuit;
    spec.antenna = s.antenna;
    spec.tuner = s.tuner;
    spec.noise = s.noise;
    for (std::size_t k = 0; k < s.stations.size(); ++k) spec.stations.push_back({s.stations[k].params, programmes[k].get()});
    receiver_figures fig;
    render_settings rs = s.render;
    rs.preroll_s = 0.01;
    std::vector<double> v;
    (void)render_receiver(spec, rs, [&](const audio_block& b) { v.insert(v.end(), b.audio_v.begin(), b.audio_v.end()); }, fig);
    return v;
}

bool identical(const std::vector<double>& a, const std::vector<double>& b)
{
    return a.size() == b.size() && std::memcmp(a.data(), b.data(), a.size() * sizeof(double)) == 0;
}
} // namespace

TEST_CASE("antenna noise in a render: off by default, seeded renders byte-identical, another seed differs")
{
    const scenario quiet = parse_scenario(untuned_text, "n.toml");
    CHECK(quiet.noise.field_density == 0.0);
    scenario noisy = parse_scenario(untuned_text, "n.toml", {"antenna.noise_field_density=\"0.5u\"", "antenna.noise_seed=3"});
    CHECK(noisy.noise.field_density == 0.5e-6);
    const auto off = render_audio(quiet);
    const auto n1 = render_audio(noisy), n2 = render_audio(noisy);
    noisy.noise.seed = 4;
    const auto n3 = render_audio(noisy);
    REQUIRE(!off.empty());
    CHECK(identical(n1, n2));
    CHECK(!identical(n1, n3));
    CHECK(!identical(n1, off));
    // The noise field becomes EMF through the effective height as the stations' field does (EMF = field x
    // effective height, the definition of effective height): halving the height while doubling every field
    // (station and noise; exact in binary) renders the same audio, byte for byte.
    scenario half = noisy;
    half.antenna.effective_height_m = noisy.antenna.effective_height_m / 2.0;
    half.noise.field_density = 2.0 * noisy.noise.field_density;
    for (auto& st : half.stations) st.params.field_v_per_m *= 2.0;
    CHECK(identical(render_audio(half), n3));
    // Noise off explicitly (density 0) is the default render, byte for byte.
    scenario zero = parse_scenario(untuned_text, "n.toml", {"antenna.noise_field_density=0", "antenna.noise_seed=9"});
    CHECK(identical(render_audio(zero), off));
}

TEST_CASE("antenna noise keys: engineering values, the named default, round trip, mistakes with file:line")
{
    // ITU-R P.372 quiet rural (values from memory): Fa = 53.6 dB at 1 MHz; E_n = Fa - 95.5 dB(uV/m) in 1 Hz
    // = -41.9 dB(uV/m) = 8.04e-9 V/m per sqrt(Hz).
    const scenario s = parse_scenario(untuned_text, "n.toml", {"antenna.noise_field_density=quiet-rural"});
    CHECK(s.noise.field_density == doctest::Approx(1e-6 * std::pow(10.0, -41.9 / 20.0)).epsilon(1e-12));
    CHECK(to_toml(parse_scenario(to_toml(s), "again.toml")) == to_toml(s));
    CHECK(parse_scenario(untuned_text, "n.toml", {"antenna.noise_half_band_hz=\"30k\""}).noise.half_band_hz == 30e3);
    std::string bad = untuned_text;
    bad.replace(bad.find("effective_height_m = 4"), 22, "effective_height_m = 4\nnoise_field_density = -1e-9");
    CHECK_THROWS_WITH_AS((void)parse_scenario(bad, "n.toml"), doctest::Contains("n.toml:6: antenna.noise_field_density = -1e-09"), config_error);
    std::string word = untuned_text;
    word.replace(word.find("effective_height_m = 4"), 22, "effective_height_m = 4\nnoise_field_density = \"loud-city\"");
    CHECK_THROWS_WITH_AS((void)parse_scenario(word, "n.toml"), doctest::Contains("n.toml:6: antenna.noise_field_density = 'loud-city': must be a number"),
                         config_error);
    CHECK_THROWS_WITH_AS((void)parse_scenario(untuned_text, "n.toml", {"antenna.noise_field_density=1n", "antenna.noise_half_band_hz=600k"}),
                         doctest::Contains("antenna.noise_half_band_hz = 600000: must be at most 0.45 x the wanted carrier"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_scenario(untuned_text, "n.toml", {"antenna.noise_seed=1.5"}),
                         doctest::Contains("antenna.noise_seed = 1.5: must be a whole number"), config_error);
}

TEST_CASE("antenna noise in galena dial: tiled across the dial, seeded, levels traced for the stations only")
{
    // A coupled set (as dial_test's) swept +-2 % around 1 MHz in 40 ms past one weak unmodulated station.
    auto sweep = [](double density, std::uint64_t seed) {
        tone_modulation prog({1000.0}, {1.0}, 0.1);
        receiver_spec spec;
        spec.antenna.effective_height_m = 4.0;
        spec.tuner.layout = tuner_layout::coupled;
        spec.tuner.coil_h = 240e-6;
        spec.tuner.coil_q = 150.0;
        spec.tuner.tuned_hz = 1.0e6;
        spec.tuner.detector_tap = 0.5;
        spec.tuner.antenna_coil_h = 20e-6;
        spec.tuner.antenna_coil_q = 100.0;
        spec.tuner.coupling = 0.1;
        spec.circuit.load.bleeder_ohm = 68e3;
        spec.circuit.load.filter_capacitance_f = 1e-9;
        receiver_station st;
        st.params.name = "Invented Weak";
        st.params.carrier_hz = 1.0e6;
        st.params.field_v_per_m = 1e-3;
        st.params.modulation_index = 0.0;
        st.programme = &prog;
        spec.stations.push_back(st);
        spec.noise.field_density = density;
        spec.noise.seed = seed;
        dial_path path;
        path.start_hz = 0.98e6;
        path.end_hz = 1.02e6;
        path.glide_s = 0.04;
        dial_settings ds;
        ds.retune_interval_s = 2e-3;
        ds.steps_per_cycle = 16;
        std::vector<double> audio;
        const dial_result r = render_dial(spec, path, ds, [&](const audio_block& b) { audio.insert(audio.end(), b.audio_v.begin(), b.audio_v.end()); });
        CHECK(r.names.size() == 1);
        for (const auto& p : r.trace) CHECK(p.level_v.size() == 1);
        return audio;
    };
    const auto quiet = sweep(0.0, 1), a = sweep(0.2e-6, 1), b = sweep(0.2e-6, 1), c = sweep(0.2e-6, 2);
    REQUIRE(!quiet.empty());
    CHECK(identical(a, b));
    CHECK(!identical(a, c));
    CHECK(!identical(a, quiet));
}
