// Turning the dial: a time-varying tuning capacitor (charge conserved), the dial sweep's traced levels
// against the universal resonance curve and against fixed-tuning renders, and with several stations against
// the dial resting at the same position.
#include "galena/constants.hpp"
#include "galena/dial.hpp"
#include "galena/error.hpp"
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/signal.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <Eigen/Core>
#include <unsupported/Eigen/MatrixFunctions>
#include <cmath>
#include <vector>

using namespace galena;

namespace {

/// A capacitor C from one node to ground, with a resistor R across it (R = inf: no current path at all).
state_space rc(double c_f, double r_ohm)
{
    network net;
    const node_id a = net.add_node("a");
    net.add_capacitor(a, ground_node, c_f);
    if (std::isfinite(r_ohm)) net.add_resistor(a, ground_node, r_ohm);
    return net.assemble();
}

/// Steps the RC whose capacitance ramps linearly C(t) = C0 (1 + t / T) over [0, T] in `segments` pieces, C
/// held at each piece's middle value; at each change the state is mapped by carry_charge, or (the wrong
/// C dv/dt form, for comparison) kept as the same voltage. Returns the voltage at T.
double ramped_rc(double c0, double r, double t_end, int segments, bool conserve_charge, double v0)
{
    const double h = t_end / segments;
    auto cap = [&](int k) { return c0 * (1.0 + (k + 0.5) * h / t_end); };
    state_space ss = rc(cap(0), r);
    // The first piece starts from charge Q0 = C0 v0 on C(0) = C0.
    Eigen::VectorXd x = carry_charge(rc(c0, r), Eigen::VectorXd::Constant(1, v0), ss);
    if (!conserve_charge) x[0] = v0;
    for (int k = 0; k < segments; ++k) {
        if (k > 0) {
            state_space next = rc(cap(k), r);
            x = conserve_charge ? carry_charge(ss, x, next) : x;
            ss = std::move(next);
        }
        x = (ss.a * h).exp() * x;
    }
    // At T the capacitor is 2 C0; the last piece ended at C(T - h/2): carry to C(T).
    const state_space last = rc(2.0 * c0, r);
    return conserve_charge ? carry_charge(ss, x, last)[0] : x[0];
}

} // namespace

TEST_CASE("time-varying capacitor: an isolated charge is kept when the capacitor is stepped, v = Q0 / C")
{
    // Charge conservation (Q = C v; the current into a capacitor is d(C v)/dt): with no current path the
    // charge Q0 stays, so v = Q0 / C after any change of C. The wrong form C dv/dt = 0 keeps v instead.
    const double c1 = 100e-12, v0 = 1.5, q0 = c1 * v0;
    const state_space s1 = rc(c1, INFINITY);
    REQUIRE(s1.states() == 1);
    for (double c2 : {40e-12, 100e-12, 365e-12}) {
        const state_space s2 = rc(c2, INFINITY);
        const double v = carry_charge(s1, Eigen::VectorXd::Constant(1, v0), s2)[0];
        CHECK(v == doctest::Approx(q0 / c2).epsilon(1e-14));
        CHECK(c2 * v == doctest::Approx(q0).epsilon(1e-14).scale(0));
    }
    // A slow ramp in 1000 steps, no current path: v follows Q0 / C(t) at every step.
    state_space ss = s1;
    Eigen::VectorXd x = Eigen::VectorXd::Constant(1, v0);
    for (int k = 1; k <= 1000; ++k) {
        const double c = c1 * (1.0 - 0.6 * k / 1000.0);
        const state_space next = rc(c, INFINITY);
        x = carry_charge(ss, x, next);
        x = (next.a * 1e-6).exp() * x; // A = 0: nothing flows
        ss = next;
        if (k % 250 == 0) CHECK(x[0] == doctest::Approx(q0 / c).epsilon(1e-12));
    }
    // The wrong form would have left 1.5 V; the right one is 1.5 / 0.4 = 3.75 V.
    CHECK(std::fabs(x[0] - v0) > 2.0);
}

