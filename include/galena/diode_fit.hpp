/// A diode's DC model fitted from a few measured points: the measurement files, the explicit Lambert-W
/// diode current with series and shunt resistance, a weighted least-squares fit on log current with honest
/// uncertainties, and the fit's text forms (JSON, a [diode] TOML section).
#pragma once

#include <array>
#include <cstddef>
#include <filesystem>
#include <nlohmann/json.hpp>
#include <optional>
#include <string>
#include <vector>

namespace galena {

/// Principal branch W0 of the Lambert W function at x = exp(ln_x), for any real ln_x (no overflow).
/// Below ln_x = 600 it is Boost.Math's lambert_w0; above, w + ln w = ln_x is solved by Newton's method
/// in the log domain (exp(ln_x) would overflow), to full double precision.
[[nodiscard]] double lambert_w0_of_exp(double ln_x);

/// The DC model of a diode: Shockley junction with a shunt (leakage) resistance across it and a series
/// resistance in front of both (the circuit of `diode_params` without charge and breakdown).
///   I = Is (exp(vj / (n Vt)) - 1) + vj / Rsh,  V = vj + I Rs
struct diode_dc_model {
    double saturation_current_a = 1e-8;   ///< Is, A; > 0
    double emission_coefficient = 1.0;    ///< n; > 0
    double series_resistance_ohm = 0.0;   ///< Rs, ohm; >= 0
    double leakage_resistance_ohm = 1e300; ///< Rsh, ohm; > 0 (infinity: no shunt)
    double thermal_voltage_v = 0.025693;  ///< Vt = kT/q, V; > 0

