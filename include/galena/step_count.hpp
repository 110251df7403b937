/// The phase-locked integrator's step count: N steps per carrier cycle chosen from the error of the
/// rectified level, estimated with the output frozen at its DC under the integrator's own discretisation.
/// Apart from the stepper (cycle_integrator.hpp), which it knows only through junction_theta().
#pragma once

#include "galena/circuit.hpp"

#include <span>

namespace galena {

/// Rectified DC at the output of a one_junction_network driven by an unmodulated carrier of peak
/// carrier_peak_v, computed with the output held at that DC (no ripple): the root V of
/// I(V) = G_dc V, where I(V) is the mean series current in the junction's periodic steady state under
/// the same trapezoidal discretisation with N steps per cycle. Comparing it at N and 2N estimates the
/// integrator's relative error in the detected level. V, V; throws integration_error if no root is found.
/// @param carrier_hz carrier frequency, Hz; carrier_peak_v its peak, V; steps_per_cycle N, >= 4
template <int Dim>
[[nodiscard]] double frozen_output_dc_v(const one_junction_network<Dim>& net, double carrier_hz, double carrier_peak_v,
                                        int steps_per_cycle);

/// The chosen step count and its estimated error.
struct step_choice {
    int steps_per_cycle = 0;      ///< N
    double estimated_error = 0.0; ///< max over the levels of |V(N) - V(2N)| / |V(2N)|
    bool met = false;             ///< the tolerance was met below max_steps
};

/// Chooses N from the ladder 16, 20, 24, 32, 40, 48, 64, 80, 96, 128, ... up to max_steps: the first N at
/// which the rectified-DC error estimate |V(N) - V(2N)| / |V(2N)| is within `tolerance` at every level in
/// carrier_levels_v and also at the next rung (so that a lucky sign change of the error is not taken).
/// @param carrier_levels_v envelope levels to check (e.g. the trough, mean and crest), V; each > 0
/// @param tolerance relative error of the detected level; (0, 0.1]
template <int Dim>
[[nodiscard]] step_choice choose_steps_per_cycle(const one_junction_network<Dim>& net, double carrier_hz,
                                                 std::span<const double> carrier_levels_v, double tolerance,
                                                 int max_steps = 2048);

} // namespace galena
