// Dial sweep speed: the bundled coupled set (scenarios/receiver.toml) swept across the invented demo band
// (scenarios/demo-band.toml: 8 stations over 530-1700 kHz) on galena's dial renderer, against Debian's ngspice
// on a short piece of the same sweep, in this run.
//
// galena: render_dial over the whole glide (default 10 s), audio discarded; wall and CPU seconds per simulated
// second, the share spent re-tabulating (retunes), and the process's peak resident memory (bounded: the trace
// and one chunk).
// ngspice: the same front end written as a netlist (tests/receiver_spice.hpp: the tuned circuit, the junction
// as the Shockley law plus the SPICE depletion charge, the load as one capacitor and resistor) with the tuning
// capacitor moving as the glide does, its charge the state (tuning_ramp: v = q / C(t)), the 8 stations
// with tone programmes, over `piece_ms` from the start of the glide at a 5 ns maximum step (reltol 1e-6).
// The ratio is of wall seconds per simulated second. It compares speed, not waveforms (the programmes and
// the earpiece model differ).
//   bench_dial [glide_s=10] [piece_ms=0.5] [retune_interval_s=2e-3] [stop_hz]
// stop_hz: the dial rests on that frequency for glide_s instead of gliding (the grid is then locked to the
// tuned carrier: a comparison for the glide's grid, locked to the band's top).
#include "galena/band_file.hpp"
#include "galena/dial.hpp"
#include "galena/scenario.hpp"

#include "../tests/receiver_spice.hpp"

#include <fmt/format.h>
#include <sys/resource.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <ctime>

using namespace galena;

namespace {
double cpu_s()
{
    timespec ts{};
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
}
double children_cpu_s()
{
    rusage ru{};
    getrusage(RUSAGE_CHILDREN, &ru);
    return static_cast<double>(ru.ru_utime.tv_sec + ru.ru_stime.tv_sec) + 1e-6 * static_cast<double>(ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
}
long peak_rss_kb()
{
    rusage ru{};
    getrusage(RUSAGE_SELF, &ru);
    return ru.ru_maxrss;
}
} // namespace

int main(int argc, char** argv)
{
    const double glide_s = argc > 1 ? std::atof(argv[1]) : 10.0;
    const double piece_ms = argc > 2 ? std::atof(argv[2]) : 0.5;
    const double retune_s = argc > 3 ? std::atof(argv[3]) : 2e-3;
    const std::filesystem::path root(GALENA_SOURCE_DIR);
    const scenario s = load_scenario(root / "scenarios/receiver.toml");
    const band_spec band = load_band(root / "scenarios/demo-band.toml");
    dial_path path = band.dial;
    path.glide_s = glide_s;
    if (argc > 4) {
        path.stops_hz = {std::atof(argv[4])};
        path.dwell_s = glide_s;
    }
    const auto programmes = make_band_programmes(band, s, path.duration_s());
    receiver_spec spec;
    spec.circuit = s.circuit;
    spec.antenna = s.antenna;
    spec.tuner = s.tuner;
    for (std::size_t k = 0; k < band.stations.size(); ++k) spec.stations.push_back({band.stations[k].params, programmes[k].get()});
    dial_settings ds;
    ds.retune_interval_s = retune_s;
    const double c0 = cpu_s();
    std::size_t samples = 0;
    const dial_result r = render_dial(spec, path, ds, [&](const audio_block& b) { samples += b.audio_v.size(); });
    const double cpu = cpu_s() - c0;
    std::printf("galena dial: %zu stations, %.3g s glide %.0f-%.0f kHz, N = %d per cycle of %.0f kHz, retune every %.3g ms\n",
                band.stations.size(), glide_s, path.start_hz / 1e3, path.end_hz / 1e3, r.steps_per_cycle, r.reference_hz / 1e3, retune_s * 1e3);
    const double g_wall = r.wall_s / r.simulated_s;
    std::printf("  simulated %.3f s in %.2f s wall, %.2f s CPU: %.3f wall s and %.3f CPU s per simulated s\n", r.simulated_s, r.wall_s, cpu,
                g_wall, cpu / r.simulated_s);
    std::printf("  %zu retunes: %.3f s (%.1f %% of the wall time, %.0f us each); %zu audio samples; peak RSS %.1f MB\n", r.retunes,
                r.retune_wall_s, 100.0 * r.retune_wall_s / r.wall_s, 1e6 * r.retune_wall_s / static_cast<double>(std::max<std::size_t>(1, r.retunes)),
                samples, static_cast<double>(peak_rss_kb()) / 1024.0);
    const auto steps = static_cast<double>(std::max<std::size_t>(1, r.solver.steps));
    std::printf("  %.0f RF steps per simulated s: %.1f %% closed on the prediction, %.3f Newton evaluations per step\n",
                steps / r.simulated_s, 100.0 * static_cast<double>(r.solver.predicted_steps) / steps,
                static_cast<double>(r.solver.newton_iterations) / steps);
    std::fflush(stdout);

    // ngspice on the first piece of the same glide.
    galena_test::receiver_case rc;
    rc.name = "dial sweep piece";
    rc.circuit = s.circuit;
    rc.antenna = s.antenna;
    rc.tuner = s.tuner;
    for (const auto& st : band.stations)
        rc.stations.push_back({st.params.carrier_hz, std::sqrt(2.0) * st.params.field_v_per_m * s.antenna.effective_height_m,
                               st.params.modulation_index, st.programme == band_programme::tone ? st.tone_hz : 1000.0});
    const dial_tuning tun(s.circuit, s.antenna, s.tuner, path.lowest_hz(), path.highest_hz());
    const double t_piece = piece_ms * 1e-3;
    const double ca = tun.capacitance_f(path.start_hz);
    const double cb = tun.capacitance_f(path.start_hz + (path.end_hz - path.start_hz) * t_piece / glide_s);
    // The tuning capacitor C(t) = C0 + dC t with its charge as the state, the coil losses following it
    // (receiver_spice.hpp's tuning_ramp).
    rc.tuner.capacitance_f = ca;
    rc.ramp = galena_test::tuning_ramp{0.0, t_piece, ca, (cb - ca) / t_piece, true};
    const std::string net = galena_test::netlist(rc, t_piece, 5e-9, std::filesystem::temp_directory_path() / "galena-bench-dial" / "out.txt");
    const auto dir = std::filesystem::temp_directory_path() / "galena-bench-dial";
    std::filesystem::create_directories(dir);
    std::vector<double> t, v;
    const auto w0 = std::chrono::steady_clock::now();
    const double k0 = children_cpu_s();
    const std::string err = galena_test::run_ngspice(dir, net, t, v, t_piece);
    const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - w0).count();
    if (!err.empty()) {
        std::printf("ngspice: %s\n", err.c_str());
        return 0;
    }
    const double s_wall = wall / t_piece;
    std::printf("ngspice (5 ns max step, reltol 1e-6): %.3g ms in %.2f s wall, %.2f s CPU: %.4g wall s per simulated s\n", piece_ms, wall,
                children_cpu_s() - k0, s_wall);
    std::printf("galena is %.0fx faster in wall time per simulated second\n", s_wall / g_wall);
    return 0;
}
