#include "galena/report_plots.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/characterize.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/metrics.hpp"
#include "galena/plot_choices.hpp"
#include "galena/report_detail.hpp"
#include "galena/text_table.hpp"
#include "galena/units.hpp"

#include <algorithm>
#include <array>
#include <atomic>
#include <cerrno>
#include <cmath>
#include <csignal>
#include <cstring>
#include <fcntl.h>
#include <fmt/format.h>
#include <fstream>
#include <functional>
#include <map>
#include <set>
#include <mutex>
#include <spawn.h>
#include <sys/wait.h>
#include <thread>
#include <time.h>
#include <unistd.h>

namespace galena {

namespace fs = std::filesystem;

namespace {

std::string gp_escape(const std::string& s)
{
    std::string o;
    for (char c : s) {
        if (c == '\'') o += "''";
        else if (c == '_') o += "\\\\_"; // gnuplot enhanced text: literal underscore
        else o += c;
    }
    return o;
}

/// The scenario and earpiece trace used for the waveform and spectrum plots of one variant.
struct trace {
    const scenario* scene;
    std::vector<double> v;
    /// Whole-receiver layouts: the wanted station's unmodulated EMF peak at the antenna, V (the zoom's top
    /// panel shows that envelope instead of the bench generator's); 0 for the bench layout.
    double emf_peak_v = 0.0;
};

trace plot_trace(const variant_result& r)
{
    trace t;
    if (r.measured_separately) {
        t.scene = &r.measure_scene;
        t.v.assign(r.measure_earpiece_v.begin(), r.measure_earpiece_v.end());
    } else {
        t.scene = &r.scene;
        t.v.assign(r.job.analysis_v.begin(), r.job.analysis_v.end());
    }
    if (t.scene->tuner.layout != tuner_layout::bench) t.emf_peak_v = r.job.receiver.wanted_emf_peak_v;
    return t;
}

/// Both files of one plot. Sized for a projector (1280 x 720) with type that reads from the back of a hall:
/// 16 pt base font in the PNG, 14 pt in the SVG (which scales with the window).
std::string terminal_pair_script(const std::string& stem, const std::string& body, int w = 1280, int h = 720)
{
    return fmt::format("set terminal svg size {0},{1} dynamic font 'sans,14' background rgb 'white'\n"
                       "set output '{2}.svg'\nreset\n{3}\nunset output\n"
                       "set terminal pngcairo size {0},{1} font 'sans,16' background rgb 'white'\n"
                       "set output '{2}.png'\nreset\n{3}\nunset output\n",
                       w, h, stem, body);
}

/// The legend: outside on the right, readable on a projector (no smaller than the tick labels).
constexpr const char* key_setting = "set key outside right top font ',14' spacing 1.15 samplen 3\n";

/// A colour-blind-safe palette (plot_choices.hpp): neighbours contrast, the pale yellow comes last.
const auto& palette = detail::plot_palette;

std::string line_style(std::size_t g, std::size_t m, double width = 2.5) { return detail::plot_line_style(g, m, width); }

int palette_rgb(std::size_t g) { return std::stoi(palette[g % palette.size()], nullptr, 16); }

/// A text key of everything in the circuit that shapes its curves (diode, load, earpiece, source), so that
/// variants differing only in signal level share one key. `with_diode` = false leaves the diode out (for
/// finding variants that differ only in the diode).
std::string circuit_key(const circuit_params& c, bool with_diode = true)
{
    const auto& d = c.diode;
    const auto& e = c.earpiece;
    std::string k = fmt::format("src {} | load {} {} {} | ear {} {} {} {} {} {} {} {} {}", c.source.resistance_ohm, c.load.bleeder_ohm,
                                c.load.filter_capacitance_f, c.load.stray_capacitance_f, to_string(e.kind), e.capacitance_f,
                                e.leakage_ohm, e.motional_resistance_ohm, e.motional_inductance_h, e.motional_capacitance_f,
                                e.resistance_ohm, e.inductance_h, e.loss_resistance_ohm);
    if (with_diode)
        k += fmt::format(" | diode {} {} {} {} {} {} {} {} {} {} {} {} {} {}", d.name, d.saturation_current_a, d.emission_coefficient,
                         d.series_resistance_ohm, d.leakage_resistance_ohm, d.junction_capacitance_f, d.junction_potential_v,
                         d.grading_coefficient, d.breakdown_voltage_v, d.breakdown_current_a, d.temperature_c,
                         d.nominal_temperature_c, d.energy_gap_ev, d.saturation_current_exponent);
    return k;
}

/// circuit_key plus, for a whole receiver, its antenna and tuner: variants with one key differ only in signal.
std::string scene_key(const scenario& sc, bool with_diode = true)
{
    std::string k = circuit_key(sc.circuit, with_diode);
    if (sc.tuner.layout != tuner_layout::bench) {
        const auto& a = sc.antenna;
        const auto& t = sc.tuner;
        k += fmt::format(" | antenna {} {} {} {} | tuner {} {} {} {} {} {} {} {} {} {} {}", a.effective_height_m, a.capacitance_f,
                         a.inductance_h, a.resistance_ohm, to_string(t.layout), t.coil_h, t.coil_q, t.tuned_hz, t.capacitance_f,
                         t.detector_tap, t.antenna_tap, t.antenna_coil_h, t.antenna_coil_q, t.coupling, t.dc_return_ohm);
    }
    return k;
}

/// Variants grouped by circuit, in order of first appearance: group[i] and member[i] of variant i.
struct grouping {
    std::vector<std::size_t> group, member;
    std::vector<std::vector<std::size_t>> members; ///< variant indices of each group
};

grouping group_by_circuit(const std::vector<const scenario*>& scenes)
{
    grouping g;
    std::map<std::string, std::size_t> index;
    for (std::size_t i = 0; i < scenes.size(); ++i) {
        const auto [it, fresh] = index.emplace(scene_key(*scenes[i]), g.members.size());
        if (fresh) g.members.emplace_back();
        g.group.push_back(it->second);
        g.member.push_back(g.members[it->second].size());
        g.members[it->second].push_back(i);
    }
    return g;
}

} // namespace

namespace {
/// The last non-empty line of a small log file (gnuplot's own reason), or "".
std::string last_log_line(const fs::path& log)
{
    std::ifstream in(log, std::ios::binary);
    std::string line, last;
    while (std::getline(in, line))
        if (line.find_first_not_of(" \t\r^") != std::string::npos) last = line;
    return last;
}
} // namespace

void run_gnuplot(const std::string& script, const fs::path& work_dir, const std::string& stem)
{
    const fs::path gp = work_dir / (stem + ".gp");
    const fs::path log = work_dir / (stem + ".log");
    write_text_atomic(gp, script);
    // Messages name the plot, not a path: the work folder is often a stage that is removed afterwards.
    const std::string what_plot = fmt::format("plot {}", stem);
    throw_if_cancelled();
    // posix_spawn instead of system(): system() blocks SIGINT and SIGTERM in galena while the child runs, so
    // a signal sent to galena's process id alone was lost. Here galena keeps its handlers, polls the cancel
    // flag while gnuplot runs and stops gnuplot itself; the child starts with default signal dispositions
    // (galena ignores SIGPIPE and SIGXFSZ, which an exec would otherwise pass on).
    posix_spawn_file_actions_t fa;
    posix_spawnattr_t attr;
    posix_spawn_file_actions_init(&fa);
    posix_spawnattr_init(&attr);
    sigset_t def;
    sigemptyset(&def);
    for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGPIPE, SIGXFSZ}) sigaddset(&def, sig);
    posix_spawnattr_setsigdefault(&attr, &def);
    sigset_t none;
    sigemptyset(&none);
    posix_spawnattr_setsigmask(&attr, &none);
    posix_spawnattr_setflags(&attr, POSIX_SPAWN_SETSIGDEF | POSIX_SPAWN_SETSIGMASK);
    posix_spawn_file_actions_addchdir_np(&fa, work_dir.c_str());
    posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
    posix_spawn_file_actions_addopen(&fa, 1, "/dev/null", O_WRONLY, 0);
    posix_spawn_file_actions_addopen(&fa, 2, (stem + ".log").c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
    const std::string script_name = stem + ".gp";
    char prog[] = "gnuplot";
    std::vector<char> arg(script_name.begin(), script_name.end());
    arg.push_back('\0');
    char* argv[] = {prog, arg.data(), nullptr};
    pid_t pid = -1;
    const int rc = posix_spawnp(&pid, "gnuplot", &fa, &attr, argv, environ);
    posix_spawn_file_actions_destroy(&fa);
    posix_spawnattr_destroy(&attr);
    if (rc == ENOENT)
        throw audio_error(fmt::format("{}: gnuplot not found on PATH (install the Debian package gnuplot-nox)", what_plot));
    if (rc == EAGAIN || rc == ENOMEM || rc == EMFILE || rc == ENFILE)
        throw resource_error(fmt::format("{}: cannot start gnuplot: {} (a process, memory or file limit was reached)", what_plot,
                                         std::strerror(rc)));
    if (rc != 0) throw audio_error(fmt::format("{}: cannot start gnuplot: {}", what_plot, std::strerror(rc)));
    int status = 0;
    bool stopped = false;
    for (;;) {
        const pid_t w = ::waitpid(pid, &status, WNOHANG);
        if (w == pid) break;
        if (w < 0 && errno != EINTR) {
            const int err = errno;
            throw audio_error(fmt::format("{}: waiting for gnuplot failed: {}", what_plot, std::strerror(err)));
        }
        if (cancel_requested() && !stopped) {
            ::kill(pid, SIGTERM);
            stopped = true;
        }
        const timespec nap{0, 10'000'000}; // 10 ms
        nanosleep(&nap, nullptr);
    }
    throw_if_cancelled();
    // A signal that reached gnuplot alone (e.g. Ctrl-C while galena had not seen it yet) stops the command too.
    if (WIFSIGNALED(status) && (WTERMSIG(status) == SIGINT || WTERMSIG(status) == SIGTERM || WTERMSIG(status) == SIGHUP)) {
        request_cancel(WTERMSIG(status));
        throw_if_cancelled();
    }
    const std::string reason = last_log_line(log);
    const std::string said = reason.empty() ? std::string() : fmt::format("; gnuplot said: {}", reason);
    if (WIFSIGNALED(status)) {
        const int sig = WTERMSIG(status);
        const std::string what = fmt::format("{}: gnuplot was killed by signal {} ({}){}", what_plot, sig, strsignal(sig), said);
        if (sig == SIGKILL || sig == SIGXCPU || sig == SIGXFSZ || sig == SIGSEGV || sig == SIGABRT || sig == SIGBUS)
            throw resource_error(what + " (a memory, CPU-time or file-size limit is the usual cause)");
        throw audio_error(what);
    }
    if (WIFEXITED(status) && WEXITSTATUS(status) != 0)
        throw audio_error(fmt::format("{}: gnuplot failed with exit code {}{}", what_plot, WEXITSTATUS(status), said));
    std::error_code ec;
    if (fs::file_size(log, ec) == 0) fs::remove(log, ec);
}

