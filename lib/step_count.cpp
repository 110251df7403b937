#include "galena/step_count.hpp"

#include "galena/constants.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/error.hpp"
#include "galena/junction_law_eval.hpp"
#include "galena/monotone_root.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <array>
#include <boost/math/tools/roots.hpp>
#include <cmath>
#include <cstdint>
#include <fmt/format.h>
#include <limits>
#include <map>
#include <utility>
#include <vector>

// Step-count selection: the rectified DC with the output frozen at that DC.
namespace galena {

namespace {

/// h / (R Cj0) above which the junction relaxes within a fraction of a step: its periodic steady state is
/// reached in a cycle and the trapezoidal rule's junction mode is undamped (see frozen_junction).
constexpr double stiff_junction_ratio = 8.0;

/// The ladder of step counts tried by choose_steps_per_cycle.
constexpr std::array<int, 24> step_ladder{16,  20,  24,  32,  40,  48,   64,   80,   96,   128,  160,  192,
                                          256, 320, 384, 512, 640, 768, 1024, 1280, 1536, 2048, 3072, 4096};



/// The junction alone, driven by u_k = E cos(2 pi k / n) through R with its far end held at vout, under the
/// integrator's discretisation (the same theta as cycle_integrator would use).
class frozen_junction {
public:
    frozen_junction(const junction_law& law, double r_ohm, double period_s, double theta, double e_v, int n)
        : m_law(law), m_inv_r(1.0 / r_ohm), m_wa(theta * period_s / n), m_wb((1.0 - theta) * period_s / n), m_e(e_v), m_n(n),
          m_stiff(!(law.cj0_f > 0.0) || period_s / n > stiff_junction_ratio * r_ohm * law.cj0_f),
          m_u(static_cast<std::size_t>(n) + 1), m_v(static_cast<std::size_t>(n) + 1)
    {
        for (int k = 0; k <= n; ++k) m_u[static_cast<std::size_t>(k)] = e_v * std::cos(two_pi * k / n);
    }

    /// Mean series current over one cycle of the periodic steady state, A.
    double mean_current(double vout)
    {
        // Periodic steady state. Start on the quasi-static point (the charge ignored), then plain cycles: the
        // junction's R Cj is normally far below the period. A stiff junction (R Cj < h/8) has settled after
        // two cycles except for the trapezoidal rule's undamped mode (-1)^k, which the mean over an even
        // number of steps does not see. A slow one that has not settled is found by shooting on the cycle map.
        const double drive0 = (m_u[0] - vout) * m_inv_r;
        auto f0 = [&](double v) {
            const junction_values r = detail::evaluate_inline(m_law, v);
            return std::pair{r.current_a + m_inv_r * v - drive0, r.conductance_s + m_inv_r};
        };
        double v0 = detail::solve_increasing(f0, 0.0, 1e-3 + 0.1 * m_e, iterations);
        const double tol = 1e-12 * (m_e + std::fabs(vout));
        // Fixed-point iteration of the cycle map, with Aitken's delta-squared extrapolation every third
        // cycle for slow junctions (R Cj comparable with the period).
        std::array<double, 3> hist{};
        int have = 0;
        for (int it = 0; it < 120; ++it) {
            const double v1 = march(v0, vout);
            if (std::fabs(v1 - v0) <= tol || (m_stiff && it >= 1) || !std::isfinite(v1)) {
                v0 = std::isfinite(v1) ? v1 : v0;
                break;
            }
            hist[static_cast<std::size_t>(have++)] = v0;
            v0 = v1;
            if (have == 3) {
                const double d1 = hist[2] - hist[1], d2 = v0 - hist[2]; // three consecutive iterates
                const double den = d2 - d1;
                const double acc = v0 - d2 * d2 / den;
                if (den != 0.0 && std::isfinite(acc) && std::fabs(acc - v0) < 10.0 * std::fabs(d2) + tol) v0 = acc;
                have = 0;
            }
        }
        march(v0, vout);
        double sum = 0.0;
        for (int k = 0; k < m_n; ++k) sum += m_u[static_cast<std::size_t>(k)] - m_v[static_cast<std::size_t>(k)] - vout;
        return sum * m_inv_r / m_n; // trapezoid over a periodic cycle: the plain sum
    }

