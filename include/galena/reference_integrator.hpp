/// Accuracy reference path: Boost.Odeint's rosenbrock4 (Kaps-Rentrop, order 4, L-stable) with its
/// controlled dense-output stepper, driven by the same analytic Jacobian as the production stepper.
/// Slow; for tests and benchmarks, not for rendering.
#pragma once

#include <boost/numeric/odeint.hpp>
#include <boost/numeric/ublas/matrix.hpp>
#include <boost/numeric/ublas/vector.hpp>
#include <cstddef>
#include <vector>

namespace galena {

/// Samples the solution of `sys` from x0 at t0_s on the uniform grid t0_s + k * dt_s, k = 0..count-1,
/// with rosenbrock4 under the given tolerances. Returns sample k of state `index` in out[k].
/// @param max_step_s bounds the step so the carrier cannot be stepped over; > 0
template <class System>
std::vector<double> reference_solve(const System& sys, const typename System::vec& x0, double t0_s, double dt_s,
                                    std::size_t count, int index, double rtol, double atol, double max_step_s)
{
    namespace ode = boost::numeric::odeint;
    using uvec = boost::numeric::ublas::vector<double>;
    using umat = boost::numeric::ublas::matrix<double>;
    constexpr int n = System::dim;
    auto rhs = [&sys](const uvec& x, uvec& dxdt, double t) {
        typename System::vec xv, fv;
        for (int i = 0; i < n; ++i) xv[i] = x[i];
        sys.rhs(xv, t, fv);
        for (int i = 0; i < n; ++i) dxdt[i] = fv[i];
    };
    auto jac = [&sys](const uvec& x, umat& j, double t, uvec& dfdt) {
        typename System::vec xv, fv, fp;
        typename System::mat jm, unused;
        for (int i = 0; i < n; ++i) xv[i] = x[i];
        sys.rhs_jacobian(xv, t, fv, jm);
        // Explicit time derivative by a central difference (the source is smooth in t).
        const double ht = 1e-12 + 1e-9 * std::abs(t);
        sys.rhs(xv, t + ht, fp);
        typename System::vec fm;
        sys.rhs(xv, t - ht, fm);
        for (int r = 0; r < n; ++r) {
            dfdt[r] = (fp[r] - fm[r]) / (2.0 * ht);
            for (int c = 0; c < n; ++c) j(r, c) = jm(r, c);
        }
    };
    uvec x(n);
    for (int i = 0; i < n; ++i) x[i] = x0[i];
    auto stepper = ode::make_dense_output(atol, rtol, max_step_s, ode::rosenbrock4<double>());
    std::vector<double> out;
    out.reserve(count);
    std::vector<double> times(count);
    for (std::size_t k = 0; k < count; ++k) times[k] = t0_s + static_cast<double>(k) * dt_s;
    ode::integrate_times(stepper, std::make_pair(rhs, jac), x, times.begin(), times.end(), std::min(dt_s, max_step_s),
                         [&out, index](const uvec& s, double) { out.push_back(s[index]); });
    return out;
}

} // namespace galena
