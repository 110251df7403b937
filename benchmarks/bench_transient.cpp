// Full-transient speed and accuracy on the reference detector circuit, side by side with Boost.Odeint's
// rosenbrock4 and Debian's ngspice, all measured in this run. Prints wall seconds per simulated second,
// relRMS against a converged reference, and each method's speed ratio to galena.
//
// Circuit: 1 MHz carrier, 0.5 V peak, m = 0.5 at 1 kHz; 20k source; Is = 2 uA, n = 1.5, Rs = 20 ohm,
// Cj0 = 0.5 pF, 2 Mohm leakage; 68k bleeder, 1 nF filter, 10 nF piezo with 10 Mohm leakage.
// Usage: bench_transient [simulated_ms = 2]
#include "galena/circuit.hpp"
#include "galena/integrator.hpp"
#include "galena/reference_integrator.hpp"

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

using namespace galena;
using clk = std::chrono::steady_clock;

namespace {

constexpr double fc = 1e6;
constexpr double sample_dt = 1e-8; // compare on a 100 MHz grid

circuit_params circuit()
{
    circuit_params c;
    c.source.resistance_ohm = 20e3;
    c.diode.saturation_current_a = 2e-6;
    c.diode.emission_coefficient = 1.5;
    c.diode.series_resistance_ohm = 20.0;
    c.diode.leakage_resistance_ohm = 2e6;
    c.diode.junction_capacitance_f = 0.5e-12;
    c.load.bleeder_ohm = 68e3;
    c.load.filter_capacitance_f = 1e-9;
    c.earpiece.capacitance_f = 10e-9;
    c.earpiece.leakage_ohm = 10e6;
    return c;
}

/// Runs the production stepper with a per-cycle step bound; returns samples of v_b on the grid.
template <class Eq>
std::vector<double> run_galena(const Eq& eq, double t_end, double steps_per_cycle, double rtol, double& wall)
{
    step_settings st;
    st.relative_tolerance = rtol;
    st.absolute_tolerance_v = 1e-6;
    st.max_step_s = 1.0 / (fc * steps_per_cycle);
    st.initial_step_s = 1e-10;
    tr_bdf2<Eq> ig(eq, st);
    ig.initialize(Eq::vec::Zero(), 0.0);
    std::vector<double> out;
    out.reserve(static_cast<std::size_t>(t_end / sample_dt) + 2);
    std::size_t k = 0;
    const auto t0 = clk::now();
    ig.advance_to(t_end, [&](double ta, const auto& xa, const auto& fa, double tb, const auto& xb, const auto& fb) {
        constexpr int o = Eq::output_index;
        while (static_cast<double>(k) * sample_dt <= tb) {
            out.push_back(hermite_value(static_cast<double>(k) * sample_dt, ta, xa[o], fa[o], tb, xb[o], fb[o]));
            ++k;
        }
    });
    wall = std::chrono::duration<double>(clk::now() - t0).count();
    return out;
}

double rel_rms(const std::vector<double>& a, const std::vector<double>& ref, std::size_t from)
{
    double num = 0, den = 0;
    const std::size_t n = std::min(a.size(), ref.size());
    for (std::size_t i = from; i < n; ++i) {
        num += (a[i] - ref[i]) * (a[i] - ref[i]);
        den += ref[i] * ref[i];
    }
    return std::sqrt(num / den);
}

/// ngspice batch run of the same circuit; returns v_b on the grid (linear interpolation of its output).
std::vector<double> run_ngspice(double t_end, double& wall, bool& ok)
{
    namespace fs = std::filesystem;
    const fs::path dir = fs::temp_directory_path() / "galena-bench-ngspice";
    fs::create_directories(dir);
    const auto c = circuit();
    std::ofstream net(dir / "detector.cir");
    // Ideal diode (RS = 0) with the series and leakage resistors explicit: galena puts the leakage across
    // the junction, inside Rs.
    net << "* detector benchmark circuit\n"
        << "B1 src 0 V = 0.5*(1+0.5*sin(2*pi*1000*time))*cos(2*pi*1e6*time)\n"
        << "Rsrc src a 20k\nRs a j 20\nRleak j b 2meg\nD1 j b dmod\n"
        << ".model dmod D(IS=2e-6 N=1.5 RS=0 CJO=0.5p VJ=0.5 M=0.5 FC=0.5)\n"
        << "Cb b 0 " << (c.load.filter_capacitance_f + c.earpiece.capacitance_f + c.load.stray_capacitance_f) << "\n"
        << "Rb b 0 68k\nRe b 0 10meg\n"
        << ".options reltol=1e-3 temp=25 tnom=25\n"
        << ".tran 1n " << t_end << " 0 25n uic\n"
        << ".control\nrun\nwrdata " << (dir / "out.txt").string() << " v(b)\n.endc\n.end\n";
    net.close();
    const auto t0 = clk::now();
    const int rc = std::system(fmt::format("ngspice -b {} > {} 2>&1", (dir / "detector.cir").string(), (dir / "log.txt").string()).c_str());
    wall = std::chrono::duration<double>(clk::now() - t0).count();
    ok = rc == 0 || std::filesystem::exists(dir / "out.txt");
    std::vector<double> ts, vs;
    std::ifstream in(dir / "out.txt");
    double t, v;
    while (in >> t >> v) {
        ts.push_back(t);
        vs.push_back(v);
    }
    std::vector<double> out;
    std::size_t j = 0;
    for (std::size_t k = 0; static_cast<double>(k) * sample_dt <= t_end && !ts.empty(); ++k) {
        const double tk = static_cast<double>(k) * sample_dt;
        while (j + 1 < ts.size() && ts[j + 1] < tk) ++j;
        if (j + 1 >= ts.size()) break;
        const double u = (tk - ts[j]) / (ts[j + 1] - ts[j]);
        out.push_back(vs[j] + u * (vs[j + 1] - vs[j]));
    }
    ok = ok && !out.empty();
    return out;
}

} // namespace

