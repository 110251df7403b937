// The simulation core against outside references: the exact rectified-DC law of an exponential diode
// (Boost.Math Bessel I0 and a bracketing root finder), ngspice in batch mode on the same circuits, the
// piezo earpiece's dam-up without a DC path, and the production stepper's convergence order on the real
// detector against Boost.Odeint's rosenbrock4, and its waveform against rosenbrock4 at tight tolerance.
#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/step_count.hpp"
#include "galena/render.hpp"
#include "galena/components.hpp"
#include "galena/integrator.hpp"
#include "galena/reference_integrator.hpp"
#include "galena/signal.hpp"

#include <boost/math/special_functions/bessel.hpp>
#include <boost/math/tools/roots.hpp>
#include <doctest/doctest.h>
#include "detector_laws.hpp"
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <complex>
#include <cstdint>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <type_traits>
#include <vector>

using namespace galena;
using galena_test::dc_law_v;
using galena_test::vt_25c;
namespace fs = std::filesystem;

namespace {

constexpr double k_pi = 3.14159265358979323846;


/// The production stepper's settings as a render uses them: rtol 1e-3, atol 1e-6 V (the step_settings
/// defaults) and h_max = carrier period / steps_per_cycle (render_settings.carrier_steps_floor).
step_settings production_settings(double carrier_hz, double steps_per_cycle)
{
    step_settings st;
    st.max_step_s = 1.0 / (carrier_hz * steps_per_cycle);
    st.initial_step_s = std::min(st.initial_step_s, 0.01 / carrier_hz);
    return st;
}

/// Runs eq from x0 at t = 0 and returns the output voltage on the grid t0 + k dt, k < n, interpolated
/// with the stepper's own dense output (cubic Hermite between accepted steps).
template <class Eq>
std::vector<double> output_on_grid(const Eq& eq, const step_settings& st, const typename Eq::vec& x0, double t0, double dt,
                                   std::size_t n, step_stats* stats = nullptr)
{
    constexpr int out = Eq::output_index;
    tr_bdf2<Eq> ig(eq, st);
    ig.initialize(x0, 0.0);
    std::vector<double> v;
    v.reserve(n);
    std::size_t k = 0;
    const double t_end = t0 + static_cast<double>(n - 1) * dt;
    ig.advance_to(t_end, [&](double ta, const auto& xa, const auto& fa, double tb, const auto& xb, const auto& fb) {
        while (k < n) {
            const double t = t0 + static_cast<double>(k) * dt;
            if (t > tb && !(k == n - 1 && tb >= t_end)) break;
            v.push_back(hermite_value(std::clamp(t, ta, tb), ta, xa[out], fa[out], tb, xb[out], fb[out]));
            ++k;
        }
    });
    if (stats != nullptr) *stats = ig.stats();
    return v;
}

/// The output voltage on the grid t0 + k dt, k < n, by the production phase-locked integrator with its
/// automatic step count (render_settings defaults), cubic Hermite between steps.
std::vector<double> phase_locked_on_grid(const detector_network& net, const am_source& src, double t0, double dt, std::size_t n,
                                         int* steps_used = nullptr)
{
    return with_one_junction_network(net, [&](const auto& oj) {
        constexpr int dim = std::remove_cvref_t<decltype(oj)>::vec::RowsAtCompileTime;
        const am_params& am = src.params();
        const double fc = am.carrier_hz, period = 1.0 / fc;
        const double levels[] = {am.carrier_peak_v * (1.0 + am.modulation_index), am.carrier_peak_v,
                                 am.carrier_peak_v * (1.0 - am.modulation_index)};
        const int steps = choose_steps_per_cycle(oj, fc, levels, render_settings{}.dc_tolerance).steps_per_cycle;
        if (steps_used != nullptr) *steps_used = steps;
        const double h = period / steps;
        cycle_settings cs;
        cs.steps_per_cycle = steps;
        cs.voltage_scale_v = levels[0];
        cycle_integrator<dim> ig(oj, fc, cs);
        ig.initialize(0.0, cycle_integrator<dim>::vec::Zero(), src.voltage(0.0));
        phase_locked_source sampler(src, steps);
        std::vector<double> u(static_cast<std::size_t>(steps)), out;
        for (std::size_t c = 0; out.size() < n; ++c) {
            sampler.cycle(c, u);
            ig.advance(u);
            const auto y = ig.output_v();
            const double tc = static_cast<double>(c) * period;
            while (out.size() < n && t0 + static_cast<double>(out.size()) * dt < tc + period) {
                // Rounding can put a sample that sits on a cycle boundary a hair before the cycle's start.
                const double s = std::max(0.0, (t0 + static_cast<double>(out.size()) * dt - tc) / h);
                const int m = std::min(steps - 1, static_cast<int>(s));
                out.push_back(hermite_value(s, double(m), y[m], ig.output_slope_v_per_s(m) * h, double(m + 1), y[m + 1],
                                            ig.output_slope_v_per_s(m + 1) * h));
            }
        }
        return out;
    });
}

/// rms(a - b) / rms(b).
double relative_rms(const std::vector<double>& a, const std::vector<double>& b)
{
    double num = 0.0, den = 0.0;
    for (std::size_t i = 0; i < b.size(); ++i) {
        num += (a[i] - b[i]) * (a[i] - b[i]);
        den += b[i] * b[i];
    }
    return std::sqrt(num / den);
}

/// |a/b - 1|. (doctest's Approx adds a scale of 1 to the relative tolerance, which makes it absolute for
/// microvolt values, so relative checks are spelled out.)
double rel_diff(double a, double b) { return std::fabs(a / b - 1.0); }

double mean_of(const std::vector<double>& a)
{
    double s = 0.0;
    for (double v : a) s += v;
    return s / static_cast<double>(a.size());
}

// ---------------------------------------------------------------------------------------------------
// 1. Rectified-DC law
// ---------------------------------------------------------------------------------------------------


struct dc_case {
    const char* name;
    double is_a;
    double n;
    double rl_ohm;
};

} // namespace

