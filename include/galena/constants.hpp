/// Physical constants in SI units: the single source of truth for every module.
#pragma once

namespace galena {

/// Boltzmann constant, J/K (exact in the 2019 SI; SI brochure, 9th ed.).
inline constexpr double boltzmann_j_per_k = 1.380649e-23;
/// Elementary charge, C (exact in the 2019 SI; SI brochure, 9th ed.).
inline constexpr double elementary_charge_c = 1.602176634e-19;
/// Offset between the Celsius and Kelvin scales, K.
inline constexpr double celsius_zero_k = 273.15;
/// pi, to double precision.
inline constexpr double pi = 3.14159265358979323846;
/// 2 pi, to double precision.
inline constexpr double two_pi = 2.0 * pi;

/// Thermal voltage kT/q, V, at an absolute temperature in kelvin (must be > 0).
[[nodiscard]] constexpr double thermal_voltage_v(double temperature_k) noexcept
{
    return boltzmann_j_per_k * temperature_k / elementary_charge_c;
}

/// Converts a temperature in degrees Celsius to kelvin.
[[nodiscard]] constexpr double kelvin_from_celsius(double temperature_c) noexcept
{
    return temperature_c + celsius_zero_k;
}

} // namespace galena
