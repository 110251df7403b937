/// State equations and analytic Jacobians of the detector stage:
///
///   AM source --R_src--+--R_s--[junction: Shockley || R_leak || Cj(v)]--+-- output node b
///                                                                       |
///                          C_filter + C_stray + C_0  ||  R_bleeder || R_leak,ear  ||  earpiece branch
///
/// R_src and R_s are in series with nothing between them, so they are lumped into R = R_src + R_s.
/// With Cj0 > 0 the junction voltage is a state; with Cj0 = 0 it is algebraic and is solved by a
/// safeguarded scalar Newton inside each evaluation (the branch current i(u) with u = v_s - v_b).
/// Earpiece branch states: Butterworth-Van Dyke motional branch (i_m through L_m, v on C_m), or the
/// magnetic phone's inductor current i_L. Every other element is linear and folded into the output node.
#pragma once

#include "galena/components.hpp"
#include "galena/signal.hpp"

#include <Eigen/Core>
#include <utility>
#include <cmath>
#include <limits>

namespace galena {

/// A linear network fed through a series resistance and one nonlinear junction by a source u(t):
///
///   dq(v)/dt = (u - v - c^T y) / R - i(v)          (no junction charge: 0 = (u - v - c^T y) / R - i(v))
///   dy/dt    = A y + b (u - v) / R
///
/// v is the junction voltage, V; y holds the network's Dim states (volts on capacitors, amperes in
/// inductors); c^T y is the voltage at the junction's far end (the output node). A already contains the
/// series path's own term -b c^T / R. q and i come from the junction law.
template <int Dim>
struct one_junction_network {
    using vec = Eigen::Matrix<double, Dim, 1>;
    using mat = Eigen::Matrix<double, Dim, Dim>;
    double series_ohm = 0.0;   ///< R, ohm; > 0
    junction_law junction;     ///< i(v), q(v) and their slopes
    mat a = mat::Zero();       ///< A, 1/s (for current states: ohm/H and so on)
    vec b = vec::Zero();       ///< b: the series current (u - v)/R enters dy/dt as b times it; 1/F for a node
    vec c = vec::Zero();       ///< the output (far-end) voltage is c^T y

    /// DC conductance from the output node to ground through the network with the series path removed,
    /// S; 0 when the network has no DC path (a capacitor-only load).
    [[nodiscard]] double dc_load_conductance_s() const;
};

/// All circuit parameters of one variant.
struct circuit_params {
    source_params source;
    diode_params diode;
    load_params load;
    earpiece_params earpiece;
};

/// Derived constants of the network, validated. Built once per render.
class detector_network {
public:
    /// Validates every part and the topology (throws config_error): total output-node capacitance must
    /// be > 0, and a junction capacitance needs a series resistance R_src + R_s > 0.
    explicit detector_network(const circuit_params& p);

    [[nodiscard]] const circuit_params& params() const noexcept { return m_params; }
    [[nodiscard]] const diode_model& diode() const noexcept { return m_diode; }
    /// R = R_src + R_s, ohm.
    [[nodiscard]] double series_ohm() const noexcept { return m_series_ohm; }
    /// Total capacitance at the output node, F.
    [[nodiscard]] double node_capacitance_f() const noexcept { return m_node_c; }
    /// Total linear conductance from the output node to ground, S (bleeder, earpiece leakage or resistor).
    [[nodiscard]] double node_conductance_s() const noexcept { return m_node_g; }
    /// Number of earpiece branch states: 0, 1 (magnetic) or 2 (BVD).
    [[nodiscard]] int earpiece_states() const noexcept { return m_ear_states; }
    /// DC resistance from the output node to ground (earpiece and bleeder), ohm; inf when none.
    [[nodiscard]] double dc_load_ohm() const noexcept;
    /// Slowest linear time constant at the output node, C_node / G_dc, s (inf without a DC path).
    [[nodiscard]] double output_time_constant_s() const noexcept;

private:
    circuit_params m_params;
    diode_model m_diode;
    double m_series_ohm;
    double m_node_c;
    double m_node_g;
    int m_ear_states;
};

/// State equations for one topology, for any stepper that takes `rhs` and `rhs_jacobian`.
/// State layout: [v_j (if JunctionCap)], v_b, [earpiece states]. Volts and amperes.
template <bool JunctionCap, int EarStates>
class detector_equations {
public:
    static constexpr int junction_states = JunctionCap ? 1 : 0;
    static constexpr int dim = junction_states + 1 + EarStates;
    /// Index of the output (earpiece) voltage in the state vector.
    static constexpr int output_index = junction_states;
    using vec = Eigen::Matrix<double, dim, 1>;
    using mat = Eigen::Matrix<double, dim, dim>;

