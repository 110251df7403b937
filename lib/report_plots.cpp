#include "galena/report_plots.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/characterize.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/metrics.hpp"
#include "galena/report_detail.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <atomic>
#include <cerrno>
#include <cmath>
#include <csignal>
#include <cstring>
#include <fcntl.h>
#include <fmt/format.h>
#include <fstream>
#include <map>
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

std::string terminal_pair_script(const std::string& stem, const std::string& body, int w = 900, int h = 480)
{
    return fmt::format("set terminal svg size {0},{1} dynamic font 'sans,11' background rgb 'white'\n"
                       "set output '{2}.svg'\n{3}\nunset output\n"
                       "set terminal pngcairo size {0},{1} font 'sans,10' background rgb 'white'\n"
                       "set output '{2}.png'\n{3}\nunset output\n",
                       w, h, stem, body);
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

/// Zoom window and spectrum plots over a list of (name, trace).
void draw_traces(const std::vector<std::string>& names, const std::vector<trace>& traces, const fs::path& dir,
                 std::vector<std::string>& stems)
{
    // Zoom: three periods of the tone (or 10 ms) after the settling window.
    const scenario& s0 = *traces[0].scene;
    const double fs_hz = s0.render.audio_rate_hz;
    const bool wanted_tone = s0.tuner.layout != tuner_layout::bench && !s0.stations.empty() &&
                             s0.stations.front().kind == programme_kind::tone;
    const double f0 = wanted_tone                                  ? s0.stations.front().tone_hz
                      : s0.programme.kind == programme_kind::tone ? s0.programme.tone_hz
                                                                   : 300.0;
    const double settle = choose_settling_window(detector_network(s0.circuit)).settle_s;
    const double t0 = std::max(settle, 0.02);
    const double span = std::max(3.0 / f0, 0.003);
    {
        std::string data;
        // Source envelope for each distinct carrier level (the carrier fills the band between +-envelope).
        // Whole receivers: the wanted station's EMF at the antenna (its programme and modulation index).
        const bool receiver = s0.tuner.layout != tuner_layout::bench;
        std::map<double, std::size_t> levels;
        for (std::size_t i = 0; i < traces.size(); ++i)
            levels.emplace(receiver ? traces[i].emf_peak_v : traces[i].scene->am.carrier_peak_v, i);
        std::string env_plot;
        int block = 0;
        for (const auto& [a, idx] : levels) {
            const scenario& sc = *traces[idx].scene;
            std::unique_ptr<modulation> prog;
            double m = sc.am.modulation_index, fc = sc.am.carrier_hz;
            if (receiver) {
                auto progs = make_station_programmes(sc);
                prog = std::move(progs.front());
                m = sc.stations.front().params.modulation_index;
                fc = sc.stations.front().params.carrier_hz;
            } else {
                prog = make_programme(sc);
            }
            prog->prepare(t0, t0 + span);
            for (int k = 0; k <= 600; ++k) {
                const double t = t0 + span * k / 600.0;
                const double e = a * (1.0 + m * prog->value(t));
                data += fmt::format("{:.7g} {:.7g} {:.7g}\n", (t - t0) * 1e3, e, -e);
            }
            data += "\n\n";
            env_plot += fmt::format("{}'zoom.dat' index {} using 1:2:3 with filledcurves fc rgb '#{}' fs transparent solid 0.25 "
                                    "title '{} {:.3g} V ({:.4g} MHz, band)', ",
                                    env_plot.empty() ? "" : "", block, block % 2 ? "4477cc" : "cc7744",
                                    receiver ? "wanted EMF" : "carrier", a, fc / 1e6);
            ++block;
        }
        std::string ear_plot;
        for (std::size_t i = 0; i < traces.size(); ++i) {
            const auto k0 = static_cast<std::size_t>(t0 * fs_hz);
            const auto n = static_cast<std::size_t>(span * fs_hz) + 1;
            for (std::size_t k = k0; k < std::min(traces[i].v.size(), k0 + n); ++k)
                data += fmt::format("{:.7g} {:.7g}\n", (static_cast<double>(k) / fs_hz - t0) * 1e3, traces[i].v[k]);
            data += "\n\n";
            // Eight colours, then dashed lines, so that no two variants look alike.
            ear_plot += fmt::format("{}'zoom.dat' index {} using 1:2 with lines lw 1.5 dt {} title '{}'", ear_plot.empty() ? "" : ", ",
                                    block, 1 + i / 8, gp_escape(names[i]));
            ++block;
        }
        write_text_atomic(dir / "zoom.dat", data);
        env_plot.resize(env_plot.size() - 2);
        const std::string body = fmt::format(
            "set multiplot layout 2,1 title 'Waveform zoom: {:.3g} ms from {:.3g} s'\n"
            "set grid\nset key outside right top font ',8'\nset ylabel '{}'\nset xlabel ''\n"
            "plot {}\nset ylabel 'earpiece V (DC included)'\nset xlabel 'time, ms'\nplot {}\nunset multiplot",
            span * 1e3, t0, receiver ? "antenna EMF, V" : "source V", env_plot, ear_plot);
        run_gnuplot(terminal_pair_script("zoom", body, 1000, 640), dir, "zoom");
        stems.push_back("zoom");
    }
    {
        std::string data, plot;
        const double band_high = std::min(10000.0, 0.5 * fs_hz);
        for (std::size_t i = 0; i < traces.size(); ++i) {
            const auto k0 = std::min(traces[i].v.size(), static_cast<std::size_t>(t0 * fs_hz));
            std::span<const double> v(traces[i].v.data() + k0, traces[i].v.size() - k0);
            if (v.size() < 64) continue;
            const auto sp = compute_spectrum(v, fs_hz, spectrum_window::blackman_harris4);
            for (std::size_t k = 1; k < sp.frequency_hz.size(); ++k) {
                if (sp.frequency_hz[k] > band_high) break;
                data += fmt::format("{:.6g} {:.6g}\n", sp.frequency_hz[k], 20.0 * std::log10(std::max(sp.amplitude_v[k], 1e-12)));
            }
            data += "\n\n";
            plot += fmt::format("{}'spectrum.dat' index {} using 1:2 with lines dt {} title '{}'", plot.empty() ? "" : ", ", i,
                                1 + i / 8, gp_escape(names[i]));
        }
        write_text_atomic(dir / "spectrum.dat", data);
        const std::string body = fmt::format("set title 'Earpiece spectrum (4-term Blackman-Harris window)'\nset grid\n"
                                             "set key outside right top font ',8'\nset logscale x\nset xlabel 'frequency, Hz'\n"
                                             "set ylabel 'amplitude, dBV'\nset yrange [-140:*]\nplot {}",
                                             plot);
        run_gnuplot(terminal_pair_script("spectrum", body), dir, "spectrum");
        stems.push_back("spectrum");
    }
}

void draw_bars(const std::string& stem, const std::string& title, const std::string& ylabel,
               const std::vector<std::string>& names, const std::vector<double>& values, const fs::path& dir,
               std::vector<std::string>& stems)
{
    if (std::none_of(values.begin(), values.end(), [](double v) { return std::isfinite(v); })) return; // nothing to draw
    std::string data;
    for (std::size_t i = 0; i < names.size(); ++i)
        data += fmt::format("\"{}\" {}\n", gp_escape(names[i]), std::isfinite(values[i]) ? fmt::format("{:.6g}", values[i]) : "NaN");
    write_text_atomic(dir / (stem + ".dat"), data);
    const std::string body = fmt::format("set title '{}'\nset grid ytics\nset style fill solid 0.7\nset boxwidth 0.7\n"
                                         "set xtics rotate by -40 font ',8'\nset ylabel '{}'\nset bmargin 8\nunset key\n"
                                         "plot '{}.dat' using 0:2:xtic(1) with boxes lc rgb '#3366aa'",
                                         title, ylabel, stem);
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
        // Eight colours, then dashed lines, so that no two variants look alike.
        plot += fmt::format("{}'selectivity.dat' index {} using 1:2 with lines lw 1.5 dt {} title '{} (Q_L {:.0f})'",
                            plot.empty() ? "" : ", ", block, 1 + block / 8, gp_escape(r->spec.name), r->job.receiver.loaded_q);
        ++block;
    }
    if (!plot.empty()) {
        std::string marks;
        int n = 1;
        for (const auto& st : rx.front()->scene.stations)
            marks += fmt::format("set arrow {0} from {1:.8g}, graph 0 to {1:.8g}, graph 1 nohead dt 2 lc rgb '#777777'\n"
                                 "set label {0} '{2}' at {1:.8g}, graph 0.03 rotate by 90 left offset -0.6,0 font ',8' tc rgb '#555555'\n",
                                 n, st.params.carrier_hz / 1e3, gp_escape(st.params.name)),
                ++n;
        write_text_atomic(dir / "selectivity.dat", data);
        run_gnuplot(terminal_pair_script("selectivity",
                                         fmt::format("set title 'Selectivity at the detector, measured loading included (re each variant''s peak)'\n"
                                                     "set grid\n"
                                                     "set key outside right top font ',8'\nset xlabel 'frequency, kHz'\n"
                                                     "set ylabel 'relative response, dB'\nset yrange [-30:2]\n{}plot {}",
                                                     marks, plot)),
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
                "plot 'tradeoff.dat' using 1:3 with points pt 7 ps 1.2 lc rgb '#3366aa', '' using 1:3:4 with labels offset 0.8,0.6 left font ',8'\n";
    if (with_nb > 0)
        body += "set xlabel 'loudest neighbour re wanted, dB (lower: more selective)'\n"
                "plot 'tradeoff.dat' using 2:3 with points pt 7 ps 1.2 lc rgb '#aa5533', '' using 2:3:4 with labels offset 0.8,0.6 left font ',8'\n";
    body += "unset multiplot";
    run_gnuplot(terminal_pair_script("tradeoff", body, 1100, 480), dir, "tradeoff");
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
    draw_traces({"earpiece"}, {t}, dir, stems);
    return stems;
}

pack_plots draw_pack_plots(const sweep_result& sweep, const fs::path& dir, bool curves)
{
    pack_plots out;
    std::vector<std::string>& stems = out.stems;
    std::error_code ec;
    fs::create_directories(dir, ec);
    if (ec) throw audio_error(fmt::format("{}: cannot create: {}", dir.string(), ec.message()));
    std::vector<std::string> names;
    std::vector<trace> traces;
    for (const auto& r : sweep.variants) {
        names.push_back(r.spec.name);
        traces.push_back(plot_trace(r));
    }
    draw_traces(names, traces, dir, stems);
    std::vector<double> thd, level;
    for (const auto& r : sweep.variants) {
        thd.push_back(detail::number_or_nan(r.metrics, "thd_percent"));
        const double rms = detail::number_or_nan(r.metrics, "audio_rms_v");
        level.push_back(rms > 0.0 ? 20.0 * std::log10(rms) : std::numeric_limits<double>::quiet_NaN());
    }
    draw_bars("thd", "THD (fundamental reference, harmonics 2-9) of the tone", "THD, %", names, thd, dir, stems);
    draw_bars("level", "Earpiece audio level (RMS, 20 Hz - 10 kHz)", "level, dBV", names, level, dir, stems);
    const bool any_receiver = std::any_of(sweep.variants.begin(), sweep.variants.end(),
                                          [](const variant_result& r) { return r.scene.tuner.layout != tuner_layout::bench; });
    if (any_receiver) draw_receiver_plots(sweep, dir, stems);
    // The response and transfer curves simulate the bench detector (generator behind source.resistance_ohm);
    // a whole receiver's detector is fed by its tuned circuit, which the selectivity plot shows instead.
    if (!curves || any_receiver) return out;

    // Transfer curves and responses, one simulation set per variant, on all cores, stored by index.
    const std::size_t n = sweep.variants.size();
    std::vector<transfer_curve> tc(n);
    std::vector<frequency_response> fr(n);
    std::atomic<std::size_t> next{0};
    std::exception_ptr err;
    std::string curve_error;
    std::mutex m;
    auto work = [&] {
        for (std::size_t i; (i = next.fetch_add(1)) < n && !cancel_requested();) {
            try {
                const scenario& s = sweep.variants[i].scene;
                characterize_settings cs;
                cs.render.audio_rate_hz = s.render.audio_rate_hz;
                cs.band_high_hz = std::min(10000.0, 0.5 * s.render.audio_rate_hz);
                cs.modulation_index = std::min(0.3, s.am.modulation_index > 0 ? s.am.modulation_index : 0.3);
                cs.analysis_s = 0.05; // >= 4 periods of the lowest response frequency (150 Hz) with a margin
                tc[i] = measure_transfer_curve(s.circuit, log_spaced(0.01, 3.0, 7), cs);
                std::vector<double> f = log_spaced(150.0, std::min(8000.0, 0.4 * s.render.audio_rate_hz), 7);
                fr[i] = measure_frequency_response(s.circuit, s.am.carrier_peak_v, f, cs);
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
        const unsigned threads = std::max(1u, std::min<unsigned>(std::thread::hardware_concurrency(), static_cast<unsigned>(n)));
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
    std::string tdata, tplot, rdata, rplot;
    for (std::size_t i = 0; i < n; ++i) {
        for (const auto& p : tc[i].points) tdata += fmt::format("{:.6g} {:.6g} {:.6g}\n", p.carrier_peak_v, p.audio_v, p.dc_v);
        tdata += "\n\n";
        tplot += fmt::format("{}'transfer.dat' index {} using 1:2 with linespoints title '{}'", tplot.empty() ? "" : ", ", i,
                             gp_escape(names[i]));
        for (const auto& p : fr[i].points) rdata += fmt::format("{:.6g} {:.6g}\n", p.frequency_hz, p.relative_db);
        rdata += "\n\n";
        rplot += fmt::format("{}'response.dat' index {} using 1:2 with linespoints title '{}'", rplot.empty() ? "" : ", ", i,
                             gp_escape(names[i]));
    }
    write_text_atomic(dir / "transfer.dat", tdata);
    write_text_atomic(dir / "response.dat", rdata);
    run_gnuplot(terminal_pair_script("transfer",
                                     fmt::format("set title 'Transfer curve: recovered {:.0f} Hz tone vs carrier level (m = {:.2g}, "
                                                 "{:.0f} kHz carrier)'\nset grid\nset logscale xy\nset key outside right top font ',8'\n"
                                                 "set xlabel 'carrier peak, V'\nset ylabel 'tone amplitude at the earpiece, V'\nplot {}",
                                                 tc[0].tone_hz, tc[0].modulation_index, characterize_settings{}.carrier_hz / 1e3, tplot)),
                dir, "transfer");
    stems.push_back("transfer");
    run_gnuplot(terminal_pair_script("response", fmt::format("set title 'Frequency response, audio in to earpiece (re each "
                                                             "variant''s peak)'\nset grid\nset logscale x\nset key outside right top "
                                                             "font ',8'\nset xlabel 'frequency, Hz'\nset ylabel 'relative gain, dB'\nplot {}",
                                                             rplot)),
                dir, "response");
    stems.push_back("response");
    return out;
}

} // namespace galena
