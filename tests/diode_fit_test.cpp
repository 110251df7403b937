// diode_fit: the Lambert-W diode current against published check values, Boost.Math and scipy; recovery of
// known parameters from synthetic points; the coverage of the reported intervals; agreement with scipy's
// curve_fit; identifiability flags; and the one-line errors for bad measurement files (through the tool).
#include "galena/constants.hpp"
#include "galena/diode_fit.hpp"
#include "galena/error.hpp"

#include "cli_support.hpp"

#include <algorithm>
#include <boost/math/special_functions/lambert_w.hpp>
#include <boost/math/tools/roots.hpp>
#include <doctest/doctest.h>
#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

/// Vt at 300 K from the exact 2019 SI constants (SI brochure, 9th ed.): 25.852 mV.
const double vt_300k = 1.380649e-23 * 300.0 / 1.602176634e-19;

fs::path tmp_dir(const std::string& name)
{
    const fs::path d = fs::path(GALENA_TEST_TMP) / "diode_fit" / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

std::vector<double> run_python(const std::string& args)
{
    const fs::path out = fs::path(GALENA_TEST_TMP) / "diode_fit_py.txt";
    fs::create_directories(out.parent_path());
    const std::string cmd = std::string("/usr/bin/python3 ") + GALENA_SOURCE_DIR + "/tests/diode_fit_check.py " + args + " > '" +
                            out.string() + "'";
    REQUIRE(std::system(cmd.c_str()) == 0);
    std::ifstream f(out);
    std::vector<double> v;
    for (double x; f >> x;) v.push_back(x);
    return v;
}

/// An independent solution of the implicit diode equation: vj + Rs (Is expm1(vj/a) + vj/Rsh) = V for vj by
/// Boost.Math's TOMS 748 bracketing root finder, then I = (V - vj) / Rs (no Lambert W involved).
double implicit_current(const diode_dc_model& m, double v)
{
    const double a = m.emission_coefficient * m.thermal_voltage_v;
    const double g = 1.0 / m.leakage_resistance_ohm;
    auto f = [&](double vj) { return vj + m.series_resistance_ohm * (m.saturation_current_a * std::expm1(vj / a) + vj * g) - v; };
    boost::uintmax_t iters = 200;
    // The junction never takes more than V (and never so much that the current exceeds V / Rs).
    const double lo = std::min(v, 0.0) - 1.0;
    const double hi = v > 0.0 ? std::min(v, a * std::log1p(v / (m.series_resistance_ohm * m.saturation_current_a))) + 1e-9 : 1e-9;
    const auto r = boost::math::tools::toms748_solve(f, lo, hi, boost::math::tools::eps_tolerance<double>(52), iters);
    const double vj = 0.5 * (r.first + r.second);
    return m.saturation_current_a * std::expm1(vj / a) + vj * g;
}

struct synthetic {
    diode_dc_model truth;
    std::vector<double> v;
};

/// The issue's synthetic specimen: Is = 2e-7 A, n = 1.3, Rs = 30 ohm, Rsh = 200 kohm at 25 degC; 8 forward
/// points from 0.05 to 0.5 V plus two reverse points (-2 V and -1 V).
synthetic issue_specimen()
{
    synthetic s;
    s.truth.saturation_current_a = 2e-7;
    s.truth.emission_coefficient = 1.3;
    s.truth.series_resistance_ohm = 30.0;
    s.truth.leakage_resistance_ohm = 200e3;
    s.truth.thermal_voltage_v = thermal_voltage_v(kelvin_from_celsius(25.0));
    s.v = {-2.0, -1.0};
    for (int k = 0; k < 8; ++k) s.v.push_back(0.05 + 0.45 * k / 7.0);
    return s;
}

diode_measurements make_points(const synthetic& s, std::mt19937* rng, double rel_noise, const std::vector<double>& rel_error = {})
{
    diode_measurements m;
    m.file = "synthetic.csv";
    m.form = "voltage_v,current_a";
    std::normal_distribution<double> nd(0.0, 1.0);
    for (std::size_t k = 0; k < s.v.size(); ++k) {
        const double e = rel_error.empty() ? 0.0 : rel_error[k];
        const double noise = rng ? rel_noise * (e > 0.0 ? e / rel_noise : 1.0) * nd(*rng) : 0.0;
        m.points.push_back({s.v[k], s.truth.current_a(s.v[k]) * (1.0 + noise), e, k + 2});
    }
    m.last_line = s.v.size() + 1;
    return m;
}

} // namespace

