// Stepper accuracy: convergence order on problems with exact solutions, real error control, and the
// circuit equations in their linear regime against exact solutions (matrix exponential from Eigen).
#include "galena/circuit.hpp"
#include "galena/integrator.hpp"

#include <doctest/doctest.h>
#include <unsupported/Eigen/MatrixFunctions>
#include <cmath>
#include <vector>

using namespace galena;

namespace {

/// Harmonic oscillator x'' = -x: exact x = cos t.
struct oscillator {
    static constexpr int dim = 2;
    using vec = Eigen::Matrix<double, 2, 1>;
    using mat = Eigen::Matrix<double, 2, 2>;
    void rhs(const vec& x, double, vec& f) const { f << x[1], -x[0]; }
    void rhs_jacobian(const vec& x, double t, vec& f, mat& j) const
    {
        rhs(x, t, f);
        j << 0, 1, -1, 0;
    }
    vec tolerance_scale() const { return vec::Ones(); }
};

/// Prothero-Robinson stiff test y' = -lambda (y - cos t) - sin t, exact y = cos t (Hairer & Wanner,
/// Solving ODEs II, sec. IV.15). lambda = 1e6 makes it very stiff.
struct prothero_robinson {
    static constexpr int dim = 1;
    using vec = Eigen::Matrix<double, 1, 1>;
    using mat = Eigen::Matrix<double, 1, 1>;
    double lambda = 1e6;
    void rhs(const vec& x, double t, vec& f) const { f[0] = -lambda * (x[0] - std::cos(t)) - std::sin(t); }
    void rhs_jacobian(const vec& x, double t, vec& f, mat& j) const
    {
        rhs(x, t, f);
        j(0, 0) = -lambda;
    }
    vec tolerance_scale() const { return vec::Ones(); }
};

template <class S>
double fixed_step_error(const S& sys, typename S::vec x0, double h, double t_end, double exact)
{
    step_settings st;
    st.relative_tolerance = 1e-1; // loose: every step is accepted, the step is the bound
    st.absolute_tolerance_v = 1e3;
    st.max_step_s = h;
    st.initial_step_s = h;
    tr_bdf2<S> ig(sys, st);
    ig.initialize(x0, 0.0);
    ig.advance_to(t_end, [](auto&&...) {});
    return std::fabs(ig.state()[0] - exact);
}

} // namespace

TEST_CASE("TR-BDF2 is second order on the harmonic oscillator")
{
    // Exact solution cos(t); error ratio under step halving should approach 2^2 = 4.
    oscillator sys;
    oscillator::vec x0(1.0, 0.0);
    std::vector<double> err;
    for (double h : {0.1, 0.05, 0.025, 0.0125}) err.push_back(fixed_step_error(sys, x0, h, 2.0, std::cos(2.0)));
    for (std::size_t i = 1; i < err.size(); ++i) {
        const double order = std::log2(err[i - 1] / err[i]);
        CHECK(order == doctest::Approx(2.0).epsilon(0.05).scale(0.0));
    }
}

TEST_CASE("TR-BDF2 stays second order and stable on a very stiff problem (L-stability)")
{
    prothero_robinson sys;
    prothero_robinson::vec x0(1.0);
    std::vector<double> err;
    for (double h : {0.1, 0.05, 0.025}) err.push_back(fixed_step_error(sys, x0, h, 1.0, std::cos(1.0)));
    for (double e : err) CHECK(e < 1e-6); // h * lambda up to 1e5: an A-but-not-L-stable method would ring
    // Error shrinks with h (no instability, no order collapse below 1).
    CHECK(err[0] > err[1]);
    CHECK(err[1] > err[2]);
}

