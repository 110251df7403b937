// The phase-locked trapezoidal integrator against outside references: the bilinear transform (a linear
// network's periodic steady state under the trapezoidal rule), the matrix exponential (its transient and
// second-order convergence), the exact rectified-DC law of an exponential diode (Boost.Math Bessel I0),
// and a converged solution by a different method from outside the project (Boost.Odeint's rosenbrock4
// at a tight tolerance, through galena's reference_integrator).
#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/step_count.hpp"
#include "galena/integrator.hpp"
#include "galena/reference_integrator.hpp"
#include "galena/signal.hpp"

#include <boost/math/special_functions/bessel.hpp>
#include <boost/math/tools/roots.hpp>
#include <doctest/doctest.h>
#include "detector_laws.hpp"
#include <fmt/format.h>
#include <unsupported/Eigen/MatrixFunctions>

#include <cmath>
#include <complex>
#include <vector>

using namespace galena;
using galena_test::dc_law_v;
using galena_test::vt_25c;

namespace {

// Independent constants: the test does not take them from galena/constants.hpp.
constexpr double k_pi = 3.14159265358979323846;

/// A junction that is a linear RC: current v / r_ohm, charge c_f v (grading 0 makes Cj constant; Vj far
/// away keeps v below the linear continuation).
junction_law linear_junction(double r_ohm, double c_f)
{
    junction_law j;
    j.saturation_current_a = 0.0;
    j.inv_emission_voltage = 1.0 / 0.03;
    j.leakage_s = 1.0 / r_ohm;
    j.cj0_f = c_f;
    j.junction_potential_v = 1e6;
    j.grading = 0.0;
    j.square_root_grading = false;
    j.fc_v = 0.5e6;
    return j;
}

/// Output node (C_b to ground through R_l) fed through R, plus an optional series R_m L_m C_m branch
/// (a Butterworth-Van Dyke motional arm) across it.
template <int Dim>
one_junction_network<Dim> linear_network(double r, double cb, double rl, const junction_law& j)
{
    one_junction_network<Dim> n;
    n.series_ohm = r;
    n.junction = j;
    n.c[0] = 1.0;
    n.b[0] = 1.0 / cb;
    n.a(0, 0) = -(1.0 / r + 1.0 / rl) / cb;
    if constexpr (Dim == 3) {
        const double rm = 300.0, lm = 0.05, cm = 2e-9;
        n.a(0, 1) = -1.0 / cb;
        n.a(1, 0) = 1.0 / lm;
        n.a(1, 1) = -rm / lm;
        n.a(1, 2) = -1.0 / lm;
        n.a(2, 1) = 1.0 / cm;
    }
    return n;
}

/// Full linear state-space model x = [v_j, y], dx/dt = M x + f u of a linear one_junction_network (junction
/// with charge c_j v and current g_j v): the continuous-time system the integrator discretises.
template <int Dim>
void linear_model(const one_junction_network<Dim>& n, Eigen::MatrixXd& m, Eigen::VectorXd& f)
{
    const double cj = n.junction.cj0_f, gj = n.junction.leakage_s, ir = 1.0 / n.series_ohm;
    m = Eigen::MatrixXd::Zero(Dim + 1, Dim + 1);
    f = Eigen::VectorXd::Zero(Dim + 1);
    // Cj dv/dt = (u - v - c.y)/R - gj v
    m(0, 0) = (-ir - gj) / cj;
    for (int i = 0; i < Dim; ++i) m(0, 1 + i) = -ir * n.c[i] / cj;
    f[0] = ir / cj;
    // dy/dt = A y + b (u - v)/R
    for (int i = 0; i < Dim; ++i) {
        for (int k = 0; k < Dim; ++k) m(1 + i, 1 + k) = n.a(i, k);
        m(1 + i, 0) = -n.b[i] * ir;
        f[1 + i] = n.b[i] * ir;
    }
}

/// Runs a one_junction_network from rest under u = amplitude cos(2 pi fc t) for `cycles` cycles; returns
/// the output voltage at every step of the last cycle (index 0 = its start).
template <int Dim>
std::vector<double> run_cos(const one_junction_network<Dim>& net, double fc, double amplitude, int n, std::size_t cycles,
                            int passes = 4)
{
    cycle_settings cs;
    cs.steps_per_cycle = n;
    cs.voltage_scale_v = amplitude;
    cs.max_batched_passes = passes;
    cycle_integrator<Dim> ig(net, fc, cs);
    ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), amplitude);
    std::vector<double> u(static_cast<std::size_t>(n));
    for (int k = 1; k <= n; ++k) u[static_cast<std::size_t>(k - 1)] = amplitude * std::cos(2.0 * k_pi * k / n);
    for (std::size_t c = 0; c < cycles; ++c) ig.advance(u);
    const auto y = ig.output_v();
    return {y.begin(), y.end()};
}

