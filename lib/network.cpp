#include "galena/network.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <Eigen/Eigenvalues>
#include <Eigen/LU>
#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>

namespace galena {

Eigen::RowVectorXd state_space::node_c(node_id n) const
{
    return n == ground_node ? Eigen::RowVectorXd::Zero(a.cols()) : Eigen::RowVectorXd(c.row(n - 1));
}

Eigen::RowVectorXd state_space::node_d(node_id n) const
{
    return n == ground_node ? Eigen::RowVectorXd::Zero(b.cols()) : Eigen::RowVectorXd(d.row(n - 1));
}

double state_space::node_dj(node_id n) const { return n == ground_node ? 0.0 : dj[n - 1]; }

double network::node_capacitance_f(node_id n) const
{
    check_node(n, "node_capacitance_f");
    double c = 0.0;
    for (const auto& e : m_capacitors)
        if (e.a == n || e.b == n) c += e.value;
    return c;
}

node_id network::add_node(std::string name)
{
    m_node_names.push_back(std::move(name));
    return nodes();
}

const std::string& network::node_name(node_id n) const
{
    static const std::string gnd = "ground";
    return n == ground_node ? gnd : m_node_names.at(static_cast<std::size_t>(n - 1));
}

void network::check_node(node_id n, const char* what) const
{
    if (n < 0 || n > nodes()) throw config_error(fmt::format("network: {} joins node {}, which does not exist", what, n));
}

void network::add_conductance(node_id a, node_id b, double g)
{
    check_node(a, "a conductance");
    check_node(b, "a conductance");
    detail::require_range("network conductance", g, 0.0, std::numeric_limits<double>::max(), "S");
    if (g > 0.0 && a != b) m_conductances.push_back({a, b, g});
}

void network::add_resistor(node_id a, node_id b, double r)
{
    detail::require_above("network resistance", r, 0.0, std::numeric_limits<double>::infinity(), "ohm");
    add_conductance(a, b, std::isinf(r) ? 0.0 : 1.0 / r);
}

void network::add_capacitor(node_id a, node_id b, double c)
{
    check_node(a, "a capacitor");
    check_node(b, "a capacitor");
    detail::require_range("network capacitance", c, 0.0, 1.0, "F");
    if (c > 0.0 && a != b) m_capacitors.push_back({a, b, c});
}

int network::add_inductor(node_id a, node_id b, double l, double r)
{
    check_node(a, "an inductor");
    check_node(b, "an inductor");
    detail::require_above("network inductance", l, 0.0, 1e6, "H");
    detail::require_range("network inductor series resistance", r, 0.0, 1e12, "ohm");
    m_inductors.push_back({a, b, l, r});
    return inductors() - 1;
}

void network::couple(int l1, int l2, double k)
{
    if (l1 < 0 || l2 < 0 || l1 >= inductors() || l2 >= inductors() || l1 == l2)
        throw config_error(fmt::format("network: coupling between inductors {} and {}: must name two different inductors", l1, l2));
    if (!(std::fabs(k) < 1.0))
        throw config_error(fmt::format("network: coupling k = {}: must be in (-1, 1)", detail::format_value(k)));
    m_couplings.push_back({l1, l2, k});
}

int network::add_voltage_source(node_id a, node_id b)
{
    check_node(a, "a voltage source");
    check_node(b, "a voltage source");
    m_source_nodes.emplace_back(a, b);
    return m_sources++;
}

void network::set_junction(node_id anode, node_id cathode, double linear_c)
{
    check_node(anode, "the junction");
    check_node(cathode, "the junction");
    if (anode == cathode) throw config_error("network: the junction's anode and cathode must be different nodes");
    detail::require_range("network junction linear capacitance", linear_c, 0.0, 1.0, "F");
    m_anode = anode;
    m_cathode = cathode;
    m_port_c = linear_c;
}

void network::matrices(Eigen::MatrixXd& e, Eigen::MatrixXd& g, Eigen::MatrixXd& bsrc, Eigen::VectorXd& p) const
{
    const int n = size();
    const int nn = nodes();
    e = Eigen::MatrixXd::Zero(n, n);
    g = Eigen::MatrixXd::Zero(n, n);
    bsrc = Eigen::MatrixXd::Zero(n, m_sources);
    p = Eigen::VectorXd::Zero(n);
    // Two-terminal stamp: +x on both diagonals, -x off the diagonal; ground (0) rows are dropped.
    auto stamp = [](Eigen::MatrixXd& m, node_id a, node_id b, double x) {
        if (a > 0) m(a - 1, a - 1) += x;
        if (b > 0) m(b - 1, b - 1) += x;
        if (a > 0 && b > 0) {
            m(a - 1, b - 1) -= x;
            m(b - 1, a - 1) -= x;
        }
    };
    for (const auto& c : m_conductances) stamp(g, c.a, c.b, c.value);
    for (const auto& c : m_capacitors) stamp(e, c.a, c.b, c.value);
    if (m_anode > 0 || m_cathode > 0) stamp(e, m_anode, m_cathode, m_port_c);
    // Inductor k: KCL +i at a, -i at b; branch row: L di/dt + sum M di'/dt + R i - (v_a - v_b) = 0.
    for (int k = 0; k < inductors(); ++k) {
        const auto& l = m_inductors[static_cast<std::size_t>(k)];
        const int row = nn + k;
        if (l.a > 0) {
            g(l.a - 1, row) += 1.0;
            g(row, l.a - 1) -= 1.0;
        }
        if (l.b > 0) {
            g(l.b - 1, row) -= 1.0;
            g(row, l.b - 1) += 1.0;
        }
        e(row, row) = l.l_h;
        g(row, row) = l.r_ohm;
    }
    for (const auto& c : m_couplings) {
        const double m = c.k * std::sqrt(m_inductors[static_cast<std::size_t>(c.l1)].l_h * m_inductors[static_cast<std::size_t>(c.l2)].l_h);
        e(nn + c.l1, nn + c.l2) += m;
        e(nn + c.l2, nn + c.l1) += m;
    }
    // Voltage source s: current i_s leaves node a into the source; row: v_a - v_b = u_s.
    for (int s = 0; s < m_sources; ++s) {
        const auto [a, b] = m_source_nodes[static_cast<std::size_t>(s)];
        const int row = nn + inductors() + s;
        if (a > 0) {
            g(a - 1, row) += 1.0;
            g(row, a - 1) += 1.0;
        }
        if (b > 0) {
            g(b - 1, row) -= 1.0;
            g(row, b - 1) -= 1.0;
        }
        bsrc(row, s) = 1.0;
    }
    // Junction current j leaves the network at the anode and returns at the cathode.
    if (m_anode > 0) p(m_anode - 1) -= 1.0;
    if (m_cathode > 0) p(m_cathode - 1) += 1.0;
}

state_space network::assemble() const
{
    Eigen::MatrixXd e, g, bsrc;
    Eigen::VectorXd p;
    matrices(e, g, bsrc, p);
    const int n = size();
    const int nn = nodes();
    // Columns of the transformation z = T w: dynamic ones (a capacitive node, a capacitor-connected group's
    // non-null eigen-direction, an inductor current) and algebraic ones (everything else).
    std::vector<Eigen::VectorXd> dyn, alg;
    auto unit = [n](int i) {
        Eigen::VectorXd v = Eigen::VectorXd::Zero(n);
        v[i] = 1.0;
        return v;
    };
    // Groups of nodes joined by capacitors (not through ground).
    std::vector<int> group(static_cast<std::size_t>(nn), -1);
    int groups = 0;
    for (int i = 0; i < nn; ++i) {
        if (group[static_cast<std::size_t>(i)] >= 0 || e(i, i) <= 0.0) continue;
        std::vector<int> stack{i};
        group[static_cast<std::size_t>(i)] = groups;
        while (!stack.empty()) {
            const int k = stack.back();
            stack.pop_back();
            for (int j = 0; j < nn; ++j)
                if (j != k && e(k, j) != 0.0 && group[static_cast<std::size_t>(j)] < 0) {
                    group[static_cast<std::size_t>(j)] = groups;
                    stack.push_back(j);
                }
        }
        ++groups;
    }
    for (int i = 0; i < nn; ++i)
        if (group[static_cast<std::size_t>(i)] < 0) alg.push_back(unit(i));
    for (int gi = 0; gi < groups; ++gi) {
        std::vector<int> members;
        for (int i = 0; i < nn; ++i)
            if (group[static_cast<std::size_t>(i)] == gi) members.push_back(i);
        const auto m = static_cast<int>(members.size());
        if (m == 1) {
            dyn.push_back(unit(members[0]));
            continue;
        }
        // Jacobi-scaled symmetric eigenproblem D^-1/2 C D^-1/2 = Q diag(l) Q^T; null directions are algebraic
        // (a capacitor in series with a source or another capacitor carries no state of its own).
        Eigen::MatrixXd s(m, m);
        Eigen::VectorXd dinv(m);
        for (int r = 0; r < m; ++r) dinv[r] = 1.0 / std::sqrt(e(members[static_cast<std::size_t>(r)], members[static_cast<std::size_t>(r)]));
        for (int r = 0; r < m; ++r)
            for (int c = 0; c < m; ++c)
                s(r, c) = dinv[r] * e(members[static_cast<std::size_t>(r)], members[static_cast<std::size_t>(c)]) * dinv[c];
        const Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> es(s);
        const double lmax = es.eigenvalues().cwiseAbs().maxCoeff();
        for (int k = 0; k < m; ++k) {
            Eigen::VectorXd v = Eigen::VectorXd::Zero(n);
            for (int r = 0; r < m; ++r) v[members[static_cast<std::size_t>(r)]] = dinv[r] * es.eigenvectors()(r, k);
            (es.eigenvalues()[k] > 1e-10 * lmax ? dyn : alg).push_back(v);
        }
    }
    for (int k = 0; k < inductors(); ++k) dyn.push_back(unit(nn + k));
    for (int s = 0; s < m_sources; ++s) alg.push_back(unit(nn + inductors() + s));

    const auto nd = static_cast<int>(dyn.size());
    const auto na = static_cast<int>(alg.size());
    Eigen::MatrixXd td(n, nd), ta(n, na);
    for (int k = 0; k < nd; ++k) td.col(k) = dyn[static_cast<std::size_t>(k)];
    for (int k = 0; k < na; ++k) ta.col(k) = alg[static_cast<std::size_t>(k)];
    const Eigen::MatrixXd e11 = td.transpose() * e * td;
    const Eigen::MatrixXd g11 = td.transpose() * g * td;
    const Eigen::MatrixXd g12 = td.transpose() * g * ta;
    const Eigen::MatrixXd g21 = ta.transpose() * g * td;
    const Eigen::MatrixXd g22 = ta.transpose() * g * ta;
    const Eigen::MatrixXd b1 = td.transpose() * bsrc, b2 = ta.transpose() * bsrc;
    const Eigen::VectorXd p1 = td.transpose() * p, p2 = ta.transpose() * p;

    // Zero-size blocks (no algebraic unknowns, no sources, no states) are skipped rather than handed to the
    // LU: Eigen's solve on an empty right-hand side binds a reference to a null data pointer.
    Eigen::MatrixXd k21 = Eigen::MatrixXd::Zero(na, nd), kb = Eigen::MatrixXd::Zero(na, m_sources);
    Eigen::VectorXd kp = Eigen::VectorXd::Zero(na);
    if (na > 0) {
        const Eigen::FullPivLU<Eigen::MatrixXd> lu(g22);
        if (!lu.isInvertible())
            throw config_error("network: the resistive part is singular: a node without any path (add a resistance), a loop of "
                               "capacitors and voltage sources, or a cut set of inductors");
        if (nd > 0) k21 = lu.solve(g21);
        if (m_sources > 0) kb = lu.solve(b2);
        kp = lu.solve(p2);
    }
    state_space ss;
    ss.port_linear_capacitance_f = m_port_c;
    ss.basis = td;
    ss.charge = e * td;
    if (nd > 0) {
        const Eigen::FullPivLU<Eigen::MatrixXd> lu1(e11);
        if (!lu1.isInvertible())
            throw config_error("network: the capacitance and inductance matrix is singular (coupling |k| too close to 1?)");
        ss.a = -lu1.solve(g11 - g12 * k21);
        ss.b = m_sources > 0 ? Eigen::MatrixXd(lu1.solve(b1 - g12 * kb)) : Eigen::MatrixXd(nd, 0);
        ss.bj = lu1.solve(p1 - g12 * kp);
    } else {
        ss.a.resize(0, 0);
        ss.b.resize(0, m_sources);
        ss.bj.resize(0);
    }
    // z = (T_d - T_a K G21) w1 + T_a K B2 u + T_a K P2 j; the first nn rows are the node voltages.
    const Eigen::MatrixXd zc = td - ta * k21;
    const Eigen::MatrixXd zd = ta * kb;
    const Eigen::VectorXd zj = ta * kp;
    ss.c = zc.topRows(nn);
    ss.d = zd.topRows(nn);
    ss.dj = zj.head(nn);
    if (m_anode >= 0) {
        ss.port_c = ss.node_c(m_anode) - ss.node_c(m_cathode);
        ss.port_d = ss.node_d(m_anode) - ss.node_d(m_cathode);
        ss.port_dj = ss.node_dj(m_anode) - ss.node_dj(m_cathode);
    } else {
        ss.port_c = Eigen::RowVectorXd::Zero(nd);
        ss.port_d = Eigen::RowVectorXd::Zero(m_sources);
    }
    return ss;
}

Eigen::VectorXcd network::solve_ac(double f_hz, const Eigen::VectorXcd& rhs, std::complex<double> port_y) const
{
    Eigen::MatrixXd e, g, bsrc;
    Eigen::VectorXd p;
    matrices(e, g, bsrc, p);
    const std::complex<double> jw(0.0, two_pi * f_hz);
    Eigen::MatrixXcd m = g.cast<std::complex<double>>() + jw * e.cast<std::complex<double>>();
    if (port_y != 0.0 && m_anode >= 0) {
        auto add = [&](node_id r, node_id c, std::complex<double> y) {
            if (r > 0 && c > 0) m(r - 1, c - 1) += y;
        };
        add(m_anode, m_anode, port_y);
        add(m_cathode, m_cathode, port_y);
        add(m_anode, m_cathode, -port_y);
        add(m_cathode, m_anode, -port_y);
    }
    Eigen::FullPivLU<Eigen::MatrixXcd> lu(m);
    if (!lu.isInvertible()) {
        // A floating node (a capacitor-only node at DC): a 1 pS leak to ground makes the answer finite and huge.
        for (int i = 0; i < nodes(); ++i) m(i, i) += 1e-12;
        lu.compute(m);
    }
    return lu.solve(rhs);
}

Eigen::VectorXcd network::transfer(int input, double f_hz) const
{
    if (input < 0 || input >= m_sources) throw config_error(fmt::format("network: source {} does not exist", input));
    Eigen::VectorXcd rhs = Eigen::VectorXcd::Zero(size());
    rhs[nodes() + inductors() + input] = 1.0;
    return solve_ac(f_hz, rhs, 0.0).head(nodes());
}

std::complex<double> network::transfer_to(int input, node_id a, node_id b, double f_hz, std::complex<double> port_y) const
{
    if (input < 0 || input >= m_sources) throw config_error(fmt::format("network: source {} does not exist", input));
    check_node(a, "a transfer");
    check_node(b, "a transfer");
    Eigen::VectorXcd rhs = Eigen::VectorXcd::Zero(size());
    rhs[nodes() + inductors() + input] = 1.0;
    const Eigen::VectorXcd z = solve_ac(f_hz, rhs, port_y);
    return (a > 0 ? z[a - 1] : 0.0) - (b > 0 ? z[b - 1] : 0.0);
}

std::complex<double> network::impedance(node_id a, node_id b, double f_hz, std::complex<double> port_y) const
{
    check_node(a, "an impedance");
    check_node(b, "an impedance");
    Eigen::VectorXcd rhs = Eigen::VectorXcd::Zero(size());
    if (a > 0) rhs[a - 1] += 1.0;
    if (b > 0) rhs[b - 1] -= 1.0;
    const Eigen::VectorXcd z = solve_ac(f_hz, rhs, port_y);
    return (a > 0 ? z[a - 1] : 0.0) - (b > 0 ? z[b - 1] : 0.0);
}

double network::dc_resistance_ohm(node_id a, node_id b) const
{
    const double r = impedance(a, b, 0.0).real();
    return r > 1e11 ? std::numeric_limits<double>::infinity() : r;
}

Eigen::VectorXd carry_charge(const state_space& from, const Eigen::VectorXd& x, const state_space& to)
{
    if (from.charge.rows() != to.basis.rows() || from.charge.cols() != x.size() || to.basis.cols() != to.charge.cols())
        throw config_error(fmt::format("carry_charge: networks with {} and {} unknowns ({} and {} states) are not the same circuit",
                                       from.charge.rows(), to.basis.rows(), from.charge.cols(), to.charge.cols()));
    if (to.basis.cols() == 0) return Eigen::VectorXd(0);
    const Eigen::VectorXd q = from.charge * x;
    const Eigen::MatrixXd e11 = to.basis.transpose() * to.charge;
    return e11.partialPivLu().solve(to.basis.transpose() * q);
}

std::vector<double> time_constants_s(const state_space& ss)
{
    std::vector<double> t;
    if (ss.states() == 0) return t;
    const Eigen::EigenSolver<Eigen::MatrixXd> es(ss.a, false);
    for (int k = 0; k < ss.states(); ++k) {
        const double re = es.eigenvalues()[k].real();
        if (re < 0.0) t.push_back(-1.0 / re);
    }
    std::sort(t.begin(), t.end(), std::greater<>());
    return t;
}

} // namespace galena
