// Whole-receiver speed: a coupled set with three stations around 1 MHz (the wanted one and neighbours at
// +10 and -20 kHz) on galena's RF integrator against Debian's ngspice on the same circuit, in this run.
//
// Accuracy: every run's earpiece voltage against one converged reference, galena at N = 4096 steps per cycle
// (its own N = 1024 differs from it by 1.2e-4 in waveform, and ngspice at a 1 ns step by 1.5e-4), as the relative
// RMS difference over the second half of the compared span (ngspice interpolated linearly onto the reference's
// grid). ngspice runs the netlist of tests/receiver_spice.hpp (the Shockley law for the junction current, the
// SPICE depletion charge) with reltol 1e-6 and a maximum step of 10, 5, 2 and 1 ns.
// Speed: wall and CPU seconds per simulated second, galena over a longer span (best of three), ngspice over
// the compared span. The ratio for each galena N is taken against the fastest ngspice run whose error is at
// most galena's (or, where no ngspice run is that accurate, against the most accurate one, marked).
//   bench_receiver [galena_simulated_ms=20] [compared_ms=1]
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"

#include "../tests/receiver_spice.hpp"

#include <fmt/format.h>
#include <sys/resource.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <ctime>
#include <memory>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

galena_test::receiver_case coupled_set()
{
    galena_test::receiver_case rc;
    rc.name = "coupled set, three stations";
    rc.circuit.diode.saturation_current_a = 2e-6;
    rc.circuit.diode.emission_coefficient = 1.5;
    rc.circuit.diode.series_resistance_ohm = 20.0;
    rc.circuit.diode.junction_capacitance_f = 0.5e-12;
    rc.circuit.diode.junction_potential_v = 0.3;
    rc.circuit.load.bleeder_ohm = 68e3;
    rc.circuit.load.filter_capacitance_f = 1e-9;
    rc.circuit.earpiece.kind = earpiece_kind::piezo;
    rc.circuit.earpiece.capacitance_f = 4.7e-9;
    rc.antenna.capacitance_f = 200e-12;
    rc.antenna.resistance_ohm = 25.0;
    rc.tuner.layout = tuner_layout::coupled;
    rc.tuner.coil_q = 150.0;
    rc.tuner.detector_tap = 0.5;
    rc.tuner.coupling = 0.1;
    rc.tuner.antenna_coil_h = 20e-6;
    rc.tuner.antenna_coil_q = 100.0;
    rc.stations = {{1.0e6, 0.1, 0.5, 2000.0}, {1.01e6, 0.1, 0.5, 3000.0}, {0.98e6, 0.2, 0.5, 1000.0}};
    return rc;
}

double thread_cpu_s()
{
    timespec ts{};
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
}

double children_cpu_s()
{
    rusage ru{};
    getrusage(RUSAGE_CHILDREN, &ru);
    return static_cast<double>(ru.ru_utime.tv_sec + ru.ru_stime.tv_sec) + 1e-6 * static_cast<double>(ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
}

struct timing {
    double wall_s = 0.0, cpu_s = 0.0, newton_per_step = 0.0, predicted = 0.0;
};

/// galena's earpiece voltage at every step end over `cycles` cycles (kept when `keep`).
std::vector<double> run_galena(const galena_test::receiver_case& rc, int steps, std::size_t cycles, timing& tm, bool keep)
{
    const receiver_network rn = build_receiver_network(rc.circuit, rc.antenna, rc.tuner);
    const state_space ss = rn.net.assemble();
    std::vector<std::unique_ptr<tone_modulation>> tones;
    station_source src;
    for (const auto& st : rc.stations) {
        tones.push_back(std::make_unique<tone_modulation>(std::vector{st.tone_hz}, std::vector{1.0}, 10.0));
        am_params p;
        p.carrier_hz = st.carrier_hz;
        p.carrier_peak_v = st.emf_peak_v;
        p.modulation_index = st.m;
        src.add("s", am_source(p, tones.back().get()));
    }
    rf_settings rs;
    rs.steps_per_cycle = steps;
    const auto t0 = std::chrono::steady_clock::now();
    const double c0 = thread_cpu_s();
    rf_integrator ig(ss, rn.emf_input, diode_model(rc.circuit.diode).law(), src, rc.stations.front().carrier_hz, rs);
    // The timed runs take the earpiece's cycle means only, as render_receiver does; the compared ones every step.
    ig.add_output(ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node),
                  keep ? output_use::every_step : output_use::cycle_mean);
    ig.initialize();
    std::vector<double> out, buf(static_cast<std::size_t>(steps));
    if (keep) out.reserve(cycles * static_cast<std::size_t>(steps));
    for (std::size_t c = 0; c < cycles; ++c) {
        ig.advance_cycle(buf);
        if (keep) out.insert(out.end(), buf.begin(), buf.end());
    }
    tm.wall_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    tm.cpu_s = thread_cpu_s() - c0;
    tm.newton_per_step = static_cast<double>(ig.stats().newton_iterations) / static_cast<double>(ig.stats().steps);
    tm.predicted = static_cast<double>(ig.stats().predicted_steps) / static_cast<double>(ig.stats().steps);
    return out;
}

