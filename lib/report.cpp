#include "galena/report.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/characterize.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/metrics.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <atomic>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <fmt/format.h>
#include <fstream>
#include <map>
#include <mutex>
#include <set>
#include <sstream>
#include <csignal>
#include <cerrno>
#include <cstring>
#include <fcntl.h>
#include <spawn.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>
#include <thread>

namespace galena {

namespace fs = std::filesystem;

std::string html_escape(const std::string& s)
{
    std::string o;
    for (char c : s) {
        switch (c) {
        case '&': o += "&amp;"; break;
        case '<': o += "&lt;"; break;
        case '>': o += "&gt;"; break;
        case '"': o += "&quot;"; break;
        default: o += c;
        }
    }
    return o;
}

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

std::string read_text(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    if (!in) throw audio_error(fmt::format("{}: cannot read", p.string()));
    std::ostringstream ss;
    ss << in.rdbuf();
    return ss.str();
}

double num_or_nan(const nlohmann::json& j, const char* key)
{
    if (!j.contains(key) || !j[key].is_number()) return std::numeric_limits<double>::quiet_NaN();
    return j[key].get<double>();
}

/// The scenario and earpiece trace used for the waveform and spectrum plots of one variant.
struct trace {
    const scenario* scene;
    std::vector<double> v;
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

std::vector<double> tone_code(int k, const playlist_options& o)
{
    if (k < 1) throw config_error(fmt::format("tone code: variant number {}: must be >= 1", k));
    std::vector<double> beeps(static_cast<std::size_t>(k / 5), o.long_s);
    beeps.insert(beeps.end(), static_cast<std::size_t>(k % 5), o.short_s);
    return beeps;
}

std::vector<playlist_segment> write_playlist(const std::vector<fs::path>& wavs, const std::vector<std::string>& names,
                                             const std::vector<std::string>& labels, const fs::path& out_wav,
                                             const fs::path& out_csv, wav_format format, const playlist_options& o)
{
    if (wavs.empty() || wavs.size() != names.size() || labels.size() != names.size())
        throw config_error("playlist: needs one name and label per WAV, and at least one WAV");
    std::vector<double> out;
    std::vector<playlist_segment> segs;
    double fs_hz = 0.0;
    auto silence = [&](double s) { out.insert(out.end(), static_cast<std::size_t>(std::llround(s * fs_hz)), 0.0); };
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        double rate = 0.0;
        const std::vector<float> x = read_mono(wavs[i], &rate);
        if (i == 0) {
            fs_hz = rate;
            if (!(o.beep_hz > 50.0 && o.beep_hz < 0.5 * fs_hz))
                throw config_error(fmt::format("playlist: beep_hz = {}: must be in (50, {}) Hz", o.beep_hz, 0.5 * fs_hz));
            silence(o.lead_in_s);
        } else if (rate != fs_hz) {
            throw audio_error(fmt::format("{}: sample rate {} Hz differs from the playlist's {} Hz", wavs[i].string(), rate, fs_hz));
        }
        playlist_segment s;
        s.number = static_cast<int>(i + 1);
        s.name = names[i];
        s.label = labels[i];
        s.code_start_s = static_cast<double>(out.size()) / fs_hz;
        const auto beeps = tone_code(s.number, o);
        for (std::size_t b = 0; b < beeps.size(); ++b) {
            const auto n = static_cast<std::size_t>(std::llround(beeps[b] * fs_hz));
            for (std::size_t k = 0; k < n; ++k) {
                const double t = static_cast<double>(k) / fs_hz;
                const double edge = std::min(t, static_cast<double>(n - 1 - k) / fs_hz);
                const double g = edge >= o.beep_fade_s ? 1.0 : 0.5 * (1.0 - std::cos(pi * edge / o.beep_fade_s));
                out.push_back(o.beep_peak * g * std::sin(2.0 * pi * o.beep_hz * t));
            }
            if (b + 1 < beeps.size()) silence(o.beep_gap_s);
        }
        silence(o.after_code_s);
        s.audio_start_sample = out.size();
        s.audio_samples = x.size();
        s.audio_start_s = static_cast<double>(s.audio_start_sample) / fs_hz;
        s.audio_end_s = static_cast<double>(s.audio_start_sample + s.audio_samples) / fs_hz;
        out.insert(out.end(), x.begin(), x.end());
        silence(o.after_audio_s);
        segs.push_back(s);
    }
    write_wav(out_wav, out, fs_hz, format, 1.0, true);
    std::string csv = csv_row({"number", "name", "label", "code_start_s", "audio_start_s", "audio_end_s", "audio_start_sample",
                               "audio_samples", "sample_rate_hz"});
    for (const auto& s : segs)
        csv += csv_row({std::to_string(s.number), s.name, s.label, fmt::format("{:.6f}", s.code_start_s),
                        fmt::format("{:.6f}", s.audio_start_s), fmt::format("{:.6f}", s.audio_end_s),
                        std::to_string(s.audio_start_sample), std::to_string(s.audio_samples), fmt::format("{}", fs_hz)});
    write_text_atomic(out_csv, csv);
    return segs;
}

std::vector<playlist_segment> read_playlist_table(const fs::path& csv)
{
    const auto rows = parse_csv(read_text(csv), csv);
    std::vector<playlist_segment> segs;
    for (std::size_t r = 1; r < rows.size(); ++r) {
        const auto& f = rows[r];
        if (f.size() == 1 && f[0].empty()) continue;
        if (f.size() != 9) throw audio_error(fmt::format("{}: record {}: {} fields: must be 9", csv.string(), r + 1, f.size()));
        playlist_segment s;
        try {
            s.number = std::stoi(f[0]);
            s.name = f[1];
            s.label = f[2];
            s.code_start_s = std::stod(f[3]);
            s.audio_start_s = std::stod(f[4]);
            s.audio_end_s = std::stod(f[5]);
            s.audio_start_sample = static_cast<std::size_t>(std::stoull(f[6]));
            s.audio_samples = static_cast<std::size_t>(std::stoull(f[7]));
        } catch (const std::exception&) {
            throw audio_error(fmt::format("{}: record {}: malformed number", csv.string(), r + 1));
        }
        segs.push_back(s);
    }
    return segs;
}

std::vector<matched_gain> write_loudness_matched(const std::vector<fs::path>& wavs, const std::vector<std::string>& names,
                                                 const fs::path& dir, wav_format format, double target_rms_dbfs)
{
    std::error_code ec;
    fs::create_directories(dir, ec);
    if (ec) throw audio_error(fmt::format("{}: cannot create: {}", dir.string(), ec.message()));
    std::vector<matched_gain> out;
    std::string csv = csv_row({"variant", "file", "rms_dbfs", "gain_db", "peak_limited"});
    const double peak_limit = std::pow(10.0, -1.0 / 20.0);
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        double rate = 0.0;
        const std::vector<float> x = read_mono(wavs[i], &rate);
        double ss = 0.0, peak = 0.0;
        for (float v : x) {
            ss += static_cast<double>(v) * v;
            peak = std::max(peak, std::fabs(static_cast<double>(v)));
        }
        const double rms = std::sqrt(ss / static_cast<double>(std::max<std::size_t>(1, x.size())));
        matched_gain g;
        g.name = names[i];
        g.wav = dir / (names[i] + ".wav");
        g.rms_dbfs = rms > 0.0 ? 20.0 * std::log10(rms) : -std::numeric_limits<double>::infinity();
        double gain = 1.0;
        if (rms > 1e-7) {
            gain = std::pow(10.0, (target_rms_dbfs - g.rms_dbfs) / 20.0);
            if (peak * gain > peak_limit) {
                gain = peak_limit / peak;
                g.peak_limited = true;
            }
        }
        g.gain_db = 20.0 * std::log10(gain);
        std::vector<double> y(x.begin(), x.end());
        for (double& v : y) v *= gain;
        write_wav(g.wav, y, rate, format, 1.0, true);
        csv += csv_row({g.name, g.wav.filename().string(), fmt::format("{:.2f}", g.rms_dbfs), fmt::format("{:.2f}", g.gain_db),
                        g.peak_limited ? "yes" : "no"});
        out.push_back(g);
    }
    write_text_atomic(dir / "gains.csv", csv);
    return out;
}

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
    const double f0 = s0.programme.kind == programme_kind::tone ? s0.programme.tone_hz : 300.0;
    const double settle = choose_settling_window(detector_network(s0.circuit)).settle_s;
    const double t0 = std::max(settle, 0.02);
    const double span = std::max(3.0 / f0, 0.003);
    {
        std::string data;
        // Source envelope for each distinct carrier level (the carrier fills the band between +-envelope).
        std::map<double, std::size_t> levels;
        for (std::size_t i = 0; i < traces.size(); ++i) levels.emplace(traces[i].scene->am.carrier_peak_v, i);
        std::string env_plot;
        int block = 0;
        for (const auto& [a, idx] : levels) {
            const scenario& sc = *traces[idx].scene;
            auto prog = make_programme(sc);
            prog->prepare(t0, t0 + span);
            for (int k = 0; k <= 600; ++k) {
                const double t = t0 + span * k / 600.0;
                const double e = a * (1.0 + sc.am.modulation_index * prog->value(t));
                data += fmt::format("{:.7g} {:.7g} {:.7g}\n", (t - t0) * 1e3, e, -e);
            }
            data += "\n\n";
            env_plot += fmt::format("{}'zoom.dat' index {} using 1:2:3 with filledcurves fc rgb '#{}' fs transparent solid 0.25 "
                                    "title 'carrier {:.3g} V ({:.4g} MHz, band)', ",
                                    env_plot.empty() ? "" : "", block, block % 2 ? "4477cc" : "cc7744", a, sc.am.carrier_hz / 1e6);
            ++block;
        }
        std::string ear_plot;
        for (std::size_t i = 0; i < traces.size(); ++i) {
            const auto k0 = static_cast<std::size_t>(t0 * fs_hz);
            const auto n = static_cast<std::size_t>(span * fs_hz) + 1;
            for (std::size_t k = k0; k < std::min(traces[i].v.size(), k0 + n); ++k)
                data += fmt::format("{:.7g} {:.7g}\n", (static_cast<double>(k) / fs_hz - t0) * 1e3, traces[i].v[k]);
            data += "\n\n";
            ear_plot += fmt::format("{}'zoom.dat' index {} using 1:2 with lines lw 1.5 title '{}'", ear_plot.empty() ? "" : ", ",
                                    block, gp_escape(names[i]));
            ++block;
        }
        write_text_atomic(dir / "zoom.dat", data);
        env_plot.resize(env_plot.size() - 2);
        const std::string body = fmt::format(
            "set multiplot layout 2,1 title 'Waveform zoom: {:.3g} ms from {:.3g} s'\n"
            "set grid\nset key outside right top font ',8'\nset ylabel 'source V'\nset xlabel ''\n"
            "plot {}\nset ylabel 'earpiece V (DC included)'\nset xlabel 'time, ms'\nplot {}\nunset multiplot",
            span * 1e3, t0, env_plot, ear_plot);
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
            plot += fmt::format("{}'spectrum.dat' index {} using 1:2 with lines title '{}'", plot.empty() ? "" : ", ", i,
                                gp_escape(names[i]));
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

} // namespace

