#include "galena/report_page.hpp"

#include "galena/report_detail.hpp"
#include "galena/report_talk.hpp"

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
                    "td.l,th.l{text-align:left}td.warn{max-width:22em;font-size:0.8em}audio{width:170px}figure{margin:1em 0}svg{max-width:100%;height:auto}.warn{color:#a40}" +
                    detail::talk_css() + "</style>"
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

    // The talk parts: what the presenter view and the quiz need, and the generated conclusions.
    detail::talk_data talk;
    talk.seed = p.quiz_seed;
    for (std::size_t i = 0; i < sw.variants.size(); ++i) {
        const auto& r = sw.variants[i];
        talk.items.push_back({r.spec.name, r.spec.label, fs::relative(r.job.wav, p.dir).generic_string(),
                              i < p.matched.size() ? fs::relative(p.matched[i].wav, p.dir).generic_string() : std::string()});
    }
    if (p.listening.size() == sw.variants.size() && !p.listening.empty()) {
        talk.measures = p.listening;
        talk.conclusions = conclude(p.listening, talk.thresholds);
    }
    h += "<p><button id=\"open-presenter\" class=\"talk-open\">Presenter view</button> one variant per screen in large type, "
         "for a projector (or press P; arrows move, space plays, A / B compare at the same moment, Esc returns).</p>\n";
    if (!talk.conclusions.sentences.empty()) {
        h += "<h2 id=\"conclusions\">What the measurements say</h2>\n<ul class=\"conclusions\">\n";
        for (const auto& c : talk.conclusions.sentences) h += "<li>" + html_escape(c) + "</li>\n";
        h += "</ul>\n<p>Levels are the RMS of each level-consistent file; tone colour is its third-octave band spectrum "
             "(100 Hz up).</p>\n";
    }

    // Playlists: the loudness-matched one first (safe at one volume setting), then the level-consistent one.
    auto segment_table = [&](const std::vector<playlist_segment>& segs, bool levels) {
        std::string t = "<table><tr><th>#</th><th class=l>variant</th><th class=l>label</th><th>announcement starts, s</th>"
                        "<th>audio starts, s</th><th>audio ends, s</th>";
        t += levels ? "<th>level, dBFS RMS</th><th>step from previous, dB</th></tr>\n" : "<th>gain, dB</th></tr>\n";
        for (std::size_t k = 0; k < segs.size(); ++k) {
            const auto& s = segs[k];
            t += fmt::format("<tr><td>{}</td><td class=l>{}</td><td class=l>{}</td><td>{:.3f}</td><td>{:.3f}</td><td>{:.3f}</td>",
                             s.number, html_escape(s.name), html_escape(s.label), s.code_start_s, s.audio_start_s, s.audio_end_s);
            const std::size_t v = static_cast<std::size_t>(std::max(1, s.number)) - 1;
            if (levels && v < p.listening.size()) {
                const std::size_t pv = k > 0 ? static_cast<std::size_t>(std::max(1, segs[k - 1].number)) - 1 : v;
                t += fmt::format("<td>{:.1f}</td><td>{}{}</td></tr>\n", p.listening[v].rms_dbfs,
                                 k > 0 && pv < p.listening.size() ? fmt::format("{:+.1f}", p.listening[v].rms_dbfs - p.listening[pv].rms_dbfs)
                                                                  : std::string("-"),
                                 s.fade_in_s > 0.0 ? fmt::format(" (announced, faded in over {:.3g} s)", s.fade_in_s) : std::string());
            } else if (levels) {
                t += "<td>-</td><td>-</td></tr>\n";
            } else {
                t += v < p.matched.size() ? fmt::format("<td>{:+.1f}{}</td></tr>\n", p.matched[v].gain_db, p.matched[v].peak_limited ? " (peak-limited)" : "")
                                          : std::string("<td>-</td></tr>\n");
            }
        }
        return t + "</table>\n";
    };
    if (!p.playlist_wav.empty() || !p.matched_playlist_wav.empty()) {
        const auto& any = !p.playlist.empty() ? p.playlist : p.matched_playlist;
        const bool spoken = !any.empty() && std::all_of(any.begin(), any.end(), [](const playlist_segment& g) { return g.spoken; });
        h += spoken ? "<h2 id=\"playlists\">Playlists</h2>\n<p>Each variant is announced in synthesized speech (its number "
                      "and label). A step of more than 10 dB from the item before is announced too, and the item fades in.</p>\n"
                    : "<h2 id=\"playlists\">Playlists</h2>\n<p>Each variant is announced by beeps (speech synthesis was not "
                      "available): one long beep counts five, one short beep counts one (variant 7 = long, short, short).</p>\n";
        int number = 0;
        if (!p.matched_playlist_wav.empty()) {
            h += fmt::format("<h3 id=\"playlist-matched\">{}. Loudness-matched playlist: start here</h3>\n<p>Every variant scaled to "
                             "the same RMS level, so one volume setting suits all of them and the ear compares the sound, "
                             "not the loudness (gains below).</p>\n",
                             ++number);
            h += "<audio controls preload=\"none\" src=\"" + html_escape(fs::relative(p.matched_playlist_wav, p.dir).generic_string()) +
                 "\"></audio>\n" + segment_table(p.matched_playlist, false);
        }
        if (!p.playlist_wav.empty()) {
            std::string spread;
            if (!p.listening.empty()) {
                double lo = p.listening[0].rms_dbfs, hi = lo, step = 0.0;
                for (std::size_t k = 0; k < p.listening.size(); ++k) {
                    lo = std::min(lo, p.listening[k].rms_dbfs);
                    hi = std::max(hi, p.listening[k].rms_dbfs);
                    if (k > 0) step = std::max(step, std::abs(p.listening[k].rms_dbfs - p.listening[k - 1].rms_dbfs));
                }
                spread = fmt::format(" Here the levels run from {:.1f} to {:.1f} dBFS RMS, {:.1f} dB apart; the largest step "
                                     "between neighbours is {:.1f} dB. Set the volume on the loudest item first.",
                                     lo, hi, hi - lo, step);
            }
            h += fmt::format("<h3 id=\"playlist-level\">{}. Level-consistent playlist: the real loudness differences</h3>\n"
                             "<p>Every variant at its true level relative to the others (one calibration).{}</p>\n",
                             ++number, spread);
            h += "<audio controls preload=\"none\" src=\"" + html_escape(p.playlist_wav.filename().string()) + "\"></audio>\n" +
                 segment_table(p.playlist, true);
        }
    }
    h += detail::quiz_html(talk);
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
    h += detail::presenter_html(talk);
    h += detail::talk_script(talk);
    h += "</body></html>\n";
    return h;
}

} // namespace galena
