#include "galena/diode_fit.hpp"
#include "galena/units.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <Eigen/Dense>
#include <algorithm>
#include <boost/math/distributions/students_t.hpp>
#include <boost/math/special_functions/lambert_w.hpp>
#include <cerrno>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <fmt/format.h>
#include <fstream>
#include <limits>
#include <sstream>

namespace galena {

namespace fs = std::filesystem;

namespace {
constexpr double inf = std::numeric_limits<double>::infinity();
constexpr double nan_v = std::numeric_limits<double>::quiet_NaN();
/// Above this argument exp() is close to overflow; lambert_w0_of_exp switches to the log-domain solve.
constexpr double lambert_log_switch = 600.0;
/// Current at which the reported turn-on voltage is taken, A (common practice for small-signal diodes).
constexpr double reference_current_a = 100e-6;
const std::array<const char*, fit_parameter_count> parameter_keys = {"saturation_current_a", "emission_coefficient",
                                                                      "series_resistance_ohm", "leakage_resistance_ohm"};
const std::array<const char*, fit_parameter_count> parameter_symbols = {"Is", "n", "Rs", "Rsh"};
} // namespace

double lambert_w0_of_exp(double ln_x)
{
    if (std::isnan(ln_x)) return nan_v;
    if (ln_x < lambert_log_switch) return boost::math::lambert_w0(std::exp(ln_x));
    // w e^w = x  <=>  w + ln w = ln x. Newton from the asymptote w = L - ln L (relative error < ln L / L).
    double w = ln_x - std::log(ln_x);
    for (int i = 0; i < 50; ++i) {
        const double f = w + std::log(w) - ln_x;
        const double step = f / (1.0 + 1.0 / w);
        w -= step;
        if (std::fabs(step) <= 4.0 * std::numeric_limits<double>::epsilon() * w) break;
    }
    return w;
}

double diode_dc_model::junction_voltage_v(double voltage_v) const
{
    const double a = emission_coefficient * thermal_voltage_v;
    const double rs = series_resistance_ohm;
    if (rs == 0.0) return voltage_v;
    const double g = 1.0 / leakage_resistance_ohm; // 0 for an infinite shunt
    const double big_g = 1.0 + rs * g;
    const double is = saturation_current_a;
    const double u = (voltage_v + rs * is) / big_g;
    const double ln_x = std::log(rs * is / (big_g * a)) + u / a;
    return u - a * lambert_w0_of_exp(ln_x);
}

double diode_dc_model::current_a(double voltage_v) const
{
    const double a = emission_coefficient * thermal_voltage_v;
    const double vj = junction_voltage_v(voltage_v);
    // Is (exp(vj / a) - 1) with expm1: no cancellation for small forward or reverse voltages.
    return saturation_current_a * std::expm1(std::min(vj / a, 700.0)) + vj / leakage_resistance_ohm;
}

double diode_dc_model::voltage_at_current_v(double current_a) const
{
    const double a = emission_coefficient * thermal_voltage_v;
    const double is = saturation_current_a;
    const double g = 1.0 / leakage_resistance_ohm;
    if (current_a == 0.0) return 0.0;
    // f(vj) = Is expm1(vj / a) + g vj - I is increasing; bracket its root, then safeguarded Newton.
    double lo = 0.0, hi = 0.0;
    if (current_a > 0.0) hi = a * std::log1p(current_a / is);
    else {
        if (g == 0.0 && current_a <= -is) return -inf; // an ideal junction never passes more than Is in reverse
        lo = g > 0.0 ? current_a / g : a * std::log1p(current_a / is);
    }
    auto f = [&](double v) { return is * std::expm1(v / a) + g * v - current_a; };
    double v = 0.5 * (lo + hi);
    for (int i = 0; i < 200; ++i) {
        const double fv = f(v);
        if (fv > 0.0) hi = v;
        else lo = v;
        const double d = is * std::exp(v / a) / a + g;
        double next = v - fv / d;
        if (!(next > lo && next < hi)) next = 0.5 * (lo + hi);
        if (std::fabs(next - v) <= 1e-15 * std::max(std::fabs(v), a)) {
            v = next;
            break;
        }
        v = next;
    }
    return v + current_a * series_resistance_ohm;
}

// ---------------------------------------------------------------------------------------------------------
// Measurement files

namespace {

std::string trim(std::string_view s)
{
    std::size_t b = 0, e = s.size();
    while (b < e && (s[b] == ' ' || s[b] == '\t')) ++b;
    while (e > b && (s[e - 1] == ' ' || s[e - 1] == '\t' || s[e - 1] == '\r')) --e;
    return std::string(s.substr(b, e - b));
}

std::vector<std::string> split_commas(const std::string& line)
{
    std::vector<std::string> out;
    std::size_t start = 0;
    while (true) {
        const auto c = line.find(',', start);
        out.push_back(trim(std::string_view(line).substr(start, c == std::string::npos ? std::string::npos : c - start)));
        if (c == std::string::npos) break;
        start = c + 1;
    }
    return out;
}

/// Shortened text of a field for messages.
std::string shown(const std::string& text)
{
    std::string t = detail::one_line(text);
    if (t.size() > 40) t = t.substr(0, 37) + "...";
    return t.empty() ? "(empty)" : t;
}

/// A finite value in `u`, plain or with an SI prefix and the unit's symbol ("0.25", "1.2e-6", "1.2u",
/// "10mA", "4.7k"), through the project's one value parser (units.hpp).
double parse_plain_number(const std::string& text, const std::string& where, const std::string& field, unit u)
{
    double v = nan_v;
    try {
        v = parse_quantity(text, u);
    } catch (const config_error& e) {
        throw config_error(fmt::format("{}: {} = {}: {}", where, field, shown(text), e.what()));
    }
    if (!std::isfinite(v))
        throw config_error(fmt::format("{}: {} = {}: must be a finite number", where, field, shown(text)));
    return v;
}

/// `# key = value` settings inside comment lines.
void parse_setting(const std::string& body, diode_measurements& m, const std::string& where)
{
    for (const char* key : {"temperature_c", "meter_input_ohm"}) {
        const std::size_t n = std::strlen(key);
        if (body.compare(0, n, key) != 0) continue;
        if (body.size() > n && body[n] != ' ' && body[n] != '=' && body[n] != '\t') continue; // another word
        const auto eq = body.find('=');
        if (eq == std::string::npos)
            throw config_error(fmt::format("{}: {}: a setting line must read '# {} = VALUE'", where, key, key));
        const double v = parse_plain_number(trim(std::string_view(body).substr(eq + 1)), where, key,
                                            std::string(key) == "temperature_c" ? unit::celsius : unit::ohm);
        if (std::string(key) == "temperature_c") {
            if (m.temperature_c) throw config_error(fmt::format("{}: temperature_c: given twice", where));
            if (!(v >= -60.0 && v <= 150.0))
                throw config_error(fmt::format("{}: temperature_c = {}: must be in [-60, 150] degC", where, detail::format_value(v)));
            m.temperature_c = v;
        } else {
            if (m.meter_input_ohm) throw config_error(fmt::format("{}: meter_input_ohm: given twice", where));
            if (!(v > 0.0)) throw config_error(fmt::format("{}: meter_input_ohm = {}: must be > 0 ohm", where, detail::format_value(v)));
            m.meter_input_ohm = v;
        }
    }
}

} // namespace

diode_measurements parse_diode_measurements(const std::string& text, const fs::path& file)
{
    diode_measurements m;
    m.file = file;
    const std::string name = file.string();
    enum class form { none, direct, ladder } kind = form::none;
    bool has_error_column = false;
    std::size_t columns = 0;
    std::size_t line_no = 0;
    std::size_t pos = 0;
    std::size_t previous_line = 0;
    bool have_previous = false;
    double previous_v = 0.0;
    struct ladder_row {
        double supply_v, series_ohm, diode_v, relative_error;
        std::size_t line;
    };
    std::vector<ladder_row> ladder;
    while (pos < text.size()) {
        auto nl = text.find('\n', pos);
        if (nl == std::string::npos) nl = text.size();
        const std::string raw = text.substr(pos, nl - pos);
        pos = nl + 1;
        ++line_no;
        const std::string where = fmt::format("{}:{}", name, line_no);
        if (raw.find('\0') != std::string::npos) throw config_error(fmt::format("{}: holds a NUL byte: not a text file", where));
        const std::string line = trim(raw);
        if (line.empty()) continue;
        if (line[0] == '#') {
            parse_setting(trim(std::string_view(line).substr(1)), m, where);
            continue;
        }
        const auto fields = split_commas(line);
        if (kind == form::none) {
            std::vector<std::string> f = fields;
            has_error_column = !f.empty() && f.back() == "relative_error";
            if (has_error_column) f.pop_back();
            if (f == std::vector<std::string>{"voltage_v", "current_a"}) kind = form::direct;
            else if (f == std::vector<std::string>{"supply_v", "series_ohm", "diode_v"}) kind = form::ladder;
            else {
                const bool numeric = !fields[0].empty() && fields[0].find_first_not_of("0123456789+-.eE") == std::string::npos;
                throw config_error(fmt::format(
                    "{}: {} {}: must be a header row naming the columns: voltage_v,current_a or supply_v,series_ohm,diode_v "
                    "(either optionally followed by ,relative_error)",
                    where, numeric ? "first line" : "header", shown(line)));
            }
            m.form = kind == form::direct ? "voltage_v,current_a" : "supply_v,series_ohm,diode_v";
            columns = fields.size();
            continue;
        }
        if (fields.size() != columns)
            throw config_error(fmt::format("{}: {} fields: the {} form{} needs {} per row", where, fields.size(), m.form,
                                           has_error_column ? " with relative_error" : "", columns));
        if (m.points.size() + ladder.size() >= diode_points_limit)
            throw config_error(fmt::format("{}: more than {} points: a measurement file holds at most {}", where, diode_points_limit,
                                           diode_points_limit));
        double rel = 0.0;
        if (has_error_column) {
            rel = parse_plain_number(fields.back(), where, "relative_error", unit::none);
            if (!(rel > 0.0 && rel <= 1.0))
                throw config_error(fmt::format("{}: relative_error = {}: must be in (0, 1] (a fraction of the current)", where,
                                               shown(fields.back())));
        }
        const char* vname = kind == form::direct ? "voltage_v" : "diode_v";
        const double v = parse_plain_number(fields[kind == form::direct ? 0 : 2], where, vname, unit::volt);
        if (v == 0.0)
            throw config_error(fmt::format("{}: {} = {}: must not be 0 (a zero reading carries no information on a log-current "
                                           "scale; leave it out)",
                                           where, vname, shown(fields[kind == form::direct ? 0 : 2])));
        if (have_previous && v == previous_v)
            throw config_error(fmt::format("{}: {} = {}: duplicate voltage (also on line {}); average repeated readings into one row "
                                           "or give them slightly different voltages",
                                           where, vname, shown(fields[kind == form::direct ? 0 : 2]), previous_line));
        if (have_previous && v < previous_v)
            throw config_error(fmt::format("{}: {} = {}: voltages must increase down the file (line {} has {})", where, vname,
                                           shown(fields[kind == form::direct ? 0 : 2]), previous_line, detail::format_value(previous_v)));
        have_previous = true;
        previous_v = v;
        previous_line = line_no;
        m.last_line = line_no;
        if (kind == form::direct) {
            const double i = parse_plain_number(fields[1], where, "current_a", unit::ampere);
            if (v > 0.0 && !(i > 0.0))
                throw config_error(fmt::format("{}: current_a = {}: a forward point (voltage_v > 0) needs a current > 0", where,
                                               shown(fields[1])));
            if (v < 0.0 && !(i < 0.0))
                throw config_error(fmt::format("{}: current_a = {}: a reverse point (voltage_v < 0) needs a current < 0 (it flows "
                                               "backwards)",
                                               where, shown(fields[1])));
            m.points.push_back({v, i, rel, line_no});
        } else {
            const double s = parse_plain_number(fields[0], where, "supply_v", unit::volt);
            const double r = parse_plain_number(fields[1], where, "series_ohm", unit::ohm);
            if (!(r > 0.0)) throw config_error(fmt::format("{}: series_ohm = {}: must be > 0 ohm", where, shown(fields[1])));
            if (s == 0.0 || (s > 0.0) != (v > 0.0))
                throw config_error(fmt::format("{}: supply_v = {}: must have the sign of diode_v ({}): reverse points reverse the supply",
                                               where, shown(fields[0]), detail::format_value(v)));
            if (!(std::fabs(v) < std::fabs(s)))
                throw config_error(fmt::format("{}: diode_v = {}: must be smaller in size than supply_v = {} (the resistor drops the rest)",
                                               where, shown(fields[2]), detail::format_value(s)));
            ladder.push_back({s, r, v, rel, line_no});
        }
    }
    if (kind == form::none) throw config_error(fmt::format("{}: no header row: the file holds no readings", name));
    if (m.meter_input_ohm && kind != form::ladder)
        throw config_error(fmt::format("{}: meter_input_ohm: applies only to the supply_v,series_ohm,diode_v form (the direct form "
                                       "gives the diode current itself)",
                                       name));
    for (const auto& row : ladder) {
        const double meter_g = m.meter_input_ohm ? 1.0 / *m.meter_input_ohm : 0.0;
        const double i = (row.supply_v - row.diode_v) / row.series_ohm - row.diode_v * meter_g;
        if ((row.diode_v > 0.0 && !(i > 0.0)) || (row.diode_v < 0.0 && !(i < 0.0)))
            throw config_error(fmt::format("{}:{}: diode_v = {}: the current after the meter correction ({} A) has the wrong sign: the "
                                           "meter's input resistance ({} ohm) would draw more than the resistor passes",
                                           name, row.line, detail::format_value(row.diode_v), detail::format_value(i),
                                           detail::format_value(*m.meter_input_ohm)));
        m.points.push_back({row.diode_v, i, row.relative_error, row.line});
    }
    return m;
}

diode_measurements load_diode_measurements(const fs::path& file)
{
    std::error_code ec;
    if (fs::is_directory(file, ec)) throw config_error(fmt::format("{}: is a directory, not a measurement file", file.string()));
    if (fs::exists(file, ec) && (!fs::is_regular_file(file, ec) || fs::file_size(file, ec) > 10000000))
        throw config_error(fmt::format("{}: must be a regular text file of at most 10 MB", file.string()));
    std::ifstream in(file, std::ios::binary);
    if (!in) throw config_error(fmt::format("{}: cannot open the measurement file: {}", file.string(), std::strerror(errno)));
    std::stringstream ss;
    ss << in.rdbuf();
    return parse_diode_measurements(ss.str(), file);
}

// ---------------------------------------------------------------------------------------------------------
// The fit

diode_dc_model diode_fit_result::model() const
{
    diode_dc_model m;
    m.saturation_current_a = parameters[fit_is].value;
    m.emission_coefficient = parameters[fit_n].value;
    m.series_resistance_ohm = parameters[fit_rs].value;
    m.leakage_resistance_ohm = parameters[fit_rsh].value;
    m.thermal_voltage_v = thermal_voltage_v;
    return m;
}

namespace {

using vec = Eigen::VectorXd;
using mat = Eigen::MatrixXd;

/// The least-squares problem on log current with some parameters fixed (Rs = 0, Rsh = infinity).
struct log_current_problem {
    std::vector<double> v, i, w; // voltage, measured current, weight
    double vt = 0.0;
    std::array<bool, fit_parameter_count> free{};