std::vector<std::string> draw_render_plots(const scenario& s, const job_outcome& job, const fs::path& dir)
{
    std::error_code ec;
    fs::create_directories(dir, ec);
    std::vector<std::string> stems;
    trace t{&s, std::vector<double>(job.analysis_v.begin(), job.analysis_v.end())};
    draw_traces({"earpiece"}, {t}, dir, stems);
    return stems;
}

std::vector<std::string> draw_pack_plots(const sweep_result& sweep, const fs::path& dir, bool curves)
{
    std::error_code ec;
    fs::create_directories(dir, ec);
    if (ec) throw audio_error(fmt::format("{}: cannot create: {}", dir.string(), ec.message()));
    std::vector<std::string> stems, names;
    std::vector<trace> traces;
    for (const auto& r : sweep.variants) {
        names.push_back(r.spec.name);
        traces.push_back(plot_trace(r));
    }
    draw_traces(names, traces, dir, stems);
    std::vector<double> thd, level;
    for (const auto& r : sweep.variants) {
        thd.push_back(num_or_nan(r.metrics, "thd_percent"));
        const double rms = num_or_nan(r.metrics, "audio_rms_v");
        level.push_back(rms > 0.0 ? 20.0 * std::log10(rms) : std::numeric_limits<double>::quiet_NaN());
    }
    draw_bars("thd", "THD (fundamental reference, harmonics 2-9) of the tone", "THD, %", names, thd, dir, stems);
    draw_bars("level", "Earpiece audio level (RMS, 20 Hz - 10 kHz)", "level, dBV", names, level, dir, stems);
    if (!curves) return stems;

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
        std::fprintf(stderr, "galena: warning: response and transfer curves left out: %s\n", curve_error.c_str());
        return stems;
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
    return stems;
}