/// rms(a - b) / rms(b).
double relative_rms(const std::vector<double>& a, const std::vector<double>& b, std::size_t from = 0)
{
    double num = 0.0, den = 0.0;
    for (std::size_t i = from; i < std::min(a.size(), b.size()); ++i) {
        num += (a[i] - b[i]) * (a[i] - b[i]);
        den += b[i] * b[i];
    }
    return std::sqrt(num / den);
}

} // namespace

TEST_CASE("linear network: the periodic steady state is the bilinear transform's, to rounding")
{
    // The trapezoidal rule applied to a linear system is the bilinear transform s -> (2/h)(z - 1)/(z + 1)
    // [pub: Oppenheim & Schafer, Discrete-Time Signal Processing, sec. 7.1]. On a grid of N steps per
    // carrier period the steady-state response to cos(w t) is therefore exactly the continuous transfer
    // function at the warped frequency w' = (2/h) tan(w h / 2): any error in the elimination of the
    // network, the junction's charge equation or the affine step maps shows up here. The junction is a
    // linear RC (charge Cj v, current v / R_j).
    const double fc = 1e6;
    const double amplitude = 0.7;
    auto check = [&](const auto& net, int n) {
        constexpr int dim = std::remove_cvref_t<decltype(net)>::vec::RowsAtCompileTime;
        Eigen::MatrixXd m;
        Eigen::VectorXd f;
        linear_model(net, m, f);
        const double h = 1.0 / (fc * n);
        const double w_warped = 2.0 / h * std::tan(2.0 * k_pi * fc * h / 2.0);
        const Eigen::MatrixXcd lhs = std::complex<double>(0.0, w_warped) * Eigen::MatrixXcd::Identity(dim + 1, dim + 1) -
                                     m.cast<std::complex<double>>();
        const Eigen::VectorXcd x = lhs.partialPivLu().solve(f.cast<std::complex<double>>());
        const std::complex<double> hy = x[1]; // output voltage per volt of source
        // The discrete transient decays per step as the largest |(1 + h l / 2) / (1 - h l / 2)| over the
        // eigenvalues l (slower than the continuous one for stiff modes); run until it is below 1e-15.
        double rho = 0.0;
        for (const auto& l : m.eigenvalues()) rho = std::max(rho, std::abs((1.0 + 0.5 * h * l) / (1.0 - 0.5 * h * l)));
        const auto cycles = static_cast<std::size_t>(std::ceil(std::log(1e-15) / (n * std::log(rho))));
        for (int passes : {4, 0}) { // the batched path and the step-by-step path
            const auto y = run_cos(net, fc, amplitude, n, cycles, passes);
            double worst = 0.0;
            for (int k = 0; k <= n; ++k) {
                const double expect = amplitude * std::real(hy * std::polar(1.0, 2.0 * k_pi * k / n));
                worst = std::max(worst, std::fabs(y[static_cast<std::size_t>(k)] - expect));
            }
            INFO("Dim " << dim << ", N = " << n << ", passes " << passes << ", |H| = " << std::abs(hy));
            CHECK(worst <= 1e-9 * amplitude * std::abs(hy) + 1e-13);
        }
    };
    const auto j = linear_junction(2e3, 2e-12);
    for (int n : {8, 32}) {
        check(linear_network<1>(20e3, 3e-12, 50e3, j), n);
        check(linear_network<3>(20e3, 3e-12, 50e3, j), n);
    }
}