TEST_CASE("time-varying capacitor: an RC discharging while C ramps follows d(C v)/dt = -v / R")
{
    // Closed form (charge conservation, Q = C v, i = dQ/dt): with C(t) = C0 (1 + a t) and a shunt R,
    // dQ/dt = -Q / (R C(t)) gives Q(t) = Q0 (1 + a t)^(-1 / (a R C0)). With a = 1 / T and R C0 = T the exponent
    // is -1: Q(T) = Q0 / 2 and v(T) = Q(T) / (2 C0) = v0 / 4. The wrong form C dv/dt = -v / R gives
    // v(T) = v0 (1 + a T)^(-1) = v0 / 2.
    const double c0 = 100e-12, t_end = 1e-3, r = t_end / c0, v0 = 1.0;
    const double right = v0 / 4.0, wrong = v0 / 2.0;
    // The piecewise-constant capacitor with charge carried converges on the closed form as the pieces
    // shrink (second order: midpoint values); the measured error at 64 and 256 pieces.
    const double e64 = std::fabs(ramped_rc(c0, r, t_end, 64, true, v0) - right);
    const double e256 = std::fabs(ramped_rc(c0, r, t_end, 256, true, v0) - right);
    MESSAGE(fmt::format("charge carried: error {:.3g} at 64 pieces, {:.3g} at 256", e64, e256));
    CHECK(e256 < 2e-5 * right);
    CHECK(e64 / e256 > 12.0); // second order: 16 for exact midpoint pieces
    // Keeping the voltage at each change follows the wrong closed form instead.
    const double kept = ramped_rc(c0, r, t_end, 256, false, v0);
    CHECK(kept == doctest::Approx(wrong).epsilon(1e-3));
    CHECK(std::fabs(kept - right) > 0.2);
}

namespace {

/// The single-coil set of receiver_test with a coupled antenna; one station at f_hz.
receiver_spec one_station_set(double f_hz, double field_v_per_m, modulation* programme)
{
    receiver_spec spec;
    spec.antenna.effective_height_m = 4.0;
    spec.tuner.layout = tuner_layout::coupled;
    spec.tuner.coil_h = 240e-6;
    spec.tuner.coil_q = 150.0;
    spec.tuner.tuned_hz = f_hz;
    spec.tuner.detector_tap = 0.5;
    spec.tuner.antenna_coil_h = 20e-6;
    spec.tuner.antenna_coil_q = 100.0;
    spec.tuner.coupling = 0.1;
    spec.circuit.load.bleeder_ohm = 68e3;
    spec.circuit.load.filter_capacitance_f = 1e-9;
    receiver_station st;
    st.params.name = "Invented Test";
    st.params.carrier_hz = f_hz;
    st.params.field_v_per_m = field_v_per_m;
    st.params.modulation_index = 0.0;
    st.programme = programme;
    spec.stations.push_back(st);
    return spec;
}

} // namespace

TEST_CASE("rf_integrator::retune with the same network continues the same run")
{
    tone_modulation prog({1000.0}, {1.0}, 0.02);
    const receiver_spec spec = one_station_set(1.0e6, 10e-3, &prog);
    const receiver_network rn = build_receiver_network(spec.circuit, spec.antenna, spec.tuner);
    const state_space ss = rn.net.assemble();
    station_source src;
    am_params am;
    am.carrier_hz = 1.0e6;
    am.carrier_peak_v = 0.05;
    am.modulation_index = 0.3;
    am.preroll_s = 1e-3;
    am.ramp_s = 5e-4;
    src.add("x", am_source(am, &prog));
    prog.prepare(-1.0, 1.0);
    rf_settings rs;
    rf_integrator a(ss, rn.emf_input, diode_model(spec.circuit.diode).law(), src, 1.0e6, rs);
    rf_integrator b(ss, rn.emf_input, diode_model(spec.circuit.diode).law(), src, 1.0e6, rs);
    const rf_integrator::output_row row{ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node)};
    a.add_output(row.c, row.d_u, row.d_j);
    b.add_output(row.c, row.d_u, row.d_j);
    a.initialize();
    b.initialize();
    for (int c = 0; c < 3000; ++c) {
        if (c % 500 == 499) b.retune(ss, rn.emf_input, carry_charge(ss, b.state(), ss), std::span(&row, 1));
        a.advance_cycle();
        b.advance_cycle();
    }
    CHECK(a.output_mean(0) != 0.0);
    CHECK(b.output_mean(0) == doctest::Approx(a.output_mean(0)).epsilon(1e-12).scale(0));
    CHECK_THROWS_AS(b.retune(ss, rn.emf_input, Eigen::VectorXd::Zero(ss.states() + 1), std::span(&row, 1)), config_error);
}