std::string render_page(const pack_page& p)
{
    std::string h = "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><title>" + html_escape(p.title) +
                    "</title>\n<style>body{font-family:sans-serif;margin:2em;max-width:1200px;background:#fff;color:#111}"
                    "table{border-collapse:collapse;font-size:0.85em}td,th{border:1px solid #999;padding:3px 6px;text-align:right}"
                    "td.l,th.l{text-align:left}td.warn{max-width:22em;font-size:0.8em}audio{width:170px}figure{margin:1em 0}svg{max-width:100%;height:auto}.warn{color:#a40}</style>"
                    "</head><body>\n";
    h += "<h1>" + html_escape(p.title) + "</h1>\n";
    if (!p.note.empty()) h += "<p>" + html_escape(p.note) + "</p>\n";
    h += p.extra_html;
    const sweep_result& sw = *p.sweep;
    const double fsv = sw.variants.empty() ? 0.0 : sw.variants[0].scene.output.full_scale_v;
    h += fmt::format("<p>All level-consistent files share one calibration: digital full scale = {:.4g} V at the earpiece, so "
                     "their loudness differences are real. The loudness-matched copies are scaled to a common RMS, with the "
                     "gains stated below.</p>\n",
                     fsv);
    if (!p.playlist_wav.empty()) {
        h += "<h2>Announced playlist</h2>\n<p>Each variant is announced by beeps: one long beep counts five, one short beep "
             "counts one (variant 7 = long, short, short).</p>\n";
        h += "<audio controls preload=\"none\" src=\"" + html_escape(p.playlist_wav.filename().string()) + "\"></audio>\n";
        h += "<table><tr><th>#</th><th class=l>variant</th><th class=l>label</th><th>code starts, s</th><th>audio starts, s</th>"
             "<th>audio ends, s</th></tr>\n";
        for (const auto& s : p.playlist)
            h += fmt::format("<tr><td>{}</td><td class=l>{}</td><td class=l>{}</td><td>{:.3f}</td><td>{:.3f}</td><td>{:.3f}</td></tr>\n",
                             s.number, html_escape(s.name), html_escape(s.label), s.code_start_s, s.audio_start_s, s.audio_end_s);
        h += "</table>\n";
    }
    h += "<h2>Variants</h2>\n<table><tr><th>#</th><th class=l>variant</th><th class=l>label</th><th>level-consistent</th>";
    if (!p.matched.empty()) h += "<th>loudness-matched</th><th>gain, dB</th>";
    h += "<th>carrier V</th><th>DC V</th><th>audio rms V</th><th>tone V</th><th>H2/H1</th><th>H3/H1</th><th>THD %</th>"
         "<th>THD+N %</th><th>SINAD dB</th></tr>\n";
    // Warnings go in a list below the table: long text in a cell would stretch every row.
    std::string warning_list;
    auto cell = [](const nlohmann::json& m, const char* k) {
        const double v = num_or_nan(m, k);
        return std::isfinite(v) ? fmt::format("{:.4g}", v) : std::string("-");
    };
    for (std::size_t i = 0; i < sw.variants.size(); ++i) {
        const auto& r = sw.variants[i];
        const std::string rel = (fs::relative(r.job.wav, p.dir)).generic_string();
        h += fmt::format("<tr><td>{}</td><td class=l>{}</td><td class=l>{}</td><td><audio controls preload=\"none\" src=\"{}\">"
                         "</audio></td>",
                         i + 1, html_escape(r.spec.name), html_escape(r.spec.label), html_escape(rel));
        if (!p.matched.empty()) {
            const auto& g = p.matched[i];
            h += fmt::format("<td><audio controls preload=\"none\" src=\"{}\"></audio></td><td>{:+.1f}{}</td>",
                             html_escape(fs::relative(g.wav, p.dir).generic_string()), g.gain_db, g.peak_limited ? " (peak-limited)" : "");
        }
        if (r.metrics.contains("warnings"))
            for (const auto& w : r.metrics["warnings"])
                warning_list += fmt::format("<li><b>{}</b>: {}</li>\n", html_escape(r.spec.name), html_escape(w.get<std::string>()));
        h += fmt::format("<td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>"
                         "</tr>\n",
                         cell(r.metrics, "carrier_peak_v"), cell(r.metrics, "dc_v"), cell(r.metrics, "audio_rms_v"),
                         cell(r.metrics, "fundamental_v"), cell(r.metrics, "h2_ratio"), cell(r.metrics, "h3_ratio"),
                         cell(r.metrics, "thd_percent"), cell(r.metrics, "thd_n_percent"), cell(r.metrics, "sinad_db"));
    }
    h += "</table>\n";
    if (!warning_list.empty()) h += "<h3>Warnings</h3>\n<ul class=warn>\n" + warning_list + "</ul>\n";
    h += "<p>Tables: <a href=\"table.csv\">table.csv</a>, <a href=\"table.md\">table.md</a>.</p>\n<h2>Plots</h2>\n";
    for (const auto& stem : p.plot_stems) {
        std::string svg = read_text(p.dir / "plots" / (stem + ".svg"));
        const auto at = svg.find("<svg");
        if (at != std::string::npos) svg = svg.substr(at);
        h += "<figure id=\"plot-" + stem + "\">" + svg + "<figcaption><a href=\"plots/" + stem + ".png\">" + stem +
             ".png</a></figcaption></figure>\n";
    }
    h += "</body></html>\n";
    return h;
}