TEST_CASE("linear network: the transient from rest matches the matrix exponential at second order")
{
    // Exact solution by the matrix exponential of the network augmented with the source's oscillator
    // (d/dt [cos, sin] = w [-sin, cos]) [outside reference: Eigen's MatrixFunctions]. The trapezoidal rule
    // is second order: the error at a fixed time falls 4x when N doubles.
    const double fc = 1e6;
    const double w = 2.0 * k_pi * fc;
    const auto net = linear_network<1>(20e3, 20e-12, 50e3, linear_junction(2e3, 5e-12));
    Eigen::MatrixXd m;
    Eigen::VectorXd f;
    linear_model(net, m, f);
    Eigen::MatrixXd aug = Eigen::MatrixXd::Zero(4, 4);
    aug.topLeftCorner(2, 2) = m;
    aug.block(0, 2, 2, 1) = f;
    aug(2, 3) = -w;
    aug(3, 2) = w;
    const std::size_t cycles = 3; // well inside the transient (tau ~ 0.4 us)
    Eigen::VectorXd x0(4);
    x0 << 0.0, 0.0, 1.0, 0.0;
    const Eigen::MatrixXd e = (aug * (static_cast<double>(cycles) / fc)).exp();
    const double exact = (e * x0)[1];
    double prev = 0.0;
    for (int n : {16, 32, 64, 128}) {
        const auto y = run_cos(net, fc, 1.0, n, cycles);
        const double err = std::fabs(y.back() - exact);
        MESSAGE(fmt::format("transient N = {:4d}: error {:.3e} (exact {:.6f})", n, err, exact));
        if (prev > 0.0) CHECK(std::log2(prev / err) == doctest::Approx(2.0).epsilon(0.1).scale(0.0));
        prev = err;
    }
}

namespace {


circuit_params law_circuit(double is_a, double n, double rl_ohm, double c_f)
{
    circuit_params c;
    // The law assumes a source of zero resistance; the phase-locked solver needs R > 0, so 1 ohm (it moves
    // the DC by about R / RL < 1e-4 relative).
    c.source.resistance_ohm = 1.0;
    c.diode.saturation_current_a = is_a;
    c.diode.emission_coefficient = n;
    c.diode.series_resistance_ohm = 0.0;
    c.diode.junction_capacitance_f = 0.0;
    c.earpiece.kind = earpiece_kind::resistor;
    c.earpiece.resistance_ohm = rl_ohm;
    c.load.filter_capacitance_f = c_f;
    return c;
}

} // namespace

