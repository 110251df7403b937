// Whole-receiver speed: a coupled set with three stations around 1 MHz (the wanted one and neighbours at
// +10 and -20 kHz) on galena's RF integrator against Debian's ngspice on the same circuit, in this run.
// Accuracy of each against a converged galena run (512 steps per cycle); galena's speed on one core as wall
// seconds per simulated second, and the ratio against ngspice at equal or better accuracy.
//   bench_receiver [galena_simulated_ms=20] [ngspice_simulated_ms=1]
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"

#include "../tests/receiver_spice.hpp"

#include <fmt/format.h>

#include <chrono>
#include <cmath>
#include <cstdio>
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

/// galena's earpiece voltage at every step end over `cycles` cycles; wall seconds through `wall`.
std::vector<double> run_galena(const galena_test::receiver_case& rc, int steps, std::size_t cycles, double& wall)
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
    rf_integrator ig(ss, rn.emf_input, diode_model(rc.circuit.diode).law(), src, rc.stations.front().carrier_hz, rs);
    ig.add_output(ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node));
    ig.initialize();
    std::vector<double> out, buf(static_cast<std::size_t>(steps));
    out.reserve(cycles * static_cast<std::size_t>(steps));
    for (std::size_t c = 0; c < cycles; ++c) {
        ig.advance_cycle(buf);
        out.insert(out.end(), buf.begin(), buf.end());
    }
    wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    return out;
}

/// Relative RMS difference of a (on the grid k / (fc n)) against the reference (grid k / (fc nr)), second half.
double rel_rms(const std::vector<double>& a, int n, const std::vector<double>& ref, int nr)
{
    double num = 0.0, den = 0.0;
    const std::size_t ratio = static_cast<std::size_t>(nr / n);
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
    const double spice_ms = argc > 2 ? std::atof(argv[2]) : 1.0;
    const auto rc = coupled_set();
    const double fc = rc.stations.front().carrier_hz;
    const auto cmp_cycles = static_cast<std::size_t>(std::llround(spice_ms * 1e-3 * fc));
    double w = 0.0;
    const int n_ref = 512;
    const auto ref = run_galena(rc, n_ref, cmp_cycles, w);
    std::printf("%s: %zu states; accuracy over the second half of %.3g ms against galena at N = %d\n\n", rc.name.c_str(),
                static_cast<std::size_t>(build_receiver_network(rc.circuit, rc.antenna, rc.tuner).net.assemble().states()), spice_ms,
                n_ref);
    std::printf("| method | wall s per simulated s | relRMS |\n|---|---:|---:|\n");
    const auto long_cycles = static_cast<std::size_t>(std::llround(galena_ms * 1e-3 * fc));
    double galena_rate = 0.0, galena_err = 0.0;
    for (int n : {32, 64}) {
        const auto a = run_galena(rc, n, cmp_cycles, w);
        const double err = rel_rms(a, n, ref, n_ref);
        double best = 1e300;
        for (int rep = 0; rep < 3; ++rep) {
            (void)run_galena(rc, n, long_cycles, w);
            best = std::min(best, w);
        }
        const double rate = best / (galena_ms * 1e-3);
        std::printf("| galena RF integrator, N = %d | %.3g | %.2g |\n", n, rate, err);
        if (n == 32) galena_rate = rate, galena_err = err;
    }
    std::fflush(stdout);
    const fs::path dir = fs::temp_directory_path() / "galena-bench-receiver";
    fs::create_directories(dir);
    double spice_rate_at_equal = 0.0;
    for (double step : {5e-9, 2e-9, 1e-9}) {
        std::vector<double> t, v;
        const double t_end = spice_ms * 1e-3;
        const auto t0 = std::chrono::steady_clock::now();
        const std::string err = galena_test::run_ngspice(dir, galena_test::netlist(rc, t_end, step, dir / "out.txt"), t, v, t_end);
        const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
        if (!err.empty()) {
            std::printf("| ngspice, %g ns | failed: %s | |\n", step * 1e9, err.c_str());
            continue;
        }
        // Onto galena's N = 32 grid by linear interpolation.
        std::vector<double> g(cmp_cycles * 32);
        std::size_t j = 0;
        for (std::size_t k = 0; k < g.size(); ++k) {
            const double tk = static_cast<double>(k + 1) / (fc * 32.0);
            while (j + 2 < t.size() && t[j + 1] < tk) ++j;
            g[k] = v[j] + (tk - t[j]) / (t[j + 1] - t[j]) * (v[j + 1] - v[j]);
        }
        const double e = rel_rms(g, 32, ref, n_ref);
        const double rate = wall / t_end;
        std::printf("| ngspice reltol 1e-6, max step %g ns | %.4g | %.2g |\n", step * 1e9, rate, e);
        std::fflush(stdout);
        if (e <= galena_err && spice_rate_at_equal == 0.0) spice_rate_at_equal = rate;
        if (step == 1e-9 && spice_rate_at_equal == 0.0) spice_rate_at_equal = rate; // the most accurate one tried
    }
    if (galena_rate > 0.0 && spice_rate_at_equal > 0.0)
        std::printf("\ngalena (N = 32) is %.0fx faster than ngspice at equal or better accuracy (the first ngspice step whose "
                    "error is at most galena's, else the finest tried)\n",
                    spice_rate_at_equal / galena_rate);
    return 0;
}