TEST_CASE("dial sweep: a slow sweep past one station traces the universal resonance curve of the loaded Q")
{
    // Universal resonance curve (Terman, Radio Engineers' Handbook, 1943, sec. 3 "Circuit theory": the
    // response of a resonant circuit of quality factor Q relative to its peak is 1 / sqrt(1 + x^2),
    // x = Q (f / f0 - f0 / f)). With the signal fixed at f_s and the dial moving the tuned frequency f_t,
    // x = Q (f_s / f_t - f_t / f_s) (for a tank whose parallel resistance is constant over the sweep this is
    // exact; here the coil's Q is constant instead, which differs by the square of the relative detuning).
    // Q and the loaded peak come from a fixed-tuning render (its measured detector loading through the
    // network's Y(jw)), not from the sweep. Tolerance 0.5 dB inside the -10 dB points (x <= 3).
    const double fs_hz = 1.0e6;
    tone_modulation quiet({1000.0}, {1.0}, 0.02);
    receiver_spec fixed = one_station_set(fs_hz, 2e-3, &quiet);
    render_settings rs;
    rs.steps_per_cycle = 32;
    receiver_figures fig;
    (void)render_receiver(fixed, rs, [](const audio_block&) {}, fig);
    REQUIRE(std::isfinite(fig.loaded_q));
    const double q = fig.loaded_q;
    // The junction's measured loading moves the peak from the dial's (junction-open) tuning by this ratio.
    const double shift = fig.tuned_hz / fs_hz;
    MESSAGE(fmt::format("fixed render: loaded Q {:.2f}, peak {:.2f} Hz", q, fig.tuned_hz));

    // The sweep: +-2 % in 0.1 s (400 kHz/s: 13 Hz per tank time constant 2 Q / w against a 10 kHz bandwidth).
    tone_modulation prog({1000.0}, {1.0}, 0.2);
    receiver_spec swept = one_station_set(fs_hz, 2e-3, &prog);
    dial_path path;
    path.start_hz = 0.98 * fs_hz;
    path.end_hz = 1.02 * fs_hz;
    path.glide_s = 0.1;
    dial_settings ds;
    ds.retune_interval_s = 1e-3;
    ds.level_window_s = 1e-3; // an unmodulated carrier: a short window, a fine trace
    const dial_result r = render_dial(swept, path, ds, [](const audio_block&) {});
    REQUIRE(r.trace.size() >= 95);
    double peak = 0.0;
    for (const auto& p : r.trace) peak = std::max(peak, p.level_v[0]);
    double worst = 0.0;
    int inside = 0;
    for (const auto& p : r.trace) {
        const double ft = p.tuned_hz * shift;
        const double x = q * (fs_hz / ft - ft / fs_hz);
        const double curve_db = -10.0 * std::log10(1.0 + x * x);
        if (curve_db < -10.0) continue;
        ++inside;
        worst = std::max(worst, std::fabs(20.0 * std::log10(p.level_v[0] / peak) - curve_db));
    }
    MESSAGE(fmt::format("{} dial positions inside the -10 dB points; largest departure {:.3f} dB", inside, worst));
    CHECK(inside >= 20);
    CHECK(worst <= 0.25); // the issue asks 0.5 dB; measured 0.134 dB


    // Accuracy: at slow dial positions the level matches a fixed-tuning render with the capacitor there
    // (the detector input's peak voltage over the programme, unmodulated carrier), within 0.5 dB.
    const dial_tuning tun(swept.circuit, swept.antenna, swept.tuner, path.start_hz, path.end_hz);
    for (double fd : {0.995 * fs_hz, 1.0 * fs_hz, 1.004 * fs_hz}) {
        receiver_spec at = one_station_set(fs_hz, 2e-3, &quiet);
        at.tuner.capacitance_f = tun.capacitance_f(fd);
        receiver_figures f2;
        (void)render_receiver(at, rs, [](const audio_block&) {}, f2);
        // The trace at fd, interpolated linearly between its neighbours.
        std::size_t k = 1;
        while (k + 1 < r.trace.size() && r.trace[k].tuned_hz < fd) ++k;
        const auto& a = r.trace[k - 1];
        const auto& b = r.trace[k];
        const double w = (fd - a.tuned_hz) / (b.tuned_hz - a.tuned_hz);
        const double level = a.level_v[0] + w * (b.level_v[0] - a.level_v[0]);
        const double diff_db = 20.0 * std::log10(level / f2.detector_rf_peak_v);
        MESSAGE(fmt::format("dial {:.1f} kHz: sweep {:.4g} V, fixed {:.4g} V ({:+.3f} dB)", fd / 1e3, level, f2.detector_rf_peak_v, diff_db));
        CHECK(std::fabs(diff_db) <= 0.05); // the issue asks 0.5 dB; measured within 0.01 dB
    }
}