    /// Terminal current, A, at terminal voltage V, from the explicit Lambert-W form (series resistance:
    /// Electronics Letters 36(4), 2000; with a shunt: Solar Energy Materials & Solar Cells 81, 2004):
    ///   G = 1 + Rs/Rsh, u = (V + Rs Is) / G, w = W0((Rs Is / (G n Vt)) exp(u / (n Vt))),
    ///   vj = u - n Vt w,  I = Is exp(vj / (n Vt)) - Is + vj / Rsh.
    /// Rs = 0 gives vj = V directly. Finite for every finite V (lambert_w0_of_exp guards the overflow).
    [[nodiscard]] double current_a(double voltage_v) const;
    /// Junction voltage vj, V, at terminal voltage V (same form).
    [[nodiscard]] double junction_voltage_v(double voltage_v) const;
    /// Terminal voltage, V, at which the current is `current_a` (inverse of current_a; any sign).
    [[nodiscard]] double voltage_at_current_v(double current_a) const;
};

/// One measured point, converted to terminal voltage and current.
struct diode_point {
    double voltage_v = 0.0;      ///< terminal voltage across the diode, V (negative = reverse)
    double current_a = 0.0;      ///< current, A (same sign as the voltage)
    double relative_error = 0.0; ///< the point's relative uncertainty (its weight is 1 / relative_error); 0 = not given (weight 1)
    std::size_t line = 0;        ///< line in the file, for messages
};

/// What a measurement file holds.
struct diode_measurements {
    std::filesystem::path file;
    std::string form;                         ///< "voltage_v,current_a" or "supply_v,series_ohm,diode_v"
    std::vector<diode_point> points;          ///< ascending voltage, no duplicates, no zero voltage
    std::optional<double> temperature_c;      ///< from a `# temperature_c = T` line
    std::optional<double> meter_input_ohm;    ///< from a `# meter_input_ohm = R` line (ladder form)
    std::size_t last_line = 0;                ///< last data line, for messages
};

/// Most points one measurement file may hold.
inline constexpr std::size_t diode_points_limit = 10000;

/// Parses a measurement file (CSV, comma-separated, one header row; `#` starts a comment line; blank lines
/// are skipped). Two forms, told apart by the header:
/// - `voltage_v,current_a`: direct points; forward points (V > 0) need I > 0, reverse points (V < 0) I < 0.
/// - `supply_v,series_ohm,diode_v`: a supply drives the diode through a known resistor and the diode
///   voltage is read; I = (supply_v - diode_v) / series_ohm - diode_v / R_meter, where R_meter (the
///   meter's input resistance, ohm) comes from a `# meter_input_ohm = R` line (none: no correction).
/// Either form may add a fourth/third column `relative_error` (> 0): the point's relative uncertainty.
/// A `# temperature_c = T` line gives the measurement temperature, deg C.
/// Rules: voltages strictly ascending (no duplicates), no zero voltage, every value a finite plain number.
/// Throws config_error "FILE:LINE: field = value: rule" (one line) on any breach.
[[nodiscard]] diode_measurements parse_diode_measurements(const std::string& text, const std::filesystem::path& file);
/// Reads and parses a measurement file. Throws config_error (unreadable file included).
[[nodiscard]] diode_measurements load_diode_measurements(const std::filesystem::path& file);

/// Index of each parameter in the fit's log-parameter vector theta = (ln Is, ln n, ln Rs, ln Rsh).
enum fit_index : std::size_t { fit_is = 0, fit_n = 1, fit_rs = 2, fit_rsh = 3 };
inline constexpr std::size_t fit_parameter_count = 4;

/// One fitted parameter.
struct fitted_parameter {
    std::string key;          ///< the scenario key (saturation_current_a, ...)
    double value = 0.0;       ///< SI units; series 0 / leakage infinity when fixed as not identifiable
    double sigma = 0.0;       ///< standard error, SI units (delta method: value x sigma of its logarithm); NaN when not identifiable
    double ci95_low = 0.0;    ///< 95 % interval, exp(ln value -+ t sigma_ln) (Student t); NaN when not identifiable
    double ci95_high = 0.0;
    bool identifiable = true;
    std::string reason;       ///< why it is not identifiable (empty otherwise)
};

/// A derived figure with its standard error (delta method over the fitted covariance).
struct derived_figure {
    double value = 0.0;
    double sigma = 0.0;       ///< NaN when it cannot be given
};

/// Residual of one point.
struct fit_residual {
    double voltage_v = 0.0;
    double measured_a = 0.0;
    double fitted_a = 0.0;
    double log_residual = 0.0; ///< ln(fitted / measured) (~ relative error)
    double weight = 1.0;
    std::size_t line = 0;
};

/// Settings of the fit.
struct diode_fit_options {
    /// A free parameter whose logarithm's standard error exceeds this is not identifiable from the data
    /// (its 1-sigma band spans more than a factor e^limit): it is fixed (Rs at 0, Rsh at infinity) and the
    /// rest is fitted again.
    double identifiable_sigma_ln = 1.0;
    int max_iterations = 500;
    double confidence = 0.95; ///< level of the reported intervals; (0, 1)
};

/// Everything a fit found.
struct diode_fit_result {
    std::filesystem::path file;
    double temperature_c = 25.0;
    std::string temperature_source;          ///< "command line", "file" or "default"
    double thermal_voltage_v = 0.0;
    std::array<fitted_parameter, fit_parameter_count> parameters; ///< Is, n, Rs, Rsh
    std::array<bool, fit_parameter_count> free{};       ///< fitted (true) or fixed
    /// Covariance of theta = (ln Is, ln n, ln Rs, ln Rsh) at the optimum; rows and columns of fixed
    /// parameters are zero.
    std::array<std::array<double, fit_parameter_count>, fit_parameter_count> covariance_ln{};
    std::size_t points = 0;
    std::size_t degrees_of_freedom = 0;      ///< points - free parameters
    double t_quantile = 0.0;                 ///< Student t quantile for the two-sided interval
    double residual_rms = 0.0;               ///< sqrt(sum w^2 r^2 / points), r = ln(I_fit / I_meas) (~ relative)
    double residual_scale = 0.0;             ///< sqrt(sum w^2 r^2 / dof): the scatter the covariance is scaled by
    derived_figure voltage_at_100ua_v;       ///< terminal voltage at +100 uA, V
    derived_figure slope_mv_per_decade;      ///< n Vt ln 10 x 1000, mV per decade of current
    derived_figure zero_bias_resistance_ohm; ///< n Vt / Is, ohm (the junction's small-signal resistance at zero bias)
    std::vector<fit_residual> residuals;
    int iterations = 0;
    bool converged = false;
    std::string start;                       ///< the starting values, for the report

