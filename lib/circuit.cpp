#include "galena/circuit.hpp"

#include "galena/error.hpp"

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
    m_node_c = p.load.filter_capacitance_f + p.load.stray_capacitance_f;
    m_node_g = conductance_s(p.load.bleeder_ohm);
    m_ear_states = 0;
    switch (p.earpiece.kind) {
    case earpiece_kind::piezo:
        m_node_c += p.earpiece.capacitance_f;
        m_node_g += conductance_s(p.earpiece.leakage_ohm);
        if (p.earpiece.has_motional_branch()) m_ear_states = 2;
        break;
    case earpiece_kind::magnetic: m_ear_states = 1; break;
    case earpiece_kind::resistor: m_node_g += 1.0 / p.earpiece.resistance_ohm; break;
    }
    if (!(m_node_c > 0.0))
        throw config_error("load.stray_capacitance_f = 0: the output node needs some capacitance (filter, earpiece or stray) > 0 F");
    if (m_diode.has_capacitance() && !(m_series_ohm > 0.0))
        throw config_error("source.resistance_ohm + diode.series_resistance_ohm = 0: a junction capacitance needs a series resistance > 0 ohm");
}

double detector_network::dc_load_ohm() const noexcept
{
    double g = m_node_g;
    if (m_params.earpiece.kind == earpiece_kind::magnetic) g += 1.0 / m_params.earpiece.resistance_ohm;
    return g > 0.0 ? 1.0 / g : std::numeric_limits<double>::infinity();
}

double detector_network::output_time_constant_s() const noexcept
{
    const double r = dc_load_ohm();
    return r * m_node_c;
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
    one_junction_network<Dim> n;
    n.series_ohm = net.series_ohm();
    n.junction = net.diode().law();
    const double inv_cb = 1.0 / net.node_capacitance_f();
    n.c[0] = 1.0;
    n.b[0] = inv_cb;
    n.a(0, 0) = -(1.0 / n.series_ohm + net.node_conductance_s()) * inv_cb;
    const auto& e = net.params().earpiece;
    if constexpr (Dim == 3) {
        // Butterworth-Van Dyke motional branch: y = [v_b, i_m, v_cm].
        n.a(0, 1) = -inv_cb;
        n.a(1, 0) = 1.0 / e.motional_inductance_h;
        n.a(1, 1) = -e.motional_resistance_ohm / e.motional_inductance_h;
        n.a(1, 2) = -1.0 / e.motional_inductance_h;
        n.a(2, 1) = 1.0 / e.motional_capacitance_f;
    } else if constexpr (Dim == 2) {
        // Magnetic phones: y = [v_b, i_L]; R_dc in series with L || R_loss.
        const double gp = conductance_s(e.loss_resistance_ohm);
        const double k = 1.0 / (1.0 + e.resistance_ohm * gp);
        n.a(0, 0) -= gp * k * inv_cb;
        n.a(0, 1) = -(1.0 - gp * e.resistance_ohm * k) * inv_cb;
        n.a(1, 0) = k / e.inductance_h;
        n.a(1, 1) = -e.resistance_ohm * k / e.inductance_h;
    }
    return n;
}

template struct one_junction_network<1>;
template struct one_junction_network<2>;
template struct one_junction_network<3>;
template one_junction_network<1> make_one_junction_network<1>(const detector_network&);
template one_junction_network<2> make_one_junction_network<2>(const detector_network&);
template one_junction_network<3> make_one_junction_network<3>(const detector_network&);

} // namespace galena