TEST_CASE("rectified DC follows the exponential-diode law through the phase-locked integrator and its estimator")
{
    // The I0 law (H. C. Torrey and C. A. Whitmer, Crystal Rectifiers, 1948, from memory): the DC of an exponential diode into RL || C with
    // negligible ripple. Two galena routes: (a) the full phase-locked integration, mean over whole cycles
    // after settling (RL C = 1000 periods keeps the ripple's effect on the mean below 0.05 %), and (b)
    // frozen_output_dc_v, which holds the output at the DC (no ripple at all, as the law assumes). Bound
    // 0.2 % as in reference_test (it catches a Vt taken at 300 K instead of 298.15 K: 0.6 %).
    constexpr double fc = 100e3;
    const double period = 1.0 / fc;
    struct dc_case {
        const char* name;
        double is_a, n, rl_ohm;
    };
    const dc_case cases[] = {{"germanium-like", 1e-6, 1.3, 47e3}, {"schottky-like", 2e-8, 1.08, 1e6}};
    for (const dc_case& dc : cases) {
        const double nvt = dc.n * vt_25c;
        for (double a : {0.1, 1.0, 10.0, 30.0}) {
            const double v_peak = a * nvt;
            const double v_ref = dc_law_v(v_peak, dc.is_a, dc.n, dc.rl_ohm);
            const auto c = law_circuit(dc.is_a, dc.n, dc.rl_ohm, 1000.0 * period / dc.rl_ohm);
            const detector_network net(c);
            const auto oj = make_one_junction_network<1>(net);
            // (b) the estimator at a fine grid
            const double v_frozen = frozen_output_dc_v(oj, fc, v_peak, 256);
            // (a) full integration: settle from 0.8 x the answer over 10 linearised time constants.
            const double g = 1.0 / dc.rl_ohm + (v_ref / dc.rl_ohm + dc.is_a) / nvt; // [derived from the law]
            const double tau = net.node_capacitance_f() / g;
            const auto settle = static_cast<std::size_t>(std::ceil(10.0 * tau / period));
            cycle_settings cs;
            cs.steps_per_cycle = 64;
            cs.voltage_scale_v = v_peak;
            cycle_integrator<1> ig(oj, fc, cs);
            ig.initialize(0.0, cycle_integrator<1>::vec::Constant(0.8 * v_ref), v_peak);
            std::vector<double> u(64);
            for (int k = 1; k <= 64; ++k) u[static_cast<std::size_t>(k - 1)] = v_peak * std::cos(2.0 * k_pi * k / 64);
            for (std::size_t i = 0; i < settle; ++i) ig.advance(u);
            double mean = 0.0;
            for (int i = 0; i < 50; ++i) {
                ig.advance(u);
                mean += ig.output_mean_v() / 50.0;
            }
            INFO(dc.name << " a = " << a << ": law " << v_ref << " V, integrated " << mean << " V, estimator " << v_frozen << " V");
            CHECK(std::fabs(mean / v_ref - 1.0) <= 2e-3);
            CHECK(std::fabs(v_frozen / v_ref - 1.0) <= 2e-3);
        }
    }
}

namespace {

/// The benchmark's source: 0.5 V at 1 MHz, m = 0.5 at 1 kHz, switched on at t = 0.
struct benchmark_source {
    tone_modulation tone{{1000.0}, {1.0}, 1.0};
    am_params am = [] {
        am_params a;
        a.carrier_hz = 1e6;
        a.carrier_peak_v = 0.5;
        a.modulation_index = 0.5;
        return a;
    }();
    am_source src{am, &tone};
};

circuit_params benchmark_circuit()
{
    // The issue-5 benchmark circuit (demo values): germanium-like diode with Cj and leakage, bleeder,
    // filter capacitor and a piezo with leakage.
    circuit_params c;
    c.source.resistance_ohm = 20e3;
    c.diode.saturation_current_a = 2e-6;
    c.diode.emission_coefficient = 1.5;
    c.diode.series_resistance_ohm = 20.0;
    c.diode.leakage_resistance_ohm = 2e6;
    c.diode.junction_capacitance_f = 0.5e-12;
    c.load.bleeder_ohm = 68e3;
    c.load.filter_capacitance_f = 1e-9;
    c.earpiece.capacitance_f = 10e-9;
    c.earpiece.leakage_ohm = 10e6;
    return c;
}

/// The output voltage on the grid k * dt (k < count) by the phase-locked integrator with N steps per
/// cycle (cubic Hermite dense output between steps).
template <int Dim>
std::vector<double> phase_locked_grid(const one_junction_network<Dim>& oj, const am_source& src, int n, double dt,
                                      std::size_t count)
{
    const double fc = src.params().carrier_hz, period = 1.0 / fc, h = period / n;
    cycle_settings cs;
    cs.steps_per_cycle = n;
    cs.voltage_scale_v = src.params().carrier_peak_v * (1.0 + src.params().modulation_index);
    cycle_integrator<Dim> ig(oj, fc, cs);
    ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), src.voltage(0.0));
    phase_locked_source sampler(src, n);
    std::vector<double> u(static_cast<std::size_t>(n)), out;
    for (std::size_t c = 0; out.size() < count; ++c) {
        sampler.cycle(c, u);
        ig.advance(u);
        const auto y = ig.output_v();
        const double tc = static_cast<double>(c) * period;
        while (out.size() < count && static_cast<double>(out.size()) * dt < tc + period) {
            const double s = (static_cast<double>(out.size()) * dt - tc) / h;
            const int m = std::min(n - 1, static_cast<int>(s));
            out.push_back(hermite_value(s, double(m), y[m], ig.output_slope_v_per_s(m) * h, double(m + 1), y[m + 1],
                                        ig.output_slope_v_per_s(m + 1) * h));
        }
    }
    return out;
}