namespace {

/// The programme shape x(t) (|x| <= 1) behind one trace, its modulation index and carrier: the bench
/// generator's, or for a whole receiver the wanted station's.
struct programme_view {
    std::unique_ptr<modulation> prog;
    double m = 0.0;
    double carrier_hz = 0.0;
};

programme_view programme_of(const scenario& sc)
{
    programme_view p;
    if (sc.tuner.layout != tuner_layout::bench) {
        auto progs = make_station_programmes(sc);
        p.prog = std::move(progs.front());
        p.m = sc.stations.front().params.modulation_index;
        p.carrier_hz = sc.stations.front().params.carrier_hz;
    } else {
        p.prog = make_programme(sc);
        p.m = sc.am.modulation_index;
        p.carrier_hz = sc.am.carrier_hz;
    }
    return p;
}

/// The zoom's start, s (detail::choose_zoom_start over the traces and their programmes).
double choose_zoom_start(const std::vector<trace>& traces, std::vector<programme_view>& pv, double fs, double t_min_s, double span_s)
{
    std::vector<std::span<const double>> ys;
    std::vector<std::vector<double>> xs;
    for (std::size_t i = 0; i < traces.size(); ++i) {
        const auto& v = traces[i].v;
        ys.emplace_back(v);
        std::vector<double> x(v.size(), 0.0);
        const auto k_min = std::min(v.size(), static_cast<std::size_t>(t_min_s * fs));
        pv[i].prog->prepare(static_cast<double>(k_min) / fs, static_cast<double>(v.size()) / fs);
        for (std::size_t k = k_min; k < v.size(); ++k) x[k] = pv[i].prog->value(static_cast<double>(k) / fs);
        xs.push_back(std::move(x));
    }
    return detail::choose_zoom_start(ys, xs, fs, t_min_s, span_s);
}

/// Zoom window and spectrum plots over a list of (name, trace), styled by circuit group.
void draw_traces(const std::vector<std::string>& names, const std::vector<trace>& traces, const grouping& groups, const fs::path& dir,
                 std::vector<std::string>& stems)
{
    const scenario& s0 = *traces[0].scene;
    const double fs_hz = s0.render.audio_rate_hz;
    const bool receiver = s0.tuner.layout != tuner_layout::bench;
    const bool wanted_tone = receiver && !s0.stations.empty() && s0.stations.front().kind == programme_kind::tone;
    const bool tone = wanted_tone || (!receiver && s0.programme.kind == programme_kind::tone);
    const double f0 = wanted_tone ? s0.stations.front().tone_hz : tone ? s0.programme.tone_hz : 300.0;
    const double settle = choose_settling_window(detector_network(s0.circuit)).settle_s;
    const double t_min = std::max(settle, 0.02);
    const double span = std::max(3.0 / f0, 0.003);
    std::vector<programme_view> pv;
    for (const auto& t : traces) pv.push_back(programme_of(*t.scene));
    const double t0 = choose_zoom_start(traces, pv, fs_hz, t_min, span);
    // Both panels share one time axis: the same range and the same margins (the legend sits outside).
    const std::string frame = fmt::format("set xrange [0:{:.6g}]\nset lmargin at screen 0.09\nset rmargin at screen 0.68\n", span * 1e3);
    {
        std::string data;
        // Source envelope for each distinct carrier level (the carrier fills the band between +-envelope).
        // Whole receivers: the wanted station's EMF at the antenna (its programme and modulation index).
        std::map<double, std::size_t> levels;
        for (std::size_t i = 0; i < traces.size(); ++i)
            levels.emplace(receiver ? traces[i].emf_peak_v : traces[i].scene->am.carrier_peak_v, i);
        std::string env_plot;
        int block = 0;
        for (const auto& [a, idx] : levels) {
            programme_view p = programme_of(*traces[idx].scene);
            p.prog->prepare(t0, t0 + span);
            for (int k = 0; k <= 600; ++k) {
                const double t = t0 + span * k / 600.0;
                const double e = a * (1.0 + p.m * p.prog->value(t));
                data += fmt::format("{:.7g} {:.7g} {:.7g}\n", (t - t0) * 1e3, e, -e);
            }
            data += "\n\n";
            env_plot += fmt::format("'zoom.dat' index {} using 1:2:3 with filledcurves fc rgb '#{}' fs transparent solid 0.3 "
                                    "title '{} {:.3g} V ({:.4g} MHz)', ",
                                    block, block % 2 ? "56B4E9" : "E69F00", receiver ? "wanted EMF" : "carrier", a, p.carrier_hz / 1e6);
            ++block;
        }
        std::string ear_plot;
        for (std::size_t i = 0; i < traces.size(); ++i) {
            const auto k0 = static_cast<std::size_t>(std::llround(t0 * fs_hz));
            const auto n = static_cast<std::size_t>(span * fs_hz) + 1;
            for (std::size_t k = k0; k < std::min(traces[i].v.size(), k0 + n); ++k)
                data += fmt::format("{:.7g} {:.7g}\n", (static_cast<double>(k) / fs_hz - t0) * 1e3, traces[i].v[k]);
            data += "\n\n";
            ear_plot += fmt::format("{}'zoom.dat' index {} using 1:2 with lines {} title '{}'", ear_plot.empty() ? "" : ", ", block,
                                    line_style(groups.group[i], groups.member[i]), gp_escape(names[i]));
            ++block;
        }
        write_text_atomic(dir / "zoom.dat", data);
        env_plot.resize(env_plot.size() - 2);
        const std::string body = fmt::format(
            "set multiplot layout 2,1 title 'Waveform zoom: {:.3g} ms from {:.4g} s, where the earpiece departs most from its envelope'\n"
            "{}set grid\n{}set ylabel '{}'\nset format x ''\nset xlabel ''\n"
            "plot {}\nset format x '%g'\nset ylabel 'earpiece V (DC included)'\nset xlabel 'time in the window, ms'\n"
            "set key at screen 0.995, screen 0.52 right top font ',13' spacing 1.0\nplot {}\nunset multiplot",
            span * 1e3, t0, frame, key_setting, receiver ? "antenna EMF, V" : "source V", env_plot, ear_plot);
        run_gnuplot(terminal_pair_script("zoom", body, 1280, 800), dir, "zoom");
        stems.push_back("zoom");
    }
    {
        std::string data, plot;
        const double band_high = std::min(10000.0, 0.5 * fs_hz);
        double f_lowest = 0.0;
        int block = 0;
        for (std::size_t i = 0; i < traces.size(); ++i) {
            const auto k0 = std::min(traces[i].v.size(), static_cast<std::size_t>(t_min * fs_hz));
            std::span<const double> v(traces[i].v.data() + k0, traces[i].v.size() - k0);
            if (v.size() < 64) continue; // too short to analyse: no data block, so the next trace keeps its index
            // The DC bias and its slow settling drift are removed before the window: left in, the window's
            // side lobes carry them across the lowest bins.
            const detail::plotted_spectrum sp = detail::spectrum_for_plot(v, fs_hz, band_high);
            f_lowest = std::max(f_lowest, sp.lowest_hz);
            for (std::size_t k = 0; k < sp.frequency_hz.size(); ++k)
                data += fmt::format("{:.6g} {:.6g}\n", sp.frequency_hz[k], sp.level_dbv[k]);
            data += "\n\n";
            plot += fmt::format("{}'spectrum.dat' index {} using 1:2 with lines {} title '{}'", plot.empty() ? "" : ", ", block,
                                line_style(groups.group[i], groups.member[i], 1.8), gp_escape(names[i]));
            ++block;
        }
        if (!plot.empty()) {
            write_text_atomic(dir / "spectrum.dat", data);
            const std::string body =
                fmt::format("set title \"Earpiece spectrum, from {:.0f} Hz\\n(DC and settling drift removed before a 4-term Blackman-Harris window)\"\n"
                            "set grid\n{}set logscale x\nset xlabel 'frequency, Hz'\nset ylabel 'amplitude, dBV'\nset yrange [-140:*]\n"
                            "set xrange [{:.6g}:{:.6g}]\nset lmargin at screen 0.09\nset rmargin at screen 0.68\nplot {}",
                            f_lowest, key_setting, f_lowest, band_high, plot);
            run_gnuplot(terminal_pair_script("spectrum", body), dir, "spectrum");
            stems.push_back("spectrum");
        }
    }
}

/// Upright bars rising from `floor` (stated in the title when it is not zero), the value printed on each
/// bar, each bar in its circuit group's colour.
void draw_bars(const std::string& stem, const std::string& title, const std::string& ylabel, const std::string& unit_text,
               const std::vector<std::string>& names, const std::vector<double>& values, const std::vector<std::size_t>& group, bool from_zero,
               const fs::path& dir, std::vector<std::string>& stems)
{
    double lo = std::numeric_limits<double>::infinity(), hi = -lo;
    for (double v : values)
        if (std::isfinite(v)) lo = std::min(lo, v), hi = std::max(hi, v);
    if (!std::isfinite(lo)) return; // nothing to draw
    // The floor: zero for a quantity that starts there (THD), else a round 10 below the smallest value.
    const double floor = from_zero ? std::min(0.0, lo) : 10.0 * std::floor((lo - 5.0) / 10.0);
    const double top = from_zero ? std::max(hi, 0.0) * 1.18 + 1e-9 : hi + 0.12 * (hi - floor) + 1.0;
    std::string data;
    for (std::size_t i = 0; i < names.size(); ++i)
        data += fmt::format("\"{}\" {} {}\n", gp_escape(names[i]), std::isfinite(values[i]) ? fmt::format("{:.6g}", values[i]) : "NaN",
                            palette_rgb(group[i]));
    write_text_atomic(dir / (stem + ".dat"), data);
    const std::string full_title = from_zero ? title : fmt::format("{}\\nbars rise from a floor at {:g} {}, not from zero", title, floor, unit_text);
    const std::string body = fmt::format(
        "set title \"{0}\"\nset grid ytics\nset style fill solid 0.85 border rgb '#333333'\nset yrange [{1:.6g}:{2:.6g}]\n"
        "set xrange [-0.6:{3}]\nset xtics rotate by -35 left font ',14'\nset ylabel '{4}'\nset bmargin 8\nunset key\n"
        "plot '{5}.dat' using 0:2:($0-0.36):($0+0.36):({1:.6g}):2:3 with boxxyerror lc rgb variable, "
        "'' using 0:2:(sprintf('%.1f', $2)):xtic(1) with labels offset 0,0.9 font ',14'",
        full_title, floor, top, static_cast<double>(names.size()) - 0.4, ylabel, stem);
    run_gnuplot(terminal_pair_script(stem, body), dir, stem);
    stems.push_back(stem);
}


/// Selectivity curves and the sensitivity-versus-selectivity chart of the pack's whole-receiver variants.
void draw_receiver_plots(const sweep_result& sweep, const fs::path& dir, std::vector<std::string>& stems)
{
    std::vector<const variant_result*> rx;
    for (const auto& r : sweep.variants)
        if (r.scene.tuner.layout != tuner_layout::bench) rx.push_back(&r);
    // A common window: twice the farthest station's offset from the wanted carrier and 2.5 bandwidths of
    // the most selective variant, at least +-30 kHz (a very broad variant runs off the sides: its flat top
    // is what matters).
    double centre = 0.0, farthest = 0.0, narrowest = std::numeric_limits<double>::infinity();
    for (const auto* r : rx) {
        const double bw = r->job.receiver.rf_bandwidth_hz;
        if (std::isfinite(bw)) narrowest = std::min(narrowest, bw);
        if (centre == 0.0) centre = r->scene.stations.front().params.carrier_hz;
        for (const auto& st : r->scene.stations) farthest = std::max(farthest, std::fabs(st.params.carrier_hz - centre));
    }
    double half = std::max(30e3, 2.0 * farthest);
    if (std::isfinite(narrowest)) half = std::max(half, 2.5 * narrowest);
    half = std::min(half, 0.5 * centre);
    std::string data, plot;
    int block = 0;
    for (const auto* r : rx) {
        const double tuned = r->job.receiver.tuned_hz;
        if (!std::isfinite(tuned)) continue; // untuned: no resonance to draw
        const receiver_network rn = build_receiver_network(r->scene.circuit, r->scene.antenna, r->scene.tuner);
        // The curve around the variant's own tuned frequency, over the common window.
        const double span = half + std::fabs(tuned - centre);
        const selectivity_curve c = compute_selectivity(rn, r->job.receiver.detector_admittance_s, tuned, span, 401);
        for (std::size_t k = 0; k < c.frequency_hz.size(); ++k)
            if (std::fabs(c.frequency_hz[k] - centre) <= half)
                data += fmt::format("{:.8g} {:.6g}\n", c.frequency_hz[k] / 1e3, c.relative_db[k]);
        data += "\n\n";
        plot += fmt::format("{}'selectivity.dat' index {} using 1:2 with lines {} title '{} (Q_L {:.0f})'", plot.empty() ? "" : ", ", block,
                            line_style(static_cast<std::size_t>(block), 0), gp_escape(r->spec.name), r->job.receiver.loaded_q);
        ++block;
    }
    if (!plot.empty()) {
        std::string marks;
        int n = 1;
        for (const auto& st : rx.front()->scene.stations)
            marks += fmt::format("set arrow {0} from {1:.8g}, graph 0 to {1:.8g}, graph 1 nohead dt 2 lc rgb '#777777'\n"
                                 "set label {0} '{2}' at {1:.8g}, graph 0.03 rotate by 90 left offset -0.6,0 font ',12' tc rgb '#555555'\n",
                                 n, st.params.carrier_hz / 1e3, gp_escape(st.params.name)),
                ++n;
        write_text_atomic(dir / "selectivity.dat", data);
        run_gnuplot(terminal_pair_script("selectivity",
                                         fmt::format("set title 'Selectivity at the detector, measured loading included (re each variant''s peak)'\n"
                                                     "set grid\n{}set xlabel 'frequency, kHz'\n"
                                                     "set ylabel 'relative response, dB'\nset yrange [-30:2]\n{}plot {}",
                                                     key_setting, marks, plot)),
                    dir, "selectivity");
        stems.push_back("selectivity");
    }
    // Sensitivity versus selectivity: one point per receiver variant, labelled; a panel only where some
    // variant has the figure (an untuned set has no bandwidth; gnuplot refuses a plot with no point).
    std::string pts;
    int with_bw = 0, with_nb = 0;
    for (const auto* r : rx) {
        const double tone = detail::number_or_nan(r->metrics, "wanted_tone_v");
        const double y = tone > 0.0 ? 20.0 * std::log10(tone) : std::numeric_limits<double>::quiet_NaN();
        const double bw = r->job.receiver.rf_bandwidth_hz;
        const double nb = detail::number_or_nan(r->metrics, "loudest_neighbour_db");
        if (!std::isfinite(y)) continue;
        with_bw += std::isfinite(bw) ? 1 : 0;
        with_nb += std::isfinite(nb) ? 1 : 0;
        pts += fmt::format("{} {} {:.6g} \"{}\"\n", std::isfinite(bw) ? fmt::format("{:.6g}", bw / 1e3) : "NaN",
                           std::isfinite(nb) ? fmt::format("{:.6g}", nb) : "NaN", y, gp_escape(r->spec.name));
    }
    if (with_bw == 0 && with_nb == 0) return;
    write_text_atomic(dir / "tradeoff.dat", pts);
    std::string body = fmt::format(
        "set multiplot layout 1,{} title 'Sensitivity versus selectivity: the wanted station''s tone level at the earpiece'\n"
        "set grid\nunset key\nset ylabel 'wanted tone amplitude, dBV'\nset offsets graph 0.1, graph 0.25, graph 0.1, graph 0.1\n",
        (with_bw > 0 ? 1 : 0) + (with_nb > 0 ? 1 : 0));
    if (with_bw > 0)
        body += "set xlabel 'RF -3 dB bandwidth at the detector, kHz'\n"
                "plot 'tradeoff.dat' using 1:3 with points pt 7 ps 1.6 lc rgb '#0072B2', '' using 1:3:4 with labels offset 0.8,0.6 left font ',13'\n";
    if (with_nb > 0)
        body += "set xlabel 'loudest neighbour re wanted, dB (lower: more selective)'\n"
                "plot 'tradeoff.dat' using 2:3 with points pt 7 ps 1.6 lc rgb '#D55E00', '' using 2:3:4 with labels offset 0.8,0.6 left font ',13'\n";
    body += "unset multiplot";
    run_gnuplot(terminal_pair_script("tradeoff", body, 1280, 640), dir, "tradeoff");
    stems.push_back("tradeoff");
}

} // namespace

