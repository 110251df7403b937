#include "galena/rf_integrator.hpp"

#include "galena/block_product.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/junction_law_eval.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <unsupported/Eigen/MatrixFunctions>

namespace galena {

namespace {
/// Largest block of steps evaluated by superposition (see the class comment): the per-step dot product
/// grows with it, the per-block products shrink per step; 32 measured best for 8 states and 3 stations.
constexpr int max_block_steps = 32;
/// BDF2's weight on the step-end charge: h dq/dt(t1) = 3/2 q1 - 2 q0 + 1/2 q-1 (exact for a quadratic q).
constexpr double bdf2_gain = 1.5;
/// The carrier phasors at a cycle's start are set exactly from the cycle count this often, and advanced by
/// one rotation per cycle in between.
constexpr std::size_t phasor_anchor_cycles = 256;
/// A solution is accepted from a linearisation of the law (the prediction's, or a Newton iterate's) only
/// within this many n Vt of the point where the law was evaluated: the error estimate |F''| dv^2 / (2 F')
/// takes F'' there, and an exponential's curvature grows by up to e^{1/4} over a quarter of an n Vt, which the
/// test then allows for (`curvature_growth`; 0.5 n Vt and e^{1/2} sent 11 % of the steps to the Newton
/// instead of 9.5 % on bench_receiver's set; the predictions' p99 distance is 0.05 n Vt). Without the reach a
/// prediction deep in reverse bias (F'' near 0) would accept a solution in forward conduction (measured:
/// 1.1e-4 relRMS off the Newton on a set without junction charge, the first cycles after the grid changed).
/// Both directions: exempting jumps towards reverse bias (where the forward exponential's curvature shrinks)
/// let a Newton started on the law's linear continuation above 80 n Vt (curvature 0) jump down across it, and
/// a render diverged.
constexpr double closing_reach_nvt = 0.25;
const double curvature_growth = std::exp(closing_reach_nvt);
/// After closing_low_cycles cycles in a row with less than this share of their steps closed on the
/// prediction, the next closing_retry_cycles cycles are solved by the Newton alone, started from the law
/// linearised at the same phase one cycle earlier. The prediction of the conducting steps does not hold where
/// the grid's reference is not the carrier that dominates the junction (each phase's voltage aliases from cycle
/// to cycle); before the prediction was corrected by the free voltage's change, the dial's grid (locked to
/// the band's top while the tuned station moves) was such a case, and the failed closing attempts and the
/// extrapolation's noise gain had made it 30 % slower (bench_dial).
constexpr double closing_min_share = 0.25;
/// (A single poor cycle is common where strong neighbours beat with the wanted carrier: switching off on one
/// cut rf_integrator_test's strong-neighbour set from 81 % of its steps closed to 59 %.)
constexpr int closing_low_cycles = 4;
/// Cycles solved by the Newton alone before the closing is tried again (one poor cycle then switches it off
/// again; one good one keeps it on).
constexpr int closing_retry_cycles = 16;

/// e^{m} for a badly scaled m: balanced first (Parlett & Reinsch's diagonal scaling by powers of 2, exact in
/// floating point: the off-diagonal row and column 1-norms of each index brought within a factor of 2), so the
/// scaling-and-squaring sees the spread of the dynamics rather than of the element values, then
/// e^{m} = D e^{D^-1 m D} D^-1.
template <class Matrix>
Matrix balanced_exp(Matrix m)
{
    const Eigen::Index n = m.rows();
    Eigen::VectorXd d = Eigen::VectorXd::Ones(n);
    for (bool done = false; !done;) {
        done = true;
        for (Eigen::Index i = 0; i < n; ++i) {
            double c = m.col(i).cwiseAbs().sum() - std::abs(m(i, i));
            double r = m.row(i).cwiseAbs().sum() - std::abs(m(i, i));
            if (!(c > 0.0) || !(r > 0.0) || !std::isfinite(c + r)) continue;
            const double s = c + r;
            double f = 1.0;
            while (c < 0.5 * r) f *= 2.0, c *= 4.0;
            while (c > 2.0 * r) f *= 0.5, c *= 0.25;
            if ((c + r) / f < 0.95 * s) {
                done = false;
                d[i] *= f;
                m.row(i) /= f;
                m.col(i) *= f;
            }
        }
    }
    Matrix e = m.exp();
    for (Eigen::Index i = 0; i < n; ++i) {
        e.row(i) *= d[i];
        e.col(i) /= d[i];
    }
    return e;
}
/// The block's law linearised at the predicted voltages, for steps 0..len-1 (run_cycle): plain arrays so that
/// the loop vectorises.
struct law_batch {
    const double* h0; // the phase's voltage one, two and three cycles back, V
    const double* h1;
    const double* h2;
    const double* f0; // the phase's free voltage one, two and three cycles back, V
    const double* f1;
    const double* f2h;
    const double* f_now; // its free voltage now (with the block's first current), V
    double* sens;        // in: the phase's dv/d(free voltage) one cycle back; out: now
    double* v_pred;
    double* offset;
    double* slope;
    double* inv_den;
    double* f2;
    double* thr;
    double* qa;
    double* cr;
};

/// The same arrays, read-only, for the steps' closing pass.
struct block_law_view {
    const double* v_pred;
    const double* offset;
    const double* slope;
    const double* inv_den;
    const double* f2;
    const double* thr;
    const double* qa;
    const double* cr;
};

struct law_batch_constants {
    int len;
    int history;  // valid cycles in h0, h1, h2 (0..3; 0 and 1 both predict h0)
    double beta;  // the step's port response to its own current, V/A
    double inv_h; // 1 / h, 1/s
    double c_lin; // the port's linear capacitance held by the network, F
    double two_tol; // 2 tol, V (the Newton tolerance)
    double curvature_growth;
};

template <bool Breakdown, bool Charge, bool SquareRoot>
[[gnu::always_inline]] inline void linearise_steps(const junction_law& law, const law_batch_constants& k, const double* __restrict h0,
                                                   const double* __restrict h1, const double* __restrict h2, const double* __restrict fh0,
                                                   const double* __restrict fh1, const double* __restrict fh2, const double* __restrict f_now,
                                                   double* __restrict sens, double* __restrict v_pred,
                                                   double* __restrict offset, double* __restrict slope, double* __restrict inv_den,
                                                   double* __restrict f2, double* __restrict thr, double* __restrict qa_out,
                                                   double* __restrict cr_out)
{
    // The prediction: the quadratic (or, with less history, the line or the value) through the phase's past values.
    const double w0 = k.history >= 3 ? 3.0 : k.history == 2 ? 2.0 : 1.0;
    const double w1 = k.history >= 3 ? -3.0 : k.history == 2 ? -1.0 : 0.0;
    const double w2 = k.history >= 3 ? 1.0 : 0.0;
    const double g2 = bdf2_gain * k.inv_h;
    const double beta = k.beta, c_lin = k.c_lin, two_tol = k.two_tol, growth = k.curvature_growth;
    const int len = k.len;
    for (int i = 0; i < len; ++i) {
        // The phase's past extrapolated, plus the free voltage's departure from its own extrapolation times dv/d(free).
        const double v = w0 * h0[i] + w1 * h1[i] + w2 * h2[i] + sens[i] * (f_now[i] - (w0 * fh0[i] + w1 * fh1[i] + w2 * fh2[i]));
        const junction_values r = detail::evaluate_law<Breakdown, Charge, SquareRoot>(law, v);
        // J(v) = i(v) + (1.5 q_r(v) - history) / h (solve_junction), linearised at the prediction.
        double j = r.current_a, dj = r.conductance_s, curv = r.conductance_slope_s_per_v, qr = 0.0, cr = 0.0;
        if constexpr (Charge) {
            qr = r.charge_c - c_lin * v;
            cr = r.capacitance_f - c_lin;
            j += g2 * qr;
            dj += g2 * cr;
            curv += g2 * r.capacitance_slope_f_per_v;
        }
        const double den = 1.0 - beta * dj;
        v_pred[i] = v;
        offset[i] = j - dj * v;
        slope[i] = dj;
        inv_den[i] = 1.0 / den;
        sens[i] = inv_den[i];
        f2[i] = growth * std::fabs(beta * curv);
        thr[i] = two_tol * den;
        qa_out[i] = qr - cr * v; // q_r linearised: qa + cr v
        cr_out[i] = cr;
    }
}

template <bool Breakdown, bool Charge, bool SquareRoot>
[[gnu::always_inline]] inline void linearise_steps(const junction_law& law, const law_batch& a, const law_batch_constants& k)
{
    linearise_steps<Breakdown, Charge, SquareRoot>(law, k, a.h0, a.h1, a.h2, a.f0, a.f1, a.f2h, a.f_now, a.sens, a.v_pred, a.offset, a.slope,
                                                   a.inv_den, a.f2, a.thr, a.qa, a.cr);
}

// Cloned for AVX-512 and AVX2 machines (picked at load time); the default clone runs anywhere.
__attribute__((target_clones("arch=x86-64-v4", "arch=x86-64-v3", "default"))) void
linearise_block(const junction_law& law_in, const law_batch& a, const law_batch_constants& k)
{
    const junction_law law = law_in;
    if (law.cj0_f > 0.0) {
        if (law.square_root_grading)
            law.breakdown ? linearise_steps<true, true, true>(law, a, k) : linearise_steps<false, true, true>(law, a, k);
        else
            law.breakdown ? linearise_steps<true, true, false>(law, a, k) : linearise_steps<false, true, false>(law, a, k);
    } else {
        law.breakdown ? linearise_steps<true, false, true>(law, a, k) : linearise_steps<false, false, true>(law, a, k);
    }
}

/// A block's steps from..len closed on the predicted linearisation (run_cycle), in order, until one fails
/// Newton's test: returns that step's k, with its linear solution (the Newton's start) in v_out, or len + 1
/// when all closed. Each closed step writes its voltage (v_out[k - 1]) and current (j[k]), moves the residual
/// charge history (qr0 = this step's, qr1 the one before) and adds its current's share to the later steps'
/// free voltages (port_j: the port's J table, column-major with leading dimension ld).
///
/// The arithmetic is arranged for the chain of dependent operations from one step's voltage to the next: a
/// step's linear solution v = (alpha + beta J) / (1 - beta J') with J = offset - (2 q_r0 - q_r1 / 2) / h +
/// slope v is affine in the previous step's voltage (through its current's share of alpha and its residual
/// charge q_r = qa + cr v), v_k+1 = E + F v_k, and E and F are formed from what was known a step earlier: one
/// multiply-add stands between two steps' voltages.
__attribute__((target_clones("arch=x86-64-v3", "default"))) int
close_predicted_steps(int from, int len, const block_law_view& b, double beta, double inv_h, double reach_v, const double* __restrict port_j,
                      std::ptrdiff_t ld, double* __restrict free_v, double* __restrict j, double* __restrict v_out, double& qr0_io,
                      double& qr1_io)
{
    const double* __restrict offset = b.offset;
    const double* __restrict inv_den = b.inv_den;
    const double* __restrict v_pred = b.v_pred;
    const double* __restrict f2 = b.f2;
    const double* __restrict thr = b.thr;
    const double* __restrict slope = b.slope;
    const double* __restrict qa = b.qa;
    const double* __restrict cr = b.cr;
    const double two_inv_h = 2.0 * inv_h, half_inv_h = 0.5 * inv_h;
    double qr0 = qr0_io, qr1 = qr1_io;
    int k = from;
    // The first step directly: J's known part, then the linear solution.
    double known = offset[k - 1] - (2.0 * qr0 - 0.5 * qr1) * inv_h;
    double v = (free_v[k - 1] + beta * known) * inv_den[k - 1];
    double alpha_next = k < len ? free_v[k] : 0.0; // the next step's alpha without this step's current
    for (;;) {
        const int i = k - 1;
        const double dv = v - v_pred[i];
        v_out[i] = v;
        // Within Newton's tolerance of the law, or not (a NaN fails the test and goes to the Newton).
        if (!(dv * dv * f2[i] <= thr[i] && std::fabs(dv) <= reach_v)) break;
        const double jk = known + slope[i] * v;
        j[k] = jk;
        const double qr_k = qa[i] + cr[i] * v;
        if (k == len) {
            qr1 = qr0;
            qr0 = qr_k;
            ++k;
            break;
        }
        const double* __restrict col = port_j + static_cast<std::ptrdiff_t>(k) * ld;
        // The next step (index k) as E + F v, E and F free of v: its known part is c_next - 2 cr v / h, its
        // alpha is alpha_next + col[k] jk.
        const double c_next = offset[k] + half_inv_h * qr0 - two_inv_h * qa[i];
        const double e = inv_den[k] * alpha_next + inv_den[k] * (col[k] * known + beta * c_next);
        const double f = inv_den[k] * (col[k] * slope[i] - beta * two_inv_h * cr[i]);
        const double v_next = e + f * v;
        const double known_next = c_next - two_inv_h * cr[i] * v;
        // The step after next: its alpha with this step's current (read before the update below stores it).
        const double alpha_after = k + 1 < len ? free_v[k + 1] + col[k + 1] * jk : 0.0;
        // From a multiple of 8 at or below k: every step then updates the same whole vectors, so a step's loads
        // meet the last step's stores whole (from k itself they straddle them, which defeats store
        // forwarding). Column k is zero in the rows before k - 1, and row k - 1 (this step's own alpha) is
        // not read again.
        for (int r = k & ~7; r < len; ++r) free_v[r] += col[r] * jk;
        qr1 = qr0;
        qr0 = qr_k;
        known = known_next;
        v = v_next;
        alpha_next = alpha_after;
        ++k;
    }
    qr0_io = qr0;
    qr1_io = qr1;
    return k;
}
} // namespace

rf_integrator::rf_integrator(const state_space& ss, int input, const junction_law& junction, const station_source& stations,
                             double reference_hz, const rf_settings& st)
    : m_src(&stations), m_law(junction), m_fref(reference_hz)
{
    detail::require_above("solver.newton_tolerance_v", st.newton_tolerance_v, 0.0, 1e-3, "V");
    detail::require_range("reference carrier", reference_hz, 1e3, 1e9, "Hz");
    if (input < 0 || input >= ss.b.cols()) throw config_error(fmt::format("rf_integrator: input {} does not exist", input));
    m_tol = st.newton_tolerance_v;
    m_predict = st.predict_steps;
    m_c_lin = ss.port_linear_capacitance_f;
    m_charge = junction.cj0_f > 0.0;
    for (std::size_t s = 0; s < stations.size(); ++s) {
        m_ratio.push_back(stations.carrier_hz(s) / reference_hz);
        const double r = m_ratio.back();
        m_cycle_step_phasor.push_back(std::polar(1.0, two_pi * (r - std::floor(r))));
    }
    set_grid(st.steps_per_cycle);
    set_network(ss, input);
    m_x = Eigen::VectorXd::Zero(ss.states());
    m_z = Eigen::VectorXd::Zero(ss.states() + 8 * static_cast<Eigen::Index>(stations.size()));
}

void rf_integrator::set_grid(int steps_per_cycle)
{
    detail::require_range("solver.steps_per_cycle", steps_per_cycle, 8.0, 4096.0);
    if (steps_per_cycle % 2 != 0) throw config_error(fmt::format("solver.steps_per_cycle = {}: must be even", steps_per_cycle));
    m_n = steps_per_cycle;
    m_h = 1.0 / (m_fref * m_n);
    m_block = std::min(m_n, max_block_steps);
    m_wh.clear();
    for (std::size_t s = 0; s < m_src->size(); ++s) m_wh.push_back(two_pi * m_src->carrier_hz(s) * m_h);
    // e^{j 2 pi ratio tau0} at each block's start tau0 (cycles), per station.
    m_block_phasor.clear();
    for (std::size_t s = 0; s < m_src->size(); ++s)
        for (int k0 = 0; k0 < m_n; k0 += m_block) {
            double ph = m_ratio[s] * static_cast<double>(k0) / m_n;
            ph -= std::floor(ph);
            m_block_phasor.push_back(std::polar(1.0, two_pi * ph));
        }
    m_ref_phasor.clear();
    for (int k = 1; k <= m_n; ++k) m_ref_phasor.push_back(std::polar(1.0, -two_pi * static_cast<double>(k) / m_n));
    m_hist.assign(3 * static_cast<std::size_t>(m_n), 0.0);
    m_hist_free.assign(3 * static_cast<std::size_t>(m_n), 0.0);
    m_sens.assign(static_cast<std::size_t>(m_n), 0.0);
    m_prev.assign(static_cast<std::size_t>(m_n), phase_point{});
    for (auto* b : {&m_bl.v_pred, &m_bl.offset, &m_bl.slope, &m_bl.inv_den, &m_bl.f2, &m_bl.thr, &m_bl.qa, &m_bl.cr})
        b->assign(static_cast<std::size_t>(m_block), 0.0);
    m_jb = Eigen::VectorXd::Zero(m_block + 1);
    m_free = Eigen::VectorXd::Zero(m_block);
    m_y = Eigen::VectorXd::Zero(m_block);
}

rf_integrator::phase_point rf_integrator::newton_phase_point(double v, double beta) const noexcept
{
    const double g = m_g0_s + bdf2_gain * m_cr0_f / m_h;
    return {v, m_i0 + bdf2_gain * m_qr0 / m_h - g * v, 1.0 / (1.0 - beta * g)};
}

void rf_integrator::reset_history()
{
    m_hist_last = 0;
    m_hist_cycles = 0;
    m_closing_wait = 0;
    m_low_cycles = 0;
    std::fill(m_hist.begin(), m_hist.end(), m_v);
    std::fill(m_sens.begin(), m_sens.end(), 0.0);
    // Every phase's Newton start: the law linearised at the last solution (beta as in run_cycle).
    std::fill(m_prev.begin(), m_prev.end(), newton_phase_point(m_v, m_port.j(0, 1)));
}

void rf_integrator::set_network(const state_space& ss, int input)
{
    if (input < 0 || input >= ss.b.cols()) throw config_error(fmt::format("rf_integrator: input {} does not exist", input));
    const int n = ss.states();
    m_w0.clear();
    m_w1.clear();
    // Augmented exponential for the junction current, linear over the step: [A b_j 0; 0 0 1/h; 0 0 0].
    {
        Eigen::MatrixXd m = Eigen::MatrixXd::Zero(n + 2, n + 2);
        m.topLeftCorner(n, n) = ss.a;
        m.block(0, n, n, 1) = ss.bj;
        m(n, n + 1) = 1.0 / m_h;
        const Eigen::MatrixXd e = balanced_exp(Eigen::MatrixXd(m * m_h));
        m_phi = e.topLeftCorner(n, n);
        const Eigen::VectorXd gam0 = e.block(0, n, n, 1);     // int e^{A(h-s)} b_j ds
        const Eigen::VectorXd gam1 = e.block(0, n + 1, n, 1); // int e^{A(h-s)} b_j s/h ds
        m_g0 = gam0 - gam1;
        m_g1 = gam1;
    }
    // Per station: [A B 0; 0 jw 1; 0 0 jw] gives W0 and W1 (see the header).
    for (std::size_t s = 0; s < m_src->size(); ++s) {
        const double w = two_pi * m_src->carrier_hz(s);
        Eigen::MatrixXcd m = Eigen::MatrixXcd::Zero(n + 2, n + 2);
        m.topLeftCorner(n, n) = ss.a.cast<std::complex<double>>();
        m.block(0, n, n, 1) = ss.b.col(input).cast<std::complex<double>>();
        m(n, n) = std::complex<double>(0.0, w);
        m(n + 1, n + 1) = std::complex<double>(0.0, w);
        m(n, n + 1) = 1.0;
        const Eigen::MatrixXcd e = balanced_exp(Eigen::MatrixXcd(m * std::complex<double>(m_h, 0.0)));
        m_w0.emplace_back(e.block(0, n, n, 1));
        m_w1.emplace_back(e.block(0, n + 1, n, 1));
    }
    // State-level responses over a block (tabulate projects them on each row): Phi^k, Phi^d g0, Phi^d g1 and,
    // per station and Taylor power q, X_q,k = sum_{i<k} Phi^{k-1-i} V_q,i by the recursion X_q,k = Phi X_q,k-1 + V_q,k-1, with
    // V_q,i = r^i (sigma_i^q W0 + (sigma_{i+1}^q - sigma_i^q) / h W1), r = e^{jwh}, sigma_i = i / N.
    m_resp.phi_pow.assign(static_cast<std::size_t>(m_block) + 1, Eigen::MatrixXd::Identity(n, n));
    for (int k = 1; k <= m_block; ++k) m_resp.phi_pow[static_cast<std::size_t>(k)] = m_phi * m_resp.phi_pow[static_cast<std::size_t>(k) - 1];
    m_resp.g0_pow.resize(n, m_block);
    m_resp.g1_pow.resize(n, m_block);
    m_resp.g0_pow.col(0) = m_g0;
    m_resp.g1_pow.col(0) = m_g1;
    for (int d = 1; d < m_block; ++d) {
        m_resp.g0_pow.col(d) = m_phi * m_resp.g0_pow.col(d - 1);
        m_resp.g1_pow.col(d) = m_phi * m_resp.g1_pow.col(d - 1);
    }
    {
        const Eigen::MatrixXcd phi_c = m_phi.cast<std::complex<double>>();
        auto sigma_pow = [&](int i, int q) { return std::pow(static_cast<double>(i) / m_n, q); };
        m_resp.source.assign(4 * m_src->size(), Eigen::MatrixXcd::Zero(n, m_block + 1));
        for (std::size_t s = 0; s < m_src->size(); ++s)
            for (int q = 0; q < 4; ++q) {
                Eigen::MatrixXcd& x = m_resp.source[4 * s + static_cast<std::size_t>(q)];
                for (int i = 0; i < m_block; ++i) {
                    const std::complex<double> r = std::polar(1.0, static_cast<double>(i) * m_wh[s]);
                    x.col(i + 1).noalias() = phi_c * x.col(i);
                    x.col(i + 1) += r * (sigma_pow(i, q) * m_w0[s] + ((sigma_pow(i + 1, q) - sigma_pow(i, q)) / m_h) * m_w1[s]);
                }
            }
    }
    // The port, and the state after a whole block and after the cycle's last (possibly shorter) block.
    m_port = tabulate(ss.port_c, Eigen::VectorXd::Constant(1, ss.port_d(input)), Eigen::VectorXd::Constant(1, ss.port_dj), m_block, false);
    const Eigen::MatrixXd eye = Eigen::MatrixXd::Identity(n, n);
    const Eigen::VectorXd zero = Eigen::VectorXd::Zero(n);
    m_end = tabulate(eye, zero, zero, m_block, true);
    const int last = last_block_steps();
    m_end_last = last == m_block ? m_end : tabulate(eye, zero, zero, last, true);
}

void rf_integrator::retune(const state_space& ss, int input, const Eigen::VectorXd& x, std::span<const output_row> outputs, int steps_per_cycle)
{
    if (ss.states() != m_x.size() || x.size() != m_x.size())
        throw config_error(fmt::format("rf_integrator::retune: a network of {} states and a state of {} entries for an integrator of {}",
                                       ss.states(), x.size(), m_x.size()));
    if (outputs.size() != m_outs.size())
        throw config_error(fmt::format("rf_integrator::retune: {} output rows for {} outputs", outputs.size(), m_outs.size()));
    if (ss.port_linear_capacitance_f != m_c_lin)
        throw config_error("rf_integrator::retune: the junction's linear capacitance changed");
    const bool regrid = steps_per_cycle != 0 && steps_per_cycle != m_n;
    if (regrid) {
        const double h_old = m_h;
        set_grid(steps_per_cycle);
        // BDF2's older charge point moved to one new step before the last solution, on the line through the
        // two it holds (first order for the one step that uses it).
        m_qr1 = m_qr0 - (m_qr0 - m_qr1) * m_h / h_old;
    }
    set_network(ss, input);
    for (std::size_t o = 0; o < outputs.size(); ++o)
        m_outs[o] = output_tables(outputs[o].c, outputs[o].d_u, outputs[o].d_j, m_out_use[o], m_out_stations[o]);
    m_x = x;
    if (regrid) reset_history();
}

rf_integrator::row_tables rf_integrator::tabulate(const Eigen::MatrixXd& c, const Eigen::VectorXd& d_u, const Eigen::VectorXd& d_j,
                                                  int length, bool last_only) const
{
    // Row r of c at local step end k (1..length) after a block start x_b, j_0 and the envelope's Taylor
    // coefficients P_q (q = 0..3, in units of sigma = local step / N) times the carrier phasor p at the block
    // start:
    //   c x_k = c Phi^k x_b + Re(sum_q p P_q c X_q,k) + sum_{i<k} c Phi^{k-1-i} g0 j_i + sum_{1<=i<=k} c Phi^{k-i} g1 j_i,
    // plus d_u u_k (u_k = Re(p r^k sum_q P_q sigma_k^q) per station, r = e^{jwh}) and d_j j_k; the state-level
    // responses Phi^k, Phi^d g0,1 and X_q,k are m_resp's (set_network).
    const auto n = m_phi.rows();
    const auto rows = c.rows();
    const auto ns = static_cast<Eigen::Index>(m_w0.size());
    const Eigen::Index cols = n + 8 * ns;
    const Eigen::Index out_rows = last_only ? rows : length;
    row_tables t;
    t.m = Eigen::MatrixXd::Zero(out_rows, cols);
    t.j = Eigen::MatrixXd::Zero(out_rows, length + 1);
    const Eigen::MatrixXd cg0 = c * m_resp.g0_pow, cg1 = c * m_resp.g1_pow; // rows x K: c Phi^d g0, c Phi^d g1
    std::vector<Eigen::MatrixXcd> cs(static_cast<std::size_t>(4 * ns));     // rows x (K + 1): c X_q,k per station
    for (std::size_t sq = 0; sq < cs.size(); ++sq) cs[sq] = c.cast<std::complex<double>>() * m_resp.source[sq];
    const int first = last_only ? length : 1;
    for (int k = first; k <= length; ++k) {
        const auto kk = static_cast<std::size_t>(k);
        const double sigma = static_cast<double>(k) / m_n;
        for (Eigen::Index r = 0; r < rows; ++r) {
            const Eigen::Index at = last_only ? r : k - 1;
            t.m.row(at).head(n) = c.row(r) * m_resp.phi_pow[kk];
            for (int i = 0; i <= k; ++i) {
                double g = 0.0;
                if (i < k) g += cg0(r, k - 1 - i);
                if (i >= 1) g += cg1(r, k - i);
                if (i == k) g += d_j[r];
                t.j(at, i) = g;
            }
            for (Eigen::Index s = 0; s < ns; ++s) {
                const auto su = static_cast<std::size_t>(s);
                const std::complex<double> direct = d_u[r] * std::polar(1.0, static_cast<double>(k) * m_wh[su]);
                double sq = 1.0; // sigma^q
                for (int q = 0; q < 4; ++q, sq *= sigma) {
                    const std::complex<double> acc = direct * sq + cs[su * 4 + static_cast<std::size_t>(q)](r, k);
                    t.m(at, n + 4 * s + q) = acc.real();
                    t.m(at, n + 4 * ns + 4 * s + q) = -acc.imag();
                }
            }
        }
    }
    return t;
}

rf_integrator::row_tables rf_integrator::output_tables(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use,
                                                      std::size_t stations) const
{
    const Eigen::VectorXd du = Eigen::VectorXd::Constant(1, d_u), dj = Eigen::VectorXd::Constant(1, d_j);
    row_tables full = tabulate(c, du, dj, m_block, false);
    if (use == output_use::every_step) return full;
    const int last = last_block_steps();
    const row_tables tail = last == m_block ? full : tabulate(c, du, dj, last, false);
    if (use == output_use::phasors) {
        // Rows 2s and 2s + 1 (a whole block) and 2S + 2s, 2S + 2s + 1 (the cycle's last block): the real and
        // imaginary parts of sum_k e^{-j w_s k h} (row k of the block's tables), the block's DFT at station s
        // relative to the block's start.
        const auto ss = static_cast<Eigen::Index>(stations);
        row_tables t;
        t.m = Eigen::MatrixXd::Zero(4 * ss, full.m.cols());
        t.j = Eigen::MatrixXd::Zero(4 * ss, m_block + 1);
        for (int part = 0; part < 2; ++part) {
            const row_tables& b = part == 0 ? full : tail;
            const int len = part == 0 ? m_block : last;
            for (Eigen::Index s = 0; s < ss; ++s) {
                const Eigen::Index r = 2 * ss * part + 2 * s;
                for (int k = 1; k <= len; ++k) {
                    const std::complex<double> e = std::polar(1.0, -static_cast<double>(k) * m_wh[static_cast<std::size_t>(s)]);
                    t.m.row(r) += e.real() * b.m.row(k - 1);
                    t.m.row(r + 1) += e.imag() * b.m.row(k - 1);
                    t.j.row(r).head(len + 1) += e.real() * b.j.row(k - 1);
                    t.j.row(r + 1).head(len + 1) += e.imag() * b.j.row(k - 1);
                }
            }
        }
        return t;
    }
    row_tables t;
    t.m = Eigen::MatrixXd::Zero(3, full.m.cols());
    t.j = Eigen::MatrixXd::Zero(3, m_block + 1);
    t.m.row(0) = full.m.colwise().sum();
    t.j.row(0) = full.j.colwise().sum();
    t.m.row(1) = tail.m.colwise().sum() - 0.5 * tail.m.row(last - 1);
    t.j.row(1).head(last + 1) = tail.j.colwise().sum() - 0.5 * tail.j.row(last - 1);
    t.m.row(2) = tail.m.row(last - 1);
    t.j.row(2).head(last + 1) = tail.j.row(last - 1);
    // Held transposed, so that each of the three is a contiguous column for run_cycle's dot products.
    t.m.transposeInPlace();
    t.j.transposeInPlace();
    return t;
}

int rf_integrator::add_output(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use)
{
    if (use == output_use::phasors) throw config_error("rf_integrator::add_output: a phasor output is added by add_phasor_output");
    return add_any_output(c, d_u, d_j, use, 0);
}

int rf_integrator::add_phasor_output(const Eigen::RowVectorXd& c, double d_u, double d_j, std::size_t stations)
{
    if (stations < 1 || stations > m_src->size())
        throw config_error(fmt::format("rf_integrator::add_phasor_output: {} stations of {}", stations, m_src->size()));
    return add_any_output(c, d_u, d_j, output_use::phasors, stations);
}

int rf_integrator::add_any_output(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use, std::size_t stations)
{
    if (c.size() != m_x.size())
        throw config_error(fmt::format("rf_integrator: an output row has {} entries for {} states", c.size(), m_x.size()));
    m_outs.push_back(output_tables(c, d_u, d_j, use, stations));
    m_out_use.push_back(use);
    m_out_stations.push_back(stations);
    m_out_phasor.emplace_back(stations);
    m_yp.resize(std::max<Eigen::Index>(m_yp.size(), 2 * static_cast<Eigen::Index>(stations)));
    m_out_mean.push_back(0.0);
    m_out_peak.push_back(0.0);
    m_out_last.push_back(0.0);
    return static_cast<int>(m_outs.size()) - 1;
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
    m_env_valid = false;
    m_v = 0.0;
    m_j = 0.0;
    const junction_values jv = m_law.evaluate(0.0);
    m_qr0 = m_charge ? jv.charge_c : 0.0;
    m_qr1 = m_qr0;
    m_i0 = jv.current_a;
    m_g0_s = jv.conductance_s;
    m_cr0_f = m_charge ? jv.capacitance_f - m_c_lin : 0.0;
    reset_history(); // the first cycles are predicted by v = 0
    std::fill(m_out_last.begin(), m_out_last.end(), 0.0);
    m_stats = {};
}

std::complex<double> rf_integrator::envelope_at_cycle(std::size_t s, long long c) const noexcept
{
    // Before t = 0 the envelope is continued by its value at 0 (the carrier ramp starts at 0 there).
    return m_src->envelope(s, c > 0 ? static_cast<double>(c) / m_fref : 0.0);
}

template <bool Breakdown, bool Charge, bool SquareRoot>
double rf_integrator::solve_junction(double alpha, double beta, double v, double& j1)
{
    // F(v) = v - alpha - beta J(v), J the step's junction current as a function of its end voltage;
    // beta <= 0 (passive network) makes F increasing, so the root is bracketed by the signs seen.
    const double inv_h = 1.0 / m_h;
    const double hist = charge_history(); // the step's known charge terms
    double lo = -std::numeric_limits<double>::infinity();
    double hi = std::numeric_limits<double>::infinity();
    for (int it = 0; it < 200; ++it) {
        ++m_stats.newton_iterations;
        const junction_values jv = detail::evaluate_law<Breakdown, Charge, SquareRoot>(m_law, v);
        double jj = jv.current_a;
        double dj = jv.conductance_s;
        double qr = 0.0, cr = 0.0;
        if constexpr (Charge) {
            // BDF2 on the residual charge (see the header): L-stable, no undamped step-to-step mode.
            qr = jv.charge_c - m_c_lin * v;
            cr = jv.capacitance_f - m_c_lin;
            jj += inv_h * (bdf2_gain * qr - hist);
            dj += bdf2_gain * inv_h * cr;
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
        // Newton's remaining error after this update is about |F''| dv^2 / (2 F'), F'' = -beta (I'' + 1.5 C_r' / h).
        double curvature = jv.conductance_slope_s_per_v;
        if constexpr (Charge) curvature += bdf2_gain * inv_h * jv.capacitance_slope_f_per_v;
        if (std::fabs(dv) <= m_tol ||
            (0.5 * curvature_growth * std::fabs(beta * curvature) * dv * dv <= m_tol * df &&
             std::fabs(dv) * m_law.inv_emission_voltage <= closing_reach_nvt)) {
            // Converged: the update is below the tolerance; carry the law to vn linearly.
            j1 = jj + dj * dv;
            m_qr1 = m_qr0;
            m_qr0 = qr + cr * dv;
            m_i0 = jv.current_a + jv.conductance_s * dv;
            m_g0_s = jv.conductance_s;
            m_cr0_f = cr;
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
    // The junction law's switches fixed at compile time, as junction_law::evaluate dispatches them.
    if (m_law.cj0_f > 0.0) {
        if (m_law.square_root_grading)
            m_law.breakdown ? run_cycle<true, true, true>(out) : run_cycle<false, true, true>(out);
        else
            m_law.breakdown ? run_cycle<true, true, false>(out) : run_cycle<false, true, false>(out);
    } else {
        m_law.breakdown ? run_cycle<true, false, true>(out) : run_cycle<false, false, true>(out);
    }
}

template <bool Breakdown, bool Charge, bool SquareRoot>
void rf_integrator::run_cycle(std::span<double> out)
{
    const Eigen::Index n = m_x.size();
    const std::size_t ns = m_src->size();
    const auto ens = static_cast<Eigen::Index>(ns);
    const std::size_t c = m_cycle;
    // Envelope samples at cycles c-1 .. c+2 and the cubic through them in tau (cycles since c):
    // e(tau) = a0 + a1 tau + a2 tau^2 + a3 tau^3 (4-point Lagrange on tau = -1, 0, 1, 2).
    // The envelope is complex (I + jQ; real for an AM station): the tables are real-linear in the phasor p P.
    // (A member, sized once: a local array of std::complex would be zeroed every cycle.)
    if (m_cubic.size() != 4 * ns) m_cubic.resize(4 * ns);
    std::complex<double>* const cubic = m_cubic.data();
    const auto cc = static_cast<long long>(c);
    if (m_env.size() != 4 * ns) {
        m_env.assign(4 * ns, {});
        m_env_valid = false;
    }
    const bool next = m_env_valid && cc == m_env_cycle + 1;
    for (std::size_t s = 0; s < ns; ++s) {
        std::complex<double>* e = &m_env[4 * s];
        if (next) {
            e[0] = e[1];
            e[1] = e[2];
            e[2] = e[3];
            e[3] = envelope_at_cycle(s, cc + 2);
        } else {
            for (int q = 0; q < 4; ++q) e[q] = envelope_at_cycle(s, cc - 1 + q);
        }
    }
    m_env_cycle = cc;
    m_env_valid = true;
    for (std::size_t s = 0; s < ns; ++s) {
        const std::complex<double>* e = &m_env[4 * s];
        const std::complex<double> e0 = e[0], e1 = e[1], e2 = e[2], e3 = e[3];
        cubic[4 * s] = e1;
        cubic[4 * s + 1] = -e0 / 3.0 - 0.5 * e1 + e2 - e3 / 6.0;
        cubic[4 * s + 2] = 0.5 * e0 - e1 + 0.5 * e2;
        cubic[4 * s + 3] = (e3 - e0) / 6.0 + 0.5 * (e1 - e2);
    }
    // Each station's carrier phasor at this cycle's start: by recurrence from the last cycle's, set exactly
    // from the cycle count every phasor_anchor_cycles cycles (and after a jump), so rounding cannot build up
    // (measured: the recurrence drifts about 1e-16 rad per cycle).
    const int blocks = (m_n + m_block - 1) / m_block;
    if (m_cycle_phasor.size() != ns || static_cast<long long>(c) != m_phasor_cycle || c % phasor_anchor_cycles == 0) {
        m_cycle_phasor.resize(ns);
        for (std::size_t s = 0; s < ns; ++s) {
            const double cyc = static_cast<double>(c) * m_ratio[s];
            m_cycle_phasor[s] = std::polar(1.0, two_pi * (cyc - std::floor(cyc)));
        }
    }
    const std::size_t no = m_outs.size();
    for (std::size_t o = 0; o < no; ++o) {
        m_out_mean[o] = 0.5 * m_out_last[o];
        std::fill(m_out_phasor[o].begin(), m_out_phasor[o].end(), std::complex<double>{});
    }
    m_rot.resize(ns);
    const double inv_h = 1.0 / m_h;
    int closed = 0; // steps of this cycle closed on the prediction
    for (int k0 = 0; k0 < m_n; k0 += m_block) {
        const int len = std::min(m_block, m_n - k0);
        const double tau0 = static_cast<double>(k0) / m_n;
        // Block input: the start state, then per station the envelope's Taylor coefficients at tau0 times the
        // carrier phasor there (the cycle start's phasor times the block's offset, both tabulated or anchored; see above).
        m_z.head(n) = m_x;
        for (std::size_t s = 0; s < ns; ++s) {
            const std::complex<double>* a = &cubic[4 * s];
            const std::complex<double> p[4] = {a[0] + tau0 * (a[1] + tau0 * (a[2] + tau0 * a[3])), a[1] + tau0 * (2.0 * a[2] + 3.0 * tau0 * a[3]),
                                 a[2] + 3.0 * tau0 * a[3], a[3]};
            const std::complex<double> rot = m_cycle_phasor[s] * m_block_phasor[s * static_cast<std::size_t>(blocks) + static_cast<std::size_t>(k0 / m_block)];
            m_rot[s] = rot;
            const auto es = static_cast<Eigen::Index>(s);
            for (int q = 0; q < 4; ++q) {
                const std::complex<double> rp = rot * p[q];
                m_z[n + 4 * es + q] = rp.real();
                m_z[n + 4 * ens + 4 * es + q] = rp.imag();
            }
        }
        // The free port voltage of every step with j_0's share; each solved current then adds its share to the
        // later steps (one multiply-add stands between a step's current and the next step's alpha).
        detail::column_major_product(m_port.m.data(), m_port.m.rows(), len, m_port.m.cols(), m_z.data(), m_free.data(), false);
        m_jb[0] = m_j;
        const double* port_j = m_port.j.data();
        const Eigen::Index port_ld = m_port.j.rows();
        for (int r = 0; r < len; ++r) m_free[r] += port_j[r] * m_j;
        // The law at every step's predicted voltage, in one vectorised pass (see the class comment). The step's
        // port response to its own current, beta, is the same at every step of a block.
        const double beta = port_j[port_ld];
        const std::size_t n_steps = static_cast<std::size_t>(m_n);
        const auto slot = [&](int back) { return m_hist.data() + static_cast<std::size_t>((m_hist_last + 3 - back) % 3) * n_steps + static_cast<std::size_t>(k0); };
        double* const hist_out = slot(2); // this cycle overwrites the oldest cycle, phase by phase after predicting it
        const auto fslot = [&](int back) {
            return m_hist_free.data() + static_cast<std::size_t>((m_hist_last + 3 - back) % 3) * n_steps + static_cast<std::size_t>(k0);
        };
        const bool closing = m_predict && m_closing_wait == 0;
        if (closing)
            linearise_block(m_law,
                            law_batch{slot(0), slot(1), slot(2), fslot(0), fslot(1), fslot(2), m_free.data(), m_sens.data() + k0,
                                      m_bl.v_pred.data(), m_bl.offset.data(), m_bl.slope.data(), m_bl.inv_den.data(), m_bl.f2.data(),
                                      m_bl.thr.data(), m_bl.qa.data(), m_bl.cr.data()},
                        law_batch_constants{len, m_hist_cycles, beta, inv_h, m_c_lin, 2.0 * m_tol, curvature_growth});
        std::copy(m_free.data(), m_free.data() + len, fslot(2));
        // The steps in order on the prediction; a step that fails Newton's test is solved by the Newton (from its
        // linear solution) and the closing resumes after it.
        const double reach_v = closing_reach_nvt / m_law.inv_emission_voltage;
        const block_law_view view{m_bl.v_pred.data(), m_bl.offset.data(), m_bl.slope.data(), m_bl.inv_den.data(),
                                  m_bl.f2.data(), m_bl.thr.data(),    m_bl.qa.data(),    m_bl.cr.data()};
        for (int k = 1; k <= len; ++k) {
            if (closing) {
                const int stop = close_predicted_steps(k, len, view, beta, inv_h, reach_v, port_j, port_ld, m_free.data(), m_jb.data(), hist_out, m_qr0, m_qr1);
                closed += stop - k;
                if (stop > len) break;
                k = stop;
            }
            const auto i_k = static_cast<std::size_t>(k - 1);
            phase_point& pp = m_prev[static_cast<std::size_t>(k0) + i_k];
            // The Newton's start: the closing's linear solution, or (closing off) this step's linear relation
            // solved with the law linearised at this phase's last Newton solution (no law evaluation).
            // A closing solution far from its prediction (beyond the Newton's own reach many times over) shows a
            // prediction gone astray (an aliased phase): then the phase point's start is the better one.
            const double pp_guess = (m_free[i_k] + beta * (pp.offset_a - charge_history() * inv_h)) * pp.inv_den;
            double guess = closing && std::fabs(hist_out[i_k] - m_bl.v_pred[i_k]) <= 40.0 * reach_v ? hist_out[i_k] : pp_guess;
            if (!std::isfinite(guess)) guess = pp.v;
            double j1 = 0.0;
            hist_out[i_k] = solve_junction<Breakdown, Charge, SquareRoot>(m_free[k - 1], beta, guess, j1);
            pp = newton_phase_point(hist_out[i_k], beta);
            m_sens[static_cast<std::size_t>(k0) + i_k] = pp.inv_den;
            m_jb[k] = j1;
            const double* col = port_j + k * port_ld;
            for (int r = k; r < len; ++r) m_free[r] += col[r] * j1;
        }
        m_v = hist_out[len - 1];
        m_j = m_jb[len];
        if (m_phasors)
            for (int k = 1; k <= len; ++k) {
                const std::complex<double> e = m_ref_phasor[static_cast<std::size_t>(k0 + k - 1)];
                m_v_phasor += hist_out[k - 1] * e;
                m_j_phasor += m_jb[k] * e;
            }
        const auto jb = m_jb.head(len + 1);
        for (std::size_t o = 0; o < no; ++o) {
            const row_tables& t = m_outs[o];
            if (m_out_use[o] == output_use::phasors) {
                // The block's DFT relative to its start (tables), turned to absolute time by e^{-j w_s t_b}.
                const auto two_s = static_cast<Eigen::Index>(2 * m_out_stations[o]);
                const Eigen::Index at = k0 + len == m_n ? two_s : 0;
                detail::column_major_product(t.m.data() + at, t.m.rows(), two_s, t.m.cols(), m_z.data(), m_yp.data(), false);
                detail::column_major_product(t.j.data() + at, t.j.rows(), two_s, len + 1, jb.data(), m_yp.data(), true);
                for (std::size_t s = 0; s < m_out_stations[o]; ++s)
                    m_out_phasor[o][s] += std::conj(m_rot[s]) * std::complex<double>(m_yp[static_cast<Eigen::Index>(2 * s)], m_yp[static_cast<Eigen::Index>(2 * s + 1)]);
                continue;
            }
            if (m_out_use[o] == output_use::cycle_mean) {
                const bool last_block = k0 + len == m_n;
                const Eigen::Index r = last_block ? 1 : 0;
                m_out_mean[o] += t.m.col(r).dot(m_z) + t.j.col(r).head(len + 1).dot(jb);
                if (last_block) m_out_last[o] = t.m.col(2).dot(m_z) + t.j.col(2).head(len + 1).dot(jb);
                continue;
            }
            detail::column_major_product(t.m.data(), t.m.rows(), len, t.m.cols(), m_z.data(), m_y.data(), false);
            detail::column_major_product(t.j.data(), t.j.rows(), len, len + 1, jb.data(), m_y.data(), true);
            for (int k = 1; k <= len; ++k) {
                const double y = m_y[k - 1];
                const bool cycle_end = k0 + k == m_n;
                m_out_mean[o] += cycle_end ? 0.5 * y : y;
                m_out_peak[o] = std::max(m_out_peak[o], std::fabs(y));
                if (!out.empty()) out[o * static_cast<std::size_t>(m_n) + static_cast<std::size_t>(k0 + k - 1)] = y;
                if (cycle_end) m_out_last[o] = y;
            }
        }
        const row_tables& e = len == m_block ? m_end : m_end_last;
        detail::column_major_product(e.m.data(), e.m.rows(), n, e.m.cols(), m_z.data(), m_x.data(), false);
        detail::column_major_product(e.j.data(), e.j.rows(), n, len + 1, jb.data(), m_x.data(), true);
    }
    for (std::size_t s = 0; s < ns; ++s) m_cycle_phasor[s] *= m_cycle_step_phasor[s];
    m_phasor_cycle = static_cast<long long>(c) + 1;
    m_stats.steps += static_cast<std::size_t>(m_n);
    for (std::size_t o = 0; o < no; ++o) m_out_mean[o] /= m_n;
    if (!std::isfinite(m_v) || !m_x.allFinite())
        throw integration_error(fmt::format("the receiver's state became non-finite near t = {:.9g} s", time_s()), time_s());
    m_stats.predicted_steps += static_cast<std::size_t>(closed);
    if (m_closing_wait > 0) {
        --m_closing_wait;
    } else if (m_predict) {
        m_low_cycles = closed < closing_min_share * m_n ? std::min(m_low_cycles + 1, closing_low_cycles) : 0;
        if (m_low_cycles == closing_low_cycles) m_closing_wait = closing_retry_cycles;
    }
    m_hist_last = (m_hist_last + 1) % 3;
    m_hist_cycles = std::min(m_hist_cycles + 1, 3);
    ++m_cycle;
}

} // namespace galena