TEST_CASE("Lambert-W diode current: published check values, Boost.Math's lambert_w0 and scipy")
{
    // Exact current through a diode with series resistance (Electronics Letters 36(4), 2000):
    //   I = (n Vt / Rs) W0[(Is Rs / (n Vt)) exp((V + Is Rs)/(n Vt))] - Is.
    // With a shunt (Solar Energy Materials & Solar Cells 81 (2004) 269-277):
    //   I = (V - Rsh Is)/(Rs + Rsh) + (n Vt / Rs) W0[(Rs Rsh Is/(n Vt (Rs + Rsh))) exp(Rsh (Rs Is + V)/(n Vt (Rs + Rsh)))].
    // Check values at 300 K (Vt = 25.852 mV), Is = 1 uA, n = 1.5, Rs = 20 ohm, derived from these formulas
    // (scipy and Boost.Math agree to 10 digits): I(0.3 V) = 1.219773140 mA; with Rsh = 100 kohm 1.221464436 mA
    // and I(-1 V) = -10.99780 uA.
    diode_dc_model m;
    m.saturation_current_a = 1e-6;
    m.emission_coefficient = 1.5;
    m.series_resistance_ohm = 20.0;
    m.thermal_voltage_v = vt_300k;
    CHECK(m.current_a(0.3) == doctest::Approx(1.219773140e-3).epsilon(1e-9).scale(0));
    const double a = 1.5 * vt_300k;
    const double published = a / 20.0 * boost::math::lambert_w0(1e-6 * 20.0 / a * std::exp((0.3 + 1e-6 * 20.0) / a)) - 1e-6;
    CHECK(m.current_a(0.3) == doctest::Approx(published).epsilon(1e-13));

    diode_dc_model ms = m;
    ms.leakage_resistance_ohm = 100e3;
    CHECK(ms.current_a(0.3) == doctest::Approx(1.221464436e-3).epsilon(1e-8).scale(0));
    CHECK(ms.current_a(-1.0) == doctest::Approx(-10.99780e-6).epsilon(1e-6).scale(0));
    auto shunt_form = [&](double v) {
        const double rs = 20.0, rsh = 100e3, is = 1e-6;
        return (v - rsh * is) / (rs + rsh) +
               a / rs * boost::math::lambert_w0(rs * rsh * is / (a * (rs + rsh)) * std::exp(rsh * (rs * is + v) / (a * (rs + rsh))));
    };
    CHECK(ms.current_a(0.3) == doctest::Approx(shunt_form(0.3)).epsilon(1e-12));
    CHECK(ms.current_a(-1.0) == doctest::Approx(shunt_form(-1.0)).epsilon(1e-9));

    // scipy.special.lambertw on the same published forms, over forward and reverse voltages. Measured
    // agreement: 9.4e-15 relative; the bound 1e-12 leaves room for libm differences between machines.
    const std::vector<double> vs = {-3.0, -1.0, -0.2, -0.01, 0.01, 0.1, 0.2, 0.3, 0.5, 0.8, 1.5, 3.0};
    std::string args = fmt::format("current {:.17g} 1e-6 1.5 20 inf", vt_300k);
    std::string args_sh = fmt::format("current {:.17g} 1e-6 1.5 20 100e3", vt_300k);
    for (double v : vs) {
        args += fmt::format(" {:.17g}", v);
        args_sh += fmt::format(" {:.17g}", v);
    }
    const auto ref = run_python(args);
    const auto ref_sh = run_python(args_sh);
    REQUIRE(ref.size() == vs.size());
    REQUIRE(ref_sh.size() == vs.size());
    double worst = 0.0;
    for (std::size_t k = 0; k < vs.size(); ++k) {
        worst = std::max(worst, std::fabs(m.current_a(vs[k]) / ref[k] - 1.0));
        worst = std::max(worst, std::fabs(ms.current_a(vs[k]) / ref_sh[k] - 1.0));
    }
    MESSAGE("worst relative difference to scipy: " << worst);
    CHECK(worst < 1e-12);
}