TEST_CASE("rectified DC of an exponential diode follows Is (I0(V/nVt) exp(-Vdc/nVt) - 1) = Vdc/RL")
{
    // Reference: the I0 law of H. C. Torrey and C. A. Whitmer, Crystal Rectifiers, MIT Radiation Laboratory Series vol. 15, 1948 (from memory), solved here with Boost.Math cyl_bessel_i and
    // toms748_solve. The law assumes Rs = 0, Cj = 0, a source of zero resistance and negligible ripple.
    // The ripple is about Vdc / (fc RL C) peak to peak; RL C = 1000 carrier periods keeps its effect on the
    // mean below 0.05 %. The tolerance, 0.2 %, leaves room for that and the stepper's error, and still
    // catches a 0.6 % error in Vt (kT/q taken at 300 K instead of 298.15 K) in the square-law cases.
    constexpr double fc = 100e3; // Hz; the law does not depend on frequency when RL C >> 1/fc
    const double period = 1.0 / fc;
    const dc_case cases[] = {
        {"germanium-like", 1e-6, 1.3, 47e3},   // Rv = n Vt / Is = 33 kohm
        {"schottky-like", 2e-8, 1.08, 1e6},    // Rv = 1.4 Mohm
        {"zero-bias-like", 4e-6, 1.05, 10e3},  // Rv = 6.8 kohm
    };
    // Carrier levels as multiples of n Vt: square law (a << 1) through linear (a >> 1).
    const double levels[] = {0.05, 0.3, 1.0, 3.0, 10.0, 30.0};
    double worst = 0.0;
    for (const dc_case& dc : cases) {
        const double nvt = dc.n * vt_25c;
        const double rv = nvt / dc.is_a; // zero-bias video resistance, ohm
        for (double a : levels) {
            const double v_peak = a * nvt;
            const double v_ref = dc_law_v(v_peak, dc.is_a, dc.n, dc.rl_ohm);

            circuit_params c;
            c.source.resistance_ohm = 0.0;
            c.diode.saturation_current_a = dc.is_a;
            c.diode.emission_coefficient = dc.n;
            c.diode.series_resistance_ohm = 0.0;
            c.diode.junction_capacitance_f = 0.0;
            c.earpiece.kind = earpiece_kind::resistor;
            c.earpiece.resistance_ohm = dc.rl_ohm;
            c.load.filter_capacitance_f = 1000.0 * period / dc.rl_ohm;
            const detector_network net(c);
            tone_modulation silent({1000.0}, {1.0}, 1.0);
            am_params am;
            am.carrier_hz = fc;
            am.carrier_peak_v = v_peak;
            am.modulation_index = 0.0;
            const am_source src(am, &silent);
            using eq_t = detector_equations<false, 0>;
            const eq_t eq(net, src);

            // Settling: the carrier-averaged output obeys C dVdc/dt = Is (I0 e^-y - 1) - Vdc/RL, whose
            // linearisation has conductance 1/RL + (Vdc/RL + Is)/(n Vt) [derived from the law]; 10 time
            // constants from 0.8 x the answer leave 0.2 e^-10 ~ 1e-5 of the start error.
            const double g = 1.0 / dc.rl_ohm + (v_ref / dc.rl_ohm + dc.is_a) / nvt;
            const double tau = net.node_capacitance_f() / g;
            const double t_settle = std::ceil(10.0 * tau / period) * period;
            const double t_end = t_settle + 50.0 * period;

            step_settings st;
            st.relative_tolerance = 1e-6; // the square-law outputs are microvolts: tight, absolute-scaled
            st.absolute_tolerance_v = 1e-12;
            st.max_step_s = period / 40.0;
            st.initial_step_s = period / 1000.0;
            tr_bdf2<eq_t> ig(eq, st);
            eq_t::vec x0;
            x0 << 0.8 * v_ref;
            ig.initialize(x0, 0.0);
            ig.advance_to(t_settle, [](auto&&...) {});
            // Mean over 50 whole cycles: exact integral of the cubic Hermite over each step.
            double integral = 0.0;
            ig.advance_to(t_end, [&](double ta, const auto& xa, const auto& fa, double tb, const auto& xb, const auto& fb) {
                const double h = tb - ta;
                integral += 0.5 * h * (xa[0] + xb[0]) + h * h * (fa[0] - fb[0]) / 12.0;
            });
            const double v_sim = integral / (t_end - t_settle);
            const double err = std::fabs(v_sim / v_ref - 1.0);
            worst = std::max(worst, err);
            INFO(dc.name << ": V = " << v_peak << " V (" << a << " nVt), law " << v_ref << " V, simulated " << v_sim << " V");
            CHECK(err <= 0.002);
            MESSAGE(fmt::format("DC law {:15s} a = {:5.2f}: law {:.6e} V, sim {:.6e} V, rel err {:.2e}", dc.name, a, v_ref,
                                v_sim, err));
            if (a == levels[0]) {
                // Small-signal limit [derived from the law: I0(a) ~ 1 + a^2/4, e^-y ~ 1 - y gives
                // Is (a^2/4 - y) = y n Vt / RL, so Vdc = V^2/(4 n Vt) RL/(RL + Rv), Rv = n Vt / Is]; the
                // neglected terms are O(a^2), below 1e-3 relative at a = 0.05.
                const double v_small = v_peak * v_peak / (4.0 * nvt) * dc.rl_ohm / (dc.rl_ohm + rv);
                CHECK(rel_diff(v_sim, v_small) <= 0.002);
                CHECK(rel_diff(v_ref, v_small) <= 0.002);
            }
        }
    }
    MESSAGE("DC law: worst relative error " << worst);
}

// ---------------------------------------------------------------------------------------------------
// 2. ngspice
// ---------------------------------------------------------------------------------------------------

