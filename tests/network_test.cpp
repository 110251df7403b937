// The network module against closed forms: an RC low-pass corner, LC resonance (textbook formula), the
// standard dummy antenna's impedance (from its element values), and against the detector matrices as they
// were written by hand before the network existed (kept here as the reference) for every earpiece and load kind.
#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/error.hpp"
#include "galena/front_end.hpp"
#include "galena/network.hpp"

#include <doctest/doctest.h>
#include <Eigen/Eigenvalues>
#include <Eigen/LU>

#include <cmath>
#include <complex>
#include <type_traits>
#include <vector>

using namespace galena;

namespace {
// Independent constant: the test does not take it from galena/constants.hpp.
constexpr double k_pi = 3.14159265358979323846;

/// H(jw) = C (jwI - A)^-1 B + D from a state-space form, for node n and input 0.
std::complex<double> ss_transfer(const state_space& ss, node_id n, double f_hz)
{
    const int k = ss.states();
    const std::complex<double> jw(0.0, 2.0 * k_pi * f_hz);
    const Eigen::MatrixXcd m = jw * Eigen::MatrixXcd::Identity(k, k) - ss.a.cast<std::complex<double>>();
    const Eigen::VectorXcd x = m.fullPivLu().solve(ss.b.col(0).cast<std::complex<double>>());
    return (ss.node_c(n).cast<std::complex<double>>() * x)(0) + ss.node_d(n)(0);
}
/// The bench detector (R_src + R_s, junction, output node b, earpiece) written by hand from Kirchhoff's current
/// law at the output node and each earpiece branch's own equation: the form circuit.cpp used before the
/// network existed, y = [v_b, earpiece states], series path folded into A. The reference the
/// network-derived make_one_junction_network must reproduce.
template <int Dim>
one_junction_network<Dim> hand_written_bench(const circuit_params& p)
{
    const earpiece_params& e = p.earpiece;
    auto g_of = [](double r) { return std::isfinite(r) ? 1.0 / r : 0.0; };
    double cb = p.load.filter_capacitance_f + p.load.stray_capacitance_f;
    double gb = g_of(p.load.bleeder_ohm);
    if (e.kind == earpiece_kind::piezo) cb += e.capacitance_f, gb += g_of(e.leakage_ohm);
    if (e.kind == earpiece_kind::resistor) gb += 1.0 / e.resistance_ohm;
    one_junction_network<Dim> n;
    n.series_ohm = p.source.resistance_ohm + p.diode.series_resistance_ohm;
    n.junction = diode_model(p.diode).law();
    n.c[0] = 1.0;
    n.b[0] = 1.0 / cb;
    n.a(0, 0) = -(1.0 / n.series_ohm + gb) / cb;
    if constexpr (Dim == 3) {
        // Butterworth-Van Dyke motional branch: y = [v_b, i_m, v_cm]; L_m di/dt = v_b - R_m i - v_cm, C_m dv_cm/dt = i.
        n.a(0, 1) = -1.0 / cb;
        n.a(1, 0) = 1.0 / e.motional_inductance_h;
        n.a(1, 1) = -e.motional_resistance_ohm / e.motional_inductance_h;
        n.a(1, 2) = -1.0 / e.motional_inductance_h;
        n.a(2, 1) = 1.0 / e.motional_capacitance_f;
    } else if constexpr (Dim == 2) {
        // Magnetic phones: y = [v_b, i_L]; R_dc in series with L || R_loss.
        const double gp = g_of(e.loss_resistance_ohm);
        const double k = 1.0 / (1.0 + e.resistance_ohm * gp);
        n.a(0, 0) -= gp * k / cb;
        n.a(0, 1) = -(1.0 - gp * e.resistance_ohm * k) / cb;
        n.a(1, 0) = k / e.inductance_h;
        n.a(1, 1) = -e.resistance_ohm * k / e.inductance_h;
    }
    return n;
}

/// Output means of `cycles` carrier cycles of E cos(wt) through the cycle integrator.
template <int Dim>
std::vector<double> cycle_means(const one_junction_network<Dim>& oj, double fc, double e_v, int cycles)
{
    cycle_settings cs;
    cs.steps_per_cycle = 32;
    cs.voltage_scale_v = e_v;
    cycle_integrator<Dim> ig(oj, fc, cs);
    ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), e_v);
    std::vector<double> u(32), out;
    for (int c = 0; c < cycles; ++c) {
        for (int k = 0; k < 32; ++k) u[static_cast<std::size_t>(k)] = e_v * std::cos(2.0 * k_pi * (k + 1) / 32.0);
        ig.advance(u);
        out.push_back(ig.output_mean_v());
    }
    return out;
}

} // namespace

