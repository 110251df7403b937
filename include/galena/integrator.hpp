/// Steppers and the stepping loop. Knows nothing of circuits: a System provides
///   static constexpr int dim; using vec; using mat;
///   void rhs(const vec& x, double t, vec& f) const;
///   void rhs_jacobian(const vec& x, double t, vec& f, mat& J) const;
///   vec tolerance_scale() const;   // per-state multiplier of the absolute tolerance
/// An observer is called once per accepted step with the step's Hermite data:
///   obs(t0, x0, f0, t1, x1, f1)
#pragma once

#include "galena/error.hpp"

#include <Eigen/Dense>
#include <algorithm>
#include <cmath>
#include <cstddef>
#include <fmt/format.h>

namespace galena {

/// Cubic Hermite through (x0, f0) at t0 and (x1, f1) at t1, evaluated at t (the steppers' dense output;
/// t outside [t0, t1] extrapolates). Works for scalars and Eigen vectors.
template <class T>
[[nodiscard]] T hermite_value(double t, double t0, const T& x0, const T& f0, double t1, const T& x1, const T& f1)
{
    const double h = t1 - t0;
    const double s = (t - t0) / h;
    const double s2 = s * s;
    const double s3 = s2 * s;
    return (2.0 * s3 - 3.0 * s2 + 1.0) * x0 + ((s3 - 2.0 * s2 + s) * h) * f0 + (3.0 * s2 - 2.0 * s3) * x1 +
           ((s3 - s2) * h) * f1;
}

/// Accuracy and limits of the adaptive stepper.
struct step_settings {
    double relative_tolerance = 1e-3;   ///< rtol, dimensionless; [1e-10, 1e-1]
    double absolute_tolerance_v = 1e-6; ///< atol for voltage states, V (currents scaled by the system); > 0
    double max_step_s = 1e-7;           ///< h_max, s: keep below a sixth of the carrier period
    double min_step_s = 1e-16;          ///< step-size floor, s; below it integration_error is thrown
    double initial_step_s = 1e-9;       ///< first trial step, s
    int max_newton_iterations = 8;      ///< per implicit stage; [2, 50]
    double newton_tolerance = 0.05;     ///< Newton stops when its estimated remaining error (weighted) is below this
};

/// Work counters of an integration.
struct step_stats {
    std::size_t accepted = 0;
    std::size_t rejected_error = 0;    ///< steps rejected by the error test
    std::size_t rejected_newton = 0;   ///< steps retried after a Newton failure
    std::size_t newton_iterations = 0;
    std::size_t jacobians = 0;
};

/// TR-BDF2 (Bank et al. 1985; analysis and error estimator of Hosea & Shampine 1996): a one-step,
/// L-stable, second-order ESDIRK with gamma = 2 - sqrt(2), a trapezoidal stage to t + gamma h and a
/// BDF2 stage to t + h sharing one iteration matrix I - d h J (d = gamma / 2). The embedded third-order
/// weights give the local error estimate, which is filtered through (I - d h J)^-1 as Shampine
/// recommends for stiff problems. Full Newton with the analytic Jacobian at every iteration.
/// Dense output is the cubic Hermite through (x_n, f_n, x_{n+1}, f_{n+1}).
/// Error weights are atol_i + rtol * max(|x_i|, largest |x_i| so far): the relative tolerance is taken
/// against each state's amplitude, not its instantaneous value, so that a carrier-rate waveform crossing
/// zero does not force micro-steps (the same idea as a circuit simulator's reltol on the signal's scale).
/// Not for systems larger than a few dozen states (dense LU per iteration).
template <class System>
class tr_bdf2 {
public:
    using vec = typename System::vec;
    using mat = typename System::mat;
    static constexpr int dim = System::dim;

    tr_bdf2(const System& sys, const step_settings& s) : m_sys(&sys), m_s(s), m_scale(sys.tolerance_scale()) {}

    /// Sets the initial state x0 at time t0_s.
    void initialize(const vec& x0, double t0_s)
    {
        m_x = x0;
        m_t = t0_s;
        m_h = m_s.initial_step_s;
        m_sys->rhs(m_x, m_t, m_f);
        m_have_prev = false;
        m_xp = m_x;
        m_fp = m_f;
        m_hp = 0.0;
        m_peak = x0.cwiseAbs();
    }

    /// Integrates up to exactly t_end_s (the last step is shortened to land on it).
    /// Throws integration_error at a Newton failure below the step floor.
    template <class Observer>
    void advance_to(double t_end_s, Observer&& obs)
    {
        while (m_t < t_end_s) {
            double h = std::min({m_h, m_s.max_step_s, t_end_s - m_t});
            const bool last = (h == t_end_s - m_t);
            vec x1;
            vec f1;
            double err = 0.0;
            bool rejected = false;
            while (true) {
                if (h < m_s.min_step_s)
                    throw integration_error(
                        fmt::format("the solver could not advance at t = {:.9g} s: step {:.3g} s is below the floor "
                                    "{:.3g} s (Newton failures {}); the component values are probably far out of "
                                    "range (check the diode's Is, n and series resistance)",
                                    m_t, h, m_s.min_step_s, m_stats.rejected_newton),
                        m_t);
                if (!attempt(h, x1, f1, err)) {
                    ++m_stats.rejected_newton;
                    h *= 0.25;
                    continue;
                }
                if (err <= 1.0) break;
                ++m_stats.rejected_error;
                rejected = true;
                h *= std::max(0.1, 0.9 * std::cbrt(1.0 / err));
            }
            const double t1 = (last && h == t_end_s - m_t) ? t_end_s : m_t + h;
            obs(m_t, m_x, m_f, t1, x1, f1);
            m_xp = m_x;
            m_fp = m_f;
            m_hp = t1 - m_t;
            m_have_prev = true;
            m_x = x1;
            m_f = f1;
            m_peak = m_peak.cwiseMax(x1.cwiseAbs());
            m_t = t1;
            ++m_stats.accepted;
            // Standard elementary controller; no growth right after a rejection.
            const double grow = 0.9 * std::cbrt(1.0 / std::max(err, 1e-10));
            m_h = h * std::clamp(grow, 0.2, rejected ? 1.0 : 4.0);
        }
    }

