// galena command-line tool: argument parsing and exit codes only; all work is done by the library.
#include "galena/cancel.hpp"
#include "galena/components.hpp"
#include "galena/dial_report.hpp"
#include "galena/diode_report.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/metrics.hpp"
#include "galena/report.hpp"
#include "galena/scenario.hpp"
#include "galena/staged_output.hpp"
#include "galena/sweep.hpp"
#include "galena/units.hpp"
#include "galena/workbench.hpp"

#include <CLI/CLI.hpp>
#include <cerrno>
#include <algorithm>
#include <chrono>
#include <cmath>
#include <csignal>
#include <optional>
#include <cstdio>
#include <fmt/format.h>
#include <unistd.h>

namespace {

/// The installed data folder: <prefix>/share/galena, with <prefix> the folder above this executable's bin/.
std::filesystem::path installed_data_dir()
{
    std::error_code ec;
    const auto exe = std::filesystem::weakly_canonical("/proc/self/exe", ec);
    if (ec || exe.empty()) return {};
    return exe.parent_path().parent_path() / GALENA_INSTALL_DATA_SUBDIR;
}

/// Documented exit codes (README, "Exit codes").
enum exit_code : int {
    exit_ok = 0,
    exit_usage = 2,       ///< bad command line or scenario
    exit_audio = 3,       ///< audio or output file problem
    exit_numerical = 4,   ///< the solver failed
    exit_resource = 5,    ///< a resource ran out (memory, file descriptors, processes, FFTW plan)
    exit_internal = 70,   ///< a bug: please report
    exit_signal_base = 128, ///< stopped by signal N (Ctrl-C / SIGINT: 130, SIGTERM: 143)
};

/// One line on stderr, whatever the message holds.
int report(const std::string& what, int code)
{
    std::string line = what;
    for (char& c : line)
        if (c == '\n' || c == '\r') c = ' ';
    std::fprintf(stderr, "galena: error: %s\n", line.c_str());
    return code;
}
int report(const std::exception& e, int code) { return report(std::string(e.what()), code); }

/// Progress and status text on stderr: once a write fails (EPIPE when stderr is a pipe whose reader has
/// gone, e.g. `2>&1 | head`), nothing more is printed and the work goes on.
bool g_stderr_open = true;
void progress_text(const char* text)
{
    if (!g_stderr_open) return;
    if (std::fputs(text, stderr) < 0 || std::fflush(stderr) != 0) g_stderr_open = false;
}

/// Staging notices (stale stages removed, stages that could not be removed) as warnings.
void print_staging_notices()
{
    for (const auto& n : galena::take_staging_notices()) {
        std::string line = "galena: warning: " + n + "\n";
        progress_text(line.c_str());
    }
}

/// Wall time left, from the time spent and the share done ("about 12 s left"); empty until it means something.
std::string time_left(double elapsed_s, double fraction)
{
    if (!(fraction >= 0.02) || elapsed_s < 1.0) return "estimating time left";
    if (fraction >= 1.0) return "done";
    const double left = elapsed_s * (1.0 - fraction) / fraction;
    if (left < 90.0) return fmt::format("about {:.0f} s left", std::ceil(left));
    return fmt::format("about {:.0f} min left", std::ceil(left / 60.0));
}

std::string bar(double fraction)
{
    const int width = 24;
    const int filled = std::clamp(static_cast<int>(fraction * width), 0, width);
    return "[" + std::string(static_cast<std::size_t>(filled), '#') + std::string(static_cast<std::size_t>(width - filled), '.') + "]";
}

/// Progress of a sweep: on a terminal one bar redrawn in place with the time left; otherwise one plain line
/// per finished variant, in variant order.
std::function<void(const galena::sweep_progress&)> sweep_progress(bool quiet)
{
    if (quiet) return {};
    const bool tty = isatty(fileno(stderr)) != 0;
    return [tty](const galena::sweep_progress& p) {
        const int w = p.total >= 1000 ? 4 : p.total >= 100 ? 3 : 2;
        if (tty) {
            progress_text(fmt::format("\r{} {:>{}}/{} variants {:3}%  {:<24}", bar(p.fraction), p.reported, w, p.total,
                                      static_cast<int>(p.fraction * 100.0), time_left(p.elapsed_s, p.fraction))
                              .c_str());
            if (p.reported == p.total && !p.finished.empty()) progress_text("\n");
        } else if (!p.finished.empty()) {
            progress_text(fmt::format("galena: [{:>{}}/{}] {} done; {}\n", p.reported, w, p.total, p.finished,
                                      time_left(p.elapsed_s, p.fraction))
                              .c_str());
        }
    };
}

/// Progress of one render, shown only once it has run for a second: a bar with the time left on a
/// terminal, a plain line every 10 % otherwise.
std::function<void(double)> render_progress(bool quiet, bool& drew)
{
    if (quiet) return {};
    const bool tty = isatty(fileno(stderr)) != 0;
    const auto t0 = std::chrono::steady_clock::now();
    return [tty, t0, &drew, last = -1](double f) mutable {
        const double elapsed = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
        if (elapsed < 1.0) return;
        const int pct = static_cast<int>(f * 100.0);
        if (pct == last || (!tty && pct / 10 == last / 10)) return;
        last = pct;
        drew = true;
        if (tty) progress_text(fmt::format("\rrendering {} {:3}%  {:<24}", bar(f), pct, time_left(elapsed, f)).c_str());
        else progress_text(fmt::format("galena: rendering {}%; {}\n", pct, time_left(elapsed, f)).c_str());
    };
}

/// Lets a numeric option take engineering values ("1k", "300ms"), read by the library's one parser.
CLI::Validator engineering(galena::unit u)
{
    return CLI::Validator(
        [u](std::string& text) -> std::string {
            try {
                text = fmt::format("{:.17g}", galena::parse_quantity(text, u));
                return {};
            } catch (const galena::config_error& e) {
                return fmt::format("'{}': {}", text, e.what());
            }
        },
        std::string(galena::unit_symbol(u)), "engineering value");
}

/// Variants from --vary axes and --variant specs (axes first).
std::vector<galena::variant_spec> collect_variants(const std::vector<std::string>& vary, const std::vector<std::string>& named)
{
    std::vector<galena::variant_spec> v;
    if (!vary.empty()) {
        std::vector<galena::sweep_axis> axes;
        for (const auto& a : vary) axes.push_back(galena::parse_sweep_axis(a));
        v = galena::expand_sweep(axes);
    }
    for (const auto& n : named) v.push_back(galena::parse_variant(n));
    if (v.empty()) throw galena::config_error("no variants: give --vary section.key=a,b,c or --variant NAME:section.key=value");
    return v;
}

void print_pack(const galena::pack_outcome& o, const std::string& out_dir, double wall_s)
{
    fmt::print("{}", galena::table_markdown(o.sweep.variants));
    fmt::print("\nwrote {} ({} variants, playlist {}); {:.1f} s wall\n", (std::filesystem::path(out_dir) / "index.html").string(),
               o.sweep.variants.size(), o.playlist_wav.string(), wall_s);
    fmt::print("{}\n", galena::full_scale_text(o.sweep));
    std::fflush(stdout);
    for (const auto& w : o.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.message.c_str());
}

} // namespace

