// The whole receiver on the RF integrator against ngspice (Debian's package, batch mode, K-coupled
// inductors) on the same circuits, written out by this test from the element values: an untuned wire
// antenna, a single-coil tapped set, and a coupled set with a wanted station and a neighbour 10 kHz away.
// Compared: the earpiece waveform (relative RMS difference) and each station's tone level (least-squares fit).
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"
#include "receiver_spice.hpp"

#include <doctest/doctest.h>
#include <Eigen/QR>
#include <fmt/format.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {
using galena_test::netlist;
using galena_test::receiver_case;
using galena_test::station_case;

bool run_ngspice(const fs::path& dir, const std::string& net, std::vector<double>& t, std::vector<double>& v, double t_end)
{
    const std::string err = galena_test::run_ngspice(dir, net, t, v, t_end);
    if (!err.empty()) FAIL_CHECK(err);
    return err.empty();
}

// Independent constant: the test does not take it from galena/constants.hpp.
constexpr double k_pi = 3.14159265358979323846;

/// Peak amplitudes of sinusoids at f_hz (plus DC) in x[k] at t0 + k dt, least squares.
std::vector<double> tone_levels(const std::vector<double>& x, double t0, double dt, const std::vector<double>& f_hz)
{
    const auto n = static_cast<Eigen::Index>(x.size());
    const auto m = static_cast<Eigen::Index>(f_hz.size());
    Eigen::MatrixXd a(n, 2 * m + 1);
    Eigen::VectorXd y(n);
    for (Eigen::Index k = 0; k < n; ++k) {
        const double tk = t0 + static_cast<double>(k) * dt;
        for (Eigen::Index i = 0; i < m; ++i) {
            a(k, 2 * i) = std::cos(2.0 * k_pi * f_hz[static_cast<std::size_t>(i)] * tk);
            a(k, 2 * i + 1) = std::sin(2.0 * k_pi * f_hz[static_cast<std::size_t>(i)] * tk);
        }
        a(k, 2 * m) = 1.0;
        y[k] = x[static_cast<std::size_t>(k)];
    }
    const Eigen::VectorXd c = a.colPivHouseholderQr().solve(y);
    std::vector<double> r;
    for (Eigen::Index i = 0; i < m; ++i) r.push_back(std::hypot(c[2 * i], c[2 * i + 1]));
    return r;
}

diode_params germanium_like()
{
    diode_params d;
    d.saturation_current_a = 2e-6;
    d.emission_coefficient = 1.5;
    d.series_resistance_ohm = 20.0;
    d.junction_capacitance_f = 0.5e-12;
    d.junction_potential_v = 0.3;
    d.grading_coefficient = 0.5;
    return d;
}

receiver_case base(const std::string& name, tuner_layout layout)
{
    receiver_case rc;
    rc.name = name;
    rc.circuit.diode = germanium_like();
    rc.circuit.load.bleeder_ohm = 68e3;
    rc.circuit.load.filter_capacitance_f = 1e-9;
    rc.circuit.earpiece.kind = earpiece_kind::piezo;
    rc.circuit.earpiece.capacitance_f = 4.7e-9;
    rc.antenna.capacitance_f = 200e-12;
    rc.antenna.resistance_ohm = 25.0;
    rc.tuner.layout = layout;
    rc.tuner.coil_q = 150.0;
    return rc;
}

} // namespace

