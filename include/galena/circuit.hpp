/// The detector stage on the bench, as one network built from components (see detector_network):
///
///   AM source --R_src--+--R_s--[junction: Shockley || R_leak || Cj(v)]--+-- output node b
///                                                                       |
///                                                   load and earpiece (stamp_load, front_end.cpp)
///
/// R_src and R_s are in series with nothing between them, so they are lumped into R = R_src + R_s.
/// With Cj0 > 0 the junction voltage is a state; with Cj0 = 0 it is algebraic and is solved by a
/// safeguarded scalar Newton inside each evaluation (the branch current i(u) with u = v_s - v_b).
/// The load's states (the output node, a BVD motional branch, a magnetic phone's coil current, or whatever
/// an added earpiece stamps) come from the assembled network: no earpiece is written out here.
#pragma once

#include "galena/components.hpp"
#include "galena/error.hpp"
#include "galena/network.hpp"
#include "galena/signal.hpp"

#include <Eigen/Core>
#include <complex>
#include <utility>
#include <cmath>
#include <limits>
#include <string>

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

/// The bench detector as one network: a generator u behind R = R_src + R_s, the junction port, and the load
/// and earpiece stamped by stamp_load (front_end.cpp) at the output node. Everything the bench path needs
/// (the phase-locked path's (A, b, c), the adaptive path's equations, the DC load, Y(jw), time constants)
/// derives from its assembled state space. Built once per render.
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
    /// Conductance from the output node to ground with the load's other states held, S: -A_load(0,0) C_node
    /// (bleeder, earpiece leakage or resistor; the part of a load's current that follows v_b at once).
    [[nodiscard]] double node_conductance_s() const noexcept { return m_node_g; }
    /// Number of load states besides the output node's voltage (earpiece branch states: 0, 1 or 2 today).
    [[nodiscard]] int earpiece_states() const noexcept { return static_cast<int>(m_load_a.rows()) - 1; }
    /// DC resistance from the output node to ground (earpiece and bleeder), ohm; inf when none.
    [[nodiscard]] double dc_load_ohm() const noexcept { return m_dc_load_ohm; }
    /// Slowest linear time constant at the output node, C_node / G_dc, s (inf without a DC path).
    [[nodiscard]] double output_time_constant_s() const noexcept;
    /// Admittance of the load and earpiece at the output node at f_hz, junction open, S (node capacitance
    /// included).
    [[nodiscard]] std::complex<double> load_admittance_s(double f_hz) const;

    /// The load alone: dy/dt = A_load y + b j for a current j injected at the output node, v_b = c^T y
    /// (y[0] is v_b). 1/s, 1/F (and so on for current states), dimensionless.
    [[nodiscard]] const Eigen::MatrixXd& load_a() const noexcept { return m_load_a; }
    [[nodiscard]] const Eigen::VectorXd& load_b() const noexcept { return m_load_b; }
    [[nodiscard]] const Eigen::VectorXd& load_c() const noexcept { return m_load_c; }
    /// Per-state multiplier of an absolute tolerance in volts: 1 for voltages; 1 / (w_a L + R) for an
    /// inductor current (L its self-inductance, R = -A_ii L its loss, w_a = 1e4 rad/s an audio frequency).
    [[nodiscard]] const Eigen::VectorXd& state_tolerance_scale() const noexcept { return m_scale; }
    /// The assembled network (states, basis, charges).
    [[nodiscard]] const state_space& assembled() const noexcept { return m_ss; }

private:
    circuit_params m_params;
    diode_model m_diode;
    network m_net;
    node_id m_out = 0;
    state_space m_ss;
    Eigen::MatrixXd m_load_a;
    Eigen::VectorXd m_load_b, m_load_c, m_scale;
    double m_series_ohm;
    double m_node_c;
    double m_node_g = 0.0;
    double m_dc_load_ohm = 0.0;
};

