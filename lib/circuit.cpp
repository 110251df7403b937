#include "galena/circuit.hpp"

#include "galena/error.hpp"

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

} // namespace galena