TEST_CASE("error control is real: global error follows tolerance proportionality tol^(p/(p+1))")
{
    // With error-per-step control of an order-p method, the step scales as tol^(1/(p+1)) and the global
    // error as tol^(p/(p+1)) (Hairer, Norsett & Wanner, Solving ODEs I, sec. II.4): for p = 2, slope 2/3.
    oscillator sys;
    oscillator::vec x0(1.0, 0.0);
    std::vector<double> errs;
    const std::vector<double> tols{1e-4, 1e-6, 1e-8};
    for (double rtol : tols) {
        step_settings st;
        st.relative_tolerance = rtol;
        st.absolute_tolerance_v = rtol;
        st.max_step_s = 1.0;
        st.initial_step_s = 1e-3;
        tr_bdf2<oscillator> ig(sys, st);
        ig.initialize(x0, 0.0);
        ig.advance_to(10.0, [](auto&&...) {});
        errs.push_back(std::fabs(ig.state()[0] - std::cos(10.0)));
    }
    for (std::size_t i = 1; i < errs.size(); ++i) {
        const double slope = std::log10(errs[i - 1] / errs[i]) / std::log10(tols[i - 1] / tols[i]);
        CHECK(slope == doctest::Approx(2.0 / 3.0).epsilon(0.1).scale(0.0));
    }
}

TEST_CASE("step-size floor raises integration_error naming the simulated time")
{
    // y' = y^2 blows up at t = 1 for y(0) = 1 (exact y = 1/(1-t)): the solver must give up near t = 1.
    struct blowup {
        enum { dim = 1 };
        using vec = Eigen::Matrix<double, 1, 1>;
        using mat = Eigen::Matrix<double, 1, 1>;
        void rhs(const vec& x, double, vec& f) const { f[0] = x[0] * x[0]; }
        void rhs_jacobian(const vec& x, double t, vec& f, mat& j) const
        {
            rhs(x, t, f);
            j(0, 0) = 2.0 * x[0];
        }
        vec tolerance_scale() const { return vec::Ones(); }
    } sys;
    step_settings st;
    st.relative_tolerance = 1e-6;
    st.absolute_tolerance_v = 1e-6;
    st.max_step_s = 0.1;
    st.min_step_s = 1e-12;
    tr_bdf2<blowup> ig(sys, st);
    ig.initialize(blowup::vec(1.0), 0.0);
    try {
        ig.advance_to(2.0, [](auto&&...) {});
        FAIL("expected integration_error");
    } catch (const integration_error& e) {
        CHECK(e.time_s() > 0.9);
        CHECK(e.time_s() < 1.0);
        CHECK(std::string(e.what()).find("t = ") != std::string::npos);
    }
}

namespace {

/// A network whose diode is negligible (Is = 1e-18 A, reverse-biased by the initial charge, so the diode
/// current is ~1e-18 A against microamperes in the linear elements): the output node is then linear.
circuit_params linear_network()
{
    circuit_params c;
    c.source.resistance_ohm = 1e3;
    c.diode.saturation_current_a = 1e-18;
    c.diode.emission_coefficient = 1.0;
    c.diode.junction_capacitance_f = 0.0;
    c.load.stray_capacitance_f = 0.0;
    return c;
}

/// Solves the circuit from x0 with the production stepper and returns the output voltage at t_end.
template <class Eq>
double output_at(const Eq& eq, const typename Eq::vec& x0, double t_end, double max_step)
{
    step_settings st;
    st.relative_tolerance = 1e-6;
    st.absolute_tolerance_v = 1e-9;
    st.max_step_s = max_step;
    st.initial_step_s = max_step * 1e-3;
    tr_bdf2<Eq> ig(eq, st);
    ig.initialize(x0, 0.0);
    ig.advance_to(t_end, [](auto&&...) {});
    return ig.state()[Eq::output_index];
}

} // namespace