namespace {

std::string num(double v) { return fmt::format("{:.17g}", v); }

fs::path test_tmp_dir(const std::string& leaf)
{
#ifdef GALENA_TEST_TMP
    fs::path base(GALENA_TEST_TMP);
#else
    fs::path base = fs::temp_directory_path();
#endif
    const fs::path dir = base / leaf;
    fs::create_directories(dir);
    return dir;
}

/// The ngspice netlist of galena's circuit (see circuit.hpp):
///   B-source s --R_src-- a --R_s-- j --[D || R_leak]-- b ; at b: C_filter + C_stray + C0, bleeder,
///   piezo leakage, resistor earpiece, BVD branch (Rm - Lm - Cm) or magnetic phones (Rdc - (L || R_loss)).
/// The diode is ngspice's level-1 D with RS = 0 (the series resistance is the explicit R_s), its EG and XTI
/// (Is(T) = IS (T/TNOM)^(XTI/N) exp((T/TNOM - 1) EG / (N Vt)), ngspice manual, diode model, temperature
/// effects) and, when galena's diode has one, reverse breakdown BV and IBV; the leakage sits across the
/// junction, inside R_s, as in galena.
std::string spice_netlist(const std::string& title, const circuit_params& c, const am_params& am, double fm_hz, double t_end,
                          double max_step, const fs::path& out_file)
{
    std::ostringstream s;
    const diode_params& d = c.diode;
    s << "* galena reference circuit: " << title << "\n";
    s << "B1 s 0 V = " << num(am.carrier_peak_v) << "*(1+" << num(am.modulation_index) << "*sin(" << num(2 * k_pi * fm_hz)
      << "*time))*cos(" << num(2 * k_pi * am.carrier_hz) << "*time)\n";
    s << "Rsrc s a " << num(c.source.resistance_ohm) << "\n";
    s << "Rs a j " << num(d.series_resistance_ohm) << "\n";
    s << "D1 j b dmod\n";
    if (std::isfinite(d.leakage_resistance_ohm)) s << "Rleak j b " << num(d.leakage_resistance_ohm) << "\n";
    double cb = c.load.filter_capacitance_f + c.load.stray_capacitance_f;
    if (c.earpiece.kind == earpiece_kind::piezo) cb += c.earpiece.capacitance_f;
    s << "Cb b 0 " << num(cb) << "\n";
    if (std::isfinite(c.load.bleeder_ohm)) s << "Rbleed b 0 " << num(c.load.bleeder_ohm) << "\n";
    const earpiece_params& e = c.earpiece;
    switch (e.kind) {
    case earpiece_kind::piezo:
        if (std::isfinite(e.leakage_ohm)) s << "Rpz b 0 " << num(e.leakage_ohm) << "\n";
        if (e.has_motional_branch()) {
            s << "Rm b m1 " << num(e.motional_resistance_ohm) << "\n";
            s << "Lm m1 m2 " << num(e.motional_inductance_h) << "\n";
            s << "Cm m2 0 " << num(e.motional_capacitance_f) << "\n";
        }
        break;
    case earpiece_kind::magnetic:
        s << "Rdc b m1 " << num(e.resistance_ohm) << "\n";
        s << "Lph m1 0 " << num(e.inductance_h) << "\n";
        if (std::isfinite(e.loss_resistance_ohm)) s << "Rloss m1 0 " << num(e.loss_resistance_ohm) << "\n";
        break;
    case earpiece_kind::resistor: s << "Rear b 0 " << num(e.resistance_ohm) << "\n"; break;
    }
    s << ".model dmod D(IS=" << num(d.saturation_current_a) << " N=" << num(d.emission_coefficient)
      << " RS=0 CJO=" << num(d.junction_capacitance_f) << " VJ=" << num(d.junction_potential_v)
      << " M=" << num(d.grading_coefficient) << " FC=0.5 EG=" << num(d.energy_gap_ev) << " XTI=" << num(d.saturation_current_exponent);
    if (std::isfinite(d.breakdown_voltage_v)) s << " BV=" << num(d.breakdown_voltage_v) << " IBV=" << num(d.breakdown_current_a);
    s << ")\n";
    // gmin (added across every junction by ngspice) is pushed far below the smallest conductance here.
    s << ".options reltol=1e-6 abstol=1e-15 vntol=1e-9 gmin=1e-18 temp=" << num(d.temperature_c)
      << " tnom=" << num(d.nominal_temperature_c) << "\n";
    // uic: every state starts at zero at t = 0, as galena's x0 = 0.
    s << ".tran " << num(max_step) << " " << num(t_end) << " 0 " << num(max_step) << " uic\n";
    s << ".control\nset wr_singlescale\nset numdgt=15\nrun\nwrdata " << out_file.string() << " v(b)\nquit 0\n.endc\n.end\n";
    return s.str();
}

/// Runs ngspice in batch mode on the netlist and returns its (time, v(b)) rows. FAILs the test (does not
/// skip) when ngspice is missing or fails: CI installs the Debian package.
bool run_ngspice(const fs::path& dir, const std::string& netlist, double t_end, std::vector<double>& t, std::vector<double>& v)
{
    const fs::path cir = dir / "circuit.cir";
    const fs::path log = dir / "ngspice.log";
    const fs::path out = dir / "out.txt";
    fs::remove(out);
    {
        std::ofstream f(cir);
        f << netlist;
    }
    if (std::system("command -v ngspice > /dev/null 2>&1") != 0) {
        FAIL_CHECK("ngspice not found on PATH: this test needs the Debian package ngspice (CI installs it)");
        return false;
    }
    const std::string cmd = fmt::format("ngspice -b '{}' > '{}' 2>&1", cir.string(), log.string());
    const int rc = std::system(cmd.c_str());
    std::ifstream in(out);
    if (!in) {
        std::ifstream lg(log);
        std::stringstream ls;
        ls << lg.rdbuf();
        FAIL_CHECK("ngspice failed (rc " << rc << ", command: " << cmd << "); log:\n" << ls.str());
        return false;
    }
    double a = 0.0, b = 0.0;
    while (in >> a >> b) {
        t.push_back(a);
        v.push_back(b);
    }
    if (rc != 0 || t.size() < 100 || t.back() < t_end * (1.0 - 1e-9)) {
        FAIL_CHECK("ngspice did not finish (rc " << rc << ", " << t.size() << " rows to t = " << (t.empty() ? 0.0 : t.back())
                   << " s of " << t_end << " s in " << out.string() << ")");
        return false;
    }
    return true;
}

/// Linear interpolation of (t, v) onto the grid t0 + k dt, k < n (t ascending).
std::vector<double> interpolate(const std::vector<double>& t, const std::vector<double>& v, double t0, double dt, std::size_t n)
{
    std::vector<double> r(n);
    std::size_t j = 0;
    for (std::size_t k = 0; k < n; ++k) {
        const double tk = t0 + static_cast<double>(k) * dt;
        while (j + 2 < t.size() && t[j + 1] < tk) ++j;
        const double s = (tk - t[j]) / (t[j + 1] - t[j]);
        r[k] = v[j] + s * (v[j + 1] - v[j]);
    }
    return r;
}

struct spice_case {
    std::string name;
    circuit_params circuit;
    am_params am;
};

diode_params germanium_like()
{
    diode_params d;
    d.saturation_current_a = 1e-6;
    d.emission_coefficient = 1.3;
    d.series_resistance_ohm = 15.0;
    d.leakage_resistance_ohm = 500e3;
    d.junction_capacitance_f = 0.8e-12;
    d.junction_potential_v = 0.3;
    d.grading_coefficient = 0.5;
    return d;
}

/// The bench detector these references share: a 20 kOhm generator, the diode, a 47 kOhm bleeder and a piezo
/// earpiece of `earpiece_f`.
circuit_params generator_detector(const diode_params& diode, double earpiece_f)
{
    circuit_params c;
    c.source.resistance_ohm = 20e3;
    c.diode = diode;
    c.load.bleeder_ohm = 47e3;
    c.earpiece.kind = earpiece_kind::piezo;
    c.earpiece.capacitance_f = earpiece_f;
    return c;
}

std::vector<spice_case> spice_cases()
{
    std::vector<spice_case> v;
    am_params am;
    am.carrier_hz = 1e6;
    {
        spice_case k{"(a) germanium-like, Cj, 47k bleeder, piezo", {}, am};
        k.circuit.source.resistance_ohm = 20e3;
        k.circuit.diode = germanium_like();
        k.circuit.load.bleeder_ohm = 47e3;
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        k.circuit.earpiece.leakage_ohm = 100e6;
        k.am.carrier_peak_v = 0.5;
        k.am.modulation_index = 0.5;
        v.push_back(k);
    }
    {
        spice_case k{"(b) schottky-like, Cj = 0, 2.2 nF filter, 100k bleeder, piezo", {}, am};
        k.circuit.source.resistance_ohm = 50e3;
        k.circuit.diode.saturation_current_a = 20e-9;
        k.circuit.diode.emission_coefficient = 1.08;
        k.circuit.diode.series_resistance_ohm = 15.0;
        k.circuit.diode.junction_capacitance_f = 0.0;
        k.circuit.load.filter_capacitance_f = 2.2e-9;
        k.circuit.load.bleeder_ohm = 100e3;
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        k.am.carrier_peak_v = 1.0;
        k.am.modulation_index = 0.3;
        v.push_back(k);
    }
    {
        spice_case k{"(c) silicon-like, Cj0 = 10 pF graded M = 0.33, 100k bleeder, piezo", {}, am};
        k.circuit.source.resistance_ohm = 20e3;
        k.circuit.diode.saturation_current_a = 3e-9;
        k.circuit.diode.emission_coefficient = 1.9;
        k.circuit.diode.series_resistance_ohm = 0.7;
        k.circuit.diode.junction_capacitance_f = 10e-12;
        k.circuit.diode.junction_potential_v = 0.6;
        k.circuit.diode.grading_coefficient = 0.33;
        k.circuit.load.bleeder_ohm = 100e3;
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        k.am.carrier_peak_v = 2.0;
        k.am.modulation_index = 0.8;
        v.push_back(k);
    }
    {
        spice_case k{"(d) germanium-like, Butterworth-Van Dyke piezo, no bleeder", {}, am};
        k.circuit.source.resistance_ohm = 20e3;
        k.circuit.diode = germanium_like();
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        k.circuit.earpiece.motional_resistance_ohm = 300.0;
        k.circuit.earpiece.motional_inductance_h = 0.2;
        k.circuit.earpiece.motional_capacitance_f = 5e-9;
        k.am.carrier_peak_v = 0.5;
        k.am.modulation_index = 0.5;
        v.push_back(k);
    }
    {
        spice_case k{"(e) zero-bias-like, 2 nF filter, magnetic phones", {}, am};
        k.circuit.source.resistance_ohm = 5e3;
        k.circuit.diode.saturation_current_a = 4e-6;
        k.circuit.diode.emission_coefficient = 1.05;
        k.circuit.diode.series_resistance_ohm = 22.0;
        k.circuit.diode.junction_capacitance_f = 0.18e-12;
        k.circuit.diode.junction_potential_v = 0.35;
        k.circuit.load.filter_capacitance_f = 2e-9;
        k.circuit.earpiece.kind = earpiece_kind::magnetic;
        k.circuit.earpiece.resistance_ohm = 2000.0;
        k.circuit.earpiece.inductance_h = 1.5;
        k.circuit.earpiece.loss_resistance_ohm = 50e3;
        k.am.carrier_peak_v = 1.0;
        k.am.modulation_index = 0.5;
        v.push_back(k);
    }
    return v;
}

} // namespace