    [[nodiscard]] std::size_t free_count() const
    {
        return static_cast<std::size_t>(std::count(free.begin(), free.end(), true));
    }

    [[nodiscard]] diode_dc_model model(const std::array<double, fit_parameter_count>& theta) const
    {
        diode_dc_model m;
        m.saturation_current_a = std::exp(theta[fit_is]);
        m.emission_coefficient = std::exp(theta[fit_n]);
        m.series_resistance_ohm = free[fit_rs] ? std::exp(theta[fit_rs]) : 0.0;
        m.leakage_resistance_ohm = free[fit_rsh] ? std::exp(theta[fit_rsh]) : inf;
        m.thermal_voltage_v = vt;
        return m;
    }

    /// Residuals w (ln|I(V)| - ln|I_meas|) and, when jac != nullptr, their Jacobian over the free
    /// parameters (implicit differentiation of F(I) = Is (exp((V - I Rs)/a) - 1) + (V - I Rs)/Rsh - I).
    /// Returns false when the model is not finite at some point.
    bool evaluate(const std::array<double, fit_parameter_count>& theta, vec& r, mat* jac) const
    {
        const auto m = model(theta);
        const double a = m.emission_coefficient * vt;
        const double g = 1.0 / m.leakage_resistance_ohm;
        const double rs = m.series_resistance_ohm;
        const std::size_t k = free_count();
        r.resize(static_cast<Eigen::Index>(v.size()));
        if (jac) jac->resize(static_cast<Eigen::Index>(v.size()), static_cast<Eigen::Index>(k));
        for (std::size_t p = 0; p < v.size(); ++p) {
            const double vj = m.junction_voltage_v(v[p]);
            const double cur = m.saturation_current_a * std::expm1(vj / a) + vj * g;
            if (!std::isfinite(cur) || cur == 0.0 || (cur > 0.0) != (i[p] > 0.0)) return false;
            const auto e = static_cast<Eigen::Index>(p);
            r(e) = w[p] * (std::log(std::fabs(cur)) - std::log(std::fabs(i[p])));
            if (!jac) continue;
            const double big_e = m.saturation_current_a * std::exp(vj / a);
            const double d = 1.0 + rs * (big_e / a + g); // -dF/dI
            const std::array<double, fit_parameter_count> df = {big_e - m.saturation_current_a, -big_e * vj / a,
                                                                 -cur * rs * (big_e / a + g), -vj * g};
            Eigen::Index c = 0;
            for (std::size_t q = 0; q < fit_parameter_count; ++q)
                if (free[q]) (*jac)(e, c++) = w[p] * df[q] / d / cur;
        }
        return r.allFinite() && (!jac || jac->allFinite());
    }
};

/// Plausible bounds on theta, so that trial steps never reach overflow; the fit rejects steps outside.
bool within_bounds(const std::array<double, fit_parameter_count>& t)
{
    return t[fit_is] > std::log(1e-40) && t[fit_is] < std::log(1.0) && t[fit_n] > std::log(0.1) && t[fit_n] < std::log(50.0) &&
           t[fit_rs] > std::log(1e-9) && t[fit_rs] < std::log(1e9) && t[fit_rsh] > std::log(1e-3) && t[fit_rsh] < std::log(1e18);
}

struct lm_outcome {
    int iterations = 0;
    bool converged = false;
};

/// Levenberg-Marquardt with Moré's diagonal scaling; each damped step is the least-squares solution of
/// [J; sqrt(lambda) D] d = [-r; 0] by column-pivoting Householder QR (no normal equations).
lm_outcome levenberg_marquardt(const log_current_problem& pb, std::array<double, fit_parameter_count>& theta, int max_iterations)
{
    lm_outcome out;
    vec r, r_trial;
    mat j;
    if (!pb.evaluate(theta, r, &j)) return out;
    double cost = r.squaredNorm();
    const Eigen::Index k = j.cols();
    const Eigen::Index m = j.rows();
    vec scale = j.colwise().norm().transpose().cwiseMax(1e-300);
    double lambda = 1e-3;
    for (int it = 0; it < max_iterations; ++it) {
        out.iterations = it + 1;
        scale = scale.cwiseMax(j.colwise().norm().transpose());
        mat aug(m + k, k);
        vec rhs(m + k);
        aug.topRows(m) = j;
        aug.bottomRows(k) = (std::sqrt(lambda) * scale).asDiagonal();
        rhs.head(m) = -r;
        rhs.tail(k).setZero();
        const vec step = aug.colPivHouseholderQr().solve(rhs);
        auto trial = theta;
        Eigen::Index c = 0;
        for (std::size_t q = 0; q < fit_parameter_count; ++q)
            if (pb.free[q]) trial[q] += step(c++);
        double trial_cost = inf;
        if (step.allFinite() && within_bounds(trial) && pb.evaluate(trial, r_trial, nullptr)) trial_cost = r_trial.squaredNorm();
        if (trial_cost < cost) {
            theta = trial;
            const double previous = cost;
            if (!pb.evaluate(theta, r, &j)) return out;
            cost = r.squaredNorm();
            lambda = std::max(lambda * 0.3, 1e-15);
            // Converged: the step no longer moves theta (relative change of every parameter < 1e-12), or the
            // cost stopped falling at rounding level.
            if (step.cwiseAbs().maxCoeff() < 1e-12 || previous - cost <= 1e-15 * previous) {
                out.converged = true;
                return out;
            }
        } else {
            lambda *= 4.0;
            // No descent even for a tiny step along the gradient: at the minimum to rounding.
            if (lambda > 1e20) {
                out.converged = true;
                return out;
            }
        }
    }
    return out;
}

/// Covariance of the free log-parameters, s^2 (J^T J)^-1 by SVD; entries are +inf along directions
/// with no information (singular values below 1e-12 of the largest).
mat covariance_of(const mat& j, double s2)
{
    Eigen::JacobiSVD<mat> svd(j, Eigen::ComputeThinV);
    const vec sv = svd.singularValues();
    const mat vmat = svd.matrixV();
    const Eigen::Index k = j.cols();
    mat cov = mat::Zero(k, k);
    const double tol = 1e-12 * (sv.size() > 0 ? sv(0) : 0.0);
    for (Eigen::Index q = 0; q < sv.size(); ++q) {
        if (!(sv(q) > tol)) {
            for (Eigen::Index a = 0; a < k; ++a)
                if (std::fabs(vmat(a, q)) > 1e-6) cov(a, a) = inf;
            continue;
        }
        cov += (s2 / (sv(q) * sv(q))) * vmat.col(q) * vmat.col(q).transpose();
    }
    return cov;
}

/// Starting values (see fit_diode's documentation); reported in `note`.
std::array<double, fit_parameter_count> starting_values(const log_current_problem& pb, std::string& note)
{
    std::vector<std::size_t> fwd, rev;
    for (std::size_t p = 0; p < pb.v.size(); ++p) (pb.v[p] > 0.0 ? fwd : rev).push_back(p);
    // Steepest straight line of ln I against V over three adjacent forward points.
    const std::size_t win = std::min<std::size_t>(3, fwd.size());
    double best_slope = -inf, best_mid_v = 0.0, best_mid_i = 0.0;
    for (std::size_t s = 0; s + win <= fwd.size(); ++s) {
        double sv = 0, si = 0, svv = 0, svi = 0;
        for (std::size_t q = s; q < s + win; ++q) {
            const double x = pb.v[fwd[q]], y = std::log(pb.i[fwd[q]]);
            sv += x;
            si += y;
            svv += x * x;
            svi += x * y;
        }
        const double nn = static_cast<double>(win);
        const double slope = (nn * svi - sv * si) / (nn * svv - sv * sv);
        if (slope > best_slope) {
            best_slope = slope;
            best_mid_v = sv / nn;
            best_mid_i = std::exp(si / nn);
        }
    }
    const double n0 = std::clamp(best_slope > 0.0 ? 1.0 / (best_slope * pb.vt) : 8.0, 0.7, 8.0);
    const double a0 = n0 * pb.vt;
    const double is0 = std::clamp(best_mid_i / std::expm1(best_mid_v / a0), 1e-30, 1e-2);
    // Series resistance from the excess voltage at the largest forward current.
    const std::size_t top = fwd.back();
    const double excess = pb.v[top] - a0 * std::log1p(pb.i[top] / is0);
    double rs0 = excess > 0.0 ? excess / pb.i[top] : 0.01 * a0 / pb.i[top];
    rs0 = std::clamp(rs0, 1e-6, std::max(0.9 * pb.v[top] / pb.i[top], 1e-6));
    // Leakage from the reverse slope (two most negative points) or one reverse point.
    double rsh0 = inf;
    if (rev.size() >= 2) {
        const std::size_t p1 = rev[0], p2 = rev[1];
        const double slope_r = (pb.v[p2] - pb.v[p1]) / (pb.i[p2] - pb.i[p1]);
        rsh0 = slope_r > 0.0 ? slope_r : pb.v[p1] / pb.i[p1];
    } else if (rev.size() == 1) {
        const std::size_t p1 = rev[0];
        rsh0 = pb.i[p1] + is0 < 0.0 ? pb.v[p1] / (pb.i[p1] + is0) : 10.0 * pb.v[p1] / pb.i[p1];
    }
    note = fmt::format("Is {:.4g} A, n {:.4g} (steepest 3-point line of ln I against V near {:.4g} V), Rs {:.4g} ohm (excess voltage "
                       "at {:.4g} A), Rsh {:.4g} ohm (reverse slope)",
                       is0, n0, best_mid_v, rs0, pb.i[top], rsh0);
    std::array<double, fit_parameter_count> t = {std::log(is0), std::log(n0), std::log(rs0),
                                                 std::isfinite(rsh0) ? std::log(std::clamp(rsh0, 1.0, 1e17)) : std::log(1e12)};
    return t;
}

} // namespace

diode_fit_result fit_diode(const diode_measurements& data, double temperature_c, std::string temperature_source,
                           const diode_fit_options& opt)
{
    detail::require_range("temperature_c", temperature_c, -60.0, 150.0, "degC");
    const std::string where = fmt::format("{}:{}", data.file.string(), data.last_line);
    diode_fit_result res;
    res.file = data.file;
    res.temperature_c = temperature_c;
    res.temperature_source = std::move(temperature_source);
    res.thermal_voltage_v = thermal_voltage_v(kelvin_from_celsius(temperature_c));

    log_current_problem pb;
    pb.vt = res.thermal_voltage_v;
    std::size_t forward = 0, reverse = 0;
    for (const auto& p : data.points) {
        pb.v.push_back(p.voltage_v);
        pb.i.push_back(p.current_a);
        pb.w.push_back(p.relative_error > 0.0 ? 1.0 / p.relative_error : 1.0);
        (p.voltage_v > 0.0 ? forward : reverse) += 1;
    }
    pb.free = {true, true, true, reverse > 0};
    const std::size_t k = pb.free_count();
    if (forward < 2)
        throw config_error(fmt::format("{}: {} forward point{}: a fit needs at least 2 forward points (voltage > 0)", where, forward,
                                       forward == 1 ? "" : "s"));
    if (data.points.size() < k + 1)
        throw config_error(fmt::format("{}: {} points for {} parameters ({}): a fit needs at least {} (one more than the parameters, "
                                       "to estimate the scatter)",
                                       where, data.points.size(), k, reverse > 0 ? "Is, n, Rs, leakage" : "Is, n, Rs", k + 1));

    auto theta = starting_values(pb, res.start);
    if (!within_bounds(theta)) theta = {std::log(1e-8), 0.0, 0.0, std::log(1e9)};
    if (!pb.free[fit_rsh]) {
        res.parameters[fit_rsh].identifiable = false;
        res.parameters[fit_rsh].reason = "no reverse points: the leakage needs readings in reverse; taken as none (infinite)";
    }

    mat cov_free;
    vec r;
    mat j;
    // Fit; fix Rs or Rsh when the data cannot pin it down, and fit again.
    while (true) {
        const auto lm = levenberg_marquardt(pb, theta, opt.max_iterations);
        res.iterations += lm.iterations;
        res.converged = lm.converged;
        if (!lm.converged || !pb.evaluate(theta, r, &j))
            throw config_error(fmt::format("{}: the fit did not converge in {} iterations (start: {}); check the readings for a "
                                           "misplaced point",
                                           where, res.iterations, res.start));
        const std::size_t kk = pb.free_count();
        res.degrees_of_freedom = data.points.size() - kk;
        const double s2 = r.squaredNorm() / static_cast<double>(res.degrees_of_freedom);
        cov_free = covariance_of(j, s2);
        // The least identifiable of Rs and Rsh beyond the limit, if any.
        std::size_t worst = fit_parameter_count;
        double worst_sigma = opt.identifiable_sigma_ln;
        Eigen::Index c = 0;
        for (std::size_t q = 0; q < fit_parameter_count; ++q) {
            if (!pb.free[q]) continue;
            const double sg = std::sqrt(cov_free(c, c));
            if ((q == fit_rs || q == fit_rsh) && !(sg <= worst_sigma)) {
                worst = q;
                worst_sigma = std::isnan(sg) ? inf : sg;
            }
            ++c;
        }
        if (worst == fit_parameter_count) break;
        auto& par = res.parameters[worst];
        par.identifiable = false;
        const auto m = pb.model(theta);
        if (worst == fit_rs) {
            double i_top = 0.0;
            for (double x : pb.i) i_top = std::max(i_top, x);
            par.reason = fmt::format("I x Rs at the largest current ({:.3g} mV) is within the scatter of the readings (sigma of ln Rs = "
                                     "{:.3g}): fixed at 0; add readings at higher current (a smaller series resistor)",
                                     1e3 * i_top * m.series_resistance_ohm, worst_sigma);
        } else {
            par.reason = fmt::format("the reverse readings do not separate the leakage from the saturation current and the scatter "
                                     "(sigma of ln Rsh = {:.3g}): taken as none (infinite); add readings further into reverse",
                                     worst_sigma);
        }
        pb.free[worst] = false;
    }

    // Parameters, intervals, covariance in the full 4 x 4 layout.
    res.points = data.points.size();
    res.free = pb.free;
    const double dof = static_cast<double>(res.degrees_of_freedom);
    res.t_quantile = boost::math::quantile(boost::math::complement(boost::math::students_t_distribution<double>(dof),
                                                                   0.5 * (1.0 - opt.confidence)));
    std::array<Eigen::Index, fit_parameter_count> col{};
    {
        Eigen::Index c = 0;
        for (std::size_t q = 0; q < fit_parameter_count; ++q) col[q] = pb.free[q] ? c++ : -1;
    }
    const auto m = pb.model(theta);
    const std::array<double, fit_parameter_count> values = {m.saturation_current_a, m.emission_coefficient, m.series_resistance_ohm,
                                                            m.leakage_resistance_ohm};
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        auto& par = res.parameters[q];
        par.key = parameter_keys[q];
        par.value = values[q];
        for (std::size_t q2 = 0; q2 < fit_parameter_count; ++q2)
            res.covariance_ln[q][q2] = col[q] >= 0 && col[q2] >= 0 ? cov_free(col[q], col[q2]) : 0.0;
        if (!pb.free[q]) {
            par.sigma = par.ci95_low = par.ci95_high = nan_v;
            continue;
        }
        const double sg = std::sqrt(cov_free(col[q], col[q]));
        if (!std::isfinite(sg)) {
            par.identifiable = false;
            par.reason = fmt::format("the readings do not determine {} (singular Jacobian): they miss the region where it acts",
                                     parameter_symbols[q]);
            par.sigma = par.ci95_low = par.ci95_high = nan_v;
            continue;
        }
        par.sigma = par.value * sg;
        par.ci95_low = std::exp(std::log(par.value) - res.t_quantile * sg);
        par.ci95_high = std::exp(std::log(par.value) + res.t_quantile * sg);
    }