int main(int argc, char** argv)
{
    const double t_end = (argc > 1 ? std::atof(argv[1]) : 2.0) * 1e-3;
    const detector_network net(circuit());
    tone_modulation tone({1000.0}, {1.0}, 10.0);
    am_params am;
    am.carrier_hz = fc;
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.5;
    // The tone_modulation is a sine starting at t = 0, as the ngspice B-source.
    const am_source src(am, &tone);
    detector_equations<true, 0> eq(net, src);
    const std::size_t from = static_cast<std::size_t>(0.5 * t_end / sample_dt); // compare the second half

    double w_ref, w_gal, w_ode, w_spice;
    std::fprintf(stderr, "converged reference (TR-BDF2, 640 steps/cycle, rtol 1e-9)...\n");
    const auto ref = run_galena(eq, t_end, 640.0, 1e-9, w_ref);
    std::fprintf(stderr, "galena default (40 steps/cycle)...\n");
    const auto gal = run_galena(eq, t_end, 40.0, 1e-3, w_gal);
    double w_20, w_10;
    const auto gal20 = run_galena(eq, t_end, 25.0, 1e-2, w_20);
    const auto gal10 = run_galena(eq, t_end, 20.0, 1e-2, w_10);
    std::fprintf(stderr, "Boost.Odeint rosenbrock4, rtol 1e-4...\n");
    auto t0 = clk::now();
    const auto ode = reference_solve(erase_system(eq), {0.0, 0.0}, 0.0, sample_dt, ref.size(), 1, 1e-4, 1e-6, 1.0 / (fc * 6.0));
    w_ode = std::chrono::duration<double>(clk::now() - t0).count();
    std::fprintf(stderr, "ngspice, reltol 1e-3, 25 ns max step...\n");
    bool spice_ok = false;
    const auto spice = run_ngspice(t_end, w_spice, spice_ok);

    const double sim = t_end;
    fmt::print("simulated {:.3g} ms at a 1 MHz carrier; relRMS over the second half, against the converged reference\n", sim * 1e3);
    fmt::print("| method | wall s per simulated s | relRMS | galena speed-up |\n|---|---|---|---|\n");
    auto row = [&](const char* name, double wall, const std::vector<double>& v) {
        fmt::print("| {} | {:.2f} | {:.2e} | {:.1f}x |\n", name, wall / sim, rel_rms(v, ref, from), wall / w_gal);
    };
    row("galena TR-BDF2, 40 steps/cycle (default)", w_gal, gal);
    row("galena TR-BDF2, 25 steps/cycle, rtol 1e-2", w_20, gal20);
    row("galena TR-BDF2, 20 steps/cycle, rtol 1e-2", w_10, gal10);
    row("Boost.Odeint rosenbrock4, rtol 1e-4", w_ode, ode);
    if (spice_ok) row("ngspice, reltol 1e-3, 25 ns max step", w_spice, spice);
    else fmt::print("| ngspice | not run (is the ngspice package installed?) | | |\n");
    return 0;
}
