/// One linear network assembled from components by modified nodal analysis (MNA), with the diode junction
/// as its one nonlinear port; the state-space form, Y(jw), transfer functions, the DC load and the time
/// constants all derive from this one description.
#pragma once

#include <Eigen/Core>
#include <complex>
#include <string>
#include <vector>

namespace galena {

/// A node of a network; 0 is ground.
using node_id = int;
inline constexpr node_id ground_node = 0;

/// State-space form of a network with its inputs (ideal voltage sources) and its junction port:
///
///   dx/dt = A x + B u + b_j j          (x: the states; u: source voltages, V; j: junction current, A)
///   v     = C x + D u + d_j j          (v: every node voltage, V; row k - 1 is node k)
///   v_port = c_p x + d_p u + d_pj j    (anode minus cathode voltage of the junction port, V)
///
/// j flows through the junction from its anode to its cathode (out of the network at the anode, back in at
/// the cathode). The states are capacitive node voltages (V; scaled combinations where capacitors connect
/// nodes to each other, see network::assemble) and inductor currents (A).
struct state_space {
    Eigen::MatrixXd a;        ///< A, 1/s
    Eigen::MatrixXd b;        ///< B, one column per source
    Eigen::VectorXd bj;       ///< b_j
    Eigen::MatrixXd c;        ///< C: node voltages from the states
    Eigen::MatrixXd d;        ///< D
    Eigen::VectorXd dj;       ///< d_j, ohm
    Eigen::RowVectorXd port_c; ///< c_p
    Eigen::RowVectorXd port_d; ///< d_p
    double port_dj = 0.0;     ///< d_pj, ohm (<= 0 for a passive network: minus the resistance seen at the port)
    /// Capacitance the network itself places across the port, F (the linear part of the junction's charge
    /// that network::set_junction was given); the integrator adds only q(v) - C_lin v as nonlinear charge.
    double port_linear_capacitance_f = 0.0;
    /// T_d: the MNA unknowns (node voltages, inductor currents, source currents) per unit of each state.
    Eigen::MatrixXd basis;
    /// E T_d: the charge (C) on each node's capacitors and the flux (Wb) of each inductor per unit of each
    /// state (source rows zero). basis^T charge is the states' capacitance and inductance matrix E11.
    Eigen::MatrixXd charge;

    [[nodiscard]] int states() const noexcept { return static_cast<int>(a.rows()); }
    /// Row of C (with D and d_j) for node n; node 0 (ground) is all zeros.
    [[nodiscard]] Eigen::RowVectorXd node_c(node_id n) const;
    [[nodiscard]] Eigen::RowVectorXd node_d(node_id n) const;
    [[nodiscard]] double node_dj(node_id n) const;
};

/// A linear network built by components that stamp themselves into MNA matrices
///   E dz/dt + G z = B u + P j,  z = [node voltages; inductor currents; source currents].
/// Built once, then assembled. Not for large circuits: the dense algebra suits a few dozen unknowns.
class network {
public:
    /// Adds a node; returns its id (>= 1). The name is used in messages.
    node_id add_node(std::string name);
    /// Resistance between a and b, ohm; (0, inf]; inf adds nothing. Throws config_error otherwise.
    void add_resistor(node_id a, node_id b, double resistance_ohm);
    /// Conductance between a and b, S; >= 0.
    void add_conductance(node_id a, node_id b, double conductance_s);
    /// Capacitance between a and b, F; >= 0 (0 adds nothing).
    void add_capacitor(node_id a, node_id b, double capacitance_f);
    /// Inductor from a to b, H; > 0, with a series loss resistance, ohm; >= 0. Returns the inductor's index
    /// (its current, from a to b, is a state).
    int add_inductor(node_id a, node_id b, double inductance_h, double series_ohm = 0.0);
    /// Mutual inductance M = k sqrt(L1 L2) between two inductors (dot at each one's node a); k in [-1, 1) (|k| < 1).
    void couple(int inductor1, int inductor2, double k);
    /// Ideal voltage source v_a - v_b = u_k; returns its input index k.
    int add_voltage_source(node_id a, node_id b);
    /// Places the junction port from anode to cathode, with `linear_capacitance_f` (F, >= 0) stamped across it
    /// as an ordinary capacitor (the integrator treats only the rest of the junction's charge as nonlinear).
    void set_junction(node_id anode, node_id cathode, double linear_capacitance_f = 0.0);