/// The converged reference: Boost.Odeint rosenbrock4 (order 4, dense output) at relative tolerance rtol,
/// max step 10 ns, on the same grid. Measured on the benchmark circuit: at rtol 1e-7 it is within 2.4e-7
/// relRMS of rtol 1e-9 (and of galena at 1024 steps per cycle).
std::vector<double> converged_grid(const detector_network& net, const am_source& src, double dt, std::size_t count, double rtol)
{
    return with_equations(net, src, [&](auto eq) {
        using eq_t = decltype(eq);
        const std::vector<double> x0(static_cast<std::size_t>(eq_t::dim), 0.0);
        return reference_solve(erase_system(eq), x0, 0.0, dt, count, eq_t::output_index, rtol, rtol * 1e-2, 1e-8);
    });
}

/// Means over whole carrier cycles (period_samples grid points each) from index `from`.
std::vector<double> cycle_means(const std::vector<double>& v, std::size_t from, std::size_t period_samples)
{
    std::vector<double> m;
    for (std::size_t i = from; i + period_samples <= v.size(); i += period_samples) {
        double a = 0.0;
        for (std::size_t j = 0; j < period_samples; ++j) a += v[i + j];
        m.push_back(a / static_cast<double>(period_samples));
    }
    return m;
}

} // namespace

TEST_CASE("benchmark circuit: automatic N meets the 1e-4 accuracy target; the error falls faster than second order")
{
    // The issue-5 accuracy target: relRMS <= 1e-4 of the earpiece waveform (100 MHz grid, 1..2 ms) against a
    // converged reference by a different method (rosenbrock4, rtol 1e-7). Measured: 6.1e-6 at the automatic
    // N = 32. The bound, 3e-5, is the automatic choice's tolerance (2e-5 on the detected level) plus the
    // dense output's share.
    const benchmark_source bs;
    const am_source& src = bs.src;
    const am_params& am = bs.am;
    const detector_network net(benchmark_circuit());
    const auto oj = make_one_junction_network<1>(net);
    const double dt = 1e-8;
    const std::size_t count = 200001, from = 100000;
    const auto ref = converged_grid(net, src, dt, count, 1e-7);
    const double levels[] = {0.75, 0.5, 0.25};
    const auto choice = choose_steps_per_cycle(oj, am.carrier_hz, levels, 2e-5);
    REQUIRE(choice.met);
    const double e_auto = relative_rms(phase_locked_grid(oj, src, choice.steps_per_cycle, dt, count), ref, from);
    MESSAGE(fmt::format("automatic N = {}: relRMS {:.3e} against rosenbrock4 (estimated level error {:.2e})",
                        choice.steps_per_cycle, e_auto, choice.estimated_error));
    CHECK(e_auto <= 3e-5);
    // Order: on a phase-locked grid the trapezoidal rule sums the periodic junction current almost
    // spectrally. Self-convergence against N = 1024 (itself within 1e-6 of rosenbrock4; measured 9e-9 against
    // rosenbrock4 at rtol 1e-8): measured ratios 22x (16 -> 32: 1.36e-4, 6.3e-6) and 7.4x (32 -> 64: 8.5e-7),
    // against 4x for plain second order.
    const auto fine = phase_locked_grid(oj, src, 1024, dt, count);
    CHECK(relative_rms(fine, ref, from) <= 1e-6);
    std::vector<double> errs;
    for (int n : {16, 32, 64}) {
        errs.push_back(relative_rms(phase_locked_grid(oj, src, n, dt, count), fine, from));
        MESSAGE(fmt::format("N = {:3d}: relRMS {:.3e} against N = 1024", n, errs.back()));
    }
    CHECK(errs[0] / errs[1] >= 6.0);
    CHECK(errs[1] / errs[2] >= 6.0);
}