TEST_CASE("receiver against ngspice: untuned, single-coil tapped, coupled with a neighbour 10 kHz away")
{
    std::vector<receiver_case> cases;
    {
        receiver_case rc = base("untuned wire antenna", tuner_layout::untuned);
        rc.tuner.dc_return_ohm = 47e3;
        rc.stations = {{1.0e6, 1.5, 0.5, 2000.0}};
        cases.push_back(rc);
    }
    {
        receiver_case rc = base("single-coil, antenna tap 0.25, detector tap 0.6", tuner_layout::single_coil);
        rc.tuner.antenna_tap = 0.25;
        rc.tuner.detector_tap = 0.6;
        rc.stations = {{1.0e6, 0.05, 0.5, 2000.0}};
        cases.push_back(rc);
    }
    {
        receiver_case rc = base("coupled k = 0.1, detector tap 0.5, wanted + neighbour at +10 kHz", tuner_layout::coupled);
        rc.tuner.detector_tap = 0.5;
        rc.tuner.coupling = 0.1;
        rc.tuner.antenna_coil_h = 20e-6;
        rc.tuner.antenna_coil_q = 100.0;
        rc.stations = {{1.0e6, 0.1, 0.5, 2000.0}, {1.01e6, 0.1, 0.5, 3000.0}};
        cases.push_back(rc);
    }
    // Both simulators start from the same zero state at t = 0, so the comparison needs no settled state: 2 ms
    // simulated, the second millisecond compared (whole periods of the 2 kHz and 3 kHz tones and of the 10 kHz
    // whistle). ngspice's trapezoidal rule at a 1 ns step is converged here: a 0.25 ns run differs from it by
    // 1.1e-4 in the coupled set. The diode current is the Shockley law in both (see receiver_spice.hpp: ngspice's
    // own reverse-bias approximation had raised its detected DC by 0.15 % in the coupled set).
    // galena's own error is second order in the step, from the junction current's piecewise-linear form and
    // the BDF2 derivative of the junction's nonlinear charge; the detector conducts for about 20 ns per cycle,
    // less than one step at the production N = 32, and the tuned sets' detected DC then sits 0.2-0.3 % high.
    // Against ngspice it now converges as h^2 down to ngspice's own error (single-coil 2.3e-3, 6.1e-4, 5.2e-5
    // at N = 32, 64, 256). Until the step exponentials were balanced (rf_integrator.cpp: this network's A has
    // entries near 1e17 1/s beside a spectral radius of 6e11, and unbalanced scaling-and-squaring left W0 and
    // Phi about 1.5e-7 off, against 1e-11 balanced, checked in long double) a 2e-4 DC difference remained
    // past N = 256 (1.9e-4 single-coil, 1.4e-4 coupled): it had been put down to the junction models; it was
    // galena's. That error had also happened to cancel part of the h^2 error at N = 32 and 64 (2.1e-3 and
    // 3.7e-4 then). The 1e-3 waveform criterion is checked at N = 64 and 256; N = 32, the render
    // default, at its measured figures. Each station's tone level agrees within 1 % at every N checked.
    const double t_end = 2e-3, t_cmp = 1e-3;
    const double max_step = 1e-9;
    cases[0].checks = {{32, 6e-4}, {256, 1e-5}};                  // measured 5.0e-4 and 7.2e-6
    cases[1].checks = {{32, 2.6e-3}, {64, 7e-4}, {256, 7e-5}};     // measured 2.33e-3, 6.1e-4 and 5.2e-5
    cases[2].checks = {{32, 3.3e-3}, {64, 9e-4}, {256, 1.3e-4}};   // measured 3.0e-3, 8.0e-4 and 1.05e-4
    for (const auto& rc : cases) {
        CAPTURE(rc.name);
        const receiver_network rn = build_receiver_network(rc.circuit, rc.antenna, rc.tuner);
        const state_space ss = rn.net.assemble();
        std::vector<double> ts, vs;
        const fs::path dir = fs::path(GALENA_TEST_TMP) / fmt::format("receiver_ngspice_{}", static_cast<int>(rc.tuner.layout));
        fs::create_directories(dir);
        if (!run_ngspice(dir, netlist(rc, t_end, max_step, dir / "out.txt"), ts, vs, t_end)) continue;
        for (const auto& [steps, bound] : rc.checks) {
            CAPTURE(steps);
            std::vector<std::unique_ptr<tone_modulation>> tones;
            station_source src;
            for (const auto& st : rc.stations) {
                tones.push_back(std::make_unique<tone_modulation>(std::vector{st.tone_hz}, std::vector{1.0}, 1.0));
                am_params p;
                p.carrier_hz = st.carrier_hz;
                p.carrier_peak_v = st.emf_peak_v;
                p.modulation_index = st.m;
                src.add("s", am_source(p, tones.back().get()));
            }
            const double fc = rc.stations.front().carrier_hz;
            rf_settings rs;
            rs.steps_per_cycle = steps;
            rf_integrator ig(ss, rn.emf_input, diode_model(rc.circuit.diode).law(), src, fc, rs);
            ig.add_output(ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node));
            ig.initialize();
            const auto cycles = static_cast<std::size_t>(std::llround(t_end * fc));
            const auto first = static_cast<std::size_t>(std::llround(t_cmp * fc));
            std::vector<double> ours, buf(static_cast<std::size_t>(steps));
            for (std::size_t c = 0; c < cycles; ++c) {
                ig.advance_cycle(buf);
                if (c >= first) ours.insert(ours.end(), buf.begin(), buf.end());
            }
            const double dt = 1.0 / (fc * steps);
            const double t0 = static_cast<double>(first) / fc + dt;
            ours.resize(ours.size() - 1); // the last step end is t_end itself
            std::vector<double> theirs(ours.size());
            std::size_t j = 0;
            for (std::size_t k = 0; k < ours.size(); ++k) {
                const double tk = t0 + static_cast<double>(k) * dt;
                while (j + 2 < ts.size() && ts[j + 1] < tk) ++j;
                theirs[k] = vs[j] + (tk - ts[j]) / (ts[j + 1] - ts[j]) * (vs[j + 1] - vs[j]);
            }
            double num2 = 0.0, den2 = 0.0;
            for (std::size_t k = 0; k < ours.size(); ++k) num2 += std::pow(ours[k] - theirs[k], 2), den2 += theirs[k] * theirs[k];
            const double rel_rms = std::sqrt(num2 / den2);
            std::vector<double> freqs;
            for (const auto& st : rc.stations) freqs.push_back(st.tone_hz);
            const auto lo = tone_levels(ours, t0, dt, freqs);
            const auto lt = tone_levels(theirs, t0, dt, freqs);
            std::string levels;
            for (std::size_t i = 0; i < lo.size(); ++i) levels += fmt::format(" {:.5g} V vs {:.5g} V ({:+.2f} %);", lo[i], lt[i], 100.0 * (lo[i] / lt[i] - 1.0));
            MESSAGE(fmt::format("{}, N = {}: waveform relRMS {:.3g}; tone levels{}", rc.name, steps, rel_rms, levels));
            CHECK(rel_rms <= bound);
            // Each station's tone level within 1 % (the criterion).
            for (std::size_t i = 0; i < lo.size(); ++i) CHECK(std::fabs(lo[i] / lt[i] - 1.0) <= 0.01);
        }
    }
}