    // Residuals.
    double rss = 0.0;
    for (std::size_t p = 0; p < pb.v.size(); ++p) {
        fit_residual fr;
        fr.voltage_v = pb.v[p];
        fr.measured_a = pb.i[p];
        fr.fitted_a = m.current_a(pb.v[p]);
        fr.log_residual = std::log(fr.fitted_a / fr.measured_a);
        fr.weight = pb.w[p];
        fr.line = data.points[p].line;
        rss += fr.weight * fr.weight * fr.log_residual * fr.log_residual;
        res.residuals.push_back(fr);
    }
    res.residual_rms = std::sqrt(rss / static_cast<double>(pb.v.size()));
    res.residual_scale = std::sqrt(rss / dof);

    // Derived figures (delta method over the free log-parameters).
    auto sigma_of = [&](const std::array<double, fit_parameter_count>& grad) {
        double var = 0.0;
        for (std::size_t a = 0; a < fit_parameter_count; ++a)
            for (std::size_t b = 0; b < fit_parameter_count; ++b)
                if (grad[a] != 0.0 && grad[b] != 0.0) var += grad[a] * res.covariance_ln[a][b] * grad[b];
        return std::isfinite(var) ? std::sqrt(std::max(var, 0.0)) : nan_v;
    };
    const double slope = m.emission_coefficient * m.thermal_voltage_v * std::log(10.0) * 1e3;
    res.slope_mv_per_decade = {slope, sigma_of({0.0, slope, 0.0, 0.0})};
    const double r0 = m.emission_coefficient * m.thermal_voltage_v / m.saturation_current_a;
    res.zero_bias_resistance_ohm = {r0, sigma_of({-r0, r0, 0.0, 0.0})};
    const double v100 = m.voltage_at_current_v(reference_current_a);
    std::array<double, fit_parameter_count> grad{};
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        if (!pb.free[q]) continue;
        constexpr double h = 1e-6;
        auto tp = theta, tm = theta;
        tp[q] += h;
        tm[q] -= h;
        grad[q] = (pb.model(tp).voltage_at_current_v(reference_current_a) - pb.model(tm).voltage_at_current_v(reference_current_a)) /
                  (2.0 * h);
    }
    res.voltage_at_100ua_v = {v100, sigma_of(grad)};
    return res;
}

