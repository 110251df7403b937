#include "galena/cycle_integrator.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/junction_law_eval.hpp"
#include "galena/monotone_root.hpp"
#include "galena/validate.hpp"

#include <Eigen/LU>
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <fmt/format.h>
#include <limits>
#include <tuple>
#include <utility>

namespace galena {

namespace {

/// Inputs and outputs of the per-cycle batch: plain arrays so that the loops vectorise.
struct batch_arrays {
    const double* vp;   // linearisation points, 1..n
    const double* u;    // source, 0..n
    double* cap;        // C(vp), 0..n (index 0 = the previous cycle's last step, set by the caller)
    double* g;          // i'(vp)
    double* qa;         // q(vp) - C vp
    double* ia;         // i(vp) - i' vp
    double* f2;         // |F''| of the step equation at vp
    double* thr;        // 2 eps F': a step is accepted when dv^2 f2 <= thr
    double* inv_den;    // 1 / F'
    double* cst;        // v_k = cst + ca v_k-1 + inv_den (cy . y_k-1)
    double* ca;
    double* m21;        // one-state networks: y_k = pu + m21 v_k-1 + m22 y_k-1
    double* m22;
    double* pu;
    double* cyd;        // one-state networks: inv_den cy
};

struct batch_constants {
    int n;
    double inv_r;      // 1/R, S
    double pb;         // c . p
    double p;          // p (one-state networks)
    double cy;         // cy (one-state networks)
    double big_p;      // P (one-state networks)
    double eps_v;      // Newton tolerance, V
    double wa;         // theta h: weight of the step end in the junction equation, s
    double wb;         // (1 - theta) h: weight of the step start, s
    bool one_state;    // fill m21, m22, pu
};

/// The junction half of the batch: law values at the predicted voltages, the step equation's slope F' and
/// curvature F'' there. Templated on the law's switches so that the loop has no branches.
template <bool Breakdown, bool Charge, bool SquareRoot>
[[gnu::always_inline]] inline void evaluate_points(const junction_law& law, int n, double wa, double lin, double eps2,
                                                   const double* __restrict vp, double* __restrict cap, double* __restrict g,
                                                   double* __restrict qa, double* __restrict ia, double* __restrict f2,
                                                   double* __restrict thr, double* __restrict inv_den)
{
    for (int i = 1; i <= n; ++i) {
        const double v = vp[i];
        const junction_values r = detail::evaluate_law<Breakdown, Charge, SquareRoot>(law, v);
        cap[i] = r.capacitance_f;
        g[i] = r.conductance_s;
        qa[i] = r.charge_c - r.capacitance_f * v;
        ia[i] = r.current_a - r.conductance_s * v;
        // F(v) = q(v) + theta h (i(v) + (1 - pb) v / R) - rhs: F' and |F''| (q = 0 without junction charge).
        const double den = r.capacitance_f + wa * (r.conductance_s + lin);
        f2[i] = std::fabs(r.capacitance_slope_f_per_v) + wa * std::fabs(r.conductance_slope_s_per_v);
        thr[i] = eps2 * den;
        inv_den[i] = 1.0 / den;
    }
}

template <bool Breakdown, bool Charge, bool SquareRoot>
[[gnu::always_inline]] inline void evaluate_points(const junction_law& law, const batch_arrays& a, const batch_constants& k)
{
    const double lin = k.inv_r * (1.0 - k.pb);
    evaluate_points<Breakdown, Charge, SquareRoot>(law, k.n, k.wa, lin, 2.0 * k.eps_v, a.vp, a.cap, a.g, a.qa, a.ia, a.f2, a.thr,
                                                   a.inv_den);
}

/// The affine step maps v_k = cst + ca v_k-1 + inv_den (cy . y_k-1) (and, for one-state networks,
/// y_k = pu + m21 v_k-1 + m22 y_k-1) from the linearised junction.
[[gnu::always_inline]] inline void assemble_steps(const batch_constants& k, const double* __restrict u, const double* __restrict cap,
                                                  const double* __restrict g, const double* __restrict qa,
                                                  const double* __restrict ia, const double* __restrict inv_den,
                                                  double* __restrict cst, double* __restrict ca, double* __restrict m21,
                                                  double* __restrict m22, double* __restrict pu, double* __restrict cyd)
{
    const int n = k.n;
    const double wa = k.wa;
    const double wb = k.wb;
    const double inv_r = k.inv_r;
    const double pb = k.pb;
    // q(v1) - q(v0) = theta h j1 + (1 - theta) h j0, linearised at both ends, solved for v1 (see the header).
    for (int i = 1; i <= n; ++i) {
        cst[i] = ((qa[i - 1] - qa[i]) + wb * (u[i - 1] * inv_r - ia[i - 1]) - wa * ia[i] +
                  wa * ((1.0 - pb) * u[i] - pb * u[i - 1]) * inv_r) *
                 inv_den[i];
        ca[i] = (cap[i - 1] - wb * (inv_r + g[i - 1]) + wa * pb * inv_r) * inv_den[i];
    }
    if (k.one_state) {
        const double p = k.p;
        const double pcy = k.p * k.cy;
        const double big_p = k.big_p;
        for (int i = 1; i <= n; ++i) {
            m21[i] = -p * (1.0 + ca[i]);
            m22[i] = big_p - pcy * inv_den[i];
            pu[i] = p * (u[i - 1] + u[i]) - p * cst[i];
            cyd[i] = k.cy * inv_den[i];
        }
    }
}

// Evaluates the junction law at every predicted voltage of a cycle and assembles the affine step maps.
// Cloned for AVX-512 and AVX2 machines (picked at load time); the default clone runs anywhere.
__attribute__((target_clones("arch=x86-64-v4", "arch=x86-64-v3", "default"))) void
linearise_cycle(const junction_law& law_in, const batch_arrays& a, const batch_constants& k)
{
    const junction_law law = law_in;
    const bool sq = law.square_root_grading;
    if (law.cj0_f > 0.0) {
        if (law.breakdown) sq ? evaluate_points<true, true, true>(law, a, k) : evaluate_points<true, true, false>(law, a, k);
        else sq ? evaluate_points<false, true, true>(law, a, k) : evaluate_points<false, true, false>(law, a, k);
    } else {
        if (law.breakdown) evaluate_points<true, false, true>(law, a, k);
        else evaluate_points<false, false, true>(law, a, k);
    }
    assemble_steps(k, a.u, a.cap, a.g, a.qa, a.ia, a.inv_den, a.cst, a.ca, a.m21, a.m22, a.pu, a.cyd);
}

/// The recurrence of a one-state network's cycle (the sequential part; two FMAs deep per step):
/// v_k = cst + ca v_k-1 + cyd y_k-1, y_k = pu + m21 v_k-1 + m22 y_k-1. Stores v and y at the steps, returns
/// the end state, the sum of y over the interior steps 1..n-1, and whether every step's linearisation error
/// dv^2 |F''| / (2 F') is within the tolerance.
__attribute__((target_clones("arch=x86-64-v4", "arch=x86-64-v3", "default"))) bool
sweep_one_state(const batch_arrays& a, int n, double v0, double y0, double* __restrict v_out, double* __restrict y_out,
                double& v_end, double& y_end, double& y_interior_sum)
{
    const double* __restrict cst = a.cst;
    const double* __restrict ca = a.ca;
    const double* __restrict cyd = a.cyd;
    const double* __restrict pu = a.pu;
    const double* __restrict m21 = a.m21;
    const double* __restrict m22 = a.m22;
    double v = v0, y = y0, sum = 0.0;
    for (int k = 1; k <= n; ++k) {
        const double vn = cst[k] + ca[k] * v + cyd[k] * y;
        y = pu[k] + m21[k] * v + m22[k] * y;
        v = vn;
        v_out[k] = v;
        y_out[k] = y;
        sum += y;
    }
    v_end = v;
    y_end = y;
    y_interior_sum = sum - y;
    const double* __restrict vp = a.vp;
    const double* __restrict f2 = a.f2;
    const double* __restrict thr = a.thr;
    bool ok = std::isfinite(v) && std::isfinite(y);
    for (int k = 1; k <= n; ++k) {
        const double dv = v_out[k] - vp[k];
        ok &= dv * dv * f2[k] <= thr[k];
    }
    return ok;
}

} // namespace

template <int Dim>
double junction_theta(const one_junction_network<Dim>& net)
{
    return net.junction.cj0_f > 0.0 ? 0.5 : 1.0;
}

template <int Dim>
cycle_integrator<Dim>::cycle_integrator(const one_junction_network<Dim>& net, double carrier_hz, const cycle_settings& s)
    : m_net(net), m_s(s), m_n(s.steps_per_cycle)
{
    detail::require_above("series resistance R_src + R_s", net.series_ohm, 0.0, 1e12, "ohm");
    detail::require_above("signal.carrier_hz", carrier_hz, 0.0, 1e9, "Hz");
    detail::require_range("solver.steps_per_cycle", static_cast<double>(s.steps_per_cycle), 8.0, 4096.0);
    if (s.steps_per_cycle % 2 != 0)
        throw config_error(fmt::format("solver.steps_per_cycle = {}: must be even (the trapezoidal junction mode (-1)^k then "
                                       "cancels over a cycle)",
                                       s.steps_per_cycle));
    if (s.junction_theta != 0.0) detail::require_range("junction theta", s.junction_theta, 0.5, 1.0);
    detail::require_range("max_batched_passes", static_cast<double>(s.max_batched_passes), 0.0, 100.0);
    detail::require_above("solver.newton_tolerance", s.newton_tolerance, 0.0, 1e-3);
    detail::require_above("voltage scale", s.voltage_scale_v, 0.0, 1e6, "V");
    m_period = 1.0 / carrier_hz;
    m_h = m_period / static_cast<double>(m_n);
    m_inv_r = 1.0 / net.series_ohm;
    m_theta = s.junction_theta > 0.0 ? s.junction_theta : junction_theta(net);
    if (!(net.junction.cj0_f > 0.0)) m_theta = 1.0; // no charge: the constraint holds at every step end
    m_wa = m_theta * m_h;
    m_wb = (1.0 - m_theta) * m_h;
    m_eps_v = s.newton_tolerance * s.voltage_scale_v;
    const mat id = mat::Identity();
    const mat lhs = id - 0.5 * m_h * net.a;
    const Eigen::PartialPivLU<mat> lu(lhs);
    m_p_mat = lu.solve(id + 0.5 * m_h * net.a);
    m_p_vec = lu.solve(net.b) * (0.5 * m_h * m_inv_r);
    m_pb = net.c.dot(m_p_vec);
    m_cb = net.c.dot(net.b);
    m_ct_a = net.a.transpose() * net.c;
    m_cy = -(m_wb * m_inv_r) * net.c - (m_wa * m_inv_r) * (m_p_mat.transpose() * net.c);
    const auto sz = static_cast<std::size_t>(m_n + 1);
    for (auto* v : {&m_u, &m_vp, &m_cap, &m_g, &m_qa, &m_ia, &m_f2, &m_thr, &m_inv_den, &m_cst, &m_ca, &m_m21, &m_m22, &m_pu, &m_cyd,
                    &m_v, &m_yb, &m_ya, &m_h1, &m_h2})
        v->assign(sz, 0.0);
}

template <int Dim>
void cycle_integrator<Dim>::initialize(double v0_v, const vec& y0, double u0_v)
{
    m_y = y0;
    m_u[0] = u0_v;
    if (!(m_net.junction.cj0_f > 0.0)) {
        // No junction charge: v is not a state; take the value the constraint (u0 - v - c.y0)/R = i(v) gives.
        const double drive = (u0_v - m_net.c.dot(y0)) * m_inv_r;
        auto f = [&](double v) {
            const junction_values r = detail::evaluate_inline(m_net.junction, v);
            return std::pair{r.current_a + m_inv_r * v - drive, r.conductance_s + m_inv_r};
        };
        v0_v = detail::solve_increasing(f, v0_v, std::max(1e-3, 0.1 * m_s.voltage_scale_v), m_stats.scalar_newton_iterations);
        if (!std::isfinite(v0_v))
            throw integration_error("the junction equation has no solution at t = 0; the diode parameters are probably far out of range",
                                    0.0);
    }
    m_v0 = v0_v;
    const junction_values r = detail::evaluate_inline(m_net.junction, v0_v);
    m_cap[0] = r.capacitance_f;
    m_g[0] = r.conductance_s;
    m_qa[0] = r.charge_c - r.capacitance_f * v0_v;
    m_ia[0] = r.current_a - r.conductance_s * v0_v;
    m_v[0] = v0_v;
    m_yb[0] = m_net.c.dot(y0);
    m_ya[0] = m_ct_a.dot(y0);
    m_history = 0;
    const std::size_t init_iterations = m_stats.scalar_newton_iterations;
    m_stats = {};
    m_stats.scalar_newton_iterations = init_iterations;
}

template <int Dim>
double cycle_integrator<Dim>::output_slope_v_per_s(int k) const noexcept
{
    const auto i = static_cast<std::size_t>(k);
    const double ya = Dim == 1 ? m_net.a(0, 0) * m_yb[i] : m_ya[i];
    return ya + m_cb * (m_u[i] - m_v[i]) * m_inv_r;
}

template <int Dim>
double cycle_integrator<Dim>::output_mean_v() const noexcept
{
    const double sum = 0.5 * (m_yb[0] + m_yb[static_cast<std::size_t>(m_n)]) + m_yb_interior_sum;
    const double integral = m_h * sum + m_h * m_h / 12.0 * (output_slope_v_per_s(0) - output_slope_v_per_s(m_n));
    return integral / m_period;
}

template <int Dim>
bool cycle_integrator<Dim>::batched_cycle()
{
    const int n = m_n;
    if (m_history >= 2)
        for (int k = 1; k <= n; ++k) m_vp[k] = 2.0 * m_h1[k] - m_h2[k];
    else
        for (int k = 1; k <= n; ++k) m_vp[k] = m_h1[k];
    const batch_arrays arr{m_vp.data(), m_u.data(),   m_cap.data(), m_g.data(),   m_qa.data(), m_ia.data(),  m_f2.data(), m_thr.data(),
                           m_inv_den.data(), m_cst.data(), m_ca.data(), m_m21.data(), m_m22.data(), m_pu.data(), m_cyd.data()};
    const batch_constants bc{n, m_inv_r, m_pb, m_p_vec[0], m_cy[0], m_p_mat(0, 0), m_eps_v, m_wa, m_wb, Dim == 1};
    for (int pass = 0; pass < m_s.max_batched_passes; ++pass) {
        ++m_stats.batched_passes;
        linearise_cycle(m_net.junction, arr, bc);
        bool ok;
        vec yk = m_y;
        if constexpr (Dim == 1) {
            double v_end = 0.0, y_end = 0.0;
            ok = sweep_one_state(arr, n, m_v0, yk[0], m_v.data(), m_yb.data(), v_end, y_end, m_yb_interior_sum);
            yk[0] = y_end;
        } else {
            double vk = m_v0;
            double sum = 0.0;
            for (int k = 1; k <= n; ++k) {
                const double vn = m_cst[k] + m_ca[k] * vk + m_inv_den[k] * m_cy.dot(yk);
                yk = m_p_mat * yk + m_p_vec * (m_u[k - 1] + m_u[k] - vk - vn);
                vk = vn;
                m_v[k] = vn;
                m_yb[k] = m_net.c.dot(yk);
                m_ya[k] = m_ct_a.dot(yk);
                sum += m_yb[k];
            }
            m_yb_interior_sum = sum - m_yb[static_cast<std::size_t>(n)];
            ok = std::isfinite(vk) && yk.allFinite();
            for (int k = 1; k <= n; ++k) {
                const double dv = m_v[k] - m_vp[k];
                ok = ok && (dv * dv * m_f2[k] <= m_thr[k]);
            }
        }
        if (ok) {
            // Accepted: the step voltages are the linearised updates. The stored linearisation (at the
            // predicted voltages) stays the model for the next step's q0 and j0; it differs from the
            // law at the accepted voltages by less than the tolerance.
            m_y = yk;
            return true;
        }
        for (int k = 1; k <= n; ++k) m_vp[k] = m_v[k];
    }
    return false;
}

template <int Dim>
double cycle_integrator<Dim>::solve_scalar_step(int k, double guess)
{
    // The step equation F(v) = 0 is strictly increasing in v (C >= 0, i' > 0), so a bracket plus Newton
    // with bisection fallback always converges.
    const auto i = static_cast<std::size_t>(k);
    const double lin = m_inv_r * (1.0 - m_pb);
    const double v0 = m_v[i - 1];
    const double u0 = m_u[i - 1];
    const double u1 = m_u[i];
    const double cpy = m_net.c.dot(m_p_mat * m_y);
    const double drive = ((1.0 - m_pb) * u1 - cpy - m_pb * (u0 - v0)) * m_inv_r;
    // q(v1) + theta h (i(v1) + (1 - pb) v1 / R) = q0 + (1 - theta) h j0 + theta h drive; q0 and j0 from the
    // previous step's linearisation (exact there after a scalar step, within the tolerance after a batch).
    const double q0 = m_qa[i - 1] + m_cap[i - 1] * v0;
    const double j0 = (u0 - v0 - m_net.c.dot(m_y)) * m_inv_r - (m_ia[i - 1] + m_g[i - 1] * v0);
    const double rhs = q0 + m_wb * j0 + m_wa * drive;
    auto f = [&](double v) {
        const junction_values r = detail::evaluate_inline(m_net.junction, v);
        return std::pair{r.charge_c + m_wa * (r.current_a + lin * v) - rhs, r.capacitance_f + m_wa * (r.conductance_s + lin)};
    };
    const double v = detail::solve_increasing(f, std::isfinite(guess) ? guess : v0, std::max(1e-3, 0.1 * m_s.voltage_scale_v),
                                      m_stats.scalar_newton_iterations);
    if (!std::isfinite(v))
        throw integration_error(fmt::format("the junction equation has no solution near t = {:.9g} s (step {} of the cycle); "
                                            "the diode parameters are probably far out of range",
                                            time_s() + k * m_h, k),
                                time_s() + k * m_h);
    const junction_values r = detail::evaluate_inline(m_net.junction, v);
    m_cap[i] = r.capacitance_f;
    m_g[i] = r.conductance_s;
    m_qa[i] = r.charge_c - r.capacitance_f * v;
    m_ia[i] = r.current_a - r.conductance_s * v;
    return v;
}

template <int Dim>
void cycle_integrator<Dim>::scalar_cycle()
{
    ++m_stats.scalar_cycles;
    const int n = m_n;
    m_v[0] = m_v0;
    for (int k = 1; k <= n; ++k) {
        const double guess = m_history >= 1 ? m_h1[k] : m_v[k - 1];
        const double v = solve_scalar_step(k, guess);
        const double v0 = m_v[k - 1];
        m_y = m_p_mat * m_y + m_p_vec * (m_u[k - 1] + m_u[k] - v0 - v);
        m_v[k] = v;
        m_yb[k] = m_net.c.dot(m_y);
        m_ya[k] = m_ct_a.dot(m_y);
    }
    double sum = 0.0;
    for (int k = 1; k < n; ++k) sum += m_yb[static_cast<std::size_t>(k)];
    m_yb_interior_sum = sum;
}

template <int Dim>
void cycle_integrator<Dim>::advance(std::span<const double> u_v)
{
    const int n = m_n;
    if (static_cast<int>(u_v.size()) != n)
        throw config_error(fmt::format("cycle_integrator::advance: {} source samples given, {} expected", u_v.size(), n));
    std::copy(u_v.begin(), u_v.end(), m_u.begin() + 1);
    m_v[0] = m_v0;
    m_yb[0] = m_net.c.dot(m_y);
    m_ya[0] = m_ct_a.dot(m_y);
    // The linearised passes only write indices 1..n, so a failed attempt leaves the cycle's start intact
    // for the step-by-step solve.
    if (!(m_history >= 1 && m_s.max_batched_passes > 0 && batched_cycle())) scalar_cycle();
    const auto last = static_cast<std::size_t>(n);
    if (!std::isfinite(m_v[last]) || !m_y.allFinite())
        throw integration_error(fmt::format("the solution became non-finite near t = {:.9g} s", time_s() + m_period),
                                time_s() + m_period);
    ++m_stats.cycles;
    // Next cycle starts where this one ended.
    m_v0 = m_v[last];
    m_u[0] = m_u[last];
    m_cap[0] = m_cap[last];
    m_g[0] = m_g[last];
    m_qa[0] = m_qa[last];
    m_ia[0] = m_ia[last];
    std::swap(m_h1, m_h2);
    std::copy(m_v.begin(), m_v.end(), m_h1.begin());
    m_history = std::min<std::size_t>(m_history + 1, 2);
}

template class cycle_integrator<1>;
template class cycle_integrator<2>;
template class cycle_integrator<3>;
template double junction_theta<1>(const one_junction_network<1>&);
template double junction_theta<2>(const one_junction_network<2>&);
template double junction_theta<3>(const one_junction_network<3>&);

} // namespace galena