/// State equations for one topology, for any stepper that takes `rhs` and `rhs_jacobian`, written once
/// for every load: the load's (A_load, b, c) come from the assembled network.
/// State layout: [v_j (if JunctionCap)], y = [v_b, the load's other states]. Volts and amperes.
template <bool JunctionCap, int EarStates>
class detector_equations {
public:
    static constexpr int junction_states = JunctionCap ? 1 : 0;
    static constexpr int load_dim = 1 + EarStates;
    static constexpr int dim = junction_states + load_dim;
    /// Index of the output (earpiece) voltage in the state vector.
    static constexpr int output_index = junction_states;
    using vec = Eigen::Matrix<double, dim, 1>;
    using mat = Eigen::Matrix<double, dim, dim>;
    using load_vec = Eigen::Matrix<double, load_dim, 1>;
    using load_mat = Eigen::Matrix<double, load_dim, load_dim>;

    detector_equations(const detector_network& net, const am_source& src) : m_net(&net), m_src(&src)
    {
        m_inv_r = net.series_ohm() > 0.0 ? 1.0 / net.series_ohm() : 0.0;
        m_a = net.load_a();
        m_b = net.load_b();
        m_c = net.load_c();
        m_scale.template tail<load_dim>() = net.state_tolerance_scale();
        if constexpr (JunctionCap) m_scale[0] = 1.0;
    }

    /// Absolute-tolerance scale of each state relative to a tolerance in volts (currents: 1/impedance).
    [[nodiscard]] vec tolerance_scale() const { return m_scale; }

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
        const double vb = m_c.dot(x.template tail<load_dim>());
        if constexpr (JunctionCap) return (vs - x[0] - vb) * m_inv_r;
        else return branch(vs - vb).current_a;
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
        const load_vec y = x.template tail<load_dim>();
        const double vb = m_c.dot(y);
        // The load: dy/dt = A_load y + b i_s, with i_s the series (diode) current into the output node.
        double is = 0.0;
        if constexpr (JunctionCap) {
            const diode_model& d = m_net->diode();
            const double vj = x[0];
            is = (vs - vj - vb) * m_inv_r;
            const junction_point jp = d.junction(vj);
            const auto [c, dc] = d.capacitance_and_slope(vj);
            const double inv_c = 1.0 / c;
            f[0] = (is - jp.current_a) * inv_c;
            if constexpr (WithJacobian) {
                j.setZero();
                j(0, 0) = (-m_inv_r - jp.conductance_s) * inv_c - f[0] * dc * inv_c;
                j.template block<1, load_dim>(0, 1) = (-m_inv_r * inv_c) * m_c.transpose();
                j.template block<load_dim, 1>(1, 0) = -m_inv_r * m_b;
                j.template block<load_dim, load_dim>(1, 1) = m_a - m_inv_r * m_b * m_c.transpose();
            }
        } else {
            const junction_point br = branch(vs - vb);
            is = br.current_a;
            if constexpr (WithJacobian) j = m_a - br.conductance_s * m_b * m_c.transpose();
        }
        f.template tail<load_dim>() = m_a * y + m_b * is;
    }

    const detector_network* m_net;
    const am_source* m_src;
    double m_inv_r = 0.0;
    load_mat m_a;
    load_vec m_b, m_c;
    vec m_scale = vec::Ones();
    mutable double m_vj_guess = 0.0;
    mutable double m_cached_t = std::numeric_limits<double>::quiet_NaN();
    mutable double m_cached_vs = 0.0;
};

/// The message for a load with more states than the bench path's fixed-size dispatch holds (0 to 2 besides
/// the output node; add a case to with_equations and with_one_junction_network for more).
[[nodiscard]] std::string unsupported_load_states(int extra_states);

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
    case 0:
        if (cj) return fn(detector_equations<true, 0>(net, src));
        return fn(detector_equations<false, 0>(net, src));
    default: throw config_error(unsupported_load_states(net.earpiece_states()));
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
    case 0: return fn(make_one_junction_network<1>(net));
    default: throw config_error(unsupported_load_states(net.earpiece_states()));
    }
}

} // namespace galena
