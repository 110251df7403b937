// galena command-line tool: argument parsing and exit codes only; all work is done by the library.
#include "galena/components.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/scenario.hpp"

#include <CLI/CLI.hpp>
#include <cstdio>
#include <fmt/format.h>
#include <unistd.h>

namespace {

/// Documented exit codes (README, "Exit codes").
enum exit_code : int {
    exit_ok = 0,
    exit_usage = 2,       ///< bad command line or scenario
    exit_audio = 3,       ///< audio or output file problem
    exit_numerical = 4,   ///< the solver failed
    exit_internal = 70,   ///< a bug: please report
};

int report(const std::exception& e, int code)
{
    std::fprintf(stderr, "galena: error: %s\n", e.what());
    return code;
}

} // namespace

int main(int argc, char** argv)
{
    CLI::App app{"galena: time-domain simulation of the crystal-set detector stage"};
    app.require_subcommand(1);

    std::string scenario_path;
    std::string out_dir;
    std::vector<std::string> sets;
    bool overwrite = false;
    bool quiet = false;
    auto* render = app.add_subcommand("render", "render one scenario to DIR/recovered.wav");
    render->add_option("scenario", scenario_path, "scenario file (TOML)")->required();
    render->add_option("--out,-o", out_dir, "output directory")->required();
    render->add_option("--set,-s", sets, "override a value: section.key=value (repeatable)");
    render->add_flag("--overwrite", overwrite, "replace existing output files");
    render->add_flag("--quiet,-q", quiet, "no progress output");

    std::string check_path;
    std::vector<std::string> check_sets;
    auto* check = app.add_subcommand("check", "validate a scenario without running it; print it in full");
    check->add_option("scenario", check_path, "scenario file (TOML)")->required();
    check->add_option("--set,-s", check_sets, "override a value: section.key=value (repeatable)");

    auto* presets = app.add_subcommand("presets", "list the built-in diode presets and their parameters");

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
        if (*check) {
            const auto s = galena::load_scenario(check_path, check_sets);
            fmt::print("{}", galena::to_toml(s));
            std::fprintf(stderr, "galena: %s is valid\n", check_path.c_str());
            return exit_ok;
        }
        if (*render) {
            const auto s = galena::load_scenario(scenario_path, sets);
            galena::job_options opt;
            opt.overwrite = overwrite;
            const bool tty = isatty(fileno(stderr)) != 0;
            int last = -1;
            if (!quiet)
                opt.progress = [&](double f) {
                    const int pct = static_cast<int>(f * 100.0);
                    if (pct == last) return;
                    if (tty) std::fprintf(stderr, "\rrendering %3d%%", pct);
                    else if (pct % 10 == 0) std::fprintf(stderr, "rendering %d%%\n", pct);
                    last = pct;
                };
            const auto o = galena::run_render_job(s, out_dir, opt);
            if (!quiet && tty) std::fprintf(stderr, "\n");
            fmt::print("wrote {} ({} samples at {} Hz, full scale {:.3g} V peak)\n", o.wav.string(), o.render.samples,
                       o.render.audio_rate_hz, o.full_scale_v);
            fmt::print("peak audio {:.4g} V; simulated {:.3f} s in {:.2f} s wall ({:.2f} s per simulated s)\n", o.peak_audio_v,
                       o.render.simulated_s, o.render.wall_s, o.render.wall_s / o.render.simulated_s);
            for (const auto& w : o.warnings) std::fprintf(stderr, "galena: warning: %s\n", w.c_str());
            return exit_ok;
        }
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
