#include "galena/rf_integrator.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <unsupported/Eigen/MatrixFunctions>

namespace galena {

rf_integrator::rf_integrator(const state_space& ss, int input, const junction_law& junction, const station_source& stations,
                             double reference_hz, const rf_settings& st)
    : m_src(&stations), m_law(junction), m_n(st.steps_per_cycle), m_fref(reference_hz)
{
    detail::require_range("solver.steps_per_cycle", st.steps_per_cycle, 8.0, 4096.0);
    if (st.steps_per_cycle % 2 != 0)
        throw config_error(fmt::format("solver.steps_per_cycle = {}: must be even", st.steps_per_cycle));
    detail::require_above("solver.newton_tolerance_v", st.newton_tolerance_v, 0.0, 1e-3, "V");
    detail::require_range("reference carrier", reference_hz, 1e3, 1e9, "Hz");
    if (input < 0 || input >= ss.b.cols()) throw config_error(fmt::format("rf_integrator: input {} does not exist", input));
    m_tol = st.newton_tolerance_v;
    m_h = 1.0 / (reference_hz * m_n);
    m_c_lin = ss.port_linear_capacitance_f;
    m_charge = junction.cj0_f > 0.0;
    const int n = ss.states();
    // Augmented exponential for the junction current, linear over the step: [A b_j 0; 0 0 1/h; 0 0 0].
    {
        Eigen::MatrixXd m = Eigen::MatrixXd::Zero(n + 2, n + 2);
        m.topLeftCorner(n, n) = ss.a;
        m.block(0, n, n, 1) = ss.bj;
        m(n, n + 1) = 1.0 / m_h;
        const Eigen::MatrixXd e = (m * m_h).exp();
        m_phi = e.topLeftCorner(n, n);
        const Eigen::VectorXd gam0 = e.block(0, n, n, 1);     // int e^{A(h-s)} b_j ds
        const Eigen::VectorXd gam1 = e.block(0, n + 1, n, 1); // int e^{A(h-s)} b_j s/h ds
        m_g0 = gam0 - gam1;
        m_g1 = gam1;
    }
    // Per station: [A B 0; 0 jw 1; 0 0 jw] gives W0 and W1 (see the header).
    for (std::size_t s = 0; s < stations.size(); ++s) {
        const double w = two_pi * stations.station(s).params().carrier_hz;
        Eigen::MatrixXcd m = Eigen::MatrixXcd::Zero(n + 2, n + 2);
        m.topLeftCorner(n, n) = ss.a.cast<std::complex<double>>();
        m.block(0, n, n, 1) = ss.b.col(input).cast<std::complex<double>>();
        m(n, n) = std::complex<double>(0.0, w);
        m(n + 1, n + 1) = std::complex<double>(0.0, w);
        m(n, n + 1) = 1.0;
        const Eigen::MatrixXcd e = (m * std::complex<double>(m_h, 0.0)).exp();
        m_w0r.push_back(e.block(0, n, n, 1).real());
        m_w0i.push_back(e.block(0, n, n, 1).imag());
        m_w1r.push_back(e.block(0, n + 1, n, 1).real());
        m_w1i.push_back(e.block(0, n + 1, n, 1).imag());
        m_ratio.push_back(stations.station(s).params().carrier_hz / reference_hz);
        m_rot.push_back(std::polar(1.0, w * m_h));
    }
    m_pc = ss.port_c;
    m_pd = ss.port_d(input);
    m_pdj = ss.port_dj;
    // 4-point Lagrange weights on cycle boundaries -1, 0, 1, 2 at phase tau = k / N.
    for (int k = 0; k <= m_n; ++k) {
        const double t = static_cast<double>(k) / m_n;
        m_lag.push_back({-t * (t - 1.0) * (t - 2.0) / 6.0, (t + 1.0) * (t - 1.0) * (t - 2.0) / 2.0,
                         -(t + 1.0) * t * (t - 2.0) / 2.0, (t + 1.0) * t * (t - 1.0) / 6.0});
    }
    m_env.assign(4 * stations.size(), 0.0);
    for (int k = 1; k <= m_n; ++k) m_ref_phasor.push_back(std::polar(1.0, -two_pi * static_cast<double>(k) / m_n));
    m_v_prev.assign(static_cast<std::size_t>(m_n), 0.0);
    m_x = Eigen::VectorXd::Zero(n);
    m_tmp = Eigen::VectorXd::Zero(n);
}

int rf_integrator::add_output(const Eigen::RowVectorXd& c, double d_u, double d_j)
{
    m_out_c.push_back(c);
    m_out_du.push_back(d_u);
    m_out_dj.push_back(d_j);
    m_out_mean.push_back(0.0);
    m_out_peak.push_back(0.0);
    m_out_last.push_back(0.0);
    return static_cast<int>(m_out_c.size()) - 1;
}

void rf_integrator::reset_peaks() { std::fill(m_out_peak.begin(), m_out_peak.end(), 0.0); }

void rf_integrator::start_phasors()
{
    m_phasors = true;
    m_v_phasor = m_j_phasor = 0.0;
}

void rf_integrator::initialize()
{
    m_x.setZero();
    m_cycle = 0;
    m_v = 0.0;
    m_j = 0.0;
    const junction_values jv = m_law.evaluate(0.0);
    m_i0 = jv.current_a;
    m_qr0 = jv.charge_c;
    std::fill(m_v_prev.begin(), m_v_prev.end(), 0.0);
    std::fill(m_out_last.begin(), m_out_last.end(), 0.0);
    m_stats = {};
}

double rf_integrator::envelope_at_cycle(std::size_t s, long long c) const noexcept
{
    // Before t = 0 the envelope is continued by its value at 0 (the carrier ramp starts at 0 there).
    return m_src->station(s).envelope(c > 0 ? static_cast<double>(c) / m_fref : 0.0);
}

void rf_integrator::load_envelopes(std::size_t c)
{
    const auto cc = static_cast<long long>(c);
    for (std::size_t s = 0; s < m_src->size(); ++s)
        for (int i = 0; i < 4; ++i) m_env[4 * s + static_cast<std::size_t>(i)] = envelope_at_cycle(s, cc - 1 + i);
}

double rf_integrator::solve_junction(double alpha, double beta, double v, double& j1)
{
    // F(v) = v - alpha - beta J(v), J the step's junction current as a function of its end voltage;
    // beta <= 0 (passive network) makes F increasing, so the root is bracketed by the signs seen.
    const double inv_h = 1.0 / m_h;
    double lo = -std::numeric_limits<double>::infinity();
    double hi = std::numeric_limits<double>::infinity();
    for (int it = 0; it < 200; ++it) {
        ++m_stats.newton_iterations;
        const junction_values jv = m_law.evaluate(v);
        double jj = jv.current_a;
        double dj = jv.conductance_s;
        double qr = 0.0, cr = 0.0;
        if (m_charge) {
            // Backward Euler on the residual charge (see the header): no step-to-step recursion to ring.
            qr = jv.charge_c - m_c_lin * v;
            cr = jv.capacitance_f - m_c_lin;
            jj += inv_h * (qr - m_qr0);
            dj += inv_h * cr;
        }
        const double f = v - alpha - beta * jj;
        const double df = 1.0 - beta * dj;
        if (f > 0.0) hi = std::min(hi, v);
        else lo = std::max(lo, v);
        double vn = v - f / df;
        if (!(vn > lo && vn < hi) || !(df > 0.0)) {
            if (std::isfinite(lo) && std::isfinite(hi)) {
                vn = 0.5 * (lo + hi);
                ++m_stats.bisections;
            } else {
                vn = std::clamp(vn, v - 1.0, v + 1.0);
            }
        }
        const double dv = vn - v;
        // Newton's remaining error after this update is about |F''| dv^2 / (2 F'), F'' = -beta dI'/dv (the
        // charge's curvature is left out: it is bounded by the conductance's in forward conduction).
        if (std::fabs(dv) <= m_tol || 0.5 * std::fabs(beta * jv.conductance_slope_s_per_v) * dv * dv <= m_tol * df) {
            // Converged: the update is below the tolerance; carry the law to vn linearly.
            j1 = jj + dj * dv;
            m_i0 = jv.current_a + jv.conductance_s * dv;
            m_qr0 = qr + cr * dv;
            return vn;
        }
        v = vn;
    }
    throw integration_error(fmt::format("the junction equation did not converge near t = {:.9g} s (alpha = {:.6g} V)",
                                        time_s(), alpha),
                            time_s());
}

void rf_integrator::advance_cycle(std::span<double> out)
{
    // Fixed-size kernels for the usual state counts (a whole receiver has 4 to 14 states).
    switch (m_x.size()) {
    case 2: run_cycle<2>(out); break;
    case 3: run_cycle<3>(out); break;
    case 4: run_cycle<4>(out); break;
    case 5: run_cycle<5>(out); break;
    case 6: run_cycle<6>(out); break;
    case 7: run_cycle<7>(out); break;
    case 8: run_cycle<8>(out); break;
    case 9: run_cycle<9>(out); break;
    case 10: run_cycle<10>(out); break;
    case 11: run_cycle<11>(out); break;
    case 12: run_cycle<12>(out); break;
    case 13: run_cycle<13>(out); break;
    case 14: run_cycle<14>(out); break;
    default: run_cycle<Eigen::Dynamic>(out); break;
    }
}

template <int N>
void rf_integrator::run_cycle(std::span<double> out)
{
    using vec = Eigen::Matrix<double, N, 1>;
    using row = Eigen::Matrix<double, 1, N>;
    using mat = Eigen::Matrix<double, N, N>;
    const auto n = m_x.size();
    const Eigen::Map<const mat> phi(m_phi.data(), n, n);
    const Eigen::Map<const vec> g0(m_g0.data(), n), g1(m_g1.data(), n);
    const Eigen::Map<const row> pc(m_pc.data(), n);
    vec x = Eigen::Map<const vec>(m_x.data(), n);
    vec t(n);
    const std::size_t c = m_cycle;
    load_envelopes(c);
    const std::size_t ns = m_src->size();
    // Station phasors e^{j w t} at the cycle start, from the cycle count (never accumulated across cycles).
    std::array<std::complex<double>, 16> p_small{};
    std::vector<std::complex<double>> p_big;
    std::complex<double>* p = p_small.data();
    if (ns > p_small.size()) {
        p_big.resize(ns);
        p = p_big.data();
    }
    std::array<double, 16> e_small{};
    std::vector<double> e_big;
    double* e_prev = e_small.data();
    if (ns > e_small.size()) {
        e_big.resize(ns);
        e_prev = e_big.data();
    }
    for (std::size_t s = 0; s < ns; ++s) {
        const double cyc = static_cast<double>(c) * m_ratio[s];
        p[s] = std::polar(1.0, two_pi * (cyc - std::floor(cyc)));
        e_prev[s] = m_env[4 * s + 1];
    }
    const double beta = pc.dot(g1) + m_pdj;
    const std::size_t no = m_out_c.size();
    for (std::size_t o = 0; o < no; ++o) m_out_mean[o] = 0.5 * m_out_last[o];
    double v_before = m_v_prev[static_cast<std::size_t>(m_n - 1)];
    for (int k = 0; k < m_n; ++k) {
        t.noalias() = phi * x;
        t += g0 * m_j;
        double u1 = 0.0;
        const auto& w = m_lag[static_cast<std::size_t>(k + 1)];
        for (std::size_t s = 0; s < ns; ++s) {
            const double* e = &m_env[4 * s];
            const double e0 = e_prev[s];
            const double e1 = w[0] * e[0] + w[1] * e[1] + w[2] * e[2] + w[3] * e[3];
            const double de = (e1 - e0) / m_h;
            const double pr = p[s].real(), pi_ = p[s].imag();
            t += (e0 * pr) * Eigen::Map<const vec>(m_w0r[s].data(), n) - (e0 * pi_) * Eigen::Map<const vec>(m_w0i[s].data(), n) +
                 (de * pr) * Eigen::Map<const vec>(m_w1r[s].data(), n) - (de * pi_) * Eigen::Map<const vec>(m_w1i[s].data(), n);
            p[s] *= m_rot[s];
            u1 += e1 * p[s].real();
            e_prev[s] = e1;
        }
        const double alpha = pc.dot(t) + m_pd * u1;
        const auto kk = static_cast<std::size_t>(k);
        const double old = m_v_prev[kk];
        const double guess = old + (m_v - v_before);
        v_before = old;
        double j1 = 0.0;
        const double v1 = solve_junction(alpha, beta, guess, j1);
        x = t + g1 * j1;
        m_v = v1;
        m_j = j1;
        m_v_prev[kk] = v1;
        for (std::size_t o = 0; o < no; ++o) {
            const double y = Eigen::Map<const row>(m_out_c[o].data(), n).dot(x) + m_out_du[o] * u1 + m_out_dj[o] * j1;
            m_out_mean[o] += k + 1 == m_n ? 0.5 * y : y;
            m_out_peak[o] = std::max(m_out_peak[o], std::fabs(y));
            if (!out.empty()) out[o * static_cast<std::size_t>(m_n) + kk] = y;
            if (k + 1 == m_n) m_out_last[o] = y;
        }
        if (m_phasors) {
            m_v_phasor += v1 * m_ref_phasor[kk];
            m_j_phasor += j1 * m_ref_phasor[kk];
        }
    }
    m_stats.steps += static_cast<std::size_t>(m_n);
    Eigen::Map<vec>(m_x.data(), n) = x;
    for (std::size_t o = 0; o < no; ++o) m_out_mean[o] /= m_n;
    if (!std::isfinite(m_v) || !x.allFinite())
        throw integration_error(fmt::format("the receiver's state became non-finite near t = {:.9g} s", time_s()), time_s());
    ++m_cycle;
}

} // namespace galena