selectivity_curve compute_selectivity(const receiver_network& rn, std::complex<double> y, double centre_hz, double span_hz, int points)
{
    if (!(span_hz > 0.0) || !(centre_hz > span_hz) || !std::isfinite(centre_hz))
        throw config_error(fmt::format("selectivity: centre {} Hz, span {} Hz: needs 0 < span < centre", centre_hz, span_hz));
    if (points < 3 || points > 100001 || points % 2 == 0)
        throw config_error(fmt::format("selectivity: points = {}: must be odd, in [3, 100001]", points));
    selectivity_curve c;
    c.centre_hz = centre_hz;
    const double ref = detector_gain(rn, y, centre_hz);
    const int half = points / 2;
    for (int k = -half; k <= half; ++k) {
        // The centre exactly, the rest at whole multiples of the step from it.
        const double f = k == 0 ? centre_hz : centre_hz + span_hz * static_cast<double>(k) / half;
        c.frequency_hz.push_back(f);
        c.relative_db.push_back(20.0 * std::log10(detector_gain(rn, y, f) / ref));
    }
    return c;
}

std::vector<std::string> draw_render_plots(const scenario& s, const job_outcome& job, const fs::path& dir)
{
    std::error_code ec;
    fs::create_directories(dir, ec);
    std::vector<std::string> stems;
    trace t{&s, std::vector<double>(job.analysis_v.begin(), job.analysis_v.end()),
            s.tuner.layout != tuner_layout::bench ? job.receiver.wanted_emf_peak_v : 0.0};
    draw_traces({"earpiece"}, {t}, group_by_circuit({&s}), dir, stems);
    return stems;
}

