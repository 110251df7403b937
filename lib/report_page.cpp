#include "galena/report_page.hpp"

#include "galena/report_detail.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <fmt/format.h>
#include <string>

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
    // Whole receivers: the front end's figures and the stations' levels instead of the generator's carrier.
    const bool receiver = std::any_of(sw.variants.begin(), sw.variants.end(),
                                      [](const variant_result& r) { return r.scene.tuner.layout != tuner_layout::bench; });
    if (receiver)
        h += "<th>tuned kHz</th><th>loaded Q</th><th>RF bandwidth kHz</th><th>detector RF peak V</th><th>DC V</th>"
             "<th>audio rms V</th><th>wanted tone V</th><th>loudest neighbour dB</th><th>THD %</th></tr>\n";
    else
        h += "<th>carrier V</th><th>DC V</th><th>audio rms V</th><th>tone V</th><th>H2/H1</th><th>H3/H1</th><th>THD %</th>"
             "<th>THD+N %</th><th>SINAD dB</th></tr>\n";
    // Warnings go in a list below the table: long text in a cell would stretch every row.
    std::string warning_list;
    auto cell = [](const nlohmann::json& m, const char* k) {
        const double v = detail::number_or_nan(m, k);
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
        if (receiver) {
            auto scaled = [&](const char* k, double unit) {
                const double v = detail::number_or_nan(r.metrics, k) / unit;
                return std::isfinite(v) ? fmt::format("{:.5g}", v) : std::string("-");
            };
            const double loudest = detail::number_or_nan(r.metrics, "loudest_neighbour_db");
            const std::string neighbour = std::isfinite(loudest) ? fmt::format("{:+.1f}", loudest) : std::string("-");
            h += fmt::format("<td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>\n",
                             scaled("tuned_hz", 1e3), cell(r.metrics, "loaded_q"), scaled("rf_bandwidth_hz", 1e3),
                             cell(r.metrics, "detector_rf_peak_v"), cell(r.metrics, "dc_v"), cell(r.metrics, "audio_rms_v"),
                             cell(r.metrics, "wanted_tone_v"), neighbour, cell(r.metrics, "thd_percent"));
            continue;
        }
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
        std::string svg = detail::read_report_text(p.dir / "plots" / (stem + ".svg"));
        const auto at = svg.find("<svg");
        if (at != std::string::npos) svg = svg.substr(at);
        h += "<figure id=\"plot-" + stem + "\">" + svg + "<figcaption><a href=\"plots/" + stem + ".png\">" + stem +
             ".png</a></figcaption></figure>\n";
    }
    h += "</body></html>\n";
    return h;
}

} // namespace galena