TEST_CASE("earpiece states: Butterworth-Van Dyke and magnetic phones agree with the converged reference")
{
    // Dim 3 (BVD motional branch) and Dim 2 (magnetic phones) networks at the automatic N, against
    // rosenbrock4 (rtol 1e-6: about 1e-6 from converged). What the audio path keeps is the mean over each
    // carrier cycle; it is compared to 3e-5 (the automatic choice's tolerance plus margin). The waveform
    // within the cycle (the carrier ripple) is reported: with the magnetic phones' small 2 nF node it is
    // a large part of the signal and converges at second order (measured 6.8e-5 relRMS at N = 40).
    const benchmark_source bs;
    const am_source& src = bs.src;
    const am_params& am = bs.am;
    auto bvd = benchmark_circuit();
    bvd.earpiece.motional_resistance_ohm = 300.0;
    bvd.earpiece.motional_inductance_h = 0.2;
    bvd.earpiece.motional_capacitance_f = 5e-9;
    auto mag = benchmark_circuit();
    mag.earpiece.kind = earpiece_kind::magnetic;
    mag.load.bleeder_ohm = infinite_ohm;
    mag.load.filter_capacitance_f = 2e-9;
    const double dt = 1e-8;
    const std::size_t count = 200001, from = 100000;
    const double levels[] = {0.75, 0.5, 0.25};
    for (const auto& c : {bvd, mag}) {
        const detector_network net(c);
        const auto ref = converged_grid(net, src, dt, count, 1e-6);
        with_one_junction_network(net, [&](const auto& oj) {
            const auto choice = choose_steps_per_cycle(oj, am.carrier_hz, levels, 2e-5);
            const auto got = phase_locked_grid(oj, src, choice.steps_per_cycle, dt, count);
            const double e_means = relative_rms(cycle_means(got, from, 100), cycle_means(ref, from, 100));
            const double e_wave = relative_rms(got, ref, from);
            MESSAGE(fmt::format("{} earpiece, {} states: N = {}, cycle means relRMS {:.3e}, waveform relRMS {:.3e}",
                                to_string(c.earpiece.kind), net.earpiece_states(), choice.steps_per_cycle, e_means, e_wave));
            CHECK(e_means <= 3e-5);
            CHECK(e_wave <= 1e-4);
        });
    }
}

TEST_CASE("the batched linearised Newton and the step-by-step Newton solve the same equations")
{
    // Same discretisation, two solvers: the batched path accepts a step when its linearisation error is
    // below newton_tolerance (1e-8 of the carrier crest); the step-by-step path iterates to 1e-13. Their
    // outputs may differ by about that tolerance, not more.
    const benchmark_source bs;
    const am_source& src = bs.src;
    const am_params& am = bs.am;
    const auto oj = make_one_junction_network<1>(detector_network(benchmark_circuit()));
    std::vector<std::vector<double>> outs;
    for (int passes : {4, 0}) {
        cycle_settings cs;
        cs.steps_per_cycle = 32;
        cs.voltage_scale_v = 0.75;
        cs.max_batched_passes = passes;
        cycle_integrator<1> ig(oj, 1e6, cs);
        ig.initialize(0.0, cycle_integrator<1>::vec::Zero(), 0.5);
        phase_locked_source sampler(src, 32);
        std::vector<double> u(32), means;
        for (std::size_t c = 0; c < 1000; ++c) {
            sampler.cycle(c, u);
            ig.advance(u);
            means.push_back(ig.output_mean_v());
        }
        if (passes > 0) CHECK(ig.stats().scalar_cycles <= 4); // start-up only: no or little history to predict from
        else CHECK(ig.stats().scalar_cycles == 1000);
        outs.push_back(means);
    }
    double worst = 0.0;
    for (std::size_t i = 0; i < outs[0].size(); ++i) worst = std::max(worst, std::fabs(outs[0][i] - outs[1][i]));
    MESSAGE(fmt::format("batched vs step-by-step: largest cycle-mean difference {:.2e} V", worst));
    CHECK(worst <= 1e-8 * 0.75);
}