namespace {

/// The settings of the simulated curves for one scenario: its own carrier and modulation index (0.3 where
/// it has none), its tone (400 Hz for clips), the pack's audio rate.
characterize_settings curve_settings(const scenario& s)
{
    characterize_settings cs;
    cs.render.audio_rate_hz = s.render.audio_rate_hz;
    cs.band_high_hz = std::min(10000.0, 0.5 * s.render.audio_rate_hz);
    cs.carrier_hz = s.am.carrier_hz;
    cs.modulation_index = s.am.modulation_index > 0.0 ? s.am.modulation_index : 0.3;
    if (s.programme.kind == programme_kind::tone && s.programme.tone_hz > 0.0 && s.programme.tone_hz < 0.45 * s.render.audio_rate_hz)
        cs.tone_hz = s.programme.tone_hz;
    cs.analysis_s = 0.05; // >= 4 periods of the lowest response frequency (150 Hz) with a margin
    return cs;
}

std::string describe_curve_conditions(const characterize_settings& cs)
{
    return fmt::format("{} carrier, m = {:.2g}, {:g} Hz tone", format_quantity(cs.carrier_hz, unit::hertz, 4, true), cs.modulation_index,
                       cs.tone_hz);
}


/// log-log interpolation of a transfer curve's tone amplitude at carrier level v (inside the curve's span).
double tone_at(const transfer_curve& c, double v)
{
    const auto& p = c.points;
    for (std::size_t k = 1; k < p.size(); ++k)
        if (v <= p[k].carrier_peak_v * (1.0 + 1e-12)) {
            const double u = std::log(v / p[k - 1].carrier_peak_v) / std::log(p[k].carrier_peak_v / p[k - 1].carrier_peak_v);
            return std::exp(std::log(p[k - 1].audio_v) + u * std::log(p[k].audio_v / p[k - 1].audio_v));
        }
    return std::numeric_limits<double>::quiet_NaN();
}

/// Level against carrier for the diode comparison: among circuits that differ only in their diode, each
/// diode's recovered tone level against the carrier level from weak to strong (the transfer curves already
/// simulated at the scenario's own carrier), the variants' levels marked, and a panel with each diode's
/// level re the first one's. Drawn only when some circuits differ in the diode alone.
/// The circuit groups that differ only in their diode (the largest such set, at least two), or none.
std::vector<std::size_t> diode_comparison(const sweep_result& sweep, const grouping& groups)
{
    std::map<std::string, std::vector<std::size_t>> buckets; // circuit less the diode -> groups
    std::vector<std::string> order;
    for (std::size_t g = 0; g < groups.members.size(); ++g) {
        const std::string k = scene_key(sweep.variants[groups.members[g].front()].scene, false);
        if (!buckets.count(k)) order.push_back(k);
        buckets[k].push_back(g);
    }
    const std::vector<std::size_t>* best = nullptr;
    for (const auto& k : order)
        if (buckets[k].size() >= 2 && (!best || buckets[k].size() > best->size())) best = &buckets[k];
    return best ? *best : std::vector<std::size_t>{};
}

void draw_diode_levels(const sweep_result& sweep, const grouping& groups, const std::vector<std::size_t>& gs,
                       const std::vector<transfer_curve>& tc, const std::function<double(std::size_t)>& operating_level,
                       const std::string& cond, const std::vector<std::string>& names, const fs::path& dir, std::vector<std::string>& stems)
{
    if (gs.size() < 2) return;
    std::string data, top, diff, diode_list;
    std::vector<std::string> ops(gs.size());
    const transfer_curve& ref = tc[gs.front()];
    for (std::size_t j = 0; j < gs.size(); ++j) {
        const std::size_t g = gs[j];
        const std::string diode = sweep.variants[groups.members[g].front()].scene.circuit.diode.name;
        diode_list += (j == 0 ? "" : j + 1 == gs.size() ? " and " : ", ") + diode;
        for (const auto& p : tc[g].points) {
            const double r = tone_at(ref, p.carrier_peak_v);
            data += fmt::format("{:.6g} {:.6g} {}\n", p.carrier_peak_v, 20.0 * std::log10(p.audio_v),
                                std::isfinite(r) ? fmt::format("{:.6g}", 20.0 * std::log10(p.audio_v / r)) : "NaN");
        }
        data += "\n\n";
        top += fmt::format("{}'diode_levels.dat' index {} using 1:2 with linespoints {} pt 7 ps 0.9 title '{}'", top.empty() ? "" : ", ", j,
                           line_style(j, 0, 3.0), gp_escape(diode));
        diff += fmt::format("{}'diode_levels.dat' index {} using 1:3 with linespoints {} pt 7 ps 0.9 notitle", diff.empty() ? "" : ", ", j,
                            line_style(j, 0, 3.0));
        for (std::size_t i : groups.members[g]) {
            const double v = operating_level(i);
            if (!(v >= tc[g].points.front().carrier_peak_v && v <= tc[g].points.back().carrier_peak_v)) continue;
            ops[j] += fmt::format("{:.6g} {:.6g} {} \"{}\"\n", v, 20.0 * std::log10(tone_at(tc[g], v)), palette_rgb(j), gp_escape(names[i]));
        }
    }
    // The variants' points, one block per diode, each diode's names on its own side of its curve.
    std::string marks;
    for (std::size_t j = 0; j < gs.size(); ++j) {
        if (ops[j].empty()) continue;
        data += ops[j] + "\n\n";
        const std::size_t b = gs.size() + j;
        marks += fmt::format(", 'diode_levels.dat' index {0} using 1:2:3 with points pt 6 ps 3 lw 3 lc rgb variable {1}, "
                             "'' index {0} using 1:2:4 with labels left offset 1.8,{2} font ',13' notitle",
                             b, j == 0 ? "title 'the variants'" : "notitle", j % 2 ? "-0.9" : "0.9");
    }
    write_text_atomic(dir / "diode_levels.dat", data);
    const std::string body = fmt::format(
        "set multiplot title \"Level against carrier: {0}, weak to strong\\n({1})\"\n"
        "set lmargin at screen 0.09\nset rmargin at screen 0.68\nset logscale x\nset grid\n{2}"
        "set tmargin at screen 0.86\nset bmargin at screen 0.40\nset format x ''\nset ylabel 'recovered tone, dBV'\n"
        "plot {3}{4}\n"
        "set tmargin at screen 0.36\nset bmargin at screen 0.10\nset format x '%g'\nset xlabel 'carrier peak at the detector input, V'\n"
        "set ylabel 'dB re first diode'\nset ytics 5\nunset title\nplot {5}\nunset multiplot",
        gp_escape(diode_list), cond, key_setting, top, marks, diff);
    run_gnuplot(terminal_pair_script("diode_levels", body, 1280, 800), dir, "diode_levels");
    stems.push_back("diode_levels");
}
/// Level against carrier for a whole-receiver pack's diode comparison: the detector alone (bench layout,
/// behind the scenario's source.resistance_ohm, which the title states) at the wanted station's carrier,
/// modulation and tone; each variant's operating level is its measured peak at the detector input over
/// (1 + m). A failed simulation leaves the chart out with a warning.
void draw_receiver_diode_levels(const sweep_result& sweep, const grouping& groups, const std::vector<std::string>& names,
                                const fs::path& dir, pack_plots& out)
{
    const std::vector<std::size_t> gs = diode_comparison(sweep, groups);
    if (gs.size() < 2) return;
    // The bench scenario of a receiver variant: the wanted station's carrier, modulation and tone.
    auto bench_of = [&](std::size_t i) {
        scenario s = sweep.variants[i].scene;
        const auto& st = s.stations.front();
        s.am.carrier_hz = st.params.carrier_hz;
        s.am.modulation_index = st.params.modulation_index;
        s.programme.kind = st.kind;
        s.programme.tone_hz = st.tone_hz;
        return s;
    };
    auto operating = [&](std::size_t i) {
        const auto& r = sweep.variants[i];
        return r.job.receiver.detector_rf_peak_v / (1.0 + r.scene.stations.front().params.modulation_index);
    };
    std::vector<transfer_curve> tc(groups.members.size());
    std::vector<std::size_t> jobs(gs.begin(), gs.end());
    std::string failure;
    std::mutex m;
    std::atomic<std::size_t> next{0};
    auto work = [&] {
        for (std::size_t j; (j = next.fetch_add(1)) < jobs.size() && !cancel_requested();) {
            const std::size_t g = jobs[j];
            try {
                const scenario s = bench_of(groups.members[g].front());
                std::vector<double> ops;
                for (std::size_t i : groups.members[g])
                    if (operating(i) > 0.0 && std::isfinite(operating(i))) ops.push_back(operating(i));
                tc[g] = measure_transfer_curve(s.circuit, detail::transfer_levels(ops), curve_settings(s));
            } catch (const galena::error& e) {
                std::lock_guard<std::mutex> lk(m);
                if (failure.empty()) failure = e.what();
            }
        }
    };
    {
        std::vector<std::thread> pool;
        const unsigned threads = std::max(1u, std::min<unsigned>(std::thread::hardware_concurrency(), static_cast<unsigned>(jobs.size())));
        for (unsigned t = 0; t < threads; ++t) pool.emplace_back(work);
        for (auto& t : pool) t.join();
    }
    throw_if_cancelled();
    if (!failure.empty()) {
        out.warnings.push_back({warning_code::plots_left_out, fmt::format("level against carrier left out: {}", failure)});
        return;
    }
    const scenario s0 = bench_of(groups.members[gs.front()].front());
    const std::string cond = fmt::format("the detector alone behind a {} source, at the wanted station's {}",
                                         format_quantity(s0.circuit.source.resistance_ohm, unit::ohm, 3, true),
                                         describe_curve_conditions(curve_settings(s0)));
    draw_diode_levels(sweep, groups, gs, tc, operating, cond, names, dir, out.stems);
}

} // namespace

