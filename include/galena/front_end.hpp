/// The receiver's components stamped into one network: the antenna (EMF behind its impedance), the tuned
/// circuit in one of four layouts, the diode junction, the output load and the earpiece.
#pragma once

#include "galena/circuit.hpp"
#include "galena/components.hpp"
#include "galena/network.hpp"

#include <string>
#include <string_view>

namespace galena {

/// A wire antenna: EMF = field x effective height behind a series capacitance, inductance and loss resistance.
struct antenna_params {
    /// "standard-dummy" (the dummy antenna of the classic receiver-test standard, from memory: 200 pF and
    /// 20 uH in series, with 400 ohm in series with 400 pF across the 20 uH) or "" (the fields below).
    std::string preset;
    double effective_height_m = 5.0;   ///< EMF per V/m of field, m; (0, 1000]
    double capacitance_f = 200e-12;    ///< series capacitance to ground, F; (0, 1e-6]
    double inductance_h = 0.0;         ///< series inductance, H; [0, 1e-2]
    double resistance_ohm = 25.0;      ///< series loss (ground and wire), ohm; (0, 1e6]

    const antenna_params& validate() const;
};

/// The front-end layouts.
enum class tuner_layout {
    bench,       ///< today's generator behind source.resistance_ohm (no antenna, no tuned circuit)
    untuned,     ///< antenna straight to the detector (a DC return resistance at the antenna terminal)
    single_coil, ///< antenna on a tap of the tuning coil, detector on another tap
    coupled,     ///< antenna coil coupled (k) to the tuning coil, detector on a tap of the tuning coil
};
[[nodiscard]] std::string_view to_string(tuner_layout l) noexcept;
/// Parses bench, untuned, single-coil or coupled; throws config_error otherwise.
[[nodiscard]] tuner_layout parse_tuner_layout(std::string_view s);

/// Coupling coefficient assumed between the sections of a tapped coil (a close-wound solenoid: nearly
/// all flux links every turn). Section i with turns fraction n_i has L_i = s n_i^2 and M_ij = k s n_i n_j,
/// with s chosen so that the whole coil is coil_h. 0.99 is an assumption (common practice for a close-wound
/// single-layer coil is "nearly 1"); k = 1 exactly would make the inductance matrix singular.
inline constexpr double tap_section_coupling = 0.99;

/// Stray capacitance from every tap of the tuning coil to ground, F: the coil's self-capacitance and wiring (an
/// assumed typical figure). It also keeps a tap that carries only coil sections and the junction from being
/// a node without any linear path of its own.
inline constexpr double tap_stray_capacitance_f = 1e-12;

/// Reverse bias, V, at which the junction's depletion capacitance is taken as its linear part (the network holds
/// Cj(-10 V) as an ordinary capacitor; the integrator treats q(v) - Cj(-10 V) v, increasing for v > -10 V, as
/// the nonlinear remainder).
inline constexpr double junction_linear_reverse_v = 10.0;

/// The tuned circuit.
struct tuner_params {
    tuner_layout layout = tuner_layout::bench;
    double coil_h = 240e-6;          ///< tuning coil, H; (0, 1e-1]
    double coil_q = 200.0;           ///< unloaded Q at the tuned frequency (series loss w0 L / Q); [1, 1e5]
    /// Hz, used when capacitance_f is 0: the frequency the loaded set is tuned to. The tuning capacitor is
    /// solved with the antenna (or antenna coil), the tap strays, the diode's series resistance and linear
    /// junction capacitance, the load and the earpiece all connected (the junction's nonlinear part left out):
    /// first so that the tank is in parallel resonance at tuned_hz (the admittance at the top of the tuning
    /// coil is real there), then so that the response peak at the detector lies on tuned_hz (within 1e-8;
    /// the coil's loss had put it about f/(2 Q^2) above). Where that peak is more than 1e-3 away (the two
    /// humps of an over-coupled pair) the parallel resonance stays at tuned_hz. The junction's nonlinear
    /// loading, measured by a render (receiver_figures::tuned_hz), moves the peak a little further. [1e4, 1e8]
    double tuned_hz = 1.0e6;
    double capacitance_f = 0.0;      ///< tuning capacitor, F; 0 = solved from tuned_hz
    double detector_tap = 1.0;       ///< turns fraction of the tuning coil at the detector; (0, 1]
    double antenna_tap = 0.2;        ///< single-coil: turns fraction at the antenna; (0, 1]
    double antenna_coil_h = 20e-6;   ///< coupled: antenna coil, H; (0, 1e-1]
    double antenna_coil_q = 200.0;   ///< coupled: its unloaded Q at the tuned frequency; [1, 1e5]
    double coupling = 0.05;          ///< coupled: k between antenna coil and tuning coil; (0, 0.9]
    double dc_return_ohm = 47e3;     ///< untuned: resistance from the antenna terminal to ground, ohm; (0, inf)