// ---------------------------------------------------------------------------------------------------------
// Text forms

namespace {
nlohmann::json num_or_null(double v)
{
    return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr);
}
} // namespace

nlohmann::json to_json(const diode_fit_result& r)
{
    nlohmann::json j;
    j["file"] = r.file.string();
    j["temperature_c"] = r.temperature_c;
    j["temperature_source"] = r.temperature_source;
    j["thermal_voltage_v"] = r.thermal_voltage_v;
    nlohmann::json not_identifiable = nlohmann::json::object();
    for (const auto& p : r.parameters) {
        j[p.key] = num_or_null(p.value);
        j[p.key + "_sigma"] = num_or_null(p.sigma);
        j[p.key + "_ci95_low"] = num_or_null(p.ci95_low);
        j[p.key + "_ci95_high"] = num_or_null(p.ci95_high);
        if (!p.identifiable) not_identifiable[p.key] = p.reason;
    }
    j["not_identifiable"] = not_identifiable;
    j["zero_bias_resistance_ohm"] = num_or_null(r.zero_bias_resistance_ohm.value);
    j["zero_bias_resistance_ohm_sigma"] = num_or_null(r.zero_bias_resistance_ohm.sigma);
    j["voltage_at_100ua_v"] = num_or_null(r.voltage_at_100ua_v.value);
    j["voltage_at_100ua_v_sigma"] = num_or_null(r.voltage_at_100ua_v.sigma);
    double i_top = 0.0;
    for (const auto& x : r.residuals) i_top = std::max(i_top, x.measured_a);
    j["voltage_at_100ua_extrapolated"] = i_top < reference_current_a;
    j["slope_mv_per_decade"] = num_or_null(r.slope_mv_per_decade.value);
    j["slope_mv_per_decade_sigma"] = num_or_null(r.slope_mv_per_decade.sigma);
    j["residual_rms"] = r.residual_rms;
    j["residual_scale"] = r.residual_scale;
    j["points"] = r.points;
    j["degrees_of_freedom"] = r.degrees_of_freedom;
    j["t_quantile_95"] = r.t_quantile;
    j["iterations"] = r.iterations;
    j["converged"] = r.converged;
    j["start"] = r.start;
    j["parameter_order"] = {"ln_saturation_current_a", "ln_emission_coefficient", "ln_series_resistance_ohm", "ln_leakage_resistance_ohm"};
    nlohmann::json free = nlohmann::json::array();
    for (bool f : r.free) free.push_back(f);
    j["fitted"] = free;
    nlohmann::json cov = nlohmann::json::array();
    for (const auto& row : r.covariance_ln) {
        nlohmann::json jr = nlohmann::json::array();
        for (double x : row) jr.push_back(num_or_null(x));
        cov.push_back(jr);
    }
    j["covariance_ln"] = cov;
    nlohmann::json res = nlohmann::json::array();
    for (const auto& x : r.residuals)
        res.push_back({{"line", x.line},
                       {"voltage_v", x.voltage_v},
                       {"measured_a", x.measured_a},
                       {"fitted_a", x.fitted_a},
                       {"log_residual", x.log_residual},
                       {"weight", x.weight}});
    j["residuals"] = res;
    return j;
}