TEST_CASE("earpiece waveforms agree with ngspice (batch mode, tight tolerances) to 5e-4 relative RMS")
{
    // Reference: ngspice (Debian package), level-1 diode, trapezoidal integration with reltol 1e-6 and a
    // max step of period/200 [outside reference: general-purpose circuit simulator]. galena runs its
    // production settings (rtol 1e-3, atol 1e-6 V, 40 steps per carrier period), what users get.
    // Known model difference: below -3 n Vt ngspice replaces Is (exp(v/nVt) - 1) by -Is (1 + (3 nVt/(e v))^3)
    // (ngspice source, dioload.c), at most about 0.004 Is apart; it is far below the tolerance here.
    constexpr double fm = 1000.0;
    const fs::path dir = test_tmp_dir("reference_ngspice");
    for (spice_case& k : spice_cases()) {
        const double fc = k.am.carrier_hz;
        const double period = 1.0 / fc;
        const double t_end = 1e-3;
        const double t0 = 0.3e-3; // compare 0.3 .. 1 ms
        const double dt = period / 32.0;
        const auto n = static_cast<std::size_t>(std::llround((t_end - t0) / dt));
        const std::string netlist = spice_netlist(k.name, k.circuit, k.am, fm, t_end, period / 200.0, dir / "out.txt");
        std::vector<double> ts, vs;
        REQUIRE(run_ngspice(dir, netlist, t_end, ts, vs));
        const std::vector<double> ref = interpolate(ts, vs, t0, dt, n);

        const detector_network net(k.circuit);
        tone_modulation tone({fm}, {1.0}, 1.0);
        const am_source src(k.am, &tone);
        const step_settings st = production_settings(fc, 40.0);
        const std::vector<double> got = with_equations(net, src, [&](auto eq) {
            using eq_t = decltype(eq);
            return output_on_grid(eq, st, eq_t::vec::Zero().eval(), t0, dt, n);
        });
        REQUIRE(got.size() == n);
        const double rel = relative_rms(got, ref);
        // Audio-band view: the same with each waveform's window mean removed.
        const double ma = mean_of(got), mb = mean_of(ref);
        std::vector<double> ga(n), ra(n);
        for (std::size_t i = 0; i < n; ++i) {
            ga[i] = got[i] - ma;
            ra[i] = ref[i] - mb;
        }
        const double rel_ac = relative_rms(ga, ra);
        MESSAGE(fmt::format("ngspice {}: adaptive relRMS {:.3e} (AC part {:.3e}), mean {:.6f} V vs {:.6f} V", k.name, rel, rel_ac, ma, mb));
        INFO(k.name);
        // The production (phase-locked) integrator with its automatic step count, same bounds.
        int steps = 0;
        const std::vector<double> pl = phase_locked_on_grid(net, src, t0, dt, n, &steps);
        REQUIRE(pl.size() == n);
        const double rel_pl = relative_rms(pl, ref);
        const double mp = mean_of(pl);
        std::vector<double> pa(n);
        for (std::size_t i = 0; i < n; ++i) pa[i] = pl[i] - mp;
        const double rel_pl_ac = relative_rms(pa, ra);
        MESSAGE(fmt::format("ngspice {}: phase-locked N = {} relRMS {:.3e} (AC part {:.3e})", k.name, steps, rel_pl, rel_pl_ac));
        CHECK(rel_pl <= 5e-4);
        CHECK(rel_pl_ac <= 1e-3);
        // The brief's bound is 1e-3; 5e-4 is used because a 2 % error in Is moves some of these circuits
        // by only 5e-4 .. 1e-3 (the DC shifts by n Vt ln 1.02), measured by perturbing galena's Is. The AC
        // part (mean removed) carries the audio and is checked to 1e-3.
        CHECK(rel <= 5e-4);
        CHECK(rel_ac <= 1e-3);
    }
}