    detector_equations(const detector_network& net, const am_source& src) : m_net(&net), m_src(&src)
    {
        const auto& e = net.params().earpiece;
        m_inv_r = net.series_ohm() > 0.0 ? 1.0 / net.series_ohm() : 0.0;
        m_inv_cb = 1.0 / net.node_capacitance_f();
        m_gb = net.node_conductance_s();
        if constexpr (EarStates == 2) {
            m_rm = e.motional_resistance_ohm;
            m_inv_lm = 1.0 / e.motional_inductance_h;
            m_inv_cm = 1.0 / e.motional_capacitance_f;
        } else if constexpr (EarStates == 1) {
            const double gp = conductance_s(e.loss_resistance_ohm);
            m_rdc = e.resistance_ohm;
            m_mag_k = 1.0 / (1.0 + m_rdc * gp);
            m_mag_gp = gp;
            m_inv_l = 1.0 / e.inductance_h;
        }
    }

    /// Absolute-tolerance scale of each state relative to a tolerance in volts (currents: 1/impedance).
    [[nodiscard]] vec tolerance_scale() const
    {
        vec s = vec::Ones();
        const auto& e = m_net->params().earpiece;
        if constexpr (EarStates == 2) s[output_index + 1] = 1.0 / std::sqrt(e.motional_inductance_h / e.motional_capacitance_f);
        if constexpr (EarStates == 1) s[output_index + 1] = 1.0 / (e.resistance_ohm + e.inductance_h * 1e4);
        return s;
    }

    /// dx/dt at time t_s.
    void rhs(const vec& x, double t_s, vec& f) const
    {
        mat unused;
        eval<false>(x, t_s, f, unused);
    }
    /// dx/dt and its Jacobian d(dx/dt)/dx at time t_s.
    void rhs_jacobian(const vec& x, double t_s, vec& f, mat& j) const { eval<true>(x, t_s, f, j); }

    /// Diode current, A, flowing from the source into the output node, for state x at time t_s.
    [[nodiscard]] double diode_current_a(const vec& x, double t_s) const
    {
        const double vs = m_src->voltage(t_s);
        if constexpr (JunctionCap) return (vs - x[0] - x[output_index]) * m_inv_r;
        else return branch(vs - x[output_index]).current_a;
    }

    [[nodiscard]] const am_source& source() const noexcept { return *m_src; }
    [[nodiscard]] const detector_network& network() const noexcept { return *m_net; }

private:
    /// Series branch R + junction without capacitance: current and di/du for applied voltage u.
    [[nodiscard]] junction_point branch(double u) const
    {
        const diode_model& d = m_net->diode();
        if (m_inv_r == 0.0) return d.junction(u);
        const double r = m_net->series_ohm();
        // Solve F(v) = I(v) - (u - v)/R = 0; F is strictly increasing, so Newton from a warm start with a
        // bisection fallback inside a sign-checked bracket always converges.
        double v = m_vj_guess;
        double lo = std::min(u, 0.0) - 1.0;
        double hi = std::max(u, 0.0) + 1.0;
        junction_point jp{};
        for (int it = 0; it < 100; ++it) {
            jp = d.junction(v);
            const double fv = jp.current_a - (u - v) * m_inv_r;
            if (fv > 0.0) hi = std::min(hi, v);
            else lo = std::max(lo, v);
            const double dv = fv / (jp.conductance_s + m_inv_r);
            double vn = v - dv;
            if (!(vn > lo && vn < hi)) vn = 0.5 * (lo + hi);
            const bool done = std::fabs(vn - v) <= 1e-14 + 1e-12 * std::fabs(v);
            v = vn;
            if (done) break;
        }
        jp = d.junction(v);
        m_vj_guess = v;
        const double g = jp.conductance_s;
        return {(u - v) * m_inv_r, g / (1.0 + r * g)};
    }

    /// Source voltage with a one-entry cache: Newton iterations revisit the same stage time.
    [[nodiscard]] double source_v(double t) const noexcept
    {
        if (t != m_cached_t) {
            m_cached_t = t;
            m_cached_vs = m_src->voltage(t);
        }
        return m_cached_vs;
    }