fit_uncertainty load_fit_uncertainty(const fs::path& fit_json)
{
    std::ifstream in(fit_json, std::ios::binary);
    if (!in) throw config_error(fmt::format("{}: cannot open the fit result: {}", fit_json.string(), std::strerror(errno)));
    nlohmann::json j;
    try {
        j = nlohmann::json::parse(in);
    } catch (const nlohmann::json::exception& e) {
        throw config_error(fmt::format("{}: not a fit result (malformed JSON: {})", fit_json.string(), e.what()));
    }
    fit_uncertainty u;
    auto bad = [&](const std::string& key) {
        return config_error(fmt::format("{}: {}: missing or of the wrong type: not a fit.json written by galena fit-diode",
                                        fit_json.string(), key));
    };
    if (!j.is_object()) throw bad("(top level)");
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        const auto it = j.find(parameter_keys[q]);
        if (it == j.end()) throw bad(parameter_keys[q]);
        u.value[q] = it->is_number() ? it->get<double>() : inf; // null: Rsh taken as none
    }
    const auto fitted = j.find("fitted");
    const auto cov = j.find("covariance_ln");
    if (fitted == j.end() || !fitted->is_array() || fitted->size() != fit_parameter_count) throw bad("fitted");
    if (cov == j.end() || !cov->is_array() || cov->size() != fit_parameter_count) throw bad("covariance_ln");
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        if (!(*fitted)[q].is_boolean()) throw bad("fitted");
        u.free[q] = (*fitted)[q].get<bool>();
        const auto& row = (*cov)[q];
        if (!row.is_array() || row.size() != fit_parameter_count) throw bad("covariance_ln");
        for (std::size_t q2 = 0; q2 < fit_parameter_count; ++q2)
            u.covariance_ln[q][q2] = row[q2].is_number() ? row[q2].get<double>() : inf;
    }
    if (const auto ni = j.find("not_identifiable"); ni != j.end() && ni->is_object())
        for (const auto& [key, reason] : ni->items()) u.not_identifiable.push_back(key);
    return u;
}

