#include "galena/diode_report.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/staged_output.hpp"
#include "galena/validate.hpp"

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <atomic>
#include <cctype>
#include <cmath>
#include <exception>
#include <fmt/format.h>
#include <limits>
#include <mutex>
#include <thread>

namespace galena {

namespace fs = std::filesystem;

namespace {
constexpr double nan_v = std::numeric_limits<double>::quiet_NaN();
/// A level difference below this is hard to hear, dB (common practice: the just-noticeable level step is
/// about 1 dB for speech and music).
constexpr double audible_level_step_db = 1.0;

/// Text inside a single-quoted gnuplot string (noenhanced terminals).
std::string gp_quote(const std::string& s)
{
    std::string o;
    for (char c : detail::one_line(s)) o += c == '\'' ? std::string("''") : std::string(1, c);
    return o;
}

std::string g4(double v) { return std::isfinite(v) ? fmt::format("{:.4g}", v) : std::string("-"); }

} // namespace

// ---------------------------------------------------------------------------------------------------------
// fit-diode

void draw_fit_plot(const diode_fit_result& r, const fs::path& dir)
{
    write_text_atomic(dir / "fit-points.dat", fit_points_data(r));
    write_text_atomic(dir / "fit-curve.dat", fit_curve_data(r));
    const auto& p = r.parameters;
    auto param = [](const fitted_parameter& x, const char* sym, const char* unit) {
        if (!x.identifiable) return fmt::format("{} {} (not identifiable)", sym, std::isinf(x.value) ? "none" : g4(x.value));
        return fmt::format("{} = {:.3g} +- {:.2g}{}", sym, x.value, x.sigma, unit);
    };
    const std::string legend = fmt::format("fit: {}, {}, {}, {}", param(p[fit_is], "Is", " A"), param(p[fit_n], "n", ""),
                                           param(p[fit_rs], "Rs", " ohm"), param(p[fit_rsh], "Rsh", " ohm"));
    double smallest = std::numeric_limits<double>::infinity();
    for (const auto& x : r.residuals) smallest = std::min(smallest, std::fabs(x.measured_a));
    const std::string body = fmt::format(
        "reset\nset multiplot title '{0} at {1:g} degC: measured points and the fitted Lambert-W diode curve'\n"
        "set lmargin 12\nset rmargin 4\n"
        "set origin 0,0.32\nset size 1,0.64\nset grid\nset logscale y\nset format y '%.0e'\nset ylabel '|current|, A'\n"
        "set format x ''\nset key bottom right font ',9'\nset yrange [{3:.3g}:*]\n"
        "plot 'fit-curve.dat' using 1:2 with lines lw 2 lc rgb '#3366aa' title '{2}', "
        "'fit-points.dat' using 1:2 with points pt 7 ps 1.1 lc rgb '#cc3311' title 'measured'\n"
        "set origin 0,0\nset size 1,0.34\nunset logscale y\nset autoscale y\nset format y '%g'\nset format x '%g'\n"
        "set ylabel 'residual, %'\nset xlabel 'voltage across the diode, V'\nunset key\n"
        "plot 0 with lines lc rgb '#888888', 'fit-points.dat' using 1:4 with impulses lw 2 lc rgb '#cc3311', "
        "'' using 1:4 with points pt 7 lc rgb '#cc3311'\n"
        "unset multiplot\n",
        gp_quote(r.file.filename().string()), r.temperature_c, gp_quote(legend), 0.2 * smallest);
    const std::string script = fmt::format("set terminal svg size 900,640 dynamic noenhanced font 'sans,11' background rgb 'white'\n"
                                           "set output 'fit.svg'\n{0}unset output\n"
                                           "set terminal pngcairo size 900,640 noenhanced font 'sans,10' background rgb 'white'\n"
                                           "set output 'fit.png'\n{0}unset output\n",
                                           body);
    run_gnuplot(script, dir, "fit");
}

std::string fit_summary_text(const diode_fit_result& r)
{
    std::string o = fmt::format("fit of {} ({} points, {} degrees of freedom, {} degC from the {}; residual RMS {:.3g} in ln I)\n",
                                r.file.string(), r.points, r.degrees_of_freedom, r.temperature_c, r.temperature_source, r.residual_rms);
    const char* names[] = {"saturation current Is", "emission coefficient n", "series resistance Rs", "leakage resistance Rsh"};
    const char* units[] = {" A", "", " ohm", " ohm"};
    for (std::size_t q = 0; q < fit_parameter_count; ++q) {
        const auto& p = r.parameters[q];
        if (p.identifiable)
            o += fmt::format("  {:<24} {:.4g}{} +- {:.2g} (95 %: {:.4g} .. {:.4g})\n", names[q], p.value, units[q], p.sigma, p.ci95_low,
                             p.ci95_high);
        else o += fmt::format("  {:<24} {}{}: not identifiable: {}\n", names[q], std::isinf(p.value) ? "none" : g4(p.value),
                              std::isinf(p.value) ? "" : units[q], p.reason);
    }
    o += fmt::format("  {:<24} {:.4g} V +- {:.2g}\n", "voltage at 100 uA", r.voltage_at_100ua_v.value, r.voltage_at_100ua_v.sigma);
    o += fmt::format("  {:<24} {:.4g} mV/decade +- {:.2g}\n", "slope", r.slope_mv_per_decade.value, r.slope_mv_per_decade.sigma);
    o += fmt::format("  {:<24} {:.4g} ohm +- {:.2g}\n", "zero-bias resistance", r.zero_bias_resistance_ohm.value,
                     r.zero_bias_resistance_ohm.sigma);
    return o;
}

fit_diode_outcome run_fit_diode(const fs::path& points_csv, const fs::path& out_dir, const fit_diode_options& opt)
{
    const auto data = load_diode_measurements(points_csv);
    double t = default_measurement_temperature_c;
    std::string source = "default";
    if (opt.temperature_c) {
        t = *opt.temperature_c;
        source = "command line";
    } else if (data.temperature_c) {
        t = *data.temperature_c;
        source = "file";
    }
    if (opt.temperature_c && !(t >= -60.0 && t <= 150.0))
        throw config_error(fmt::format("--temperature-c {}: must be in [-60, 150] degC", detail::format_value(t)));
    fit_diode_outcome o;
    o.fit = fit_diode(data, t, source, opt.fit);

    staged_output staged(out_dir, opt.overwrite, {points_csv});
    for (const char* f : {"diode.toml", "fit.json", "fit-points.dat", "fit-curve.dat", "fit.svg", "fit.png", "fit.gp"}) staged.check(f);
    const fs::path dir = staged.dir();
    with_described_errors(staged, [&] {
        o.diode_toml = dir / "diode.toml";
        o.fit_json = dir / "fit.json";
        write_text_atomic(o.diode_toml, to_diode_toml(o.fit));
        write_text_atomic(o.fit_json, to_json(o.fit).dump(2) + "\n");
        try {
            draw_fit_plot(o.fit, dir);
            o.plot_svg = dir / "fit.svg";
        } catch (const audio_error& e) {
            o.warnings.push_back(std::string("plot left out: ") + e.what());
        }
        throw_if_cancelled();
        staged.publish();
    });
    for (fs::path* p : {&o.diode_toml, &o.fit_json, &o.plot_svg})
        if (!p->empty()) *p = staged.published(*p);
    for (auto& w : o.warnings) w = staged.describe(w);
    return o;
}

// ---------------------------------------------------------------------------------------------------------
// rank-diodes

namespace {

/// A TOML basic string holding `text`.
std::string toml_string(const std::string& text)
{
    std::string o = "\"";
    for (const char c : text) {
        const auto u = static_cast<unsigned char>(c);
        if (c == '"') o += "\\\"";
        else if (c == '\\') o += "\\\\";
        else if (u < 0x20 || u == 0x7f) o += fmt::format("\\u{:04x}", u);
        else o += c;
    }
    return o + "\"";
}

/// A directory-safe name from a folder or file name.
std::string safe_name(const std::string& s)
{
    std::string o;
    for (char c : s) o += (std::isalnum(static_cast<unsigned char>(c)) || c == '.' || c == '_' || c == '-') ? c : '-';
    if (o.size() > 40) o.resize(40);
    return o;
}

std::string letter_of(std::size_t k)
{
    std::string s;
    do {
        s.insert(s.begin(), static_cast<char>('A' + k % 26));
        k = k / 26;
    } while (k-- > 0);
    return s;
}

double metric(const nlohmann::json& j, const std::string& key)
{
    const auto it = j.find(key);
    return it != j.end() && it->is_number() ? it->get<double>() : nan_v;
}

/// One render at a point of a diode's uncertainty.
struct sigma_render {
    std::size_t diode = 0;
    scenario scene;
    double level_v = nan_v;
    double thd_percent = nan_v;
};

/// Renders every job on `threads` workers (results stored by index, so the outcome does not depend on the
/// thread count); the first error stops the rest and is rethrown; polls the cancel flag between renders.
void run_sigma_renders(std::vector<sigma_render>& jobs, const std::string& level_key, unsigned threads)
{
    std::atomic<std::size_t> next{0};
    std::atomic<bool> failed{false};
    std::exception_ptr first;
    std::mutex m;
    auto work = [&] {
        for (;;) {
            const std::size_t i = next.fetch_add(1);
            if (i >= jobs.size() || failed.load() || cancel_requested()) return;
            try {
                auto& jb = jobs[i];
                auto prog = make_programme(jb.scene);
                const auto ra = render_to_memory(jb.scene.circuit, jb.scene.am, *prog, jb.scene.render);
                const std::vector<float> ev(ra.earpiece_v.begin(), ra.earpiece_v.end());
                const auto j = job_metrics(jb.scene, ev, ra.result.warnings);
                jb.level_v = metric(j, level_key);
                jb.thd_percent = metric(j, "thd_percent");
            } catch (...) {
                std::lock_guard<std::mutex> lk(m);
                if (!first) first = std::current_exception();
                failed = true;
            }
        }
    };
    const unsigned n = std::max(1u, std::min<unsigned>(threads == 0 ? std::max(1u, std::thread::hardware_concurrency()) : threads,
                                                       static_cast<unsigned>(std::max<std::size_t>(jobs.size(), 1))));
    std::vector<std::thread> pool;
    for (unsigned t = 1; t < n; ++t) pool.emplace_back(work);
    work();
    for (auto& t : pool) t.join();
    throw_if_cancelled();
    if (first) std::rethrow_exception(first);
}


} // namespace

rank_outcome rank_diodes(const fs::path& scenario_file, const std::vector<std::string>& base_overrides,
                         const std::vector<fs::path>& diode_files, const fs::path& out_dir, const rank_options& opt)
{
    if (diode_files.size() < 2)
        throw config_error(fmt::format("rank-diodes: {} diode file{}: a ranking needs at least 2", diode_files.size(),
                                       diode_files.size() == 1 ? "" : "s"));
    if (diode_files.size() > sweep_confirm_limit)
        throw config_error(fmt::format("rank-diodes: {} diode files: at most {} in one ranking", diode_files.size(), sweep_confirm_limit));
    rank_outcome out;
    std::vector<variant_spec> variants;
    std::vector<std::optional<fit_uncertainty>> fits;
    for (std::size_t k = 0; k < diode_files.size(); ++k) {
        const fs::path& f = diode_files[k];
        std::error_code ec;
        if (!fs::is_regular_file(f, ec)) throw config_error(fmt::format("{}: diode file: no such file", f.string()));
        const fs::path abs = fs::absolute(f, ec);
        ranked_diode rd;
        rd.letter = letter_of(k);
        std::string base = abs.stem() == "diode" && abs.has_parent_path() ? abs.parent_path().filename().string() : abs.stem().string();
        rd.name = rd.letter + "-" + safe_name(base);
        rd.diode_file = f;
        variant_spec v;
        v.name = rd.name;
        v.label = fmt::format("diode {}: {}", rd.letter, f.string());
        v.overrides = {"diode.file=" + toml_string(abs.string())};
        variants.push_back(v);
        const fs::path fj = abs.parent_path() / "fit.json";
        if (fs::is_regular_file(fj, ec)) {
            fits.push_back(load_fit_uncertainty(fj));
        } else {
            fits.emplace_back();
            rd.note = fmt::format("no fit.json beside {}: uncertainty unknown", f.string());
        }
        out.ranking.push_back(rd);
    }

    pack_options po = opt.pack;
    po.title = "galena: measured diodes ranked";
    po.extra_outputs = {"ranking.csv", "ranking.md"};
    for (const auto& rd : out.ranking) po.extra_outputs.push_back("fits/" + rd.letter + ".svg");
    for (const auto& f : diode_files) po.protect.push_back(f);
    po.extras = [&](sweep_result& sweep, const fs::path& dir) {
        // Nominal levels from the pack's own renders.
        const auto& first = sweep.variants.front();
        std::string level_key = std::isfinite(metric(first.metrics, "fundamental_v")) ? "fundamental_v" : "audio_rms_v";
        for (std::size_t k = 0; k < out.ranking.size(); ++k) {
            auto& rd = out.ranking[k];
            const auto& r = sweep.variants[k];
            rd.level_key = level_key;
            const double lv = metric(r.metrics, level_key);
            if (!(lv > 0.0))
                throw integration_error(fmt::format("{}: diode {}: no detected level ({} = {}): nothing to rank", scenario_file.string(),
                                                    rd.letter, level_key, lv), 0.0);
            rd.level_dbv = 20.0 * std::log10(lv);
            rd.thd_percent = metric(r.metrics, "thd_percent");
            rd.level_sigma_db = nan_v;
            rd.thd_sigma_percent = nan_v;
        }
        // Renders at +-1 sigma along the principal axes of each fit's covariance (fitted, identifiable
        // parameters only), on the scene the level was measured on.
        std::vector<sigma_render> jobs;
        std::vector<std::vector<std::pair<std::size_t, std::size_t>>> pairs(out.ranking.size()); // (plus, minus) job indices
        std::vector<bool> propagated(out.ranking.size(), false);
        double programme_s = 0.0;
        for (std::size_t k = 0; k < out.ranking.size(); ++k) {
            if (!fits[k]) continue;
            const auto& u = *fits[k];
            auto& rd = out.ranking[k];
            std::vector<std::size_t> idx;
            for (std::size_t q = 0; q < fit_parameter_count; ++q) {
                const bool flagged = std::find(u.not_identifiable.begin(), u.not_identifiable.end(),
                                               std::string(q == fit_is ? "saturation_current_a" : q == fit_n ? "emission_coefficient"
                                                                                      : q == fit_rs ? "series_resistance_ohm"
                                                                                                    : "leakage_resistance_ohm")) !=
                                     u.not_identifiable.end();
                if (u.free[q] && !flagged && std::isfinite(u.covariance_ln[q][q])) idx.push_back(q);
                else if (flagged) rd.left_out.emplace_back(q == fit_is ? "Is" : q == fit_n ? "n" : q == fit_rs ? "Rs" : "Rsh");
            }
            if (!rd.left_out.empty()) {
                std::string l;
                for (const auto& x : rd.left_out) l += (l.empty() ? "" : ", ") + x;
                rd.note = fmt::format("uncertainty leaves out {} (not identifiable from the readings)", l);
            }
            if (idx.empty()) continue;
            propagated[k] = true;
            Eigen::MatrixXd c(static_cast<Eigen::Index>(idx.size()), static_cast<Eigen::Index>(idx.size()));
            for (std::size_t a = 0; a < idx.size(); ++a)
                for (std::size_t b = 0; b < idx.size(); ++b)
                    c(static_cast<Eigen::Index>(a), static_cast<Eigen::Index>(b)) = u.covariance_ln[idx[a]][idx[b]];
            Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> es(c);
            const auto& r = sweep.variants[k];
            const scenario& base_scene = r.measured_separately ? r.measure_scene : r.scene;
            for (Eigen::Index e = 0; e < es.eigenvalues().size(); ++e) {
                const double lambda = es.eigenvalues()(e);
                if (!(lambda > 0.0)) continue;
                std::pair<std::size_t, std::size_t> pm_idx;
                for (int sign : {+1, -1}) {
                    sigma_render jb;
                    jb.diode = k;
                    jb.scene = base_scene;
                    auto& d = jb.scene.circuit.diode;
                    double* fields[] = {&d.saturation_current_a, &d.emission_coefficient, &d.series_resistance_ohm,
                                        &d.leakage_resistance_ohm};
                    for (std::size_t a = 0; a < idx.size(); ++a)
                        *fields[idx[a]] *= std::exp(sign * std::sqrt(lambda) * es.eigenvectors()(static_cast<Eigen::Index>(a), e));
                    (sign > 0 ? pm_idx.first : pm_idx.second) = jobs.size();
                    programme_s += programme_duration_s(jb.scene);
                    jobs.push_back(std::move(jb));
                }
                pairs[k].push_back(pm_idx);
            }
            rd.sigma_renders = static_cast<int>(2 * pairs[k].size());
        }
        if (!jobs.empty()) {
            check_render_length(jobs.front().scene, scenario_file.string() + " (uncertainty renders)", programme_s, jobs.size(),
                                opt.pack.sweep.threads, opt.pack.sweep.allow_long);
            run_sigma_renders(jobs, level_key, opt.pack.sweep.threads);
        }
        for (std::size_t k = 0; k < out.ranking.size(); ++k) {
            if (!propagated[k]) continue;
            double var_l = 0.0, var_t = 0.0; // a covariance of zero (a noiseless fit) gives 0
            for (const auto& [p, m] : pairs[k]) {
                const double half = 0.5 * (20.0 * std::log10(jobs[p].level_v) - 20.0 * std::log10(jobs[m].level_v));
                var_l += half * half;
                const double half_t = 0.5 * (jobs[p].thd_percent - jobs[m].thd_percent);
                var_t += half_t * half_t;
            }
            out.ranking[k].level_sigma_db = std::sqrt(var_l);
            out.ranking[k].thd_sigma_percent = std::isfinite(var_t) ? std::sqrt(var_t) : nan_v;
        }

        // Order, verdicts, advice.
        std::stable_sort(out.ranking.begin(), out.ranking.end(),
                         [](const ranked_diode& a, const ranked_diode& b) { return a.level_dbv > b.level_dbv; });
        for (std::size_t k = 1; k < out.ranking.size(); ++k) {
            const auto& hi = out.ranking[k - 1];
            const auto& lo = out.ranking[k];
            const double d = hi.level_dbv - lo.level_dbv;
            const double s = std::hypot(hi.level_sigma_db, lo.level_sigma_db);
            std::string v;
            if (!std::isfinite(s))
                v = fmt::format("{} is {:.1f} dB louder than {} (uncertainty unknown: a diode without fit.json)", hi.letter, d, lo.letter);
            else if (d < opt.distinguishable_sigmas * s)
                v = fmt::format("{} and {} are indistinguishable at this signal level: {} is {:.2f} +- {:.2g} dB louder, less than {:g} "
                                "standard deviations of the difference",
                                hi.letter, lo.letter, hi.letter, d, s, opt.distinguishable_sigmas);
            else
                v = fmt::format("{} is {:.2f} +- {:.2g} dB louder than {}", hi.letter, d, s, lo.letter);
            out.verdicts.push_back(v);
        }
        const auto& a = out.ranking[0];
        const auto& b = out.ranking[1];
        const double d = a.level_dbv - b.level_dbv;
        const double s = std::hypot(a.level_sigma_db, b.level_sigma_db);
        auto thd_note = [&](const ranked_diode& x) { return std::isfinite(x.thd_percent) ? fmt::format(", THD {:.2g} %", x.thd_percent) : ""; };
        if (std::isfinite(s) && d < opt.distinguishable_sigmas * s)
            out.advice = fmt::format("diodes {} and {} are indistinguishable in level at this signal ({:.2f} +- {:.2g} dB); either will do{}",
                                     a.letter, b.letter, d, s,
                                     std::isfinite(a.thd_percent) && std::isfinite(b.thd_percent)
                                         ? fmt::format(" ({} has the lower THD: {:.2g} % against {:.2g} %)",
                                                       a.thd_percent <= b.thd_percent ? a.letter : b.letter,
                                                       std::min(a.thd_percent, b.thd_percent), std::max(a.thd_percent, b.thd_percent))
                                         : std::string());
        else
            out.advice = fmt::format("solder diode {} ({}): it is {} dB louder than {} at this signal level{}{}", a.letter,
                                     a.diode_file.string(), std::isfinite(s) ? fmt::format("{:.1f} +- {:.2g}", d, s) : fmt::format("{:.1f}", d),
                                     b.letter, thd_note(a),
                                     d < audible_level_step_db ? fmt::format(" (below about {:g} dB a level step is hard to hear)", audible_level_step_db)
                                                               : std::string());

        // Files: the tables, and each fit's plot beside its diode file.
        out.csv = dir / "ranking.csv";
        out.markdown = dir / "ranking.md";
        write_text_atomic(out.csv, ranking_csv(out));
        write_text_atomic(out.markdown, ranking_markdown(out));
        std::string fits_html;
        for (const auto& rd : out.ranking) {
            std::error_code ec;
            const fs::path svg = fs::absolute(rd.diode_file, ec).parent_path() / "fit.svg";
            if (!fs::is_regular_file(svg, ec)) continue;
            fs::create_directories(dir / "fits", ec);
            fs::copy_file(svg, dir / "fits" / (rd.letter + ".svg"), fs::copy_options::overwrite_existing, ec);
            if (ec) throw audio_error(fmt::format("{}: cannot copy into the pack: {}", svg.string(), ec.message()));
            fits_html += fmt::format("<figure><img src=\"fits/{0}.svg\" alt=\"fit of diode {0}\" style=\"max-width:100%\"><figcaption>diode "
                                     "{0}: {1}</figcaption></figure>\n",
                                     rd.letter, html_escape(rd.diode_file.string()));
        }
        std::string h = "<h2>Ranking</h2>\n<p><strong>" + html_escape(out.advice) + "</strong></p>\n<table>\n<tr><th>rank</th><th>diode</th>"
                        "<th>file</th><th>level, dBV</th><th>+- 1 sigma, dB</th><th>THD, %</th><th>note</th></tr>\n";
        for (std::size_t k = 0; k < out.ranking.size(); ++k) {
            const auto& rd = out.ranking[k];
            h += fmt::format("<tr><td>{}</td><td>{}</td><td>{}</td><td>{:.2f}</td><td>{}</td><td>{}</td><td>{}</td></tr>\n", k + 1, rd.letter,
                             html_escape(rd.diode_file.string()), rd.level_dbv, g4(rd.level_sigma_db), g4(rd.thd_percent),
                             html_escape(rd.note));
        }
        h += "</table>\n<ul>\n";
        for (const auto& v : out.verdicts) h += "<li>" + html_escape(v) + "</li>\n";
        h += "</ul>\n" + fits_html;
        return h;
    };
    out.pack = make_pack(scenario_file, base_overrides, variants, out_dir, po);
    const fs::path published = out.pack.page.parent_path();
    out.csv = published / "ranking.csv";
    out.markdown = published / "ranking.md";
    return out;
}

std::string ranking_markdown(const rank_outcome& r)
{
    const std::string key = r.ranking.empty() ? "fundamental_v" : r.ranking[0].level_key;
    std::string o = fmt::format("| rank | diode | file | level ({}), dBV | +- 1 sigma, dB | THD, % | +- 1 sigma, % | renders | note |\n"
                                "|---:|---|---|---:|---:|---:|---:|---:|---|\n",
                                key);
    for (std::size_t k = 0; k < r.ranking.size(); ++k) {
        const auto& d = r.ranking[k];
        o += fmt::format("| {} | {} | {} | {:.2f} | {} | {} | {} | {} | {} |\n", k + 1, d.letter, d.diode_file.string(), d.level_dbv,
                         g4(d.level_sigma_db), g4(d.thd_percent), g4(d.thd_sigma_percent), d.sigma_renders, d.note);
    }
    o += "\n";
    for (const auto& v : r.verdicts) o += "- " + v + "\n";
    o += "\n**" + r.advice + "**\n";
    return o;
}

std::string ranking_csv(const rank_outcome& r)
{
    auto cell = [](double v) { return std::isfinite(v) ? fmt::format("{:.9g}", v) : std::string(); };
    auto quoted = [](const std::string& s) {
        std::string o = "\"";
        for (char c : s) o += c == '"' ? std::string("\"\"") : std::string(1, c);
        return o + "\"";
    };
    std::string o = "rank,diode,file,level_key,level_dbv,level_sigma_db,thd_percent,thd_sigma_percent,sigma_renders,note\n";
    for (std::size_t k = 0; k < r.ranking.size(); ++k) {
        const auto& d = r.ranking[k];
        o += fmt::format("{},{},{},{},{},{},{},{},{},{}\n", k + 1, d.letter, quoted(d.diode_file.string()), d.level_key, cell(d.level_dbv),
                         cell(d.level_sigma_db), cell(d.thd_percent), cell(d.thd_sigma_percent), d.sigma_renders, quoted(d.note));
    }
    return o;
}

} // namespace galena