    const tuner_params& validate() const;
    /// capacitance_f, or the bare-coil value 1 / ((2 pi tuned_hz)^2 coil_h), F: the start of the loaded solve
    /// in build_receiver_network (whose receiver_network::tuning_capacitance_f is the capacitor used).
    [[nodiscard]] double tuning_capacitance_f() const noexcept;
    /// The frequency at which coil losses are set (w0 L / Q): tuned_hz, or 1 / (2 pi sqrt(coil_h capacitance_f))
    /// when the capacitor is given, Hz.
    [[nodiscard]] double design_hz() const noexcept;
};

/// Resolves the antenna preset into its fields (the dummy has no single series L and C: see stamp_antenna).
[[nodiscard]] antenna_params resolved(const antenna_params& a);

/// Stamps the load (bleeder, filter, stray) and the earpiece between `out` and ground.
void stamp_load(network& net, node_id out, const load_params& load, const earpiece_params& ear);
/// Stamps the antenna between a new EMF source (returned input index) and `terminal`, with ground as the
/// source's return.
int stamp_antenna(network& net, node_id terminal, const antenna_params& a);

/// The receiver as one network and where its parts are.
struct receiver_network {
    network net;
    int emf_input = 0;            ///< the antenna EMF (or the bench generator) input index
    node_id antenna_node = 0;     ///< the antenna terminal (bench: the generator's node)
    node_id detector_node = 0;    ///< the detector's input (the tap), before the diode's series resistance
    node_id output_node = 0;      ///< the earpiece node
    node_id tank_node = 0;        ///< the top of the tuning coil (the tuning capacitor's node); 0 without a tuned circuit
    double tuning_capacitance_f = 0.0; ///< the tuning capacitor, F (given, or solved from tuned_hz); 0 without a tuned circuit
    double design_hz = 0.0;       ///< frequency at which coil losses are set, Hz; 0 without a tuned circuit
};

/// Builds the network of a whole receiver. The diode's series resistance is a resistor, its depletion
/// capacitance at junction_linear_reverse_v a linear capacitor across the port (the rest of its charge stays
/// nonlinear).
/// With tuner.capacitance_f = 0 the tuning capacitor is solved for the loaded tank (see tuner_params::tuned_hz).
/// Throws config_error for invalid parts, a coupling the coil sections cannot hold (not positive definite), or
/// a tuned_hz the loaded coil cannot reach with a positive capacitance.
[[nodiscard]] receiver_network build_receiver_network(const circuit_params& circuit, const antenna_params& antenna,
                                                      const tuner_params& tuner);

/// The front end's tuning as the detector sees it: the response |v(detector node) / EMF| with the junction
/// replaced by a linear admittance (the detector's effective RF loading, e.g. measured by the RF integrator).
struct rf_tuning {
    double tuned_hz = 0.0;       ///< frequency of the largest response, Hz (NaN without a resonance in range)
    double loaded_q = 0.0;       ///< tuned_hz / rf_bandwidth_hz
    double bandwidth_hz = 0.0;   ///< between the -3 dB points, Hz
    double peak_gain = 0.0;      ///< |v_detector / EMF| at tuned_hz
};
/// Searches [0.6, 1.6] x around_hz for the response peak (a scan, then golden-section refinement) and the
/// -3 dB points (bisection). Fields are NaN when the peak is at the edge of the range (no resonance).
[[nodiscard]] rf_tuning analyse_tuning(const receiver_network& rn, std::complex<double> port_admittance_s, double around_hz);
/// |v_detector / EMF| at f_hz with the junction replaced by `port_admittance_s`.
[[nodiscard]] double detector_gain(const receiver_network& rn, std::complex<double> port_admittance_s, double f_hz);

} // namespace galena