    template <bool WithJacobian>
    void eval(const vec& x, double t, vec& f, mat& j) const
    {
        const double vs = source_v(t);
        const double vb = x[output_index];
        double i_ear = 0.0;
        double di_ear_dvb = 0.0;
        if constexpr (WithJacobian) j.setZero();
        if constexpr (EarStates == 2) {
            const double im = x[output_index + 1];
            const double vcm = x[output_index + 2];
            i_ear = im;
            f[output_index + 1] = (vb - m_rm * im - vcm) * m_inv_lm;
            f[output_index + 2] = im * m_inv_cm;
            if constexpr (WithJacobian) {
                j(output_index + 1, output_index) = m_inv_lm;
                j(output_index + 1, output_index + 1) = -m_rm * m_inv_lm;
                j(output_index + 1, output_index + 2) = -m_inv_lm;
                j(output_index + 2, output_index + 1) = m_inv_cm;
                j(output_index, output_index + 1) = -m_inv_cb;
            }
        } else if constexpr (EarStates == 1) {
            const double il = x[output_index + 1];
            const double vl = (vb - m_rdc * il) * m_mag_k;
            i_ear = il + m_mag_gp * vl;
            di_ear_dvb = m_mag_gp * m_mag_k;
            f[output_index + 1] = vl * m_inv_l;
            if constexpr (WithJacobian) {
                j(output_index + 1, output_index) = m_mag_k * m_inv_l;
                j(output_index + 1, output_index + 1) = -m_rdc * m_mag_k * m_inv_l;
                j(output_index, output_index + 1) = -m_mag_k * m_inv_cb;
            }
        }
        if constexpr (JunctionCap) {
            const diode_model& d = m_net->diode();
            const double vj = x[0];
            const double is = (vs - vj - vb) * m_inv_r;
            const junction_point jp = d.junction(vj);
            const auto [c, dc] = d.capacitance_and_slope(vj);
            const double inv_c = 1.0 / c;
            f[0] = (is - jp.current_a) * inv_c;
            f[output_index] = (is - m_gb * vb - i_ear) * m_inv_cb;
            if constexpr (WithJacobian) {
                j(0, 0) = (-m_inv_r - jp.conductance_s) * inv_c - f[0] * dc * inv_c;
                j(0, output_index) = -m_inv_r * inv_c;
                j(output_index, 0) = -m_inv_r * m_inv_cb;
                j(output_index, output_index) = (-m_inv_r - m_gb - di_ear_dvb) * m_inv_cb;
            }
        } else {
            (void)0;
            const junction_point b = branch(vs - vb);
            f[output_index] = (b.current_a - m_gb * vb - i_ear) * m_inv_cb;
            if constexpr (WithJacobian) j(output_index, output_index) = (-b.conductance_s - m_gb - di_ear_dvb) * m_inv_cb;
        }
    }

    const detector_network* m_net;
    const am_source* m_src;
    double m_inv_r = 0.0;
    double m_inv_cb = 0.0;
    double m_gb = 0.0;
    double m_rm = 0.0, m_inv_lm = 0.0, m_inv_cm = 0.0;
    double m_rdc = 0.0, m_mag_k = 1.0, m_mag_gp = 0.0, m_inv_l = 0.0;
    mutable double m_vj_guess = 0.0;
    mutable double m_cached_t = std::numeric_limits<double>::quiet_NaN();
    mutable double m_cached_vs = 0.0;
};

/// Calls fn(equations) with the detector_equations instance matching the network's topology.
template <class Fn>
decltype(auto) with_equations(const detector_network& net, const am_source& src, Fn&& fn)
{
    const bool cj = net.diode().has_capacitance();
    switch (net.earpiece_states()) {
    case 2:
        if (cj) return fn(detector_equations<true, 2>(net, src));
        return fn(detector_equations<false, 2>(net, src));
    case 1:
        if (cj) return fn(detector_equations<true, 1>(net, src));
        return fn(detector_equations<false, 1>(net, src));
    default:
        if (cj) return fn(detector_equations<true, 0>(net, src));
        return fn(detector_equations<false, 0>(net, src));
    }
}

} // namespace galena

namespace galena {

/// The detector as a one_junction_network (the phase-locked integrator's form): y = [v_b, earpiece
/// states], R = R_src + R_s. Dim must be 1 + net.earpiece_states(). Throws config_error when R = 0 (the
/// junction then sits directly across the source: use the adaptive method).
template <int Dim>
[[nodiscard]] one_junction_network<Dim> make_one_junction_network(const detector_network& net);

/// Calls fn(network) with the detector's one_junction_network of the matching dimension.
template <class Fn>
decltype(auto) with_one_junction_network(const detector_network& net, Fn&& fn)
{
    switch (net.earpiece_states()) {
    case 2: return fn(make_one_junction_network<3>(net));
    case 1: return fn(make_one_junction_network<2>(net));
    default: return fn(make_one_junction_network<1>(net));
    }
}

} // namespace galena
