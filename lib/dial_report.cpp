#include "galena/dial_report.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/report_page.hpp"
#include "galena/report_plots.hpp"
#include "galena/staged_output.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <memory>

namespace galena {

namespace fs = std::filesystem;

namespace {

/// Level in dB re 1 V, floored at -200 dB (a station not yet heard).
double dbv(double v) { return 20.0 * std::log10(std::max(v, 1e-10)); }

std::string dial_map_csv(const dial_result& r)
{
    std::vector<std::string> head{"time_s", "tuned_hz", "capacitance_f"};
    for (const auto& n : r.names) head.push_back(n + " level_dbv");
    std::string out = csv_row(head);
    for (const auto& p : r.trace) {
        std::vector<std::string> f{fmt::format("{:.6f}", p.time_s), fmt::format("{:.2f}", p.tuned_hz), fmt::format("{:.6e}", p.capacitance_f)};
        for (double v : p.level_v) f.push_back(fmt::format("{:.3f}", dbv(v)));
        out += csv_row(f);
    }
    return out;
}

/// gnuplot text: quotes and the enhanced-text specials escaped.
std::string gp_text(const std::string& s)
{
    std::string o;
    for (char c : s) {
        if (c == '\'' ) o += "''";
        else if (c == '_' || c == '^' || c == '@' || c == '&' || c == '~' || c == '{' || c == '}') o += std::string("\\\\") + c;
        else o += c;
    }
    return o;
}

/// Two panels: the dial (tuned frequency, kHz) against time, and each station's level at the detector, dBV.
std::string dial_map_script(const dial_result& r, const std::string& csv_name, const std::string& stem)
{
    std::string body = "reset\nset datafile separator ','\nset multiplot layout 2,1\nset grid\nset key outside right top\n"
                       "set lmargin at screen 0.09\nset rmargin at screen 0.66\n";
    body += "set ylabel 'tuned frequency, kHz'\nunset xlabel\nset format x ''\nset autoscale y\n";
    for (std::size_t k = 0; k < r.names.size(); ++k)
        body += fmt::format("set arrow from graph 0, first {0:.3f} to graph 1, first {0:.3f} nohead dt 3 lc rgb '#999999'\n",
                            r.carriers_hz[k] / 1e3);
    body += fmt::format("plot '{}' every ::1 using 1:($2/1000) with lines lw 2 lc rgb '#222222' title 'dial'\n", csv_name);
    body += "unset arrow\nset format x '%g'\nset xlabel 'time, s'\nset ylabel 'level at the detector, dBV'\n";
    double top = -200.0;
    for (const auto& p : r.trace)
        for (double v : p.level_v) top = std::max(top, dbv(v));
    body += fmt::format("set yrange [{:.0f}:{:.0f}]\n", std::floor(top / 10.0) * 10.0 - 70.0, std::ceil(top / 10.0) * 10.0 + 5.0);
    body += "plot ";
    for (std::size_t k = 0; k < r.names.size(); ++k)
        body += fmt::format("{}'{}' every ::1 using 1:{} with lines lw 1.5 title '{} ({:.0f} kHz)'", k ? ", " : "", csv_name, k + 4,
                            gp_text(r.names[k]), r.carriers_hz[k] / 1e3);
    body += "\nunset multiplot\n";
    return fmt::format("set terminal svg size 900,640 dynamic font 'sans,11' background rgb 'white'\n"
                       "set output '{0}.svg'\n{1}unset output\n"
                       "set terminal pngcairo size 900,640 font 'sans,10' background rgb 'white'\n"
                       "set output '{0}.png'\n{1}unset output\n",
                       stem, body);
}

/// Copies a float WAV of volts / 1000 into `target` with a gain; streaming.
void transcode(const fs::path& src, const fs::path& target, double fs, wav_format f, double full_scale_v, double gain)
{
    wav_reader r(src);
    wav_writer w(target, fs, f, full_scale_v, false);
    std::vector<float> buf(65536);
    std::vector<double> v;
    while (std::size_t n = r.read(buf)) {
        v.assign(buf.begin(), buf.begin() + static_cast<std::ptrdiff_t>(n));
        for (double& x : v) x *= gain;
        w.write_volts(v);
    }
    w.commit();
}

} // namespace

const std::vector<std::string>& dial_output_names()
{
    static const std::vector<std::string> names{"dial.wav",   "dial-normalised.wav", "dial-map.csv", "survey.csv",
                                                "survey.md",  "dial-map.svg",        "dial-map.png", "dial-map.log", "dial-map.gp"};
    return names;
}

std::string survey_csv(const std::vector<survey_row>& rows)
{
    std::string out = csv_row({"station", "carrier_hz", "peak_level_dbv", "peak_dial_hz", "strongest_neighbour",
                               "neighbour_level_dbv", "separation_db", "separated"});
    for (const auto& r : rows)
        out += csv_row({r.name, fmt::format("{:.0f}", r.carrier_hz), fmt::format("{:.2f}", dbv(r.peak_level_v)),
                        fmt::format("{:.0f}", r.peak_dial_hz), r.neighbour,
                        r.neighbour.empty() ? "" : fmt::format("{:.2f}", dbv(r.neighbour_level_v)),
                        std::isfinite(r.separation_db) ? fmt::format("{:.2f}", r.separation_db) : "inf", r.separated ? "yes" : "no"});
    return out;
}

std::string survey_markdown(const std::vector<survey_row>& rows, const std::string& title)
{
    std::string out = fmt::format("# Band survey: {}\n\nLevels are each carrier's amplitude at the detector's input (dB re 1 V) as "
                                  "the dial passed. A station is *separated* when the strongest other station at the dial "
                                  "position of its peak is at least {:.0f} dB below it.\n\n",
                                  markdown_cell(title), survey_separation_db);
    out += "| station | carrier, kHz | peak, dBV | dial at peak, kHz | strongest neighbour there | its level, dBV | "
           "separation, dB | separated |\n|---|---:|---:|---:|---|---:|---:|---|\n";
    for (const auto& r : rows)
        out += fmt::format("| {} | {:.1f} | {:.1f} | {:.1f} | {} | {} | {} | {} |\n", markdown_cell(r.name), r.carrier_hz / 1e3,
                           dbv(r.peak_level_v), r.peak_dial_hz / 1e3, markdown_cell(r.neighbour),
                           r.neighbour.empty() ? "" : fmt::format("{:.1f}", dbv(r.neighbour_level_v)),
                           std::isfinite(r.separation_db) ? fmt::format("{:.1f}", r.separation_db) : "-", r.separated ? "yes" : "no");
    return out;
}

dial_outcome run_dial_into(const scenario& s, const band_spec& band, const fs::path& dir, const dial_job_options& opt)
{
    if (s.tuner.layout != tuner_layout::single_coil && s.tuner.layout != tuner_layout::coupled)
        throw config_error(fmt::format("{}: tuner.layout = \"{}\": the dial turns the tuning capacitor of a single-coil or coupled set",
                                       s.file.string(), to_string(s.tuner.layout)));
    dial_outcome o;
    const dial_path path = opt.path ? *opt.path : band.dial;
    path.validate();
    const double duration = path.duration_s();
    const auto programmes = make_band_programmes(band, s, duration);
    receiver_spec spec;
    spec.circuit = s.circuit;
    spec.antenna = s.antenna;
    spec.tuner = s.tuner;
    spec.noise = s.noise;
    for (std::size_t k = 0; k < band.stations.size(); ++k) spec.stations.push_back({band.stations[k].params, programmes[k].get()});
    dial_settings ds;
    ds.retune_interval_s = opt.retune_interval_s;
    ds.level_window_s = opt.level_window_s;
    ds.steps_per_cycle = opt.steps_per_cycle;
    ds.audio_rate_hz = s.render.audio_rate_hz;
    ds.dc_block_hz = s.render.dc_block_hz;
    const double fs = s.render.audio_rate_hz;
    const fs::path raw_path = dir / ".dial-raw.wav";
    struct remover {
        fs::path p;
        ~remover()
        {
            std::error_code e;
            fs::remove(p, e);
        }
    } cleanup{raw_path};
    {
        // Volts / 1000 in float: nothing clips here; the calibrated file is made from it afterwards.
        wav_writer raw(raw_path, fs, wav_format::float32, 1.0e3, true);
        const audio_sink sink = [&](const audio_block& b) {
            throw_if_cancelled();
            for (double v : b.audio_v) o.peak_audio_v = std::max(o.peak_audio_v, std::fabs(v));
            raw.write_volts(b.audio_v);
        };
        o.dial = render_dial(spec, path, ds, sink, opt.progress);
        raw.commit();
    }
    o.survey = band_survey(o.dial);
    o.wav = dir / "dial.wav";
    // output.full_scale_v = "auto" (0, the default): chosen from this sweep's own peak (job.hpp).
    const double full_scale_v = s.output.full_scale_v == 0.0 ? choose_full_scale_v(o.peak_audio_v) : s.output.full_scale_v;
    transcode(raw_path, o.wav, fs, s.output.format, full_scale_v, 1e3);
    if (o.peak_audio_v > full_scale_v) {
        const double gain = full_scale_v * std::pow(10.0, -1.0 / 20.0) / o.peak_audio_v;
        o.normalised_wav = dir / "dial-normalised.wav";
        transcode(raw_path, o.normalised_wav, fs, s.output.format, full_scale_v, 1e3 * gain);
        o.warnings.push_back({warning_code::output_clipped,
                              fmt::format("the sweep's audio peaks at {:.3g} V, above the {:.3g} V full scale; dial-normalised.wav is a "
                                          "copy with {:.1f} dB gain",
                                          o.peak_audio_v, full_scale_v, 20.0 * std::log10(gain))});
    }
    write_text_atomic(dir / "dial-map.csv", dial_map_csv(o.dial));
    write_text_atomic(dir / "survey.csv", survey_csv(o.survey));
    write_text_atomic(dir / "survey.md", survey_markdown(o.survey, band.title));
    throw_if_cancelled();
    try {
        run_gnuplot(dial_map_script(o.dial, "dial-map.csv", "dial-map"), dir, "dial-map");
    } catch (const audio_error& e) {
        o.warnings.push_back({warning_code::plots_left_out, fmt::format("the dial map plot is missing: {}", e.what())});
    }
    return o;
}

dial_outcome run_dial_job(const fs::path& scenario_file, const std::vector<std::string>& overrides, const fs::path& band_file,
                          const fs::path& out_dir, const dial_job_options& opt)
{
    const scenario s = load_scenario(scenario_file, overrides);
    const band_spec band = load_band(band_file);
    std::vector<fs::path> inputs{scenario_file, band_file};
    for (const auto& st : band.stations)
        if (!st.audio.empty()) inputs.push_back(st.audio);
    staged_output staged(out_dir, opt.overwrite, inputs);
    for (const auto& f : dial_output_names()) {
        staged.check(f);
        staged.owns(f);
    }
    dial_outcome o;
    with_described_errors(staged, [&] {
        o = run_dial_into(s, band, staged.dir(), opt);
        throw_if_cancelled();
        staged.publish();
    });
    o.wav = staged.published(o.wav);
    if (!o.normalised_wav.empty()) o.normalised_wav = staged.published(o.normalised_wav);
    return o;
}

void add_pack_dial_sweeps(pack_options& po, const pack_spec& pack, const std::vector<std::string>& base_overrides, const dial_job_options& opt)
{
    if (pack.dial_sweeps.empty()) return;
    struct prepared {
        pack_dial_sweep spec;
        scenario scene;
        band_spec band;
        dial_path path;
    };
    auto sweeps = std::make_shared<std::vector<prepared>>();
    for (const auto& d : pack.dial_sweeps) {
        std::vector<std::string> sets = base_overrides;
        sets.insert(sets.end(), d.overrides.begin(), d.overrides.end());
        prepared p{d, load_scenario(pack.scenario, sets), load_band(d.band), {}};
        p.path = p.band.dial;
        if (d.start_hz) p.path.start_hz = *d.start_hz;
        if (d.end_hz) p.path.end_hz = *d.end_hz;
        if (d.glide_s) p.path.glide_s = *d.glide_s;
        try {
            p.path.validate();
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: dial_sweep {}: {}", pack.file.string(), d.name, e.what()));
        }
        if (p.scene.tuner.layout != tuner_layout::single_coil && p.scene.tuner.layout != tuner_layout::coupled)
            throw config_error(fmt::format("{}: dial_sweep {}: tuner.layout = \"{}\": the dial turns the tuning capacitor of a single-coil "
                                           "or coupled set",
                                           pack.file.string(), d.name, to_string(p.scene.tuner.layout)));
        po.protect.push_back(d.band);
        for (const auto& st : p.band.stations)
            if (!st.audio.empty()) po.protect.push_back(st.audio);
        sweeps->push_back(std::move(p));
    }
    po.extra_outputs.push_back("dial/");
    auto before = po.extras;
    po.extras = [before, sweeps, opt](sweep_result& sw, const fs::path& dir) {
        pack_extras extra = before ? before(sw, dir) : pack_extras();
        std::string& html = extra.section_html;
        const scenario* calibration = sw.variants.empty() ? nullptr : &sw.variants.front().scene;
        html += "<h2 id=\"dial\">Turning the dial</h2>\n<p>The set's tuning capacitor turned across a band of invented stations "
                "(charge kept as the capacitor moves). The map shows the tuned frequency and each station's level at the detector; "
                "the survey says which stations the set separates (the strongest other station at least " +
                fmt::format("{:.0f}", survey_separation_db) + " dB down where the station peaks).</p>\n";
        for (const auto& p : *sweeps) {
            throw_if_cancelled();
            const fs::path sub = dir / "dial" / p.spec.name;
            fs::create_directories(sub);
            dial_job_options o = opt;
            o.path = p.path;
            // The variants' calibration (their common full scale, automatic or set), so that the sweep joins the
            // level-consistent playlist at its true level.
            scenario scene = p.scene;
            if (calibration != nullptr) scene.output.full_scale_v = calibration->output.full_scale_v;
            const dial_outcome out = run_dial_into(scene, p.band, sub, o);
            const bool joins = calibration != nullptr && out.normalised_wav.empty() &&
                               scene.render.audio_rate_hz == calibration->render.audio_rate_hz && scene.output.format == calibration->output.format;
            if (joins) extra.playlist_items.push_back({out.wav, "dial-" + p.spec.name, p.spec.label});
            const std::string rel = "dial/" + p.spec.name + "/";
            html += fmt::format("<h3>{}</h3>\n<p>{:.0f} to {:.0f} kHz in {:.3g} s.</p>\n<audio controls preload=\"none\" src=\"{}\"></audio>\n",
                                html_escape(p.spec.label), p.path.start_hz / 1e3, p.path.end_hz / 1e3, p.path.duration_s(),
                                html_escape(rel + (out.normalised_wav.empty() ? "dial.wav" : "dial-normalised.wav")));
            if (fs::exists(sub / "dial-map.svg"))
                html += fmt::format("<figure><img src=\"{}dial-map.svg\" alt=\"dial map: tuned frequency and station levels against time\">"
                                    "<figcaption>dial map</figcaption></figure>\n",
                                    html_escape(rel));
            html += "<table><tr><th class=l>station</th><th>carrier kHz</th><th>peak level at the detector, dBV</th><th>dial at the peak, kHz</th>"
                    "<th class=l>strongest other station there</th><th>separation, dB</th><th>separated</th></tr>\n";
            for (const auto& r : out.survey)
                html += fmt::format("<tr><td class=l>{}</td><td>{:.1f}</td><td>{:.1f}</td><td>{:.1f}</td><td class=l>{}</td><td>{}</td><td>{}</td></tr>\n",
                                    html_escape(r.name), r.carrier_hz / 1e3, dbv(r.peak_level_v), r.peak_dial_hz / 1e3,
                                    r.neighbour.empty() ? "-" : html_escape(r.neighbour),
                                    std::isfinite(r.separation_db) ? fmt::format("{:.1f}", r.separation_db) : std::string("-"),
                                    r.separated ? "yes" : "no");
            html += "</table>\n";
            for (const auto& w : out.warnings) html += "<p class=\"warn\">" + html_escape(w.message) + "</p>\n";
            html += joins ? "<p>It closes both playlists, at the variants' calibration.</p>\n"
                          : "<p>It is not in the playlists: its audio rate, format or level does not fit the variants' calibration.</p>\n";
        }
        return extra;
    };
}

} // namespace galena
