/// Several AM stations summed at the antenna: each an am_source (its own carrier, level, modulation index
/// and programme) with a name. The integrators sample it; none of the carriers need lie on their grid.
#pragma once

#include "galena/signal.hpp"

#include <string>
#include <vector>

namespace galena {

/// One station as the scenario gives it.
struct station_params {
    std::string name = "station";  ///< label for reports
    double carrier_hz = 1.0e6;     ///< Hz; [1e4, 1e8]
    double field_v_per_m = 10e-3;  ///< RMS field strength of the unmodulated carrier at the antenna, V/m; (0, 100]
    double modulation_index = 0.3; ///< m; [0, 1]
    const station_params& validate() const;
};

/// The antenna EMF: the sum of the stations' AM waves. Holds the am_sources by value (each points at its
/// programme, which must outlive this object).
class station_source {
public:
    /// Adds a station; `emf` is its AM wave at the antenna's EMF (carrier peak = sqrt(2) x field x height).
    void add(std::string name, const am_source& emf) { m_names.push_back(std::move(name)), m_sources.push_back(emf); }
    [[nodiscard]] std::size_t size() const noexcept { return m_sources.size(); }
    [[nodiscard]] const am_source& station(std::size_t k) const { return m_sources.at(k); }
    [[nodiscard]] const std::string& name(std::size_t k) const { return m_names.at(k); }
    /// The summed EMF at simulation time t_s, V.
    [[nodiscard]] double voltage(double t_s) const noexcept
    {
        double u = 0.0;
        for (const auto& s : m_sources) u += s.voltage(t_s);
        return u;
    }

private:
    std::vector<std::string> m_names;
    std::vector<am_source> m_sources;
};

} // namespace galena