TEST_CASE("temperature (TEMP != TNOM, with EG and XTI) and reverse breakdown (BV, IBV) agree with ngspice")
{
    // Reference: ngspice (Debian package) level-1 diode, batch mode, as above. Temperature: ngspice scales
    // IS by (T/TNOM)^(XTI/N) exp((T/TNOM - 1) EG / (N Vt)) (ngspice manual, "Diode Model", temperature
    // effects); Cj0 = 0 here because ngspice also scales CJO and VJ with temperature and galena does not.
    // Breakdown: ngspice's current below -BV is -IS exp(-(xbv + v)/(N Vt)) with xbv chosen so that it is
    // -IBV at v = -BV (ngspice source, diotemp.c), the law galena writes as -IBV exp(-(v + BV)/(N Vt)).
    // Between -3 N Vt and -BV ngspice uses its cubic reverse law (at most 0.004 Is apart, as above).
    constexpr double fm = 1000.0;
    const fs::path dir = test_tmp_dir("reference_ngspice_temperature");
    am_params am;
    am.carrier_hz = 1e6;
    am.carrier_peak_v = 1.0;
    am.modulation_index = 0.3;
    std::vector<spice_case> cases;
    for (const double temp_c : {70.0, -20.0}) {
        spice_case k{fmt::format("schottky-like at {} C, TNOM 20 C, EG 0.69 eV, XTI 2", temp_c), {}, am};
        k.circuit.source.resistance_ohm = 50e3;
        k.circuit.diode.saturation_current_a = 20e-9;
        k.circuit.diode.emission_coefficient = 1.08;
        k.circuit.diode.series_resistance_ohm = 15.0;
        k.circuit.diode.junction_capacitance_f = 0.0;
        k.circuit.diode.temperature_c = temp_c;
        k.circuit.diode.nominal_temperature_c = 20.0;
        k.circuit.diode.energy_gap_ev = 0.69;
        k.circuit.diode.saturation_current_exponent = 2.0;
        k.circuit.load.filter_capacitance_f = 2.2e-9;
        k.circuit.load.bleeder_ohm = 100e3;
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        cases.push_back(k);
    }
    {
        // A low breakdown voltage that the reverse swing (carrier crest + detected DC, about 3 V) crosses.
        spice_case k{"silicon-like with BV = 1.2 V, IBV = 10 uA, 2 V carrier", {}, am};
        k.am.carrier_peak_v = 2.0;
        k.circuit.source.resistance_ohm = 20e3;
        k.circuit.diode.saturation_current_a = 3e-9;
        k.circuit.diode.emission_coefficient = 1.9;
        k.circuit.diode.series_resistance_ohm = 0.7;
        k.circuit.diode.junction_capacitance_f = 0.0;
        k.circuit.diode.breakdown_voltage_v = 1.2;
        k.circuit.diode.breakdown_current_a = 10e-6;
        k.circuit.load.bleeder_ohm = 100e3;
        k.circuit.earpiece.kind = earpiece_kind::piezo;
        k.circuit.earpiece.capacitance_f = 10e-9;
        cases.push_back(k);
    }
    for (spice_case& k : cases) {
        INFO(k.name);
        const double period = 1.0 / k.am.carrier_hz;
        const double t_end = 1e-3, t0 = 0.3e-3, dt = period / 32.0;
        const auto n = static_cast<std::size_t>(std::llround((t_end - t0) / dt));
        std::vector<double> ts, vs;
        REQUIRE(run_ngspice(dir, spice_netlist(k.name, k.circuit, k.am, fm, t_end, period / 200.0, dir / "out.txt"), t_end, ts, vs));
        const std::vector<double> ref = interpolate(ts, vs, t0, dt, n);
        const detector_network net(k.circuit);
        tone_modulation tone({fm}, {1.0}, 1.0);
        const am_source src(k.am, &tone);
        int steps = 0;
        const std::vector<double> pl = phase_locked_on_grid(net, src, t0, dt, n, &steps);
        REQUIRE(pl.size() == n);
        const double rel = relative_rms(pl, ref);
        MESSAGE(fmt::format("ngspice {}: phase-locked N = {} relRMS {:.3e}, mean {:.6f} V vs {:.6f} V", k.name, steps, rel, mean_of(pl),
                            mean_of(ref)));
        // Measured: 5.3e-5 (70 C) and 6.9e-7 (-20 C); 5.4e-4 with breakdown, where ngspice solves its
        // breakdown knee xbv iteratively with the forward term included (diotemp.c) and uses its cubic law
        // between -3 N Vt and -BV. The bound is 1e-3 with breakdown, 5e-4 otherwise (as above). For scale:
        // the DC at 70 C and at -20 C differ by 18 %, and breakdown lowers this circuit's DC from about 0.79 V
        // to 0.29 V (measured with and without BV), so a flipped sign in either law fails far outside these.
        CHECK(rel <= (std::isfinite(k.circuit.diode.breakdown_voltage_v) ? 1e-3 : 5e-4));
    }
}