TEST_CASE("network: RC low-pass corner 1/(2 pi R C)")
{
    // Textbook first-order low-pass: |H| = 1/sqrt(2) and phase -45 deg at f = 1/(2 pi R C); tau = R C.
    network net;
    const node_id in = net.add_node("in");
    const node_id out = net.add_node("out");
    net.add_voltage_source(in, ground_node);
    net.add_resistor(in, out, 1e3);
    net.add_capacitor(out, ground_node, 1e-6);
    const state_space ss = net.assemble();
    REQUIRE(ss.states() == 1);
    CHECK(ss.a(0, 0) == doctest::Approx(-1.0 / (1e3 * 1e-6)).epsilon(1e-14).scale(0));
    const double fc = 1.0 / (2.0 * k_pi * 1e3 * 1e-6); // 159.155 Hz
    const std::complex<double> h = net.transfer(0, fc)[out - 1];
    CHECK(std::abs(h) == doctest::Approx(1.0 / std::sqrt(2.0)).epsilon(1e-13));
    CHECK(std::arg(h) == doctest::Approx(-k_pi / 4.0).epsilon(1e-13));
    CHECK(std::abs(ss_transfer(ss, out, fc) - h) < 1e-14);
    const auto tau = time_constants_s(ss);
    REQUIRE(tau.size() == 1);
    CHECK(tau[0] == doctest::Approx(1e-3).epsilon(1e-13).scale(0));
    CHECK(net.dc_resistance_ohm(out, ground_node) == doctest::Approx(1e3).epsilon(1e-12));
}

TEST_CASE("network: LC resonance 1/(2 pi sqrt(L C)): 240 uH with 365 pF is 537.73 kHz")
{
    // Textbook resonance formula f0 = 1/(2 pi sqrt(L C)); 240 uH and 365 pF give 537.73 kHz; the capacitance
    // that tunes 240 uH to 1 MHz is 105.54 pF (both worked by hand from the formula).
    tuner_params t;
    t.coil_h = 240e-6;
    t.tuned_hz = 1e6;
    CHECK(t.tuning_capacitance_f() == doctest::Approx(105.54e-12).epsilon(5e-5).scale(0)); // 105.5438 pF, rounded to 105.54
    for (const auto& [c_f, f_expected] : {std::pair{365e-12, 537.73e3}, std::pair{t.tuning_capacitance_f(), 1.0e6}}) {
        network net;
        const node_id top = net.add_node("tank");
        net.add_inductor(top, ground_node, 240e-6);
        net.add_capacitor(top, ground_node, c_f);
        const state_space ss = net.assemble();
        REQUIRE(ss.states() == 2);
        const Eigen::EigenSolver<Eigen::MatrixXd> es(ss.a);
        const double f = std::abs(es.eigenvalues()[0].imag()) / (2.0 * k_pi);
        CHECK(std::abs(es.eigenvalues()[0].real()) < 1e-9 * f);
        CHECK(f == doctest::Approx(1.0 / (2.0 * k_pi * std::sqrt(240e-6 * c_f))).epsilon(1e-13));
        CHECK(f == doctest::Approx(f_expected).epsilon(1e-5)); // 537.735 kHz, quoted rounded as 537.73
    }
}

TEST_CASE("network: standard dummy antenna impedance at 1 MHz is 26.98 - j651.75 ohm")
{
    // Derived by hand from the element values (200 pF in series with 20 uH, 400 ohm + 400 pF across the
    // 20 uH; the classic receiver-test dummy, from memory): Z = 1/(jw 200p) + jwL || (400 + 1/(jw 400p)).
    network net;
    const node_id term = net.add_node("terminal");
    antenna_params a;
    a.preset = "standard-dummy";
    stamp_antenna(net, term, a);
    const std::complex<double> z = net.impedance(term, ground_node, 1e6);
    CHECK(z.real() == doctest::Approx(26.98).epsilon(2e-4));
    CHECK(z.imag() == doctest::Approx(-651.75).epsilon(1e-5));
}

