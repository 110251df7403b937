// Compiled as C++17 (see CMakeLists.txt): Boost 1.74 uBLAS uses std::allocator members removed in C++20.
#include "galena/reference_integrator.hpp"

#include <algorithm>
#include <boost/numeric/odeint.hpp>
#include <cmath>
#include <utility>

namespace galena {

std::vector<double> reference_solve(const erased_system& sys, const std::vector<double>& x0, double t0_s, double dt_s,
                                    std::size_t count, int index, double rtol, double atol, double max_step_s)
{
    namespace ode = boost::numeric::odeint;
    using uvec = boost::numeric::ublas::vector<double>;
    using umat = boost::numeric::ublas::matrix<double>;
    const int n = sys.dim;
    auto rhs = [&sys, n](const uvec& x, uvec& dxdt, double t) {
        std::vector<double> xv(x.begin(), x.end()), fv(static_cast<std::size_t>(n));
        sys.rhs(xv.data(), t, fv.data());
        std::copy(fv.begin(), fv.end(), dxdt.begin());
    };
    auto jac = [&sys, n](const uvec& x, umat& j, double t, uvec& dfdt) {
        const auto un = static_cast<std::size_t>(n);
        std::vector<double> xv(x.begin(), x.end()), fv(un), jm(un * un), fp(un), fm(un);
        sys.rhs_jacobian(xv.data(), t, fv.data(), jm.data());
        // Explicit time derivative by a central difference (the source is smooth in t).
        const double ht = 1e-12 + 1e-9 * std::abs(t);
        sys.rhs(xv.data(), t + ht, fp.data());
        sys.rhs(xv.data(), t - ht, fm.data());
        for (std::size_t r = 0; r < un; ++r) {
            dfdt[r] = (fp[r] - fm[r]) / (2.0 * ht);
            for (std::size_t c = 0; c < un; ++c) j(r, c) = jm[r * un + c];
        }
    };
    uvec x(static_cast<std::size_t>(n));
    std::copy(x0.begin(), x0.end(), x.begin());
    auto stepper = ode::make_dense_output(atol, rtol, max_step_s, ode::rosenbrock4<double>());
    std::vector<double> out;
    out.reserve(count);
    std::vector<double> times(count);
    for (std::size_t k = 0; k < count; ++k) times[k] = t0_s + static_cast<double>(k) * dt_s;
    ode::integrate_times(stepper, std::make_pair(rhs, jac), x, times.begin(), times.end(), std::min(dt_s, max_step_s),
                         [&out, index](const uvec& s, double) { out.push_back(s[static_cast<std::size_t>(index)]); });
    return out;
}

} // namespace galena