/// Relative RMS difference over the second half of `cycles` cycles: a(t) given at the step ends of an N-step
/// grid (or by `at`) against the reference at the step ends of its N_ref grid, at the reference's points
/// that a's grid shares (N divides N_ref).
double rel_rms_grid(const std::vector<double>& a, int n, const std::vector<double>& ref, int n_ref)
{
    double num = 0.0, den = 0.0;
    const auto ratio = static_cast<std::size_t>(n_ref / n);
    for (std::size_t k = a.size() / 2; k < a.size(); ++k) {
        const double r = ref[(k + 1) * ratio - 1];
        num += (a[k] - r) * (a[k] - r);
        den += r * r;
    }
    return std::sqrt(num / den);
}

} // namespace

int main(int argc, char** argv)
{
    const double galena_ms = argc > 1 ? std::atof(argv[1]) : 20.0;
    const double cmp_ms = argc > 2 ? std::atof(argv[2]) : 1.0;
    const auto rc = coupled_set();
    const double fc = rc.stations.front().carrier_hz;
    const auto cmp_cycles = static_cast<std::size_t>(std::llround(cmp_ms * 1e-3 * fc));
    const auto long_cycles = static_cast<std::size_t>(std::llround(galena_ms * 1e-3 * fc));
    timing tm;
    const int n_ref = 4096;
    const auto ref = run_galena(rc, n_ref, cmp_cycles, tm, true);
    std::printf("%s: %d states; accuracy over the second half of %.3g ms against galena at N = %d; galena's speed over %.3g ms\n\n",
                rc.name.c_str(), build_receiver_network(rc.circuit, rc.antenna, rc.tuner).net.assemble().states(), cmp_ms, n_ref,
                galena_ms);
    std::fflush(stdout);

    struct spice_run {
        double step_s, wall_rate, cpu_rate, err;
    };
    std::vector<spice_run> spice;
    const fs::path dir = fs::temp_directory_path() / "galena-bench-receiver";
    fs::create_directories(dir);
    const double t_end = cmp_ms * 1e-3;
    for (double step : {10e-9, 5e-9, 2e-9, 1e-9}) {
        std::vector<double> t, v;
        const auto w0 = std::chrono::steady_clock::now();
        const double c0 = children_cpu_s();
        const std::string err = galena_test::run_ngspice(dir, galena_test::netlist(rc, t_end, step, dir / "out.txt"), t, v, t_end);
        const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - w0).count();
        const double cpu = children_cpu_s() - c0;
        if (!err.empty()) {
            std::printf("ngspice at %g ns failed: %s\n", step * 1e9, err.c_str());
            continue;
        }
        // Onto the reference's grid by linear interpolation.
        std::vector<double> g(cmp_cycles * n_ref);
        std::size_t j = 0;
        for (std::size_t k = 0; k < g.size(); ++k) {
            const double tk = static_cast<double>(k + 1) / (fc * n_ref);
            while (j + 2 < t.size() && t[j + 1] < tk) ++j;
            g[k] = v[j] + (tk - t[j]) / (t[j + 1] - t[j]) * (v[j + 1] - v[j]);
        }
        spice.push_back({step, wall / t_end, cpu / t_end, rel_rms_grid(g, n_ref, ref, n_ref)});
    }

    std::printf("| method | steps per carrier cycle | steps closed on the prediction | Newton evaluations per step | wall s per simulated s | "
                "CPU s per simulated s | relRMS against the reference | ngspice run matched | speed ratio (wall) |\n"
                "|---|---:|---:|---:|---:|---:|---:|---|---:|\n");
    for (int n : {16, 32, 64, 128, 256}) {
        const auto a = run_galena(rc, n, cmp_cycles, tm, true);
        const double err = rel_rms_grid(a, n, ref, n_ref);
        timing best;
        best.wall_s = best.cpu_s = 1e300;
        for (int rep = 0; rep < 3; ++rep) {
            (void)run_galena(rc, n, long_cycles, tm, false);
            best.wall_s = std::min(best.wall_s, tm.wall_s);
            best.cpu_s = std::min(best.cpu_s, tm.cpu_s);
            best.newton_per_step = tm.newton_per_step;
            best.predicted = tm.predicted;
        }
        const double wall_rate = best.wall_s / (galena_ms * 1e-3), cpu_rate = best.cpu_s / (galena_ms * 1e-3);
        const spice_run* match = nullptr;
        for (const auto& s : spice)
            if (s.err <= err && (match == nullptr || s.wall_rate < match->wall_rate)) match = &s;
        std::string matched = "none as accurate";
        if (match != nullptr) {
            matched = fmt::format("{:g} ns", match->step_s * 1e9);
        } else if (!spice.empty()) {
            match = &spice.back();
            matched = fmt::format("{:g} ns (less accurate: {:.2g})", match->step_s * 1e9, match->err);
        }
        std::printf("| galena RF integrator | %d | %.1f %% | %.3f | %.3g | %.3g | %.2g | %s | %s |\n", n, 100.0 * best.predicted, best.newton_per_step,
                    wall_rate, cpu_rate, err,
                    matched.c_str(), match != nullptr ? fmt::format("{:.0f}x", match->wall_rate / wall_rate).c_str() : "-");
        std::fflush(stdout);
    }
    for (const auto& s : spice)
        std::printf("| ngspice, reltol 1e-6, max step %g ns | - | - | - | %.4g | %.4g | %.2g | | |\n", s.step_s * 1e9, s.wall_rate, s.cpu_rate, s.err);
    return 0;
}