TEST_CASE("network: coupled receiver, state-space transfer equals the MNA solve")
{
    // Two derivations of the same network (the reduced state space and the full MNA system at jw) must agree
    // to round-off: a check on the Schur-complement elimination with coupled, tapped coils and series C.
    circuit_params cp;
    cp.earpiece.kind = earpiece_kind::magnetic;
    tuner_params t;
    t.layout = tuner_layout::coupled;
    t.detector_tap = 0.5;
    t.coupling = 0.1;
    antenna_params a;
    a.preset = "standard-dummy";
    const receiver_network rn = build_receiver_network(cp, a, t);
    const state_space ss = rn.net.assemble();
    for (double f : {0.9e6, 1.0e6, 1.02e6, 3e3}) {
        const Eigen::VectorXcd z = rn.net.transfer(rn.emf_input, f);
        for (node_id n : {rn.detector_node, rn.output_node, rn.antenna_node}) {
            const std::complex<double> h = ss_transfer(ss, n, f);
            CHECK(std::abs(h - z[n - 1]) <= 1e-9 * std::max(1.0, std::abs(z[n - 1])));
        }
    }
}

TEST_CASE("network: the bench detector from components equals the hand-written equations for every earpiece and load")
{
    // hand_written_bench (above) has (A, b, c) with the series path folded into A; the network gives the load
    // alone (A_load = A + b c^T / R), the injection b_j = b, and the port v = u - R j - c^T y. States: network
    // order [v_b, capacitive nodes..., inductor currents]; make_one_junction_network is now built from it.
    struct variant {
        earpiece_kind kind;
        bool bvd;
        double bleeder, filter, loss;
    };
    for (const variant v : {variant{earpiece_kind::piezo, false, 68e3, 1e-9, 0.0}, variant{earpiece_kind::piezo, true, 100e3, 0.0, 0.0},
                            variant{earpiece_kind::magnetic, false, 1e300, 2.2e-9, 0.0},
                            variant{earpiece_kind::magnetic, false, 47e3, 0.0, 20e3}, variant{earpiece_kind::resistor, false, 47e3, 0.0, 0.0}}) {
        circuit_params cp;
        cp.source.resistance_ohm = 20e3;
        cp.diode.series_resistance_ohm = 20.0;
        cp.diode.junction_capacitance_f = 0.0;
        cp.load.bleeder_ohm = v.bleeder >= 1e300 ? infinite_ohm : v.bleeder;
        cp.load.filter_capacitance_f = v.filter;
        cp.earpiece.kind = v.kind;
        cp.earpiece.leakage_ohm = 10e6;
        if (v.loss > 0.0) cp.earpiece.loss_resistance_ohm = v.loss;
        if (v.bvd) {
            cp.earpiece.motional_resistance_ohm = 300.0;
            cp.earpiece.motional_inductance_h = 0.05;
            cp.earpiece.motional_capacitance_f = 2e-9;
        }
        tuner_params t; // bench
        const receiver_network rn = build_receiver_network(cp, {}, t);
        const state_space ss = rn.net.assemble();
        const detector_network dn(cp);
        with_one_junction_network(dn, [&](const auto& oj) {
            using oj_t = std::remove_cvref_t<decltype(oj)>;
            constexpr int dim = oj_t::vec::RowsAtCompileTime;
            const oj_t hand = hand_written_bench<dim>(cp);
            REQUIRE(ss.states() == dim);
            // Permutation: network [v_b, v_cm, i_m] against hand-written [v_b, i_m, v_cm] for the BVD piezo.
            std::vector<int> perm(static_cast<std::size_t>(dim));
            for (int i = 0; i < dim; ++i) perm[static_cast<std::size_t>(i)] = i;
            if (dim == 3) perm = {0, 2, 1};
            const Eigen::MatrixXd a_load = hand.a + hand.b * hand.c.transpose() / hand.series_ohm;
            const double scale = a_load.cwiseAbs().maxCoeff();
            CHECK(oj.series_ohm == doctest::Approx(hand.series_ohm).epsilon(1e-15));
            for (int i = 0; i < dim; ++i) {
                const int pi = perm[static_cast<std::size_t>(i)];
                // The receiver's bench layout and the detector's own network assemble alike.
                CHECK(std::abs(ss.bj[i] - hand.b[pi]) <= 1e-13 * hand.b.cwiseAbs().maxCoeff());
                CHECK(std::abs(ss.port_c[i] + hand.c[pi]) <= 1e-15);
                CHECK(std::abs(oj.b[i] - hand.b[pi]) <= 1e-13 * hand.b.cwiseAbs().maxCoeff());
                CHECK(std::abs(oj.c[i] - hand.c[pi]) <= 1e-15);
                for (int j = 0; j < dim; ++j) {
                    const int pj = perm[static_cast<std::size_t>(j)];
                    CHECK(std::abs(ss.a(i, j) - a_load(pi, pj)) <= 1e-13 * scale);
                    CHECK(std::abs(oj.a(i, j) - hand.a(pi, pj)) <= 1e-13 * scale);
                }
            }
            CHECK(std::abs(ss.port_dj + hand.series_ohm) <= 1e-11 * hand.series_ohm);
            CHECK(std::abs(ss.port_d[0] - 1.0) <= 1e-12);
            // The DC load, the same both ways.
            CHECK(rn.net.dc_resistance_ohm(rn.output_node, ground_node) ==
                  doctest::Approx(1.0 / hand.dc_load_conductance_s()).epsilon(1e-10));
            if (hand.dc_load_conductance_s() > 0.0)
                CHECK(dn.dc_load_ohm() == doctest::Approx(1.0 / hand.dc_load_conductance_s()).epsilon(1e-10));
            else
                CHECK(std::isinf(dn.dc_load_ohm()));
            // Waveforms: 400 cycles of a 1 V, 1 MHz carrier through the phase-locked integrator, to 1e-12, with the
            // hand-written states relabelled into the network's order (an exact permutation; a different order
            // only sums the same products differently, 2.8e-12 of peak for the BVD piezo).
            oj_t hand_p = hand;
            for (int i = 0; i < dim; ++i) {
                const int pi = perm[static_cast<std::size_t>(i)];
                hand_p.b[i] = hand.b[pi];
                hand_p.c[i] = hand.c[pi];
                for (int j = 0; j < dim; ++j) hand_p.a(i, j) = hand.a(pi, perm[static_cast<std::size_t>(j)]);
            }
            const std::vector<double> w_net = cycle_means(oj, 1e6, 1.0, 400), w_hand = cycle_means(hand_p, 1e6, 1.0, 400);
            double peak = 0.0, diff = 0.0;
            for (std::size_t k = 0; k < w_net.size(); ++k)
                peak = std::max(peak, std::fabs(w_hand[k])), diff = std::max(diff, std::fabs(w_net[k] - w_hand[k]));
            CHECK(peak > 1e-3);
            CHECK(diff <= 1e-12 * peak);
        });
    }
}

TEST_CASE("network: bad topologies are config errors")
{
    network net;
    const node_id a = net.add_node("a");
    const node_id b = net.add_node("b");
    net.add_voltage_source(a, ground_node);
    net.add_capacitor(a, b, 1e-9); // b has no DC path and no other element: fine as a state
    CHECK_NOTHROW((void)net.assemble());
    const node_id floating = net.add_node("floating");
    net.add_resistor(floating, floating == 1 ? 2 : 1, 1e3);
    CHECK_NOTHROW((void)net.assemble());
    network bad;
    const node_id x = bad.add_node("x");
    bad.add_voltage_source(x, ground_node);
    bad.add_voltage_source(x, ground_node); // two sources in parallel: a loop of sources
    CHECK_THROWS_AS((void)bad.assemble(), config_error);
    CHECK_THROWS_AS(bad.couple(0, 0, 0.5), config_error);
    CHECK_THROWS_AS(bad.add_resistor(x, ground_node, -1.0), config_error);
}