pack_plots draw_pack_plots(const sweep_result& sweep, const fs::path& dir, bool curves)
{
    pack_plots out;
    std::vector<std::string>& stems = out.stems;
    std::error_code ec;
    fs::create_directories(dir, ec);
    if (ec) throw audio_error(fmt::format("{}: cannot create: {}", dir.string(), ec.message()));
    std::vector<std::string> names;
    std::vector<trace> traces;
    std::vector<const scenario*> scenes;
    for (const auto& r : sweep.variants) {
        names.push_back(r.spec.name);
        traces.push_back(plot_trace(r));
        scenes.push_back(&r.scene);
    }
    const grouping groups = group_by_circuit(scenes);
    draw_traces(names, traces, groups, dir, stems);
    std::vector<double> thd, level, drive;
    for (const auto& r : sweep.variants) {
        thd.push_back(detail::number_or_nan(r.metrics, "thd_percent"));
        const double rms = detail::number_or_nan(r.metrics, "audio_rms_v");
        level.push_back(rms > 0.0 ? 20.0 * std::log10(rms) : std::numeric_limits<double>::quiet_NaN());
        drive.push_back(detail::number_or_nan(r.metrics, "diaphragm_drive_db_re_1mn"));
    }
    draw_bars("thd", "THD (fundamental reference, harmonics 2-9) of the tone", "THD, %", "%", names, thd, groups.group, true, dir, stems);
    // Earpieces of different kinds are compared on what moves the diaphragm (transducer.hpp), not on volts.
    std::set<earpiece_kind> kinds;
    for (const auto& r : sweep.variants) kinds.insert(r.scene.circuit.earpiece.kind);
    if (kinds.size() > 1 && std::any_of(drive.begin(), drive.end(), [](double d) { return std::isfinite(d); })) {
        draw_bars("level", "Diaphragm drive force (RMS, audio band): earpieces of different kinds compared on drive, not volts\\n"
                           "piezo N v or N q_m / C_m (BVD), magnetic Bl i_L; sensitivities: the earpiece keys (defaults are orders from memory)",
                  "drive force, dB re 1 mN", "dB re 1 mN", names, drive, groups.group, false, dir, stems);
        draw_bars("level_volts", "Earpiece voltage (RMS, 20 Hz - 10 kHz): volts are not loudness across earpiece kinds", "level, dBV", "dBV", names,
                  level, groups.group, false, dir, stems);
    } else {
        draw_bars("level", "Earpiece audio level (RMS, 20 Hz - 10 kHz)", "level, dBV", "dBV", names, level, groups.group, false, dir, stems);
    }
    const bool any_receiver = std::any_of(sweep.variants.begin(), sweep.variants.end(),
                                          [](const variant_result& r) { return r.scene.tuner.layout != tuner_layout::bench; });
    if (any_receiver) draw_receiver_plots(sweep, dir, stems);
    // The response and transfer curves simulate the bench detector (generator behind source.resistance_ohm);
    // a whole receiver's detector is fed by its tuned circuit, which the selectivity plot shows instead.
    if (curves && any_receiver) draw_receiver_diode_levels(sweep, groups, names, dir, out);
    if (!curves || any_receiver) return out;

    // The scenario behind each variant's curves: the tone measurement's where there is one (its tone).
    auto curve_scene = [&](std::size_t i) -> const scenario& {
        const auto& r = sweep.variants[i];
        return r.measured_separately ? r.measure_scene : r.scene;
    };
    // One transfer curve per circuit (it spans every level, so variants differing only in level share it),
    // with their levels among its points; one response per variant (it depends on the level).
    const std::size_t ng = groups.members.size(), n = sweep.variants.size();
    std::vector<transfer_curve> tc(ng);
    std::vector<std::vector<double>> operating(ng);
    for (std::size_t g = 0; g < ng; ++g)
        for (std::size_t i : groups.members[g]) operating[g].push_back(curve_scene(i).am.carrier_peak_v);
    std::vector<frequency_response> fr(n);
    std::atomic<std::size_t> next{0};
    std::exception_ptr err;
    std::string curve_error;
    std::mutex m;
    auto work = [&] {
        for (std::size_t job; (job = next.fetch_add(1)) < ng + n && !cancel_requested();) {
            const std::size_t i = job < ng ? groups.members[job].front() : job - ng;
            try {
                const scenario& s = curve_scene(i);
                const characterize_settings cs = curve_settings(s);
                if (job < ng) {
                    tc[job] = measure_transfer_curve(s.circuit, detail::transfer_levels(operating[job]), cs);
                } else {
                    std::vector<double> f = log_spaced(150.0, std::min(8000.0, 0.4 * s.render.audio_rate_hz), 7);
                    fr[i] = measure_frequency_response(s.circuit, s.am.carrier_peak_v, f, cs);
                }
            } catch (const galena::error& e) {
                std::lock_guard<std::mutex> lk(m);
                if (curve_error.empty()) curve_error = fmt::format("variant {}: {}", sweep.variants[i].spec.name, e.what());
            } catch (...) {
                std::lock_guard<std::mutex> lk(m);
                if (!err) err = std::current_exception();
            }
        }
    };
    {
        const unsigned threads = std::max(1u, std::min<unsigned>(std::thread::hardware_concurrency(), static_cast<unsigned>(ng + n)));
        std::vector<std::thread> pool;
        for (unsigned t = 0; t < threads; ++t) pool.emplace_back(work);
        for (auto& t : pool) t.join();
    }
    throw_if_cancelled();
    if (err) std::rethrow_exception(err);
    if (!curve_error.empty()) {
        // The renders are done and worth keeping: report the curve failure and go on without the curves.
        out.warnings.push_back({warning_code::plots_left_out, fmt::format("response and transfer curves left out: {}", curve_error)});
        return out;
    }
    // Conditions: each variant's own; the title states them, or says they differ.
    std::set<std::string> conditions;
    for (std::size_t i = 0; i < n; ++i) conditions.insert(describe_curve_conditions(curve_settings(curve_scene(i))));
    const std::string cond = conditions.size() == 1 ? *conditions.begin() : std::string("each variant's own carrier and modulation");
    // The circuit's name in legends: its variants' names less the words they do not share (e.g. "weak", "strong").
    auto group_name = [&](std::size_t g) {
        const auto& mem = groups.members[g];
        if (mem.size() == 1) return names[mem.front()];
        std::vector<std::string> parts;
        std::string w;
        for (char ch : names[mem.front()] + "-") {
            if (ch == '-' || ch == '_') {
                if (!w.empty() && std::all_of(mem.begin(), mem.end(), [&](std::size_t i) {
                        return ("-" + names[i] + "-").find("-" + w + "-") != std::string::npos;
                    }))
                    parts.push_back(w);
                w.clear();
            } else {
                w += ch;
            }
        }
        std::string o;
        for (const auto& p : parts) o += (o.empty() ? "" : "-") + p;
        return o.empty() ? names[mem.front()] : o;
    };
    std::string tdata, tplot, opdata, rdata, rplot;
    for (std::size_t g = 0; g < ng; ++g) {
        for (const auto& p : tc[g].points) tdata += fmt::format("{:.6g} {:.6g} {:.6g}\n", p.carrier_peak_v, p.audio_v, p.dc_v);
        tdata += "\n\n";
        tplot += fmt::format("{}'transfer.dat' index {} using 1:2 with linespoints {} pt 7 ps 0.8 title '{}'", tplot.empty() ? "" : ", ", g,
                             line_style(g, 0), gp_escape(group_name(g)));
    }
    // Operating points: each variant's level on its circuit's curve (a point of the curve, simulated there).
    for (std::size_t i = 0; i < n; ++i) {
        const auto& c = tc[groups.group[i]];
        const double lv = curve_scene(i).am.carrier_peak_v;
        for (const auto& p : c.points)
            if (std::fabs(p.carrier_peak_v / lv - 1.0) < 1e-9)
                opdata += fmt::format("{:.6g} {:.6g} {}\n", p.carrier_peak_v, p.audio_v, palette_rgb(groups.group[i]));
    }
    for (std::size_t i = 0; i < n; ++i) {
        for (const auto& p : fr[i].points) rdata += fmt::format("{:.6g} {:.6g}\n", p.frequency_hz, p.relative_db);
        rdata += "\n\n";
        rplot += fmt::format("{}'response.dat' index {} using 1:2 with linespoints {} pt 7 ps 0.8 title '{}'", rplot.empty() ? "" : ", ", i,
                             line_style(groups.group[i], groups.member[i]), gp_escape(names[i]));
    }
    write_text_atomic(dir / "transfer.dat", tdata);
    write_text_atomic(dir / "transfer_operating.dat", opdata);
    write_text_atomic(dir / "response.dat", rdata);
    run_gnuplot(terminal_pair_script("transfer",
                                     fmt::format("set title \"Transfer curve, one per circuit: recovered tone against carrier level\\n({}; rings: the "
                                                 "variants' own levels)\"\nset grid\nset logscale xy\nset format y '%g'\n"
                                                 "set xrange [0.008:4]\n{}"
                                                 "set xlabel 'carrier peak, V'\nset ylabel 'tone amplitude at the earpiece, V'\n"
                                                 "set lmargin at screen 0.09\nset rmargin at screen 0.68\n"
                                                 "plot {}, 'transfer_operating.dat' using 1:2:3 with points pt 6 ps 3.2 lw 3 lc rgb variable "
                                                 "title 'operating points'",
                                                 cond, key_setting, tplot)),
                dir, "transfer");
    stems.push_back("transfer");
    run_gnuplot(terminal_pair_script("response", fmt::format("set title \"Frequency response re each variant's peak\\n({}; colour: circuit, "
                                                             "dash: signal level)\"\nset grid\nset logscale x\n{}"
                                                             "set xlabel 'frequency, Hz'\nset ylabel 'relative gain, dB'\n"
                                                             "set lmargin at screen 0.09\nset rmargin at screen 0.68\nplot {}",
                                                             cond, key_setting, rplot)),
                dir, "response");
    stems.push_back("response");
    draw_diode_levels(sweep, groups, diode_comparison(sweep, groups), tc, [&](std::size_t i) { return curve_scene(i).am.carrier_peak_v; },
                      cond, names, dir, stems);
    return out;
}