pack_outcome make_pack(const fs::path& base_file, const std::vector<std::string>& base_overrides,
                       const std::vector<variant_spec>& variants, const fs::path& out_dir, const pack_options& opt)
{
    pack_outcome o;
    o.sweep = prepare_sweep(base_file, base_overrides, variants, opt.sweep);
    const auto& vs = o.sweep.variants;
    for (const auto& r : vs)
        if (r.scene.output.full_scale_v != vs[0].scene.output.full_scale_v)
            throw config_error(fmt::format("variant {}: output.full_scale_v = {}: a pack needs one calibration for every variant ({})",
                                           r.spec.name, r.scene.output.full_scale_v, vs[0].scene.output.full_scale_v));
    std::vector<fs::path> inputs = o.sweep.inputs;
    inputs.insert(inputs.end(), opt.protect.begin(), opt.protect.end());
    // Everything is staged beside out_dir and published at the end: a failure or Ctrl-C leaves no pack.
    staged_output staged(out_dir, opt.sweep.overwrite, inputs);
    check_sweep_outputs(o.sweep, staged);
    for (const char* f : {"index.html", "playlist.wav", "playlist.csv", "playlist-matched.wav", "playlist-matched.csv"}) {
        staged.check(f);
        staged.owns(f);
    }
    staged.owns("matched");
    staged.owns("plots");
    for (const auto& f : opt.extra_outputs) {
        staged.check(f);
        staged.owns(f);
    }
    const fs::path dir = staged.dir();
    o.page = dir / "index.html";
    o.playlist_wav = dir / "playlist.wav";
    o.playlist_csv = dir / "playlist.csv";
    with_described_errors(staged, [&] {
        render_sweep(o.sweep, dir, opt.sweep);
        std::string extra_html;
        if (opt.extras) extra_html = opt.extras(o.sweep, dir);
        std::vector<fs::path> wavs;
        std::vector<std::string> names, labels;
        for (const auto& r : vs) {
            wavs.push_back(r.job.wav);
            names.push_back(r.spec.name);
            labels.push_back(r.spec.label);
        }
        const wav_format fmt_ = vs[0].scene.output.format;
        throw_if_cancelled();
        o.playlist = write_playlist(wavs, names, labels, o.playlist_wav, o.playlist_csv, fmt_);
        if (opt.loudness_matched) {
            throw_if_cancelled();
            o.matched = write_loudness_matched(wavs, names, dir / "matched", fmt_);
            std::vector<fs::path> mw;
            for (const auto& g : o.matched) mw.push_back(g.wav);
            (void)write_playlist(mw, names, labels, dir / "playlist-matched.wav", dir / "playlist-matched.csv", fmt_);
        }
        pack_page page;
        page.title = opt.title;
        page.note = opt.note;
        page.extra_html = extra_html;
        page.dir = dir;
        page.sweep = &o.sweep;
        page.playlist = o.playlist;
        page.playlist_wav = o.playlist_wav;
        page.matched = o.matched;
        page.plot_stems = draw_pack_plots(o.sweep, dir / "plots", opt.curves);
        write_text_atomic(o.page, render_page(page));
        throw_if_cancelled();
        staged.publish();
    });
    relocate(o.sweep, staged);
    for (fs::path* p : {&o.page, &o.playlist_wav, &o.playlist_csv}) *p = staged.published(*p);
    for (auto& g : o.matched) g.wav = staged.published(g.wav);
    return o;
}

} // namespace galena