    [[nodiscard]] const vec& state() const noexcept { return m_x; }
    [[nodiscard]] double time() const noexcept { return m_t; }
    [[nodiscard]] const step_stats& stats() const noexcept { return m_stats; }

private:
    static constexpr double gamma = 2.0 - 1.4142135623730950488;
    static constexpr double d = 0.5 * gamma;
    static constexpr double w = 1.4142135623730950488 / 4.0;
    // Error weights b - b_hat, with b = (w, w, d) and b_hat = ((1-w)/3, (3w+1)/3, d/3).
    static constexpr double e1 = (4.0 * w - 1.0) / 3.0;
    static constexpr double e2 = -1.0 / 3.0;
    static constexpr double e3 = 2.0 * d / 3.0;

    [[nodiscard]] double weighted_norm(const vec& v, const vec& ref_a, const vec& ref_b) const
    {
        double sum = 0.0;
        for (int i = 0; i < dim; ++i) {
            const double mag = std::max({std::fabs(ref_a[i]), std::fabs(ref_b[i]), m_peak[i]});
            const double wgt = m_s.absolute_tolerance_v * m_scale[i] + m_s.relative_tolerance * mag;
            const double r = v[i] / wgt;
            sum += r * r;
        }
        return std::sqrt(sum / dim);
    }

    /// Solves z - d h f(t, z) = rhs by Newton from z (in/out). Returns false on failure.
    bool solve_stage(double t, double h, const vec& rhs, vec& z, vec& fz, mat& minv)
    {
        double prev = 0.0;
        for (int it = 0; it < m_s.max_newton_iterations; ++it) {
            mat jac;
            m_sys->rhs_jacobian(z, t, fz, jac);
            ++m_stats.jacobians;
            ++m_stats.newton_iterations;
            const vec g = z - d * h * fz - rhs;
            // Closed-form inverse: Eigen's fixed-size inverse is cofactor-based for dim <= 4, cheaper than
            // a pivoted LU for these 1..4-state systems; the matrix is I - d h J with d h J bounded by the
            // stiffness, and is never singular for a dissipative circuit.
            minv = (mat::Identity() - (d * h) * jac).inverse();
            const vec dz = minv * g;
            if (!dz.allFinite()) return false;
            z -= dz;
            const double nrm = weighted_norm(dz, z, rhs);
            // Hairer & Wanner's stopping rule: with contraction rate theta, the remaining error is about
            // theta / (1 - theta) * |dz|; the first iteration is judged on |dz| alone.
            if (it == 0) {
                if (nrm <= 1e-3 * m_s.newton_tolerance) return z.allFinite();
            } else {
                const double theta = nrm / prev;
                if (theta >= 1.0 && it >= 2) return false;
                if (theta < 1.0 && theta / (1.0 - theta) * nrm <= m_s.newton_tolerance) return z.allFinite();
            }
            prev = nrm;
        }
        return false;
    }

    /// Predicts x(t + dt) by extrapolating the previous step's cubic Hermite (Euler on the first step).
    [[nodiscard]] vec predict(double dt) const
    {
        if (!m_have_prev) return m_x + dt * m_f;
        return hermite_value<vec>(m_hp + dt, 0.0, m_xp, m_fp, m_hp, m_x, m_f);
    }

    bool attempt(double h, vec& x1, vec& f1, double& err)
    {
        mat lu;
        // Stage 2: trapezoidal rule to t + gamma h.
        const vec k1 = m_f;
        const vec r2 = m_x + (d * h) * k1;
        vec z = predict(gamma * h);
        vec fz;
        if (!solve_stage(m_t + gamma * h, h, r2, z, fz, lu)) return false;
        const vec k2 = (z - r2) / (d * h);
        // Stage 3: BDF2 to t + h.
        const vec r3 = m_x + (w * h) * (k1 + k2);
        x1 = m_have_prev ? predict(h) : (m_x + (z - m_x) / gamma).eval();
        if (!solve_stage(m_t + h, h, r3, x1, f1, lu)) return false;
        const vec k3 = (x1 - r3) / (d * h);
        const vec est = lu * ((e1 * h) * k1 + (e2 * h) * k2 + (e3 * h) * k3);
        err = weighted_norm(est, m_x, x1);
        f1 = k3;
        return std::isfinite(err);
    }

    const System* m_sys;
    step_settings m_s;
    vec m_scale;
    vec m_x;
    vec m_f;
    vec m_xp;
    vec m_peak; // largest |x_i| seen so far: the scale of the relative tolerance
    vec m_fp;
    double m_hp = 0.0;
    bool m_have_prev = false;
    double m_t = 0.0;
    double m_h = 0.0;
    step_stats m_stats;
};

} // namespace galena