TEST_CASE("the overflow guard: w + ln w = ln x in the log domain, and currents far beyond exp's range")
{
    // Continuity at the switch to the log-domain solve (Boost.Math below, Newton above).
    CHECK(lambert_w0_of_exp(599.999) == doctest::Approx(boost::math::lambert_w0(std::exp(599.999))).epsilon(1e-15));
    CHECK(lambert_w0_of_exp(600.0) == doctest::Approx(boost::math::lambert_w0(std::exp(600.0))).epsilon(1e-15));
    CHECK(lambert_w0_of_exp(700.0) == doctest::Approx(boost::math::lambert_w0(std::exp(700.0))).epsilon(1e-15));
    // Defining identity of W: w e^w = x, i.e. w + ln w = ln x, where exp(ln x) overflows.
    for (double lx : {800.0, 5e3, 1e6, 1e12}) {
        const double w = lambert_w0_of_exp(lx);
        CHECK((w + std::log(w)) == doctest::Approx(lx).epsilon(1e-15));
    }
    // 5 to 60 V across Is = 1 uA, n = 1.5 through 20 ohm: V/(n Vt) up to 1500, far past exp's range. The
    // current agrees with the implicit equation solved by TOMS 748 (no Lambert W) within 1e-13.
    diode_dc_model m;
    m.saturation_current_a = 1e-6;
    m.emission_coefficient = 1.5;
    m.series_resistance_ohm = 20.0;
    m.leakage_resistance_ohm = 100e3;
    m.thermal_voltage_v = vt_300k;
    for (double v : {-50.0, -3.0, 0.05, 0.4, 5.0, 20.0, 60.0}) {
        INFO("V = " << v);
        const double i = m.current_a(v);
        REQUIRE(std::isfinite(i));
        CHECK(i == doctest::Approx(implicit_current(m, v)).epsilon(1e-13));
        CHECK(m.voltage_at_current_v(i) == doctest::Approx(v).epsilon(1e-13));
    }
}

TEST_CASE("noiseless synthetic points: all four parameters recovered")
{
    const auto s = issue_specimen();
    const auto r = fit_diode(make_points(s, nullptr, 0.0), 25.0, "default");
    const double want[] = {s.truth.saturation_current_a, s.truth.emission_coefficient, s.truth.series_resistance_ohm,
                           s.truth.leakage_resistance_ohm};
    double worst = 0.0;
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        CHECK(r.parameters[q].identifiable);
        worst = std::max(worst, std::fabs(r.parameters[q].value / want[q] - 1.0));
    }
    MESSAGE("worst relative recovery error (noiseless): " << worst << " after " << r.iterations << " iterations");
    CHECK(r.converged);
    // The issue asks for 1e-6; measured 3.1e-15 (the fit stops at rounding level), so the bound is 1e-12.
    CHECK(worst < 1e-12);
    // Derived figures from their definitions: slope = n Vt ln 10; R0 = n Vt / Is; I(V at 100 uA) = 100 uA.
    const double vt = thermal_voltage_v(kelvin_from_celsius(25.0));
    CHECK(r.slope_mv_per_decade.value == doctest::Approx(1.3 * vt * std::log(10.0) * 1e3).epsilon(1e-6));
    CHECK(r.zero_bias_resistance_ohm.value == doctest::Approx(1.3 * vt / 2e-7).epsilon(1e-6).scale(0));
    CHECK(implicit_current(s.truth, r.voltage_at_100ua_v.value) == doctest::Approx(100e-6).epsilon(1e-6).scale(0));
}

