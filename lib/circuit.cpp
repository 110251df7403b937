#include "galena/circuit.hpp"

#include "galena/error.hpp"
#include "galena/front_end.hpp"

#include <fmt/format.h>

#include <Eigen/LU>
#include <cmath>
#include <limits>

namespace galena {

detector_network::detector_network(const circuit_params& p) : m_params(p), m_diode(p.diode)
{
    p.source.validate();
    p.load.validate();
    p.earpiece.validate();
    m_series_ohm = p.source.resistance_ohm + p.diode.series_resistance_ohm;
    // The bench as one network: generator, R = R_src + R_s, the junction port (its whole charge stays
    // nonlinear here), and the load and earpiece as stamp_load writes them for every layout.
    const node_id gen = m_net.add_node("generator");
    m_net.add_voltage_source(gen, ground_node);
    node_id anode = gen;
    if (m_series_ohm > 0.0) {
        anode = m_net.add_node("junction");
        m_net.add_resistor(gen, anode, m_series_ohm);
    }
    m_out = m_net.add_node("earpiece");
    m_net.set_junction(anode, m_out, 0.0);
    stamp_load(m_net, m_out, p.load, p.earpiece);
    m_node_c = m_net.node_capacitance_f(m_out);
    if (!(m_node_c > 0.0))
        throw config_error("load.stray_capacitance_f = 0: the output node needs some capacitance (filter, earpiece or stray) > 0 F");
    if (m_diode.has_capacitance() && !(m_series_ohm > 0.0))
        throw config_error("source.resistance_ohm + diode.series_resistance_ohm = 0: a junction capacitance needs a series resistance > 0 ohm");
    m_ss = m_net.assemble();
    // The port is v = u - R j - c^T y, and the generator reaches the load only through the junction: the
    // load is dy/dt = A y + b_j j with v_b = -c_p y.
    const int n = m_ss.states();
    if (n < 1 || std::abs(m_ss.port_d[0] - 1.0) > 1e-12 || m_ss.b.cwiseAbs().maxCoeff() != 0.0 || std::abs(m_ss.port_c[0] + 1.0) > 1e-12)
        throw config_error("the bench detector's network is not a load fed through the junction alone (the earpiece's stamps "
                           "must connect only the output node and their own nodes)");
    m_load_a = m_ss.a;
    m_load_b = m_ss.bj;
    m_load_c = -m_ss.port_c.transpose();
    m_node_g = -m_load_a(0, 0) * m_node_c;
    // DC: -c^T A^-1 b is the resistance the load shows to an injected current (none without a DC path).
    const Eigen::FullPivLU<Eigen::MatrixXd> lu(m_load_a);
    const double z_dc = lu.isInvertible() ? -m_load_c.dot(lu.solve(m_load_b)) : 0.0;
    m_dc_load_ohm = (z_dc > 0.0 && std::isfinite(z_dc)) ? z_dc : std::numeric_limits<double>::infinity();
    // Tolerance scales: inductor currents (MNA rows after the node voltages) per volt at an audio frequency.
    constexpr double audio_w_rad_per_s = 1e4;
    const Eigen::MatrixXd e11 = m_ss.basis.transpose() * m_ss.charge;
    m_scale = Eigen::VectorXd::Ones(n);
    for (int k = 0; k < n; ++k) {
        Eigen::Index row = 0;
        m_ss.basis.col(k).cwiseAbs().maxCoeff(&row);
        if (row >= m_net.nodes() && row < m_net.nodes() + m_net.inductors()) {
            const double l_h = e11(k, k);
            m_scale[k] = 1.0 / (audio_w_rad_per_s * l_h - m_load_a(k, k) * l_h);
        }
    }
}

double detector_network::output_time_constant_s() const noexcept
{
    return m_dc_load_ohm * m_node_c;
}

std::complex<double> detector_network::load_admittance_s(double f_hz) const
{
    return 1.0 / m_net.impedance(m_out, ground_node, f_hz, 0.0);
}

std::string unsupported_load_states(int extra_states)
{
    return fmt::format("an earpiece and load with {} states besides the output node: the bench path handles 0 to 2", extra_states);
}

template <int Dim>
double one_junction_network<Dim>::dc_load_conductance_s() const
{
    // Remove the series path's -b c^T / R from A; the DC response of the rest to an injected current I is
    // A_load y = -b I, so V = c^T y = -c^T A_load^-1 b I.
    const mat a_load = a + b * c.transpose() / series_ohm;
    const Eigen::FullPivLU<mat> lu(a_load);
    if (!lu.isInvertible()) return 0.0;
    const double z = -c.dot(lu.solve(b));
    return (z > 0.0 && std::isfinite(z)) ? 1.0 / z : 0.0;
}

template <int Dim>
one_junction_network<Dim> make_one_junction_network(const detector_network& net)
{
    if (Dim != 1 + net.earpiece_states())
        throw config_error(fmt::format("make_one_junction_network: dimension {} for an earpiece with {} states", Dim,
                                       net.earpiece_states()));
    if (!(net.series_ohm() > 0.0))
        throw config_error("source.resistance_ohm + diode.series_resistance_ohm = 0: the phase-locked solver needs a series "
                           "resistance > 0 ohm (set solver.method = \"adaptive\")");
    // From the assembled network: the load's (A_load, b, c), with the series path's -b c^T / R folded into A.
    one_junction_network<Dim> n;
    n.series_ohm = net.series_ohm();
    n.junction = net.diode().law();
    n.b = net.load_b();
    n.c = net.load_c();
    n.a = net.load_a() - n.b * n.c.transpose() / n.series_ohm;
    return n;
}

template struct one_junction_network<1>;
template struct one_junction_network<2>;
template struct one_junction_network<3>;
template one_junction_network<1> make_one_junction_network<1>(const detector_network&);
template one_junction_network<2> make_one_junction_network<2>(const detector_network&);
template one_junction_network<3> make_one_junction_network<3>(const detector_network&);

} // namespace galena