    [[nodiscard]] int nodes() const noexcept { return static_cast<int>(m_node_names.size()); }
    [[nodiscard]] int inductors() const noexcept { return static_cast<int>(m_inductors.size()); }
    [[nodiscard]] int sources() const noexcept { return m_sources; }
    [[nodiscard]] node_id junction_anode() const noexcept { return m_anode; }
    [[nodiscard]] node_id junction_cathode() const noexcept { return m_cathode; }
    [[nodiscard]] const std::string& node_name(node_id n) const;
    /// Sum of the capacitors with a terminal at node n (to ground or to other nodes), F.
    [[nodiscard]] double node_capacitance_f(node_id n) const;

    /// The state-space form. Nodes without capacitance and source currents are eliminated exactly (Schur
    /// complement of the algebraic block). A node joined only to ground by capacitance keeps its voltage as
    /// a state; nodes joined to each other by capacitors become scaled eigen-combinations of their voltages
    /// (a capacitor in series with a source then leaves only its own voltage as a state).
    /// Throws config_error for a network whose algebraic part is singular (a loop of capacitors and voltage
    /// sources, a cut set of inductors, or a node with no path at all: add a resistance).
    [[nodiscard]] state_space assemble() const;

    /// Node voltages, V, per volt of source `input` at frequency f_hz (>= 0), junction open.
    [[nodiscard]] Eigen::VectorXcd transfer(int input, double f_hz) const;
    /// Impedance between nodes a and b (a unit current in at a, out at b), ohm, sources shorted, junction
    /// port loaded by `port_admittance_s` (S; 0 = open). inf-like values (1e300) when a or b floats.
    [[nodiscard]] std::complex<double> impedance(node_id a, node_id b, double f_hz,
                                                 std::complex<double> port_admittance_s = 0.0) const;
    /// Voltage between nodes a and b per volt of source `input`, with the junction port loaded by
    /// `port_admittance_s`, at f_hz.
    [[nodiscard]] std::complex<double> transfer_to(int input, node_id a, node_id b, double f_hz,
                                                   std::complex<double> port_admittance_s = 0.0) const;
    /// DC resistance between a and b, ohm, sources shorted; +inf when there is no DC path.
    [[nodiscard]] double dc_resistance_ohm(node_id a, node_id b) const;

private:
    struct inductor {
        node_id a, b;
        double l_h, r_ohm;
    };
    struct coupling {
        int l1, l2;
        double k;
    };
    void check_node(node_id n, const char* what) const;
    /// Solves (G + jw E) z = rhs for the full MNA system (+ port admittance); returns z.
    [[nodiscard]] Eigen::VectorXcd solve_ac(double f_hz, const Eigen::VectorXcd& rhs, std::complex<double> port_y) const;
    [[nodiscard]] int size() const noexcept { return nodes() + inductors() + m_sources; }
    void matrices(Eigen::MatrixXd& e, Eigen::MatrixXd& g, Eigen::MatrixXd& bsrc, Eigen::VectorXd& p) const;

    std::vector<std::string> m_node_names;
    struct two_terminal {
        node_id a, b;
        double value;
    };
    std::vector<two_terminal> m_conductances; // S
    std::vector<two_terminal> m_capacitors;   // F
    std::vector<inductor> m_inductors;
    std::vector<coupling> m_couplings;
    std::vector<std::pair<node_id, node_id>> m_source_nodes;
    int m_sources = 0;
    node_id m_anode = -1;
    node_id m_cathode = -1;
    double m_port_c = 0.0;
};

/// The state of network `to` that holds the same node charges and inductor fluxes as state `x` of network
/// `from`: the two are the same circuit with different element values (a tuning capacitor turned), and at
/// the instant of the change every node's charge and every coil's flux is conserved (the current into a
/// capacitor is d(C v)/dt: charge, not voltage, is continuous when C jumps). Solves
/// E11_to x_to = basis_to^T (charge_from x). Throws config_error when the two have different unknowns.
[[nodiscard]] Eigen::VectorXd carry_charge(const state_space& from, const Eigen::VectorXd& x, const state_space& to);

/// Eigenvalues of A turned into time constants -1/Re(lambda), s, slowest first (modes with Re >= 0 skipped).
[[nodiscard]] std::vector<double> time_constants_s(const state_space& ss);

} // namespace galena
