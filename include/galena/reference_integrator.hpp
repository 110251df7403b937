/// Accuracy reference path: Boost.Odeint's rosenbrock4 (Kaps-Rentrop, order 4, L-stable) with its
/// controlled dense-output stepper, driven by the same analytic Jacobian as the production stepper.
/// Slow; for tests and benchmarks, not for rendering.
///
/// The implementation lives in a C++17 translation unit: Boost 1.74's uBLAS (which rosenbrock4 requires)
/// does not compile as C++20. This header therefore stays C++17-clean and type-erases the system.
#pragma once

#include <cstddef>
#include <functional>
#include <vector>

namespace galena {

/// A system seen through plain arrays: rhs(x, t, f) and rhs_jacobian(x, t, f, j_row_major).
struct erased_system {
    int dim = 0;
    std::function<void(const double* x, double t, double* f)> rhs;
    std::function<void(const double* x, double t, double* f, double* j_row_major)> rhs_jacobian;
};

/// Wraps any System of the integrator concept (see integrator.hpp).
template <class System>
erased_system erase_system(const System& sys)
{
    erased_system e;
    e.dim = System::dim;
    e.rhs = [&sys](const double* x, double t, double* f) {
        typename System::vec xv, fv;
        for (int i = 0; i < System::dim; ++i) xv[i] = x[i];
        sys.rhs(xv, t, fv);
        for (int i = 0; i < System::dim; ++i) f[i] = fv[i];
    };
    e.rhs_jacobian = [&sys](const double* x, double t, double* f, double* j) {
        typename System::vec xv, fv;
        typename System::mat jm;
        for (int i = 0; i < System::dim; ++i) xv[i] = x[i];
        sys.rhs_jacobian(xv, t, fv, jm);
        for (int r = 0; r < System::dim; ++r) {
            f[r] = fv[r];
            for (int c = 0; c < System::dim; ++c) j[r * System::dim + c] = jm(r, c);
        }
    };
    return e;
}

/// Samples state `index` of the solution from x0 at t0_s on the grid t0_s + k dt_s, k = 0..count-1.
/// @param max_step_s bounds the step so a carrier cannot be stepped over; > 0
std::vector<double> reference_solve(const erased_system& sys, const std::vector<double>& x0, double t0_s, double dt_s,
                                    std::size_t count, int index, double rtol, double atol, double max_step_s);

} // namespace galena