TEST_CASE("noisy synthetic points: the reported 95 % intervals cover the truth in 90-99 % of trials")
{
    // 2 % Gaussian relative noise on each current, 400 seeded trials. A t-based interval on a linearised
    // least-squares problem covers 95 % in expectation; the band 90-99 % is the issue's. With 400 trials a
    // correct 95 % shows 92.9-97.1 % (2 binomial sigma).
    const auto s = issue_specimen();
    const double want[] = {s.truth.saturation_current_a, s.truth.emission_coefficient, s.truth.series_resistance_ohm,
                           s.truth.leakage_resistance_ohm};
    std::mt19937 rng(20261202);
    const int trials = 400;
    int inside[fit_parameter_count] = {};
    int flagged = 0;
    for (int t = 0; t < trials; ++t) {
        const auto r = fit_diode(make_points(s, &rng, 0.02), 25.0, "default");
        for (std::size_t q = 0; q < fit_parameter_count; ++q) {
            const auto& p = r.parameters[q];
            if (!p.identifiable) {
                ++flagged;
                continue;
            }
            if (p.ci95_low <= want[q] && want[q] <= p.ci95_high) ++inside[q];
        }
    }
    CHECK(flagged == 0);
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        const double cov = static_cast<double>(inside[q]) / trials;
        MESSAGE("coverage of parameter " << q << ": " << cov);
        CHECK(cov >= 0.90);
        CHECK(cov <= 0.99);
    }
}

TEST_CASE("scipy's curve_fit agrees with the fit on the same data and weighting")
{
    // The reference: scipy.optimize.curve_fit (Levenberg-Marquardt, MINPACK) on ln|I| with sigma = the points'
    // relative errors, over the same log parameters, with the model from the published Lambert-W form and
    // scipy.special.lambertw (tests/diode_fit_check.py). Different weights per point exercise the weighting.
    const auto s = issue_specimen();
    std::vector<double> rel;
    for (std::size_t k = 0; k < s.v.size(); ++k) rel.push_back(0.01 + 0.01 * static_cast<double>(k % 3));
    std::mt19937 rng(77);
    const auto pts = make_points(s, &rng, 0.02, rel);
    const auto r = fit_diode(pts, 25.0, "default");
    const fs::path dir = tmp_dir("scipy");
    {
        std::ofstream f(dir / "points.txt");
        for (const auto& p : pts.points) f << fmt::format("{:.17g} {:.17g} {:.17g}\n", p.voltage_v, p.current_a, p.relative_error);
    }
    // Start scipy 10 % away from galena's answer, so agreement is not inherited from the start.
    const auto ref = run_python(fmt::format("fit {:.17g} '{}' {:.17g} {:.17g} {:.17g} {:.17g}", r.thermal_voltage_v,
                                            (dir / "points.txt").string(), std::log(r.parameters[0].value * 1.1),
                                            std::log(r.parameters[1].value * 0.9), std::log(r.parameters[2].value * 1.1),
                                            std::log(r.parameters[3].value * 0.9)));
    REQUIRE(ref.size() == 8);
    double worst = 0.0, worst_sigma = 0.0;
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        worst = std::max(worst, std::fabs(r.parameters[q].value / ref[q] - 1.0));
        worst_sigma = std::max(worst_sigma, std::fabs(std::sqrt(r.covariance_ln[q][q]) / ref[4 + q] - 1.0));
    }
    MESSAGE("worst relative difference to curve_fit: parameters " << worst << ", standard errors " << worst_sigma);
    // The issue asks for 1e-4. Measured 1.6e-10 for the parameters (MINPACK's stopping rule, not ours,
    // limits it) and 3.3e-8 for the standard errors (both are s^2 (J^T J)^-1 at nearly the same optimum).
    CHECK(worst < 1e-8);
    CHECK(worst_sigma < 1e-6);
}

