/// The production integrator: the trapezoidal rule on a grid locked to the carrier phase (N equal steps
/// per carrier cycle), for a linear network fed through one nonlinear junction. Newton's method is
/// linearised at predicted junction voltages, all of a cycle's nonlinear evaluations run as one
/// vectorised batch, and what remains per step is a short linear recurrence. Knows nothing of the detector:
/// it sees a junction law and the matrices of a linear network (one_junction_network, circuit module).
#pragma once

#include "galena/circuit.hpp"

#include <Eigen/Core>
#include <cstddef>
#include <span>
#include <vector>

namespace galena {

/// Settings of the phase-locked integrator.
struct cycle_settings {
    int steps_per_cycle = 32;       ///< N, trapezoidal steps per carrier cycle; even, [8, 4096]
    /// Newton stops when its estimated remaining error (the linearisation error 0.5 |F''| dv^2 / F') is
    /// below this fraction of `voltage_scale_v`; (0, 1e-3]
    double newton_tolerance = 1e-8;
    double voltage_scale_v = 1.0;   ///< scale of the junction voltage swing (the carrier peak), V; > 0
    /// Linearised passes over a cycle before the per-step safeguarded solve; [0, 100]. 0 solves every cycle
    /// step by step (slow: for checking the batched path).
    int max_batched_passes = 4;
    /// Weight theta of the step end in the junction's charge equation, [0.5, 1]; 0 = junction_theta()
    /// (the trapezoidal 1/2). Other values are for experiments: they make the method first order.
    double junction_theta = 0.0;
};

/// The weight theta of the step end in the junction's charge equation q1 - q0 = h (theta j1 + (1 - theta) j0):
/// 1/2 (the trapezoidal rule) with junction charge, 1 without (the algebraic constraint then holds at each
/// step end). Measured: theta = 1 (backward Euler on the junction) is first order and costs about 700x in
/// the waveform error at 32 steps per cycle on a 20k source (DEVELOPERS.md), even where R Cj0 << h and the
/// trapezoidal junction mode is barely damped; that mode is not excited by a consistent start, and its
/// (-1)^k pattern cancels over an even number of steps per cycle.
template <int Dim>
[[nodiscard]] double junction_theta(const one_junction_network<Dim>& net);

/// Work counters of the phase-locked integrator.
struct cycle_stats {
    std::size_t cycles = 0;                   ///< carrier cycles advanced
    std::size_t batched_passes = 0;           ///< linearised Newton passes (>= cycles once histories exist)
    std::size_t scalar_cycles = 0;            ///< cycles solved step by step (start-up, or after a failed pass)
    std::size_t scalar_newton_iterations = 0; ///< iterations of the per-step safeguarded Newton
};

/// Trapezoidal rule, N equal steps per carrier cycle, on a one_junction_network.
///
/// Method. Each step solves the trapezoidal equations in charge form (charge-conserving, as circuit
/// simulators do): q(v1) - q(v0) = h/2 (j0 + j1) for the junction, y1 = P y0 + p (u0 - v0 + u1 - v1) for
/// the network, with P = (I - hA/2)^-1 (I + hA/2) and p = (I - hA/2)^-1 b h / (2R) computed once. The
/// network is eliminated exactly, so each step is one scalar equation in v1. With no junction charge the
/// algebraic constraint is imposed at every step end instead of being averaged.
///
/// Newton. The junction voltage at phase k is predicted from the two previous cycles (2 v[c-1] - v[c-2]).
/// The junction law is evaluated at all N predicted voltages at once (vectorised), which turns each
/// step's Newton update into an affine map of the previous step's state: a cycle is then one linear
/// recurrence. A step is accepted when the linearisation error 0.5 |F''| dv^2 / F' of its update is within
/// the tolerance; otherwise the cycle is linearised again at the new voltages (a Newton pass over the whole
/// cycle) and, after `max_batched_passes`, solved step by step with a bracketed, safeguarded Newton.
///
/// Accuracy. On a phase-locked uniform grid the trapezoidal rule sums the periodic junction current
/// almost spectrally, so the rectified level converges faster than second order once the conduction
/// pulse is resolved (measured 21x and 7x per doubling of N on the benchmark circuit; DEVELOPERS.md).
/// Choose N with choose_steps_per_cycle() (step_count.hpp).
///
/// Not for: sources that are not a carrier of known frequency, or networks with more than one nonlinear
/// element.
template <int Dim>
class cycle_integrator {
public:
    using vec = Eigen::Matrix<double, Dim, 1>;
    using mat = Eigen::Matrix<double, Dim, Dim>;