TEST_CASE("the audio path end to end against ngspice + scipy: render()'s earpiece audio equals the low-passed ngspice waveform")
{
    // Outside references: ngspice (batch mode, the same circuit and the same source, carrier ramp and
    // programme start written as a B-source) for the waveform, and scipy.signal.resample_poly (polyphase
    // Kaiser-windowed FIR, zero phase) for the audio-band view at 48 kHz (tests/audio_path_check.py). galena's
    // chain (cycle means, sinc resampler, decimating FIR) must give the same samples at the same times.
    // A 1 nF load makes the carrier ripple about 10 % of the output, so a chain that sampled the waveform
    // (at the crest, or anywhere in the cycle) instead of averaging it would be off by percent. Measured
    // relRMS 2.4e-4 over the 384 compared samples (ngspice's own accuracy and resample_poly's Kaiser filter,
    // as in the comparisons above); bound 1e-3.
    const fs::path dir = test_tmp_dir("reference_audio_path");
    const circuit_params c = generator_detector(germanium_like(), 1e-9);
    am_params am;
    am.carrier_hz = 200e3;
    am.carrier_peak_v = 1.0;
    am.modulation_index = 0.5;
    const double fm = 1000.0, fs = 48000.0, t_pre = 0.005, ramp = 2e-3, prog = 0.012;
    render_settings rs;
    rs.audio_rate_hz = fs;
    rs.preroll_s = t_pre;
    tone_modulation tone({fm}, {1.0}, prog);
    const rendered_audio got = render_to_memory(c, am, tone, rs);
    const double t_end = t_pre + prog;
    // The same source as am_source: A r(t) (1 + m x(t - t_pre)) cos(2 pi fc t), r a raised-cosine ramp.
    std::ostringstream net;
    net << "* galena audio path reference\n";
    net << "B1 s 0 V = " << num(am.carrier_peak_v) << "*(time < " << num(ramp) << " ? 0.5*(1-cos(" << num(k_pi / ramp) << "*time)) : 1)"
        << "*(1+" << num(am.modulation_index) << "*(time >= " << num(t_pre) << " ? sin(" << num(2 * k_pi * fm) << "*(time-" << num(t_pre)
        << ")) : 0))*cos(" << num(2 * k_pi * am.carrier_hz) << "*time)\n";
    net << "Rsrc s a " << num(c.source.resistance_ohm) << "\nRs a j " << num(c.diode.series_resistance_ohm) << "\nD1 j b dmod\n";
    net << "Rleak j b " << num(c.diode.leakage_resistance_ohm) << "\n";
    net << "Cb b 0 " << num(c.load.filter_capacitance_f + c.load.stray_capacitance_f + c.earpiece.capacitance_f) << "\n";
    net << "Rbleed b 0 " << num(c.load.bleeder_ohm) << "\n";
    if (std::isfinite(c.earpiece.leakage_ohm)) net << "Rpz b 0 " << num(c.earpiece.leakage_ohm) << "\n";
    const diode_params& d = c.diode;
    net << ".model dmod D(IS=" << num(d.saturation_current_a) << " N=" << num(d.emission_coefficient) << " RS=0 CJO="
        << num(d.junction_capacitance_f) << " VJ=" << num(d.junction_potential_v) << " M=" << num(d.grading_coefficient) << " FC=0.5)\n";
    net << ".options reltol=1e-6 abstol=1e-15 vntol=1e-9 gmin=1e-18 temp=" << num(d.temperature_c) << " tnom=" << num(d.nominal_temperature_c)
        << "\n";
    const double max_step = 1.0 / (am.carrier_hz * 100.0);
    net << ".tran " << num(max_step) << " " << num(t_end) << " 0 " << num(max_step) << " uic\n";
    net << ".control\nset wr_singlescale\nset numdgt=15\nrun\nwrdata " << (dir / "out.txt").string() << " v(b)\nquit 0\n.endc\n.end\n";
    std::vector<double> ts, vs;
    REQUIRE(run_ngspice(dir, net.str(), t_end, ts, vs));
    {
        std::ofstream o(dir / "wave.txt");
        o.precision(17);
        for (std::size_t i = 0; i < ts.size(); ++i) o << ts[i] << " " << vs[i] << "\n";
    }
    const std::string cmd = fmt::format("/usr/bin/python3 '{}/tests/audio_path_check.py' '{}' '{}' {} {}", GALENA_SOURCE_DIR,
                                        (dir / "wave.txt").string(), (dir / "audio.txt").string(), num(64.0 * am.carrier_hz), num(fs));
    REQUIRE_MESSAGE(std::system(cmd.c_str()) == 0, "scipy reference failed: " << cmd);
    std::vector<double> ref;
    {
        std::ifstream in(dir / "audio.txt");
        for (double x; in >> x;) ref.push_back(x);
    }
    // Programme sample k is simulated time t_pre + k / fs, scipy's sample j is time j / fs.
    const auto offset = static_cast<std::size_t>(std::llround(t_pre * fs));
    // Compare from 3 ms into the programme (after the ramp and the 5 tau = 0.3 ms settling) to 1 ms before
    // the end (the FIR edges of resample_poly).
    const auto from = static_cast<std::size_t>(0.003 * fs), to = static_cast<std::size_t>((prog - 0.001) * fs);
    REQUIRE(got.earpiece_v.size() >= to);
    REQUIRE(ref.size() >= offset + to);
    std::vector<double> a(got.earpiece_v.begin() + static_cast<std::ptrdiff_t>(from), got.earpiece_v.begin() + static_cast<std::ptrdiff_t>(to));
    std::vector<double> b(ref.begin() + static_cast<std::ptrdiff_t>(offset + from), ref.begin() + static_cast<std::ptrdiff_t>(offset + to));
    const double rel = relative_rms(a, b);
    MESSAGE(fmt::format("audio path vs ngspice + scipy: relRMS {:.3e} over {} samples (mean {:.6f} V vs {:.6f} V)", rel, a.size(),
                        mean_of(a), mean_of(b)));
    CHECK(rel <= 1e-3);
}