TEST_CASE("parameters the data cannot pin down are flagged, fixed and reported with a reason")
{
    auto s = issue_specimen();
    // No reverse points: the leakage is not fitted.
    s.v.erase(s.v.begin(), s.v.begin() + 2);
    s.truth.leakage_resistance_ohm = 1e300;
    std::mt19937 rng(5);
    auto r = fit_diode(make_points(s, &rng, 0.01), 25.0, "default");
    CHECK_FALSE(r.parameters[fit_rsh].identifiable);
    CHECK(std::isnan(r.parameters[fit_rsh].sigma));
    CHECK(r.parameters[fit_rsh].reason.find("no reverse points") != std::string::npos);
    CHECK(r.parameters[fit_rs].identifiable);
    CHECK(to_json(r)["leakage_resistance_ohm_sigma"].is_null());
    // Currents too small for Rs to show (I Rs at most 0.2 mV, 0.6 % of the current, against 2 % scatter):
    // Rs is fixed at 0.
    auto low = issue_specimen();
    low.v = {-2.0, -1.0, 0.03, 0.045, 0.06, 0.075, 0.09, 0.105, 0.12};
    r = fit_diode(make_points(low, &rng, 0.02), 25.0, "default");
    CHECK_FALSE(r.parameters[fit_rs].identifiable);
    CHECK(r.parameters[fit_rs].value == 0.0);
    CHECK(r.parameters[fit_rs].reason.find("I x Rs") != std::string::npos);
    CHECK(to_json(r)["series_resistance_ohm_sigma"].is_null());
    // Is and n are still found within their intervals.
    CHECK(r.parameters[fit_n].ci95_low <= 1.3);
    CHECK(r.parameters[fit_n].ci95_high >= 1.3);
}

TEST_CASE("measurement files: both forms, the meter correction and the temperature line")
{
    const auto m = parse_diode_measurements("# invented\n# temperature_c = 21.5\nvoltage_v,current_a\n-1,-2e-6\n0.1,1e-6\n0.2 , 2e-5\n",
                                            "a.csv");
    CHECK(m.form == "voltage_v,current_a");
    REQUIRE(m.points.size() == 3);
    CHECK(m.temperature_c.value() == 21.5);
    CHECK(m.points[2].line == 6);
    // Ladder: I = (supply - diode)/R - diode/R_meter (Kirchhoff's current law at the diode node).
    const auto l = parse_diode_measurements("supply_v,series_ohm,diode_v\n# meter_input_ohm = 1e6\n3,1e6,0.1\n3,100,0.4\n", "b.csv");
    REQUIRE(l.points.size() == 2);
    CHECK(l.points[0].current_a == doctest::Approx((3.0 - 0.1) / 1e6 - 0.1 / 1e6).epsilon(1e-15));
    CHECK(l.points[1].current_a == doctest::Approx((3.0 - 0.4) / 100.0 - 0.4 / 1e6).epsilon(1e-15));
}

TEST_CASE("measurement files take engineering values: the same points as the plain numbers")
{
    // The SI prefixes scale the decimal text exactly: 250m V is the double 0.25 and 20u A the double 2e-5.
    const auto plain = parse_diode_measurements("voltage_v,current_a\n-1,-2e-6\n0.1,1e-6\n0.25,2e-5\n", "p.csv");
    const auto eng = parse_diode_measurements("voltage_v,current_a\n-1V,-2uA\n100m,1u\n250 mV,20uA\n", "e.csv");
    REQUIRE(eng.points.size() == plain.points.size());
    for (std::size_t k = 0; k < eng.points.size(); ++k) {
        CHECK(eng.points[k].voltage_v == plain.points[k].voltage_v);
        CHECK(eng.points[k].current_a == plain.points[k].current_a);
    }
    const auto lp = parse_diode_measurements("supply_v,series_ohm,diode_v\n# meter_input_ohm = 1e6\n3,4.7e3,0.4\n", "a.csv");
    const auto le = parse_diode_measurements("supply_v,series_ohm,diode_v\n# meter_input_ohm = 1M\n3V,4.7k,400mV\n", "b.csv");
    REQUIRE(le.points.size() == 1);
    CHECK(le.points[0].current_a == lp.points[0].current_a);
    // A unit of another kind is refused with the file, line, field, value and both units.
    try {
        (void)parse_diode_measurements("voltage_v,current_a\n0.1,1uF\n", "u.csv");
        FAIL("a current in farads was accepted");
    } catch (const config_error& e) {
        const std::string m = e.what();
        CHECK(m.find("u.csv:2: current_a = 1uF") != std::string::npos);
        CHECK(m.find("unit F") != std::string::npos);
    }
}