int main(int argc, char** argv)
{
    galena::install_signal_handlers();
    std::atexit(print_staging_notices); // after the command's own last line
    CLI::App app{"galena: time-domain simulation of the crystal-set detector stage"};
    app.require_subcommand(1);
    // Command-line mistakes cost one line too.
    app.failure_message([](const CLI::App* a, const CLI::Error& e) {
        std::string line = std::string("galena: error: ") + e.what() + " (see: " + a->get_name() + " --help)";
        for (char& c : line)
            if (c == '\n') c = ' ';
        return line + "\n";
    });

    std::string scenario_path;
    std::string out_dir;
    std::vector<std::string> sets;
    bool overwrite = false;
    bool quiet = false;
    bool allow_long = false;
    bool allow_large = false;
    const std::string long_help = "render more than the programme-time limit (README, \"When something goes wrong\")";
    const std::string large_help = "render more variants than the sweep-size limit (README, \"When something goes wrong\")";
    auto* render = app.add_subcommand("render", "render one scenario to DIR/recovered.wav");
    render->add_option("scenario", scenario_path, "scenario file (TOML)")->required();
    render->add_option("--out,-o", out_dir, "output directory")->required();
    render->add_option("--set,-s", sets, "override a value: section.key=value (repeatable)");
    render->add_flag("--overwrite", overwrite, "replace existing output files");
    render->add_flag("--quiet,-q", quiet, "no progress output");
    render->add_flag("--allow-long", allow_long, long_help);
    bool verbose = false;
    render->add_flag("--verbose", verbose, "print every figure of metrics.json and the solver's, not just the summary");

    std::string check_path;
    std::vector<std::string> check_sets;
    auto* check = app.add_subcommand("check", "validate a scenario (and print it in full) or a pack file (and every variant), rendering nothing");
    check->add_option("file", check_path, "scenario file or pack file (TOML)")->required();
    check->add_option("--set,-s", check_sets, "override a value: section.key=value (repeatable; for a pack, of its base scenario)");

    auto* presets = app.add_subcommand("presets", "list the built-in diode presets and their parameters");

    std::string sw_scenario, sw_out;
    std::vector<std::string> sw_sets, sw_vary, sw_variants;
    unsigned sw_threads = 0;
    double sw_tone_hz = 0.0;
    auto* sweep = app.add_subcommand("sweep", "render variants of a scenario on all cores: one WAV each, a table of metrics");
    sweep->add_option("scenario", sw_scenario, "base scenario file (TOML)")->required();
    sweep->add_option("--out,-o", sw_out, "output directory (one folder per variant)")->required();
    sweep->add_option("--vary,-v", sw_vary, "section.key=a,b,c | section.key=log:LO:HI:COUNT | diode.preset=presets (repeatable: product)");
    sweep->add_option("--variant", sw_variants, "a named variant NAME:section.key=value,section.key=value (repeatable)");
    sweep->add_option("--set,-s", sw_sets, "override the base: section.key=value (repeatable)");
    sweep->add_option("--threads,-j", sw_threads, "worker threads (0 = all cores)");
    sweep->add_option("--measure-tone", sw_tone_hz, "for audio clips, also render a tone of this frequency for THD, Hz")
        ->transform(engineering(galena::unit::hertz));
    sweep->add_flag("--overwrite", overwrite, "replace existing output files");
    sweep->add_flag("--quiet,-q", quiet, "no progress output");
    sweep->add_flag("--allow-long", allow_long, long_help);
    sweep->add_flag("--allow-large", allow_large, large_help);

    std::string cmp_input, cmp_out;
    std::vector<std::string> cmp_sets, cmp_vary, cmp_variants;
    unsigned cmp_threads = 0;
    bool cmp_no_curves = false;
    double cmp_tone_hz = galena::default_measure_tone_hz;
    double cmp_tone_s = galena::default_measure_duration_s;
    std::string cmp_title;
    auto* compare = app.add_subcommand("compare", "make a comparison pack: WAVs, announced playlist, plots, offline HTML page");
    compare->add_option("input", cmp_input, "a pack file ([pack] + [[variant]]) or a base scenario with --vary/--variant")->required();
    compare->add_option("--out,-o", cmp_out, "output directory")->required();
    compare->add_option("--vary,-v", cmp_vary, "as for sweep (repeatable)");
    compare->add_option("--variant", cmp_variants, "NAME:section.key=value,... (repeatable)");
    compare->add_option("--set,-s", cmp_sets, "override the base scenario: section.key=value (repeatable)");
    compare->add_option("--threads,-j", cmp_threads, "worker threads (0 = all cores)");
    compare->add_option("--title", cmp_title, "page title");
    auto* cmp_tone_opt = compare->add_option("--measure-tone", cmp_tone_hz,
                                             "for audio clips, also render a tone of this frequency for THD, Hz (0 = off; "
                                             "a pack file's measure_tone_hz unless given)")
                             ->capture_default_str()
                             ->transform(engineering(galena::unit::hertz));
    auto* cmp_tone_s_opt = compare->add_option("--measure-duration", cmp_tone_s, "length of that tone render, s")
                               ->capture_default_str()
                               ->transform(engineering(galena::unit::second));
    compare->add_flag("--no-curves", cmp_no_curves, "skip the simulated response and transfer curves");
    compare->add_flag("--overwrite", overwrite, "replace existing output files");
    compare->add_flag("--quiet,-q", quiet, "no progress output");
    compare->add_flag("--allow-long", allow_long, long_help);
    compare->add_flag("--allow-large", allow_large, large_help);

    std::string demo_out = "demo-out";
    unsigned demo_threads = 0;
    auto* demo = app.add_subcommand("demo", "render the bundled demo: a crystal set on an invented band (coupling, detector tap, bleeder, diode)");
    demo->add_option("--out,-o", demo_out, "output directory")->capture_default_str();
    demo->add_option("--threads,-j", demo_threads, "worker threads (0 = all cores)");
    demo->add_flag("--overwrite", overwrite, "replace existing output files");
    demo->add_flag("--quiet,-q", quiet, "no progress output");

    // Turning the dial (issue 16).
    std::string dl_scenario, dl_band, dl_out, dl_law = "frequency";
    std::vector<std::string> dl_sets;
    double dl_from = 0.0, dl_to = 0.0, dl_glide = 0.0, dl_dwell = -1.0, dl_retune = 2e-3, dl_window = 8e-3;
    bool dl_stops = false;
    int dl_steps = 32;
    auto* dial = app.add_subcommand("dial", "sweep a set's tuning capacitor across a band: DIR/dial.wav, dial map, band survey");
    dial->add_option("scenario", dl_scenario, "a whole-receiver scenario (single-coil or coupled; its stations are replaced)")->required();
    dial->add_option("--band,-b", dl_band, "band file: [band], [dial], [[station]] (e.g. scenarios/demo-band.toml)")->required();
    dial->add_option("--out,-o", dl_out, "output directory")->required();
    dial->add_option("--set,-s", dl_sets, "override the scenario: section.key=value (repeatable)");
    dial->add_option("--from", dl_from, "start of the glide, Hz (band file's [dial] unless given)")->transform(engineering(galena::unit::hertz));
    dial->add_option("--to", dl_to, "end of the glide, Hz")->transform(engineering(galena::unit::hertz));
    dial->add_option("--glide", dl_glide, "length of the glide (or of each glide between stops), s")->transform(engineering(galena::unit::second));
    dial->add_option("--law", dl_law, "frequency (tuned frequency linear in time) or capacitance (capacitor linear in time)")
        ->check(CLI::IsMember({"frequency", "capacitance"}));
    dial->add_flag("--stop-on-stations", dl_stops, "dwell on every station's carrier, gliding between them");
    dial->add_option("--dwell", dl_dwell, "time on each stop, s (with --stop-on-stations)")->transform(engineering(galena::unit::second));
    dial->add_option("--retune-interval", dl_retune, "simulated time between capacitor updates, s")
        ->capture_default_str()->transform(engineering(galena::unit::second));
    dial->add_option("--level-window", dl_window, "each station's level is measured over windows of this length, s")
        ->capture_default_str()->transform(engineering(galena::unit::second));
    dial->add_option("--steps-per-cycle", dl_steps, "steps per cycle of the tuned carrier, at least (even, 8-4096)")->capture_default_str();
    dial->add_flag("--overwrite", overwrite, "replace existing output files");
    dial->add_flag("--quiet,-q", quiet, "no progress output");

    // Measured diodes (issue 15): fit-diode and rank-diodes.
    std::string fd_points, fd_out;
    std::optional<double> fd_temperature;
    auto* fit_diode = app.add_subcommand("fit-diode", "fit a diode model (Is, n, Rs, leakage) to measured points: DIR/diode.toml, fit.json, plot");
    fit_diode->add_option("points", fd_points, "measurement file (CSV: voltage_v,current_a or supply_v,series_ohm,diode_v)")->required();
    fit_diode->add_option("--out,-o", fd_out, "output directory")->required();
    fit_diode->add_option("--temperature-c", fd_temperature, "measurement temperature, degC (default: the file's, else 25)");
    fit_diode->add_flag("--overwrite", overwrite, "replace existing output files");

    std::string rk_scenario, rk_out;
    std::vector<std::string> rk_diodes, rk_sets;
    unsigned rk_threads = 0;
    double rk_tone_hz = 1000.0;
    double rk_tone_s = 0.3;
    auto* rank = app.add_subcommand("rank-diodes", "render one scenario with each fitted diode; rank them by detected level, with uncertainty");
    rank->add_option("scenario", rk_scenario, "scenario file (TOML): the set and the signal level")->required();
    rank->add_option("diodes", rk_diodes, "diode.toml files written by fit-diode (fit.json beside each gives the uncertainty)")->required();
    rank->add_option("--out,-o", rk_out, "output directory")->required();
    rank->add_option("--set,-s", rk_sets, "override the scenario: section.key=value (repeatable)");
    rank->add_option("--threads,-j", rk_threads, "worker threads (0 = all cores)");
    rank->add_option("--measure-tone", rk_tone_hz, "for audio clips, rank on a tone of this frequency, Hz (0 = the clip's RMS level)")
        ->capture_default_str();
    rank->add_option("--measure-duration", rk_tone_s, "length of that tone render, s")->capture_default_str();
    rank->add_flag("--overwrite", overwrite, "replace existing output files");
    rank->add_flag("--quiet,-q", quiet, "no progress output");
    rank->add_flag("--allow-long", allow_long, long_help);

    // The workbench (issue 17): a local web page that renders on each change.
    int wb_port = 8017;
    std::string wb_listen = "127.0.0.1";
    unsigned wb_threads = 0;
    auto* workbench = app.add_subcommand("workbench", "serve the bench in the browser: change a part, hear it (loopback only; Ctrl-C stops it)");
    workbench->add_option("--port,-p", wb_port, "TCP port (0 = a free port)")->capture_default_str();
    workbench->add_option("--listen", wb_listen,
                          "listen on this address instead of the loopback address: anyone who reaches it can render on "
                          "this machine (README \"Workbench\")")
        ->capture_default_str();
    workbench->add_option("--threads,-j", wb_threads, "renders at once (0 = all cores)");

    try {
        app.parse(argc, argv);
    } catch (const CLI::ParseError& e) {
        return app.exit(e) == 0 ? exit_ok : exit_usage;
    }

    try {
        if (*presets) {
            for (const auto& p : galena::diode_presets()) {
                const auto& d = p.params;
                fmt::print("{}\n  {}\n  Is = {:.3g} A, n = {:.3g}, Rs = {:.3g} ohm, leakage = {:.3g} ohm, Cj0 = {:.3g} F, "
                           "Vj = {:.3g} V, M = {:.3g}, BV = {:.3g} V, Eg = {:.3g} eV\n  zero-bias video resistance = {:.3g} ohm at {} C\n",
                           p.name, p.description, d.saturation_current_a, d.emission_coefficient, d.series_resistance_ohm,
                           d.leakage_resistance_ohm, d.junction_capacitance_f, d.junction_potential_v, d.grading_coefficient,
                           d.breakdown_voltage_v, d.energy_gap_ev, d.video_resistance_ohm(), d.temperature_c);
            }
            return exit_ok;
        }
        if (*workbench) {
            galena::workbench_options wo;
            wo.host = wb_listen;
            wo.port = wb_port;
            wo.render_threads = wb_threads;
            wo.base_scenario = galena::find_bundled_file("scenarios/workbench.toml", "/proc/self/exe", installed_data_dir());
            wo.clips_dir = galena::find_bundled_file("audio-samples/README.md", "/proc/self/exe", installed_data_dir()).parent_path();
            galena::workbench bench(wo);
            fmt::print("galena workbench: {} (Ctrl-C stops it)\n", bench.address());
            std::fflush(stdout);
            if (wb_listen != "127.0.0.1" && wb_listen != "::1" && wb_listen != "localhost")
                std::fprintf(stderr, "galena: warning: listening on %s: anyone who can reach this address can render on this machine\n",
                             wb_listen.c_str());
            bench.serve_until_cancelled();
            const auto st = bench.stats();
            std::fprintf(stderr, "galena: workbench stopped after %zu renders (%zu replaced by newer changes); temporary folder removed\n",
                         st.renders_done, st.renders_cancelled);
            return exit_ok;
        }
        if (*fit_diode) {
            galena::fit_diode_options fo;
            fo.temperature_c = fd_temperature;
            fo.overwrite = overwrite;
            const auto o = galena::run_fit_diode(fd_points, fd_out, fo);
            fmt::print("{}wrote {}, {}{}\n", galena::fit_summary_text(o.fit), o.diode_toml.string(), o.fit_json.string(),
                       o.plot_svg.empty() ? std::string() : " and " + o.plot_svg.string());
            for (const auto& w : o.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.c_str());
            return exit_ok;
        }
        if (*rank) {
            galena::rank_options ro;
            ro.pack.sweep.threads = rk_threads;
            ro.pack.sweep.overwrite = overwrite;
            ro.pack.sweep.progress = sweep_progress(quiet);
            ro.pack.sweep.allow_long = allow_long;
            ro.pack.sweep.measure_tone_hz = rk_tone_hz;
            ro.pack.sweep.measure_duration_s = rk_tone_s;
            std::vector<std::filesystem::path> files(rk_diodes.begin(), rk_diodes.end());
            const auto o = galena::rank_diodes(rk_scenario, rk_sets, files, rk_out, ro);
            fmt::print("{}\nwrote {}, {} and {}\n", galena::ranking_markdown(o), o.csv.string(), o.markdown.string(), o.pack.page.string());
            std::fflush(stdout);
            for (const auto& w : o.pack.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.message.c_str());
            return exit_ok;
        }
        if (*dial) {
            galena::dial_job_options dopt;
            dopt.overwrite = overwrite;
            dopt.retune_interval_s = dl_retune;
            dopt.level_window_s = dl_window;
            dopt.steps_per_cycle = dl_steps;
            galena::dial_path path = galena::load_band(dl_band).dial;
            const bool any = dl_from > 0.0 || dl_to > 0.0 || dl_glide > 0.0 || dl_dwell >= 0.0 || dl_stops || dial->count("--law") > 0;
            if (dl_from > 0.0) path.start_hz = dl_from;
            if (dl_to > 0.0) path.end_hz = dl_to;
            if (dl_glide > 0.0) path.glide_s = dl_glide;
            if (dl_dwell >= 0.0) path.dwell_s = dl_dwell;
            if (dial->count("--law") > 0) path.law = dl_law == "capacitance" ? galena::dial_law::capacitance : galena::dial_law::frequency;
            if (dl_stops && path.stops_hz.empty()) {
                for (const auto& st : galena::load_band(dl_band).stations) path.stops_hz.push_back(st.params.carrier_hz);
                std::sort(path.stops_hz.begin(), path.stops_hz.end());
                if (dl_glide <= 0.0) path.glide_s = 1.0;
            }
            if (any) dopt.path = path;
            bool drew = false;
            dopt.progress = render_progress(quiet, drew);
            const auto o = galena::run_dial_job(dl_scenario, dl_sets, dl_band, dl_out, dopt);
            if (drew && isatty(fileno(stderr)) != 0) std::fprintf(stderr, "\n");
            fmt::print("{}", galena::survey_markdown(o.survey, galena::load_band(dl_band).title));
            fmt::print("\nswept {:.1f} s of dial in {:.1f} s wall ({:.2f} s per simulated s; {} retunes took {:.2f} s); wrote {}\n",
                       o.dial.simulated_s, o.dial.wall_s, o.dial.wall_s / o.dial.simulated_s, o.dial.retunes, o.dial.retune_wall_s,
                       o.wav.string());
            std::fflush(stdout);
            for (const auto& w : o.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.message.c_str());
            return exit_ok;
        }
        if (*check) {
            if (galena::is_pack_file(check_path)) {
                const auto pack = galena::load_pack(check_path);
                const auto scenes = galena::load_pack_variants(pack, check_sets);
                fmt::print("pack \"{}\": base scenario {}; measurement tone {}\n", pack.title, pack.scenario.string(),
                           pack.measure_tone_hz > 0.0 ? galena::format_quantity(pack.measure_tone_hz, galena::unit::hertz, 4, true) + ", " +
                                                            galena::format_quantity(pack.measure_duration_s, galena::unit::second, 4, true)
                                                      : std::string("off"));
                for (std::size_t i = 0; i < pack.variants.size(); ++i)
                    fmt::print("  {:<22} {}\n", pack.variants[i].name, pack.variants[i].label);
                std::fprintf(stderr, "galena: %s is a valid pack file (%zu variants)\n", check_path.c_str(), scenes.size());
                return exit_ok;
            }
            const auto s = galena::load_scenario(check_path, check_sets);
            fmt::print("{}", galena::to_toml(s));
            std::fprintf(stderr, "galena: %s is valid\n", check_path.c_str());
            return exit_ok;
        }
        if (*sweep) {
            galena::sweep_options so;
            so.threads = sw_threads;
            so.overwrite = overwrite;
            so.measure_tone_hz = sw_tone_hz;
            so.progress = sweep_progress(quiet);
            so.allow_long = allow_long;
            so.allow_large = allow_large;
            const auto r = galena::run_sweep(sw_scenario, sw_sets, collect_variants(sw_vary, sw_variants), sw_out, so);
            fmt::print("{}\nwrote {} and {}, loudness-matched copies in {}\n{}\n", galena::table_markdown(r.variants), r.csv.string(),
                       r.markdown.string(), (std::filesystem::path(sw_out) / "matched").string(), galena::full_scale_text(r));
            return exit_ok;
        }
        if (*compare || *demo) {
            const auto t0 = std::chrono::steady_clock::now();
            galena::pack_options po;
            po.sweep.overwrite = overwrite;
            po.sweep.progress = sweep_progress(quiet);
            po.sweep.allow_long = allow_long;
            po.sweep.allow_large = allow_large;
            std::filesystem::path base;
            std::vector<galena::variant_spec> variants;
            std::string out = *demo ? demo_out : cmp_out;
            std::vector<std::string> sets = *demo ? std::vector<std::string>{} : cmp_sets;
            po.sweep.threads = *demo ? demo_threads : cmp_threads;
            po.curves = !cmp_no_curves;
            std::filesystem::path input = cmp_input;
            if (*demo) input = galena::find_bundled_file("scenarios/demo-pack.toml", "/proc/self/exe", installed_data_dir());
            if (*demo || (cmp_vary.empty() && cmp_variants.empty())) {
                if (!*demo && !galena::is_pack_file(input)) {
                    (void)galena::load_scenario(input, sets); // a WAV, malformed TOML or a bad key says so first
                    throw galena::config_error(fmt::format(
                        "{}: is a scenario without variants: compare needs --vary section.key=a,b,c, --variant "
                        "NAME:section.key=value or a pack file ([pack] + [[variant]], README \"Pack files\")",
                        input.string()));
                }
                const auto pack = galena::load_pack(input);
                base = pack.scenario;
                variants = pack.variants;
                po.title = pack.title;
                po.sweep.measure_tone_hz = cmp_tone_opt->count() > 0 ? cmp_tone_hz : pack.measure_tone_hz;
                po.sweep.measure_duration_s = cmp_tone_s_opt->count() > 0 ? cmp_tone_s : pack.measure_duration_s;
                po.note = fmt::format("Made by galena from {}.", input.filename().string());
                po.protect.push_back(input);
                galena::add_pack_dial_sweeps(po, pack, sets);
            } else {
                base = input;
                variants = collect_variants(cmp_vary, cmp_variants);
                po.sweep.measure_tone_hz = cmp_tone_hz;
                po.sweep.measure_duration_s = cmp_tone_s;
            }
            if (!cmp_title.empty()) po.title = cmp_title;
            const auto o = galena::make_pack(base, sets, variants, out, po);
            print_pack(o, out, std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count());
            return exit_ok;
        }
        if (*render) {
            const auto s = galena::load_scenario(scenario_path, sets);
            galena::job_options opt;
            opt.overwrite = overwrite;
            opt.allow_long = allow_long;
            opt.use_second_core = true;
            // Plots go into the staged output with the WAV; a gnuplot failure costs the plots, not the render.
            opt.extras = [&](const galena::job_outcome& o, const std::filesystem::path& dir) {
                std::vector<galena::warning> w;
                try {
                    (void)galena::draw_render_plots(s, o, dir / "plots");
                } catch (const galena::audio_error& e) {
                    std::error_code ec;
                    std::filesystem::remove_all(dir / "plots", ec);
                    w.push_back({galena::warning_code::plots_left_out, std::string("plots left out: ") + e.what()});
                }
                return w;
            };
            bool drew = false;
            opt.progress = render_progress(quiet, drew);
            const auto o = galena::run_render_job(s, out_dir, opt);
            if (drew && isatty(fileno(stderr)) != 0) std::fprintf(stderr, "\n");
            if (verbose) {
                auto figures = o.metrics;
                figures.erase("warnings"); // shown once, below
                figures.erase("warning_codes");
                fmt::print("{}", galena::to_text(figures));
                fmt::print("simulated {:.3f} s in {:.2f} s wall ({:.2f} s per simulated s), {} steps per carrier cycle\n",
                           o.render.simulated_s, o.render.wall_s, o.render.wall_s / o.render.simulated_s, o.render.steps_per_cycle);
            }
            fmt::print("{}", galena::summary_text(o, s));
            if (!verbose) fmt::print("all figures: {} (or pass --verbose)\n", o.metrics_file.string());
            std::fflush(stdout);
            for (const auto& w : o.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.message.c_str());
            return exit_ok;
        }
    } catch (const galena::resource_error& e) {
        return report(e, exit_resource);
    } catch (const std::bad_alloc&) {
        return report("out of memory: an allocation failed (std::bad_alloc); free memory, raise the memory limit, or render "
                      "a shorter programme",
                      exit_resource);
    } catch (const std::system_error& e) {
        // Printing the results to a closed pipe (`| head`) after everything was written: the outputs stand.
        if (e.code() == std::errc::broken_pipe) return exit_ok;
        if (e.code() == std::errc::too_many_files_open || e.code() == std::errc::too_many_files_open_in_system ||
            e.code() == std::errc::not_enough_memory || e.code() == std::errc::resource_unavailable_try_again)
            return report(std::string("resource exhausted: ") + e.what(), exit_resource);
        return report(e, exit_internal);
    } catch (const galena::cancelled_error& e) {
        if (!quiet && isatty(fileno(stderr)) != 0) std::fprintf(stderr, "\n");
        return report(e, exit_signal_base + (e.signal_number() != 0 ? e.signal_number() : SIGINT));
    } catch (const galena::config_error& e) {
        return report(e, exit_usage);
    } catch (const galena::audio_error& e) {
        return report(e, exit_audio);
    } catch (const galena::integration_error& e) {
        return report(e, exit_numerical);
    } catch (const std::exception& e) {
        return report(e, exit_internal);
    }
    return exit_ok;
}