TEST_CASE("dial sweep: with a strong station far off tune, each station's level where the dial is slow matches a fixed dial")
{
    // The issue's accuracy criterion with several stations: two neighbours 9 kHz apart and a strong station
    // about 33 % below them (its remnant reaches the junction at every dial position and turns each grid
    // phase's voltage from cycle to cycle: the case the free voltage's correction of the prediction exists
    // for). A glide of 29 kHz in 0.4 s (72 Hz/ms: 2 Hz per tank time constant against a loaded bandwidth near
    // 10 kHz) against the dial resting at the same position (one stop: the capacitor fixed there, the grid
    // locked to it), per station, within the issue's 0.5 dB.
    tone_modulation p1({1000.0}, {1.0}, 1.0), p2({600.0}, {1.0}, 1.0), p3({400.0}, {1.0}, 1.0);
    receiver_spec spec = one_station_set(1.2e6, 8e-3, &p1);
    spec.stations[0].params.name = "Invented North";
    spec.stations[0].params.carrier_hz = 1.206e6;
    spec.stations[0].params.modulation_index = 0.4;
    receiver_station south = spec.stations[0], local = spec.stations[0];
    south.params.name = "Invented South";
    south.params.carrier_hz = 1.215e6;
    south.params.field_v_per_m = 6e-3;
    south.programme = &p2;
    local.params.name = "Invented Local";
    local.params.carrier_hz = 0.81e6;
    local.params.field_v_per_m = 40e-3;
    local.programme = &p3;
    spec.stations.push_back(south);
    spec.stations.push_back(local);
    dial_path glide;
    glide.start_hz = 1.196e6;
    glide.end_hz = 1.225e6;
    glide.glide_s = 0.4;
    const dial_result r = render_dial(spec, glide, dial_settings{}, [](const audio_block&) {});
    const double closed = static_cast<double>(r.solver.predicted_steps) / static_cast<double>(r.solver.steps);
    double worst = 0.0;
    for (double fd : {1.206e6, 1.2105e6, 1.215e6}) {
        dial_path rest;
        rest.stops_hz = {fd};
        rest.dwell_s = 0.05;
        const dial_result f = render_dial(spec, rest, dial_settings{}, [](const audio_block&) {});
        REQUIRE(f.trace.size() >= 4);
        CHECK(f.retunes == 0); // the capacitor and the grid never move: nothing is re-tabulated
        // The glide's trace at fd, interpolated linearly between its neighbours; the rest's last three windows.
        std::size_t k = 1;
        while (k + 1 < r.trace.size() && r.trace[k].tuned_hz < fd) ++k;
        const auto& a = r.trace[k - 1];
        const auto& b = r.trace[k];
        const double w = (fd - a.tuned_hz) / (b.tuned_hz - a.tuned_hz);
        for (std::size_t s = 0; s < 3; ++s) {
            const double swept = a.level_v[s] + w * (b.level_v[s] - a.level_v[s]);
            double fixed = 0.0;
            for (std::size_t i = f.trace.size() - 3; i < f.trace.size(); ++i) fixed += f.trace[i].level_v[s] / 3.0;
            const double diff_db = 20.0 * std::log10(swept / fixed);
            MESSAGE(fmt::format("dial {:.1f} kHz, {}: sweep {:.4g} V, resting {:.4g} V ({:+.3f} dB)", fd / 1e3, r.names[s], swept, fixed, diff_db));
            worst = std::max(worst, std::fabs(diff_db));
        }
    }
    MESSAGE(fmt::format("glide: {:.1f} % of the steps closed on the prediction; largest departure {:.3f} dB", 100.0 * closed, worst));
    CHECK(worst <= 0.05); // the issue asks 0.5 dB; measured 0.012 dB (the neighbours), 0.025 dB (the far station)
}