TEST_CASE("bad measurement files: one line naming file, line, field, value and rule, exit 2, nothing written")
{
    using galena_test::galena_cli;
    struct bad_case {
        const char* name;
        const char* text;
        std::vector<std::string> pieces;
    };
    const std::vector<bad_case> cases = {
        {"too-few", "voltage_v,current_a\n0.1,1e-6\n0.2,1e-5\n0.3,5e-5\n", {"too-few.csv:4:", "3 points for 3 parameters", "at least 4"}},
        {"nonpositive", "voltage_v,current_a\n0.1,1e-6\n0.2,0\n0.3,5e-5\n0.4,1e-4\n",
         {"nonpositive.csv:3:", "current_a = 0", "forward point", "current > 0"}},
        {"nan", "voltage_v,current_a\n0.1,1e-6\n0.2,nan\n", {"nan.csv:3:", "current_a = nan", "must be a number"}},
        {"unsorted", "voltage_v,current_a\n0.1,1e-6\n0.3,1e-5\n0.2,5e-6\n", {"unsorted.csv:4:", "voltage_v = 0.2", "must increase", "line 3"}},
        {"duplicate", "voltage_v,current_a\n0.1,1e-6\n0.1,1.1e-6\n", {"duplicate.csv:3:", "voltage_v = 0.1", "duplicate voltage", "line 2"}},
        {"wrong-form", "volts,amps\n0.1,1e-6\n", {"wrong-form.csv:1:", "header volts,amps", "voltage_v,current_a"}},
        {"no-header", "0.1,1e-6\n0.2,1e-5\n", {"no-header.csv:1:", "first line", "header row"}},
        {"fields", "supply_v,series_ohm,diode_v\n3,1e6,0.1\n3,1e5\n", {"fields.csv:3:", "2 fields", "needs 3"}},
        {"reverse-sign", "voltage_v,current_a\n-1,2e-6\n0.1,1e-6\n", {"reverse-sign.csv:2:", "current_a = 2e-6", "reverse point"}},
    };
    for (const auto& c : cases) {
        INFO(c.name);
        const fs::path dir = tmp_dir(std::string("bad-") + c.name);
        const fs::path csv = dir / (std::string(c.name) + ".csv");
        {
            std::ofstream f(csv);
            f << c.text;
        }
        const auto r = galena_cli("fit-diode '" + csv.string() + "' --out '" + (dir / "out").string() + "'", dir / "run");
        CHECK(r.rc == 2);
        INFO(r.err);
        CHECK(r.err.rfind("galena: error: ", 0) == 0);
        CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
        for (const auto& p : c.pieces) CHECK(r.err.find(p) != std::string::npos);
        CHECK_FALSE(fs::exists(dir / "out"));
    }
}

TEST_CASE("fit-diode on a bundled example writes diode.toml, fit.json and the plot")
{
    using galena_test::galena_cli;
    const fs::path dir = tmp_dir("tool");
    const fs::path csv = fs::path(GALENA_SOURCE_DIR) / "scenarios" / "diodes" / "schottky-like.csv";
    const auto r = galena_cli("fit-diode '" + csv.string() + "' --out '" + (dir / "out").string() + "' --temperature-c 20", dir / "run");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    for (const char* f : {"diode.toml", "fit.json", "fit.svg", "fit.png", "fit-points.dat", "fit-curve.dat"})
        CHECK(fs::exists(dir / "out" / f));
    const auto j = nlohmann::json::parse(galena_test::slurp(dir / "out" / "fit.json"));
    for (const char* k : {"saturation_current_a", "emission_coefficient", "series_resistance_ohm", "leakage_resistance_ohm"}) {
        CHECK(j.contains(k));
        CHECK(j.contains(std::string(k) + "_sigma"));
    }
    CHECK(j["temperature_c"] == 20.0);
    CHECK(j["temperature_source"] == "command line");
    CHECK(j.contains("zero_bias_resistance_ohm"));
    CHECK(j.contains("residual_rms"));
    // The same fit through the library: the tool only parses and calls.
    const auto lib = fit_diode(load_diode_measurements(csv), 20.0, "command line");
    CHECK(j["saturation_current_a"].get<double>() == doctest::Approx(lib.parameters[0].value).epsilon(1e-12));
}