namespace detail {

const std::array<const char*, 8> plot_palette = {"0072B2", "D55E00", "009E73", "CC79A7", "E69F00", "56B4E9", "000000", "F0E442"};

std::string plot_line_style(std::size_t g, std::size_t m, double width)
{
    // gnuplot's five dash types and three patterns of our own (dash, dot and gap lengths).
    static constexpr std::array<const char*, 8> dashes = {"1", "2", "3", "4", "5", "(24,8,4,8)", "(4,6,4,6,16,6)", "(36,12)"};
    return fmt::format("lc rgb '#{}' dt {} lw {}", plot_palette[g % plot_palette.size()], dashes[(3 * (g / plot_palette.size()) + m) % 8],
                       width);
}

namespace {
/// Residual RMS of y after the least-squares fit y ~ a + b x + c dx over one window (the earpiece following
/// its envelope, with a small lag); what is left is what the detector failed to follow (diagonal clipping,
/// negative-peak clipping) plus distortion.
double follow_residual(const double* y, const double* x, const double* dx, std::size_t n)
{
    double m[3][4] = {};
    for (std::size_t k = 0; k < n; ++k) {
        const double b[3] = {1.0, x[k], dx[k]};
        for (int i = 0; i < 3; ++i) {
            for (int j = 0; j < 3; ++j) m[i][j] += b[i] * b[j];
            m[i][3] += b[i] * y[k];
        }
    }
    // Ridge of 1e-9 of the diagonal: a silent stretch (x constant) then fits the mean alone.
    for (int i = 0; i < 3; ++i) m[i][i] += 1e-9 * (m[0][0] + m[1][1] + m[2][2]) + 1e-300;
    for (int c = 0; c < 3; ++c) { // Gaussian elimination with partial pivoting
        int p = c;
        for (int r = c + 1; r < 3; ++r)
            if (std::fabs(m[r][c]) > std::fabs(m[p][c])) p = r;
        for (int j = 0; j < 4; ++j) std::swap(m[c][j], m[p][j]);
        for (int r = c + 1; r < 3; ++r) {
            const double f = m[r][c] / m[c][c];
            for (int j = c; j < 4; ++j) m[r][j] -= f * m[c][j];
        }
    }
    double coef[3];
    for (int i = 2; i >= 0; --i) {
        double v = m[i][3];
        for (int j = i + 1; j < 3; ++j) v -= m[i][j] * coef[j];
        coef[i] = v / m[i][i];
    }
    double ss = 0.0;
    for (std::size_t k = 0; k < n; ++k) {
        const double r = y[k] - coef[0] - coef[1] * x[k] - coef[2] * dx[k];
        ss += r * r;
    }
    return std::sqrt(ss / static_cast<double>(n));
}

/// Removes the least-squares line (the DC bias and the slow drift of its settling) from v.
std::vector<double> detrended(std::span<const double> v)
{
    const double n = static_cast<double>(v.size());
    double st = 0, sy = 0, stt = 0, sty = 0;
    for (std::size_t k = 0; k < v.size(); ++k) {
        const double t = static_cast<double>(k);
        st += t, sy += v[k], stt += t * t, sty += t * v[k];
    }
    const double b = (n * sty - st * sy) / (n * stt - st * st);
    const double a = (sy - b * st) / n;
    std::vector<double> o(v.size());
    for (std::size_t k = 0; k < v.size(); ++k) o[k] = v[k] - a - b * static_cast<double>(k);
    return o;
}

} // namespace

/// The zoom's start time, s: the window (of `span_s`, from t_min_s on) where the earpiece departs most from
/// its programme's envelope, over all traces, each measured against its own RMS (so a quiet variant counts as
/// much as a loud one, and near-silence, where nothing departs, is never chosen). The first window within 5 %
/// of the largest departure wins, so a steady tone gives the earliest window after settling.
double choose_zoom_start(const std::vector<std::span<const double>>& traces, const std::vector<std::vector<double>>& programme, double fs,
                         double t_min_s, double span_s)
{
    const auto k_min = static_cast<std::size_t>(std::ceil(t_min_s * fs));
    const auto len = std::max<std::size_t>(8, static_cast<std::size_t>(span_s * fs));
    const std::size_t hop = std::max<std::size_t>(1, len / 4);
    std::vector<double> score;
    for (std::size_t i = 0; i < traces.size(); ++i) {
        const auto& v = traces[i];
        if (v.size() < k_min + len + 2) continue;
        const std::size_t n = v.size() - k_min;
        if (programme[i].size() < v.size()) continue;
        std::vector<double> x(programme[i].begin() + static_cast<std::ptrdiff_t>(k_min), programme[i].begin() + static_cast<std::ptrdiff_t>(v.size())), dx(n);
        for (std::size_t k = 0; k < n; ++k) dx[k] = (x[std::min(k + 1, n - 1)] - x[k > 0 ? k - 1 : 0]) * 0.5;
        double mean = 0.0, ss = 0.0;
        for (std::size_t k = 0; k < n; ++k) mean += v[k_min + k];
        mean /= static_cast<double>(n);
        for (std::size_t k = 0; k < n; ++k) ss += (v[k_min + k] - mean) * (v[k_min + k] - mean);
        const double rms = std::sqrt(ss / static_cast<double>(n));
        if (!(rms > 0.0)) continue;
        const std::size_t windows = (n - len) / hop + 1;
        score.resize(std::max(score.size(), windows), 0.0);
        for (std::size_t w = 0; w < windows; ++w) {
            const std::size_t a = w * hop;
            score[w] = std::max(score[w], follow_residual(v.data() + k_min + a, x.data() + a, dx.data() + a, len) / rms);
        }
    }
    if (score.empty()) return t_min_s;
    const double best = *std::max_element(score.begin(), score.end());
    for (std::size_t w = 0; w < score.size(); ++w)
        if (score[w] >= 0.95 * best) return static_cast<double>(k_min + w * hop) / fs;
    return t_min_s;
}

plotted_spectrum spectrum_for_plot(std::span<const double> v, double fs_hz, double band_high_hz)
{
    plotted_spectrum o;
    const std::vector<double> ac = detrended(v);
    const auto sp = compute_spectrum(ac, fs_hz, spectrum_window::blackman_harris4);
    // Below 5 bins the 4-term Blackman-Harris window's main lobe (+-4 bins) still holds what was removed.
    o.lowest_hz = std::max(20.0, 5.0 * fs_hz / static_cast<double>(ac.size()));
    for (std::size_t k = 1; k < sp.frequency_hz.size(); ++k) {
        if (sp.frequency_hz[k] > band_high_hz) break;
        if (sp.frequency_hz[k] < o.lowest_hz) continue;
        o.frequency_hz.push_back(sp.frequency_hz[k]);
        o.level_dbv.push_back(20.0 * std::log10(std::max(sp.amplitude_v[k], 1e-12)));
    }
    return o;
}

std::vector<double> transfer_levels(const std::vector<double>& operating)
{
    std::vector<double> grid = log_spaced(0.01, 3.0, 7);
    std::vector<double> out;
    for (double g : grid)
        if (std::none_of(operating.begin(), operating.end(), [&](double o) { return std::fabs(std::log(g / o)) < std::log(1.15); }))
            out.push_back(g);
    for (double o : operating)
        if (std::none_of(out.begin(), out.end(), [&](double x) { return std::fabs(x / o - 1.0) < 1e-9; })) out.push_back(o);
    std::sort(out.begin(), out.end());
    return out;
}

} // namespace detail

} // namespace galena