namespace {
std::string toml_number(double v)
{
    if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
    const std::string s = fmt::format("{:.9g}", v);
    return s.find_first_of(".e") == std::string::npos ? s + ".0" : s;
}
std::string sigma_text(const fitted_parameter& p)
{
    if (!p.identifiable) return "not identifiable: " + p.reason;
    return fmt::format("+- {:.3g} (1 sigma); 95 % interval {:.4g} .. {:.4g}", p.sigma, p.ci95_low, p.ci95_high);
}
} // namespace

std::string to_diode_toml(const diode_fit_result& r)
{
    std::string o;
    o += fmt::format("# Diode fitted by galena fit-diode from {} ({} points, residual RMS {:.3g} in ln I, at {} degC).\n",
                     detail::one_line(r.file.filename().string()), r.points, r.residual_rms, r.temperature_c);
    o += "# Use it in a scenario with  [diode] file = \"path/to/diode.toml\"  (keys beside it override these).\n";
    o += "# A DC fit cannot see the junction capacitance or breakdown: junction_capacitance_f is 0 here; add your\n";
    o += "# diode's value (point contacts: about 0.5-1 pF, typical) here or beside diode.file.\n";
    o += "[diode]\n";
    for (const auto& p : r.parameters) {
        o += fmt::format("# {}\n", detail::one_line(sigma_text(p)));
        o += fmt::format("{} = {}\n", p.key, toml_number(p.value));
    }
    o += "junction_capacitance_f = 0.0\n";
    o += fmt::format("temperature_c = {}\nnominal_temperature_c = {}\n", toml_number(r.temperature_c), toml_number(r.temperature_c));
    return o;
}

std::string fit_points_data(const diode_fit_result& r)
{
    std::string o = "# voltage_v  abs_measured_a  abs_fitted_a  residual_percent (100 ln(fitted/measured))  line\n";
    for (const auto& x : r.residuals)
        o += fmt::format("{:.9g} {:.9g} {:.9g} {:.6g} {}\n", x.voltage_v, std::fabs(x.measured_a), std::fabs(x.fitted_a),
                         100.0 * x.log_residual, x.line);
    return o;
}

std::string fit_curve_data(const diode_fit_result& r, int samples)
{
    const auto m = r.model();
    double lo = inf, hi = -inf;
    for (const auto& x : r.residuals) {
        lo = std::min(lo, x.voltage_v);
        hi = std::max(hi, x.voltage_v);
    }
    std::string o = "# voltage_v  abs_fitted_a\n";
    const int n = std::max(samples, 2);
    for (int k = 0; k < n; ++k) {
        const double v = lo + (hi - lo) * k / (n - 1);
        const double i = m.current_a(v);
        if (i != 0.0 && std::isfinite(i)) o += fmt::format("{:.9g} {:.9g}\n", v, std::fabs(i));
    }
    return o;
}

} // namespace galena