    /// The fitted model.
    [[nodiscard]] diode_dc_model model() const;
};

/// Fits Is, n, Rs and Rsh to the points by weighted least squares on ln|I| with the Lambert-W form:
/// Levenberg-Marquardt on theta = (ln Is, ln n, ln Rs, ln Rsh) (bounds Is, n, Rs, Rsh > 0 by the
/// reparametrisation), analytic Jacobian by implicit differentiation, QR-solved damped steps.
/// Starting values: the steepest straight-line fit of ln I against V over three adjacent forward points
/// (Is, n), the excess voltage at the largest current (Rs), the reverse slope (Rsh).
/// Rsh is fitted only when reverse points exist; a parameter the data cannot pin down (see
/// diode_fit_options) is fixed and flagged. Covariance: s^2 (J^T J)^-1 with s^2 = RSS / dof; intervals
/// with Student t quantiles.
/// @param temperature_c measurement temperature, deg C; [-60, 150]
/// Throws config_error naming the file and the last line when the points cannot support the fit (fewer
/// than parameters + 1, no forward points) or the fit fails to converge.
[[nodiscard]] diode_fit_result fit_diode(const diode_measurements& data, double temperature_c, std::string temperature_source,
                                         const diode_fit_options& opt = {});

/// fit.json: flat keys in SI units (saturation_current_a, emission_coefficient, series_resistance_ohm,
/// leakage_resistance_ohm, each with _sigma, _ci95_low, _ci95_high twins, null when not identifiable;
/// zero_bias_resistance_ohm, voltage_at_100ua_v, slope_mv_per_decade with _sigma; residual_rms,
/// residual_scale, degrees_of_freedom, t_quantile_95, temperature_c, not_identifiable {key: reason},
/// covariance_ln (4 x 4, order parameter_order), residuals [...]).
[[nodiscard]] nlohmann::json to_json(const diode_fit_result& r);

/// Covariance and values read back from a fit.json (for the ranking).
struct fit_uncertainty {
    std::array<double, fit_parameter_count> value{};                 ///< Is, n, Rs, Rsh, SI units
    std::array<bool, fit_parameter_count> free{};
    std::array<std::array<double, fit_parameter_count>, fit_parameter_count> covariance_ln{};
    std::vector<std::string> not_identifiable;                       ///< keys
};
/// Reads a fit.json written by to_json. Throws config_error naming the file and the key on any mismatch.
[[nodiscard]] fit_uncertainty load_fit_uncertainty(const std::filesystem::path& fit_json);

/// diode.toml: a [diode] section a scenario can use through `diode.file` (the fitted Is, n, Rs, leakage,
/// the measurement temperature as temperature_c and nominal_temperature_c; junction capacitance 0 and
/// no breakdown, which a DC fit cannot see), with comments naming the source file and the uncertainties.
[[nodiscard]] std::string to_diode_toml(const diode_fit_result& r);

/// The fit's plot data: measured points and residuals (fit-points.dat) and the fitted curve over the
/// measured range (fit-curve.dat), whitespace-separated with a header comment.
[[nodiscard]] std::string fit_points_data(const diode_fit_result& r);
[[nodiscard]] std::string fit_curve_data(const diode_fit_result& r, int samples = 400);

} // namespace galena