    std::size_t iterations = 0;

private:
    /// One cycle from junction voltage v0; returns the voltage at its end.
    double march(double v0, double vout)
    {
        m_v[0] = v0;
        junction_values r0 = detail::evaluate_inline(m_law, v0);
        for (int k = 1; k <= m_n; ++k) {
            const auto i = static_cast<std::size_t>(k);
            const double j0 = (m_u[i - 1] - m_v[i - 1] - vout) * m_inv_r - r0.current_a;
            const double rhs = r0.charge_c + m_wb * j0 + m_wa * (m_u[i] - vout) * m_inv_r;
            auto f = [&](double v) {
                const junction_values r = detail::evaluate_inline(m_law, v);
                return std::pair{r.charge_c + m_wa * (r.current_a + m_inv_r * v) - rhs,
                                 r.capacitance_f + m_wa * (r.conductance_s + m_inv_r)};
            };
            m_v[i] = detail::solve_increasing(f, m_v[i - 1], 1e-3 + 0.1 * m_e, iterations);
            r0 = detail::evaluate_inline(m_law, m_v[i]);
        }
        return m_v[static_cast<std::size_t>(m_n)];
    }

    junction_law m_law;
    double m_inv_r, m_wa, m_wb, m_e;
    int m_n;
    bool m_stiff;
    std::vector<double> m_u, m_v;
};

} // namespace

template <int Dim>
double frozen_output_dc_v(const one_junction_network<Dim>& net, double carrier_hz, double e_v, int n)
{
    detail::require_above("carrier level", e_v, 0.0, 1e6, "V");
    detail::require_above("signal.carrier_hz", carrier_hz, 0.0, 1e9, "Hz");
    if (n < 4) throw config_error(fmt::format("frozen_output_dc_v: {} steps per cycle; at least 4 are needed", n));
    const double g_dc = net.dc_load_conductance_s();
    const double theta = junction_theta(net);
    frozen_junction fj(net.junction, net.series_ohm, 1.0 / carrier_hz, theta, e_v, n);
    // I(V) - G V decreases in V: positive at V = -E (the junction forward-biased all cycle), at most zero at
    // V = E (reverse-biased all cycle).
    auto balance = [&](double v) { return fj.mean_current(v) - g_dc * v; };
    std::uintmax_t iters = 200;
    double v = std::numeric_limits<double>::quiet_NaN();
    try {
        const auto r = boost::math::tools::toms748_solve(balance, -e_v, e_v, boost::math::tools::eps_tolerance<double>(46), iters);
        v = 0.5 * (r.first + r.second);
    } catch (const std::exception&) {
        // Left as NaN: reported below.
    }
    if (!std::isfinite(v))
        throw integration_error(fmt::format("the rectified level at a {:.4g} V carrier could not be found", e_v), 0.0);
    return v;
}

template <int Dim>
step_choice choose_steps_per_cycle(const one_junction_network<Dim>& net, double carrier_hz, std::span<const double> levels,
                                   double tolerance, int max_steps)
{
    detail::require_above("solver.dc_tolerance", tolerance, 0.0, 0.1);
    std::map<std::pair<std::size_t, int>, double> cache;
    auto level_v = [&](std::size_t l, int n) {
        const auto key = std::pair{l, n};
        const auto it = cache.find(key);
        if (it != cache.end()) return it->second;
        const double v = frozen_output_dc_v(net, carrier_hz, levels[l], n);
        cache.emplace(key, v);
        return v;
    };
    auto error_at = [&](int n) {
        double worst = 0.0;
        for (std::size_t l = 0; l < levels.size(); ++l) {
            const double fine = level_v(l, 2 * n);
            const double coarse = level_v(l, n);
            const double scale = std::max(std::fabs(fine), 1e-300);
            worst = std::max(worst, std::fabs(coarse - fine) / scale);
        }
        return worst;
    };
    step_choice best;
    for (std::size_t i = 0; i + 1 < step_ladder.size() && step_ladder[i] <= max_steps; ++i) {
        const int n = step_ladder[i];
        const double e = error_at(n);
        best = {n, e, false};
        if (e > tolerance) continue;
        if (error_at(step_ladder[i + 1]) <= tolerance) return {n, e, true};
    }
    return best;
}

template double frozen_output_dc_v<1>(const one_junction_network<1>&, double, double, int);
template double frozen_output_dc_v<2>(const one_junction_network<2>&, double, double, int);
template double frozen_output_dc_v<3>(const one_junction_network<3>&, double, double, int);
template step_choice choose_steps_per_cycle<1>(const one_junction_network<1>&, double, std::span<const double>, double, int);
template step_choice choose_steps_per_cycle<2>(const one_junction_network<2>&, double, std::span<const double>, double, int);
template step_choice choose_steps_per_cycle<3>(const one_junction_network<3>&, double, std::span<const double>, double, int);

} // namespace galena