// ---------------------------------------------------------------------------------------------------
// 3. Piezo earpiece dam-up
// ---------------------------------------------------------------------------------------------------

namespace {

struct level_track {
    std::vector<double> tone_v; ///< amplitude of the fm component of v_b in each modulation period, V
    std::vector<double> mean_v; ///< mean of v_b in each modulation period, V
};

/// Runs the circuit for `periods` modulation periods and measures, per period, the amplitude of the
/// modulation-frequency component of the earpiece voltage (a lock-in: 2/N |sum v e^{-j wm t}| on 8 samples
/// per carrier period, which sums carrier-periodic ripple to zero over whole modulation periods).
level_track track_levels(const circuit_params& c, const am_params& am, double fm, int periods)
{
    const detector_network net(c);
    tone_modulation tone({fm}, {1.0}, static_cast<double>(periods + 1) / fm);
    const am_source src(am, &tone);
    const double dt = 1.0 / (8.0 * am.carrier_hz);
    const auto per = static_cast<std::size_t>(std::llround(1.0 / (fm * dt)));
    const std::size_t n = per * static_cast<std::size_t>(periods) + 1;
    const std::vector<double> v = with_equations(net, src, [&](auto eq) {
        using eq_t = decltype(eq);
        return output_on_grid(eq, production_settings(am.carrier_hz, 40.0), eq_t::vec::Zero().eval(), 0.0, dt, n);
    });
    level_track r;
    for (int p = 0; p < periods; ++p) {
        std::complex<double> acc = 0.0;
        double sum = 0.0;
        for (std::size_t i = 0; i < per; ++i) {
            const std::size_t k = static_cast<std::size_t>(p) * per + i;
            const double ph = 2.0 * k_pi * static_cast<double>(i) / static_cast<double>(per);
            acc += v[k] * std::complex<double>(std::cos(ph), -std::sin(ph));
            sum += v[k];
        }
        r.tone_v.push_back(2.0 * std::abs(acc) / static_cast<double>(per));
        r.mean_v.push_back(sum / static_cast<double>(per));
    }
    return r;
}

double average(const std::vector<double>& v, std::size_t from, std::size_t to)
{
    double s = 0.0;
    for (std::size_t i = from; i < to; ++i) s += v[i];
    return s / static_cast<double>(to - from);
}

} // namespace

TEST_CASE("a piezo earpiece with no DC path dams up and goes quiet; a bleeder or diode leakage sustains the audio")
{
    // Common practice (no published source): with no leakage and no bleeder the
    // rectified charge dams up on the earpiece capacitance and the audio decays toward silence; a bleeder of
    // 10k-100k, or diode reverse leakage, restores it. Only the Shockley reverse current Is is left to
    // discharge C in the first case (Is/C = 2 V/s here against an envelope that swings 0.5 V per 0.5 ms).
    circuit_params base;
    base.source.resistance_ohm = 0.0; // R = 0 as law 1 assumes, so the dammed DC can be checked against it
    base.diode.saturation_current_a = 20e-9; // Schottky-like, low reverse current
    base.diode.emission_coefficient = 1.08;
    base.diode.series_resistance_ohm = 0.0;
    base.diode.junction_capacitance_f = 0.0;
    base.diode.leakage_resistance_ohm = infinite_ohm;
    base.earpiece.kind = earpiece_kind::piezo;
    base.earpiece.capacitance_f = 10e-9;
    base.earpiece.leakage_ohm = infinite_ohm;
    base.load.bleeder_ohm = infinite_ohm;
    am_params am;
    am.carrier_hz = 200e3; // low carrier keeps 60 ms of simulation quick; fc >> fm still holds
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.5;
    constexpr double fm = 1000.0;
    constexpr int periods = 60;

    circuit_params bleeder = base;
    bleeder.load.bleeder_ohm = 47e3;
    circuit_params leaky = base;
    leaky.diode.leakage_resistance_ohm = 500e3;

    const level_track none = track_levels(base, am, fm, periods);
    const level_track bled = track_levels(bleeder, am, fm, periods);
    const level_track leak = track_levels(leaky, am, fm, periods);
    const auto last = static_cast<std::size_t>(periods);
    const double none_late = average(none.tone_v, last - 10, last);
    const double bled_mid = average(bled.tone_v, 10, 20), bled_late = average(bled.tone_v, last - 10, last);
    const double leak_mid = average(leak.tone_v, 30, 40), leak_late = average(leak.tone_v, last - 10, last);
    MESSAGE(fmt::format("dam-up tone level (V): no DC path first {:.4g} -> late {:.4g}; bleeder 47k mid {:.4g} late {:.4g}; "
                        "diode leakage 500k mid {:.4g} late {:.4g}",
                        none.tone_v[0], none_late, bled_mid, bled_late, leak_mid, leak_late));
    // No DC path: loud while the charge builds in the first period, then quiet (the 5 % bound is loose: the
    // sawtooth left by Is/C, about 2 mV per modulation period, against the tens of mV of the charging period).
    CHECK(none_late < 0.05 * none.tone_v[0]);
    CHECK(none_late < 0.05 * bled_late);
    CHECK(none_late < 0.1 * leak_late);
    // The dammed charge sits just below the unloaded law at the envelope peak: with no load the DC balance
    // <Is (I0(A(t)/nVt) e^-y - 1)> = 0 over the audio period gives Vdc = n Vt ln <I0(A(1 + m sin)/nVt)>
    // [derived from the I0 law (Torrey & Whitmer 1948) with RL -> inf], and <I0(A(t))> <= I0(A_peak).
    const double nvt = base.diode.emission_coefficient * vt_25c;
    double avg_i0 = 0.0;
    constexpr int quad = 2000; // trapezoid rule over a period: spectrally accurate for a periodic integrand
    for (int i = 0; i < quad; ++i) {
        const double env = am.carrier_peak_v * (1.0 + am.modulation_index * std::sin(2.0 * k_pi * i / quad));
        avg_i0 += boost::math::cyl_bessel_i(0, env / nvt) / quad;
    }
    const double v_dammed = nvt * std::log(avg_i0);
    const double none_mean = average(none.mean_v, last - 10, last);
    MESSAGE(fmt::format("dam-up DC: simulated {:.5f} V, unloaded law over the envelope {:.5f} V", none_mean, v_dammed));
    CHECK(rel_diff(none_mean, v_dammed) <= 0.01);
    // With a bleeder or diode leakage the audio is sustained: steady from the middle to the end of the run.
    CHECK(rel_diff(bled_late, bled_mid) <= 0.02);
    CHECK(bled_late > 0.5 * bled.tone_v[0]);
    CHECK(rel_diff(leak_late, leak_mid) <= 0.05);
    CHECK(leak_late > 10.0 * none_late);
}