TEST_CASE("the automatic step count delivers the detected level within its tolerance")
{
    // For several diodes and loads, the rectified level from the full integration at the chosen N is
    // compared with the same integration at 8 N (converged: the error falls faster than N^-2). The
    // estimator is a frozen-output model, so the bound is 3x its tolerance.
    struct k_case {
        const char* name;
        circuit_params c;
        double carrier_v;
    };
    std::vector<k_case> cases;
    {
        circuit_params c = benchmark_circuit();
        cases.push_back({"benchmark", c, 0.5});
    }
    {
        circuit_params c;
        c.source.resistance_ohm = 50e3;
        c.diode = find_diode_preset("small-signal-schottky").params;
        c.load.bleeder_ohm = 100e3;
        c.load.filter_capacitance_f = 2.2e-9;
        cases.push_back({"schottky strong", c, 2.0});
    }
    {
        circuit_params c;
        c.source.resistance_ohm = 5e3;
        c.diode = find_diode_preset("silicon-junction-switching").params; // M = 0.33: the exp-log charge path
        c.load.bleeder_ohm = 47e3;
        cases.push_back({"silicon graded", c, 3.0});
    }
    {
        circuit_params c;
        c.source.resistance_ohm = 1e3; // a junction far faster than a step: R Cj << h
        c.diode = find_diode_preset("zero-bias-schottky-detector").params; // breakdown modelled
        c.load.bleeder_ohm = 47e3;
        cases.push_back({"zero-bias, stiff junction", c, 0.2});
    }
    const double fc = 1e6;
    for (const auto& k : cases) {
        const detector_network net(k.c);
        const auto oj = make_one_junction_network<1>(net);
        const double tol = 2e-5;
        const double levels[] = {k.carrier_v};
        const auto choice = choose_steps_per_cycle(oj, fc, levels, tol);
        REQUIRE(choice.met);
        auto level_at = [&](int n) {
            cycle_settings cs;
            cs.steps_per_cycle = n;
            cs.voltage_scale_v = k.carrier_v;
            cycle_integrator<1> ig(oj, fc, cs);
            ig.initialize(0.0, cycle_integrator<1>::vec::Zero(), k.carrier_v);
            std::vector<double> u(static_cast<std::size_t>(n));
            for (int i = 1; i <= n; ++i) u[static_cast<std::size_t>(i - 1)] = k.carrier_v * std::cos(2.0 * k_pi * i / n);
            const double tau = net.output_time_constant_s();
            const auto settle = static_cast<std::size_t>(std::ceil(15.0 * tau * fc));
            for (std::size_t c = 0; c < settle; ++c) ig.advance(u);
            ig.advance(u);
            return ig.output_mean_v();
        };
        const double v = level_at(choice.steps_per_cycle);
        const double v_fine = level_at(8 * choice.steps_per_cycle);
        const double err = std::fabs(v / v_fine - 1.0);
        MESSAGE(fmt::format("{}: N = {}, estimated {:.2e}, actual {:.2e} (level {:.6f} V)", k.name, choice.steps_per_cycle,
                            choice.estimated_error, err, v_fine));
        CHECK(err <= 3.0 * tol);
    }
}