    /// Throws config_error for R <= 0, a carrier outside (0, 1e9] Hz or settings out of range.
    cycle_integrator(const one_junction_network<Dim>& net, double carrier_hz, const cycle_settings& s);

    /// Sets the state at t = 0: junction voltage v0_v, network state y0 and the source voltage u0_v. Without
    /// junction charge v is not a state: v0_v is then only the starting guess for the constraint's solution.
    void initialize(double v0_v, const vec& y0, double u0_v);

    /// Advances one carrier cycle. u_v holds the source voltage at the N step ends of the cycle, phases
    /// 1/N .. N/N (the cycle's start is the previous cycle's end). Throws integration_error when the
    /// solution becomes non-finite, naming the simulated time.
    void advance(std::span<const double> u_v);

    [[nodiscard]] int steps_per_cycle() const noexcept { return m_n; }
    /// Step length h = T / N, s.
    [[nodiscard]] double step_s() const noexcept { return m_h; }
    /// Simulated time at the end of the last cycle, s (cycle count times the period: never accumulated).
    [[nodiscard]] double time_s() const noexcept { return static_cast<double>(m_stats.cycles) * m_period; }

    /// Junction voltage at the N + 1 step points of the last cycle (index 0 = its start), V.
    [[nodiscard]] std::span<const double> junction_v() const noexcept { return {m_v.data(), m_v.size()}; }
    /// Output voltage c^T y at the N + 1 step points of the last cycle, V.
    [[nodiscard]] std::span<const double> output_v() const noexcept { return {m_yb.data(), m_yb.size()}; }
    /// Time derivative of the output voltage at step point k (0..N) of the last cycle, V/s (the slope the
    /// cubic Hermite dense output uses).
    [[nodiscard]] double output_slope_v_per_s(int k) const noexcept;
    /// Mean output voltage over the last cycle, V: the exact integral of the cubic Hermite dense output,
    /// h sum (y_k + y_k+1)/2 + h^2/12 (y'_0 - y'_N), divided by the period.
    [[nodiscard]] double output_mean_v() const noexcept;
    /// Network state at the end of the last cycle.
    [[nodiscard]] const vec& state() const noexcept { return m_y; }
    [[nodiscard]] const cycle_stats& stats() const noexcept { return m_stats; }
    /// The junction equation's theta in use (1/2: trapezoidal; 1: stiff junction or no junction charge).
    [[nodiscard]] double junction_theta_used() const noexcept { return m_theta; }

private:
    bool batched_cycle();
    void scalar_cycle();
    double solve_scalar_step(int k, double guess);

    one_junction_network<Dim> m_net;
    cycle_settings m_s;
    int m_n;
    double m_period;
    double m_h;
    double m_inv_r;
    double m_theta = 0.5; // junction equation: weight of the step end
    double m_wa = 0.0;    // theta h, s
    double m_wb = 0.0;    // (1 - theta) h, s
    mat m_p_mat;       // P
    vec m_p_vec;       // p
    vec m_cy;          // coefficient of y0 in the junction equation (before scaling by 1/F')
    vec m_ct_a;        // A^T c: output slope = m_ct_a . y + (c.b) (u - v) / R
    double m_pb = 0.0; // c . p
    double m_cb = 0.0; // c . b
    double m_eps_v = 0.0;

    // State at the start of the next cycle.
    double m_v0 = 0.0;
    vec m_y = vec::Zero();
    std::size_t m_history = 0; // how many past cycles m_h1 / m_h2 hold (0, 1, 2)

    // Per-step arrays of the current cycle, index 0 = cycle start, 1..N = step ends.
    std::vector<double> m_u, m_vp, m_cap, m_g, m_qa, m_ia, m_f2, m_thr, m_inv_den, m_cst, m_ca, m_m21, m_m22, m_pu, m_cyd;
    double m_yb_interior_sum = 0.0; // sum of the output over steps 1..N-1 of the last cycle, V
    std::vector<double> m_v, m_yb, m_ya, m_h1, m_h2;
    cycle_stats m_stats;
};

} // namespace galena