// ---------------------------------------------------------------------------------------------------
// 4. Convergence of the production stepper on the real circuit
// ---------------------------------------------------------------------------------------------------

TEST_CASE("production stepper converges at second order in the per-cycle step bound on the detector")
{
    // TR-BDF2 is second order (Bank et al. 1985; Hosea & Shampine 1996): halving h_max = period /
    // carrier_steps_floor should cut the error about 4x. Reference: Boost.Odeint rosenbrock4 (order 4) at
    // rtol 1e-8 [outside reference], through galena's reference_solve; its own error is far below the
    // errors measured here (the TR-BDF2 error at 640 steps per cycle is about 7e-8).
    const circuit_params c = generator_detector(germanium_like(), 10e-9);
    const detector_network net(c);
    tone_modulation tone({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_hz = 500e3;
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.3;
    const am_source src(am, &tone);
    using eq_t = detector_equations<true, 0>;
    const eq_t eq(net, src);
    const double period = 1.0 / am.carrier_hz;
    const double dt = period / 16.0;
    const std::size_t n0 = 100 * 16; // compare the earpiece voltage over carrier cycles 100..200
    const std::size_t n = 100 * 16;
    const std::vector<double> ref_all =
        reference_solve(erase_system(eq), {0.0, 0.0}, 0.0, dt, n0 + n, eq_t::output_index, 1e-8, 1e-11, period / 50.0);
    const std::vector<double> ref(ref_all.begin() + static_cast<std::ptrdiff_t>(n0), ref_all.end());

    auto order_check = [&](const char* label, double rtol, std::vector<double> steps_per_cycle, bool bound_only) {
        std::vector<double> errs;
        for (double steps : steps_per_cycle) {
            step_settings st = production_settings(am.carrier_hz, steps);
            st.relative_tolerance = rtol;
            step_stats stats;
            const std::vector<double> got =
                output_on_grid(eq, st, eq_t::vec::Zero().eval(), static_cast<double>(n0) * dt, dt, n, &stats);
            errs.push_back(relative_rms(got, ref));
            MESSAGE(fmt::format("convergence ({}): {} steps/cycle: relRMS {:.3e}, {} accepted, {} rejected", label, steps,
                                errs.back(), stats.accepted, stats.rejected_error));
            // The bound, not the error test, must set the step for the order to be the method's.
            if (bound_only) CHECK(stats.rejected_error <= stats.accepted / 1000);
        }
        for (std::size_t i = 1; i < errs.size(); ++i) {
            const double order = std::log2(errs[i - 1] / errs[i]);
            MESSAGE(fmt::format("convergence ({}): {} -> {} steps/cycle, observed order {:.2f}", label, steps_per_cycle[i - 1],
                                steps_per_cycle[i], order));
            CHECK(order >= 1.6);
            CHECK(order <= 2.6);
        }
    };
    // carrier_steps_floor 20 -> 40 -> 80 with the error test loosened (rtol 1e-2) so that h_max alone sets
    // the step: at the production rtol 1e-3, 20 steps per cycle is tolerance-limited instead (see below).
    order_check("rtol 1e-2", 1e-2, {20.0, 40.0, 80.0}, true);
    // The production tolerance from the default bound upwards: 40 -> 80 -> 160.
    order_check("rtol 1e-3", 1e-3, {40.0, 80.0, 160.0}, false);
}

TEST_CASE("production stepper agrees with the Boost.Odeint rosenbrock4 reference on the detector")
{
    // The reference path (Kaps-Rentrop Rosenbrock, order 4) at tight tolerance vs TR-BDF2 at the default
    // per-cycle step bound: relative RMS of the earpiece waveform over 50 carrier cycles after 100.
    const circuit_params c = generator_detector(find_diode_preset("germanium-point-contact").params, 10e-9);
    const detector_network net(c);
    tone_modulation tone({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_hz = 200e3;
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.5;
    const am_source src(am, &tone);
    detector_equations<true, 0> eq(net, src);
    const double period = 1.0 / am.carrier_hz;
    const double t0 = 100 * period;
    const std::size_t n = 50 * 64;
    const double dt = 50 * period / static_cast<double>(n);
    const auto ref = reference_solve(erase_system(eq), {0.0, 0.0}, 0.0, dt, static_cast<std::size_t>(t0 / dt) + n, 1, 1e-8,
                                     1e-11, period / 50.0);
    step_settings st;
    st.max_step_s = period / 40.0;
    st.initial_step_s = period / 1000.0;
    tr_bdf2<detector_equations<true, 0>> ig(eq, st);
    ig.initialize(detector_equations<true, 0>::vec::Zero(), 0.0);
    std::vector<double> got;
    const std::size_t k0 = ref.size() - n;
    std::size_t k = 0;
    ig.advance_to(t0 + 50 * period + period, [&](double ta, const auto& xa, const auto& fa, double tb, const auto& xb, const auto& fb) {
        while (k < ref.size() && static_cast<double>(k) * dt <= tb) {
            const double v = hermite_value(static_cast<double>(k) * dt, ta, xa[1], fa[1], tb, xb[1], fb[1]);
            if (k >= k0) got.push_back(v);
            ++k;
        }
    });
    REQUIRE(got.size() == n);
    const double rel = relative_rms(got, std::vector<double>(ref.begin() + static_cast<std::ptrdiff_t>(k0), ref.end()));
    MESSAGE("TR-BDF2 (40 steps/cycle) vs rosenbrock4 reference: relRMS = " << rel);
    // Measured 3.3e-6 (TR-BDF2 at rtol 1e-3 with the 40-steps-per-cycle bound); bound 1e-5, three times the
    // figure, for compiler and library rounding (the reference itself is within 2.4e-7).
    CHECK(rel < 1e-5);
}