TEST_CASE("RC discharge of the earpiece through the bleeder matches V0 exp(-t/RC)")
{
    // Exact solution of C dv/dt = -v/R [textbook first-order RC].
    circuit_params c = linear_network();
    c.earpiece.kind = earpiece_kind::piezo;
    c.earpiece.capacitance_f = 10e-9;
    c.load.bleeder_ohm = 47e3;
    const detector_network net(c);
    tone_modulation none({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_peak_v = 1e-12; // the source is effectively off
    am.modulation_index = 0.0;
    const am_source src(am, &none);
    detector_equations<false, 0> eq(net, src);
    const double tau = 47e3 * 10e-9;
    detector_equations<false, 0>::vec x0;
    x0 << 0.5;
    for (double t : {0.5 * tau, tau, 3.0 * tau}) {
        const double v = output_at(eq, x0, t, tau / 500.0);
        CHECK(v == doctest::Approx(0.5 * std::exp(-t / tau)).epsilon(1e-5).scale(0.0));
    }
}

TEST_CASE("Butterworth-Van Dyke earpiece rings as the exact linear solution (matrix exponential)")
{
    // State x = [v_b, i_m, v_cm]; C0 dv/dt = -v G - i_m; Lm di/dt = v - Rm i - v_cm; Cm dv_cm/dt = i.
    // Reference: x(t) = expm(A t) x0 computed with Eigen's MatrixFunctions (independent of the stepper).
    circuit_params c = linear_network();
    c.earpiece.kind = earpiece_kind::piezo;
    c.earpiece.capacitance_f = 10e-9;
    c.earpiece.leakage_ohm = 1e6;
    c.earpiece.motional_resistance_ohm = 300.0;
    c.earpiece.motional_inductance_h = 0.2;
    c.earpiece.motional_capacitance_f = 5e-9; // series resonance about 5 kHz
    const detector_network net(c);
    tone_modulation none({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_peak_v = 1e-12;
    am.modulation_index = 0.0;
    const am_source src(am, &none);
    detector_equations<false, 2> eq(net, src);
    Eigen::Matrix3d a;
    const double c0 = 10e-9 + c.load.stray_capacitance_f;
    a << -1.0 / (1e6 * c0), -1.0 / c0, 0.0, 1.0 / 0.2, -300.0 / 0.2, -1.0 / 0.2, 0.0, 1.0 / 5e-9, 0.0;
    Eigen::Vector3d x0(0.2, 0.0, 0.0);
    detector_equations<false, 2>::vec xs = x0;
    for (double t : {50e-6, 200e-6, 600e-6}) {
        const Eigen::Vector3d exact = (a * t).exp() * x0;
        const double v = output_at(eq, xs, t, 1e-7);
        CHECK(v == doctest::Approx(exact[0]).epsilon(1e-4).scale(0.2));
    }
}

TEST_CASE("magnetic phones: the output node discharges through R_dc and the lossy inductance exactly")
{
    // x = [v_b, i_L]; C dv/dt = -i_ear, i_ear = (v + Rp i_L)/(Rp + Rdc); L di_L/dt = v_L = (v - Rdc i_L) Rp/(Rp + Rdc).
    circuit_params c = linear_network();
    c.earpiece.kind = earpiece_kind::magnetic;
    c.earpiece.resistance_ohm = 2000.0;
    c.earpiece.inductance_h = 1.5;
    c.earpiece.loss_resistance_ohm = 50e3;
    c.load.filter_capacitance_f = 2e-9;
    const detector_network net(c);
    tone_modulation none({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_peak_v = 1e-12;
    am.modulation_index = 0.0;
    const am_source src(am, &none);
    detector_equations<false, 1> eq(net, src);
    const double rp = 50e3, rdc = 2000.0, l = 1.5, cap = 2e-9;
    Eigen::Matrix2d a;
    a << -1.0 / (cap * (rp + rdc)), -rp / (cap * (rp + rdc)), rp / (l * (rp + rdc)), -rdc * rp / (l * (rp + rdc));
    Eigen::Vector2d x0(0.3, 0.0);
    detector_equations<false, 1>::vec xs = x0;
    for (double t : {20e-6, 100e-6, 400e-6}) {
        const Eigen::Vector2d exact = (a * t).exp() * x0;
        CHECK(output_at(eq, xs, t, 2e-7) == doctest::Approx(exact[0]).epsilon(1e-4).scale(0.3));
    }
}
