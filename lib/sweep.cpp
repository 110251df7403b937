#include "galena/sweep.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/components.hpp"
#include "galena/error.hpp"
#include "galena/metrics.hpp"
#include "galena/text_table.hpp"
#include "galena/units.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cerrno>
#include <cmath>
#include <cstring>
#include <fstream>
#include <optional>
#include <cstdlib>
#include <exception>
#include <fmt/format.h>
#include <mutex>
#include <sstream>
#include <thread>
#include <toml++/toml.h>

namespace galena {

namespace fs = std::filesystem;

namespace {

std::vector<std::string> split(const std::string& s, char sep)
{
    std::vector<std::string> out;
    std::string cur;
    std::istringstream in(s);
    while (std::getline(in, cur, sep)) out.push_back(cur);
    if (!s.empty() && s.back() == sep) out.emplace_back();
    return out;
}

std::string trim(const std::string& s)
{
    const auto b = s.find_first_not_of(" \t");
    if (b == std::string::npos) return {};
    const auto e = s.find_last_not_of(" \t");
    return s.substr(b, e - b + 1);
}

/// The unit of a swept key, or unit::none for a key that is not numeric (or unknown: loading reports it).
unit unit_of(const std::string& field_text)
{
    const std::string field = contract_field(field_text);
    for (const auto& k : scenario_keys())
        if (k.field == field) return k.numeric ? k.u : unit::none;
    return unit::none;
}

std::string lower(std::string s)
{
    for (char& c : s) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
    return s;
}

/// Value text as it appears in a name: numbers in engineering notation ("47k"), words kept.
std::string value_tag(const std::string& field_text, const std::string& v)
{
    const std::string field = contract_field(field_text);
    const std::string t = trim(v);
    if (t == "inf" || t == "none") return "none";
    for (const auto& k : scenario_keys())
        if (k.field == field && k.numeric) {
            try {
                return short_si(parse_quantity(t, k.u));
            } catch (const config_error&) {
                break; // loading the variant names the problem
            }
        }
    std::string s;
    for (char c : t) s += (std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '.') ? c : '_';
    return s;
}

std::string json_cell(const nlohmann::json& j, int digits, bool csv)
{
    if (j.is_null()) return "";
    if (j.is_number_float()) {
        const double v = j.get<double>();
        if (!std::isfinite(v)) return v > 0 ? "inf" : (v < 0 ? "-inf" : "nan");
        return csv ? fmt::format("{:.10g}", v) : fmt::format("{:.{}g}", v, digits);
    }
    if (j.is_number()) return j.dump();
    if (j.is_boolean()) return j.get<bool>() ? "true" : "false";
    if (j.is_string()) return j.get<std::string>();
    if (j.is_array()) return std::to_string(j.size());
    return j.dump();
}

} // namespace

bool is_variant_name(const std::string& n)
{
    return !n.empty() && n != "." && n != ".." &&
           std::all_of(n.begin(), n.end(), [](unsigned char c) { return std::isalnum(c) || c == '-' || c == '_' || c == '.'; });
}

const std::vector<std::string>& reserved_output_names()
{
    static const std::vector<std::string> n = {"table.csv", "table.md", "index.html", "playlist.wav", "playlist.csv",
                                               "playlist-matched.wav", "playlist-matched.csv", "matched", "plots",
                                               "gains.csv", "variant.json", "measure", "recovered.wav", "recovered.json",
                                               "metrics.json", "recovered-normalised.wav"};
    return n;
}

std::string short_si(double v)
{
    if (std::isinf(v) && v > 0) return "none";
    return format_quantity(v, unit::none, 4);
}

sweep_axis parse_sweep_axis(const std::string& spec)
{
    const auto eq = spec.find('=');
    const auto dot = spec.find('.');
    if (eq == std::string::npos || dot == std::string::npos || dot > eq || eq + 1 >= spec.size())
    {
        std::string hint;
        if (eq != std::string::npos && (dot == std::string::npos || dot > eq)) {
            const auto fields = suggest_fields(trim(spec.substr(0, eq)));
            if (!fields.empty()) hint = fmt::format(" (did you mean {}={}?)", fields.front(), spec.substr(eq + 1));
        }
        throw config_error(fmt::format("--vary {}: must look like section.key=a,b,c or section.key=log:LO:HI:COUNT{}", spec, hint));
    }
    sweep_axis a;
    a.key = trim(spec.substr(0, eq));
    const std::string rhs = trim(spec.substr(eq + 1));
    if (rhs.rfind("log:", 0) == 0) {
        const auto parts = split(rhs.substr(4), ':');
        if (parts.size() != 3)
            throw config_error(fmt::format("--vary {}: a log range is log:LO:HI:COUNT", spec));
        auto number = [&](const std::string& text, const char* what, unit u) {
            try {
                return parse_quantity(text, u);
            } catch (const config_error& e) {
                throw config_error(fmt::format("--vary {}: {} = \"{}\": {}", spec, what, trim(text), e.what()));
            }
        };
        const unit u = unit_of(a.key);
        const double lo = number(parts[0], "LO", u);
        const double hi = number(parts[1], "HI", u);
        const double n = number(parts[2], "COUNT", unit::none);
        if (!(lo > 0.0) || !(hi > lo) || !std::isfinite(hi))
            throw config_error(fmt::format("--vary {}: a log range needs 0 < LO < HI < inf", spec));
        if (!(n >= 2.0) || n > 1000.0 || n != std::floor(n))
            throw config_error(fmt::format("--vary {}: COUNT = {}: must be a whole number in [2, 1000]", spec, parts[2]));
        const int count = static_cast<int>(n);
        for (int i = 0; i < count; ++i) {
            const double v = lo * std::pow(hi / lo, static_cast<double>(i) / (count - 1));
            a.values.push_back(fmt::format("{:.6g}", i == count - 1 ? hi : v));
        }
    } else if (rhs == "presets") {
        if (a.key != "diode.preset")
            throw config_error(fmt::format("--vary {}: \"presets\" applies to diode.preset only", spec));
        for (const auto& p : diode_presets()) a.values.emplace_back(p.name);
    } else {
        for (const auto& v : split(rhs, ',')) {
            const std::string t = trim(v);
            if (t.empty()) throw config_error(fmt::format("--vary {}: empty value in the list", spec));
            a.values.push_back(t);
        }
    }
    return a;
}

variant_spec parse_variant(const std::string& spec)
{
    const auto colon = spec.find(':');
    if (colon == std::string::npos)
        throw config_error(fmt::format("--variant {}: must look like NAME:section.key=value,section.key=value", spec));
    variant_spec v;
    v.name = trim(spec.substr(0, colon));
    if (!is_variant_name(v.name))
        throw config_error(fmt::format("--variant {}: NAME \"{}\" may hold only letters, digits, '-', '_' and '.'", spec, v.name));
    v.label = v.name;
    for (const auto& o : split(spec.substr(colon + 1), ',')) {
        const std::string t = trim(o);
        if (t.empty()) continue;
        if (t.find('=') == std::string::npos || t.find('.') > t.find('=')) {
            std::string hint;
            if (const auto eq = t.find('='); eq != std::string::npos)
                if (const auto fields = suggest_fields(trim(t.substr(0, eq))); !fields.empty())
                    hint = fmt::format(" (did you mean {}={}?)", fields.front(), t.substr(eq + 1));
            throw config_error(fmt::format("--variant {}: \"{}\" must look like section.key=value{}", spec, t, hint));
        }
        v.overrides.push_back(t);
    }
    return v;
}

std::vector<variant_spec> expand_sweep(const std::vector<sweep_axis>& axes)
{
    if (axes.empty()) throw config_error("sweep: no --vary given; name at least one key to vary");
    for (std::size_t i = 0; i < axes.size(); ++i)
        for (std::size_t j = 0; j < i; ++j)
            if (axes[i].key == axes[j].key)
                throw config_error(fmt::format("--vary {}: the key is varied twice (axes {} and {}); give all its values in one "
                                               "--vary",
                                               axes[i].key, j + 1, i + 1));
    std::size_t total = 1;
    for (const auto& a : axes) {
        if (a.values.empty()) throw config_error(fmt::format("--vary {}: no values", a.key));
        total *= a.values.size();
        if (total > sweep_hard_limit)
            throw config_error(fmt::format("--vary {}: the axes multiply to {} variants or more: a sweep must hold at most {}; narrow the ranges",
                                           a.key, total, sweep_hard_limit));
    }
    std::vector<variant_spec> out;
    const int width = total >= 1000 ? 4 : total >= 100 ? 3 : 2;
    for (std::size_t i = 0; i < total; ++i) {
        variant_spec v;
        v.name = fmt::format("{:0{}}", i + 1, width);
        std::size_t rest = i;
        std::vector<std::size_t> idx(axes.size());
        for (std::size_t k = axes.size(); k-- > 0;) {
            idx[k] = rest % axes[k].values.size();
            rest /= axes[k].values.size();
        }
        for (std::size_t k = 0; k < axes.size(); ++k) {
            const auto& a = axes[k];
            const std::string& val = a.values[idx[k]];
            // "bleeder_ohm"; a station's key with its number: "station2.carrier_hz".
            const bool station = contract_field(a.key) != a.key;
            const std::string short_key = station ? "station" + a.key.substr(8) : a.key.substr(a.key.find('.') + 1);
            v.name += "-" + short_key + "-" + value_tag(a.key, val);
            if (!v.label.empty()) v.label += ", ";
            v.label += short_key + " = " + value_tag(a.key, val);
            v.overrides.push_back(a.key + "=" + val);
        }
        out.push_back(std::move(v));
    }
    return out;
}

const std::vector<std::string>& table_columns()
{
    static const std::vector<std::string> c = {"carrier_peak_v", "dc_v",       "audio_rms_v",   "a_weighted_dbv",
                                               "fundamental_v",  "h2_ratio",   "h3_ratio",      "thd_percent",
                                               "thd_n_percent",  "sinad_db",   "peak_audio_v",  "clipped_samples"};
    return c;
}

const std::vector<std::string>& receiver_table_columns()
{
    static const std::vector<std::string> c = {"tuned_hz",      "loaded_q",           "rf_bandwidth_hz",      "detector_rf_peak_v",
                                               "dc_v",          "audio_rms_v",        "a_weighted_dbv",       "wanted_tone_v",
                                               "loudest_neighbour_db", "thd_percent", "peak_audio_v",         "clipped_samples"};
    return c;
}

namespace {
/// Whole-receiver columns when any row is a whole receiver (its metrics carry tuned_hz).
const std::vector<std::string>& columns_for(const std::vector<variant_result>& rows)
{
    const bool receiver = std::any_of(rows.begin(), rows.end(), [](const variant_result& r) { return r.metrics.contains("tuned_hz"); });
    return receiver ? receiver_table_columns() : table_columns();
}
} // namespace

std::string table_csv(const std::vector<variant_result>& rows)
{
    const auto& columns = columns_for(rows);
    std::vector<std::string> head = {"variant", "label"};
    head.insert(head.end(), columns.begin(), columns.end());
    head.emplace_back("warnings");
    std::string o = csv_row(head);
    for (const auto& r : rows) {
        std::vector<std::string> f = {r.spec.name, r.spec.label};
        for (const auto& c : columns) f.push_back(r.metrics.contains(c) ? json_cell(r.metrics[c], 10, true) : std::string());
        f.push_back(std::to_string(r.metrics.contains("warnings") ? r.metrics["warnings"].size() : 0));
        o += csv_row(f);
    }
    return o;
}

std::string table_markdown(const std::vector<variant_result>& rows)
{
    // Volt and hertz columns are written in engineering notation ("21.86m" under "DC V", "1.002M" under
    // "tuned Hz"), as builders write values; ratios, % and dB stay plain.
    struct head {
        std::string key, text;
        bool engineering; ///< written with format_quantity in `u`
        unit u = unit::volt;
    };
    static const std::vector<head> heads = {
        {"carrier_peak_v", "carrier V", true}, {"dc_v", "DC V", true},        {"audio_rms_v", "audio rms V", true},
        {"a_weighted_dbv", "dBV(A)", false},   {"fundamental_v", "tone V", true}, {"h2_ratio", "H2/H1", false},
        {"h3_ratio", "H3/H1", false},          {"thd_percent", "THD %", false}, {"thd_n_percent", "THD+N %", false},
        {"sinad_db", "SINAD dB", false},       {"peak_audio_v", "peak V", true}, {"clipped_samples", "clipped", false}};
    static const std::vector<head> receiver_heads = {
        {"tuned_hz", "tuned Hz", true, unit::hertz},        {"loaded_q", "loaded Q", false},     {"rf_bandwidth_hz", "RF BW Hz", true, unit::hertz},
        {"detector_rf_peak_v", "RF peak V", true}, {"dc_v", "DC V", true},           {"audio_rms_v", "audio rms V", true},
        {"a_weighted_dbv", "dBV(A)", false},    {"wanted_tone_v", "wanted tone V", true},
        {"loudest_neighbour_db", "neighbour dB", false}, {"thd_percent", "THD %", false}, {"peak_audio_v", "peak V", true},
        {"clipped_samples", "clipped", false}};
    const auto& chosen = &columns_for(rows) == &receiver_table_columns() ? receiver_heads : heads;
    std::string o = "| variant | label |";
    std::string rule = "|---|---|";
    for (const auto& h : chosen) {
        o += " " + h.text + " |";
        rule += "---:|";
    }
    o += "\n" + rule + "\n";
    for (const auto& r : rows) {
        o += "| " + markdown_cell(r.spec.name) + " | " + markdown_cell(r.spec.label) + " |";
        for (const auto& h : chosen) {
            const std::string& k = h.key;
            const bool engineering = h.engineering && r.metrics.contains(k) && r.metrics[k].is_number_float() &&
                               std::isfinite(r.metrics[k].get<double>());
            const std::string cell = !r.metrics.contains(k) ? std::string()
                                     : engineering          ? format_quantity(r.metrics[k].get<double>(), h.u, 4)
                                                            : json_cell(r.metrics[k], 4, false);
            // Appended piece by piece: `" " + std::string(...)` trips GCC 12's -Wrestrict false positive.
            o += ' ';
            o += cell.empty() ? std::string("-") : markdown_cell(cell);
            o += " |";
        }
        o += "\n";
    }
    return o;
}

sweep_result prepare_sweep(const fs::path& base_file, const std::vector<std::string>& base_overrides,
                           const std::vector<variant_spec>& variants, const sweep_options& opt)
{
    if (variants.empty()) throw config_error(fmt::format("{}: sweep: no variants to render", base_file.string()));
    if (variants.size() > sweep_hard_limit)
        throw config_error(fmt::format("{}: sweep: {} variants: must be at most {}", base_file.string(), variants.size(), sweep_hard_limit));
    if (opt.measure_tone_hz != 0.0) {
        if (!(opt.measure_tone_hz > 0.0 && opt.measure_tone_hz <= 20000.0))
            throw config_error(fmt::format("--measure-tone = {}: must be 0 (off) or in (0, 20000] Hz", detail::format_value(opt.measure_tone_hz)));
        if (!(opt.measure_duration_s > 0.0 && opt.measure_duration_s <= 10.0))
            throw config_error(fmt::format("--measure-duration = {}: must be in (0, 10] s", detail::format_value(opt.measure_duration_s)));
    }
    sweep_result res;
    res.variants.resize(variants.size());
    // Validate everything first: a bad key in variant 9 must not cost eight renders.
    for (std::size_t i = 0; i < variants.size(); ++i) {
        auto& r = res.variants[i];
        r.spec = variants[i];
        const std::string where = r.spec.origins.empty() ? fmt::format("variant {}", i + 1) : r.spec.origins.front();
        for (std::size_t j = 0; j < i; ++j)
            if (lower(variants[j].name) == lower(r.spec.name))
                throw config_error(fmt::format("{}: name \"{}\" is used twice (variant {} has it; names are compared without "
                                               "regard to case)",
                                               where, r.spec.name, j + 1));
        if (!r.spec.name.empty() && r.spec.name.front() == '.')
            throw config_error(fmt::format("{}: name \"{}\": must not start with '.'", where, r.spec.name));
        for (const auto& reserved : reserved_output_names())
            if (lower(r.spec.name) == reserved)
                throw config_error(fmt::format("{}: name \"{}\": galena names its own output {} so; choose another name", where,
                                               r.spec.name, reserved));
        std::vector<std::string> ov = base_overrides;
        ov.insert(ov.end(), r.spec.overrides.begin(), r.spec.overrides.end());
        try {
            r.scene = load_scenario(base_file, ov);
        } catch (const config_error& e) {
            // A pack's `set` entry is named by its own file and line, not as a --set the user never typed.
            std::string msg = e.what();
            for (std::size_t k = 0; k < r.spec.origins.size() && k < r.spec.overrides.size(); ++k) {
                const std::string& o = r.spec.overrides[k];
                for (const std::string& from : {base_file.string() + " (--set " + o + ")", "--set " + o}) {
                    const auto at = msg.find(from);
                    if (at != std::string::npos) {
                        msg.replace(at, from.size(), fmt::format("{} (set \"{}\" of variant {})", r.spec.origins[k], o, r.spec.name));
                        throw config_error(msg);
                    }
                }
            }
            throw config_error(fmt::format("variant {}: {}", r.spec.name, msg));
        }
        r.measured_separately = opt.measure_tone_hz > 0.0 && r.scene.programme.kind == programme_kind::clip;
        if (r.measured_separately) {
            detail::require_range("--measure-tone", opt.measure_tone_hz, 1.0, 0.45 * r.scene.render.audio_rate_hz,
                                  "Hz (0.45 x output.sample_rate_hz)");
            r.measure_scene = r.scene;
            r.measure_scene.programme.kind = programme_kind::tone;
            r.measure_scene.programme.tone_hz = opt.measure_tone_hz;
            r.measure_scene.programme.duration_s = opt.measure_duration_s;
            r.measure_scene.programme.audio.clear();
        }
        if (i > 0 && r.scene.render.audio_rate_hz != res.variants[0].scene.render.audio_rate_hz)
            throw config_error(fmt::format("variant {}: output.sample_rate_hz = {}: every variant needs the same rate ({})",
                                           r.spec.name, r.scene.render.audio_rate_hz, res.variants[0].scene.render.audio_rate_hz));
        for (const auto& in : scenario_inputs(r.scene))
            if (std::find(res.inputs.begin(), res.inputs.end(), in) == res.inputs.end()) res.inputs.push_back(in);
    }
    if (variants.size() > sweep_confirm_limit && !opt.allow_large)
        throw config_error(fmt::format("{}: sweep: {} variants: more than {} need --allow-large (each variant is a full render)",
                                       base_file.string(), variants.size(), sweep_confirm_limit));
    double programme_s = 0.0;
    std::size_t renders = 0;
    for (const auto& r : res.variants) {
        try {
            programme_s += programme_duration_s(r.scene);
        } catch (const audio_error& e) {
            throw audio_error(fmt::format("variant {}: {}", r.spec.name, e.what()));
        }
        ++renders;
        check_measurable(r.scene, fmt::format("variant {}", r.spec.name));
        if (r.measured_separately) {
            check_measurable(r.measure_scene, fmt::format("variant {} (--measure-tone)", r.spec.name));
            programme_s += r.measure_scene.programme.duration_s;
            ++renders;
        }
    }
    const unsigned threads = opt.threads != 0 ? opt.threads : std::max(1u, std::thread::hardware_concurrency());
    check_render_length(res.variants[0].scene, base_file.string(), programme_s, renders, threads, opt.allow_long);
    return res;
}

void check_sweep_outputs(const sweep_result& res, staged_output& staged)
{
    staged.check("table.csv");
    staged.check("table.md");
    staged.owns("table.csv");
    staged.owns("table.md");
    for (const auto& r : res.variants) {
        staged.owns(r.spec.name);
        for (const auto& n : job_file_names()) staged.check(fs::path(r.spec.name) / n);
        if (r.measured_separately)
            for (const auto& n : job_file_names()) staged.check(fs::path(r.spec.name) / "measure" / n);
    }
}

void relocate(sweep_result& res, const staged_output& staged)
{
    for (auto& r : res.variants) {
        r.dir = staged.published(r.dir);
        relocate(r.job, staged);
        if (r.measured_separately) relocate(r.measure, staged);
    }
    res.csv = staged.published(res.csv);
    res.markdown = staged.published(res.markdown);
}

sweep_result run_sweep(const fs::path& base_file, const std::vector<std::string>& base_overrides,
                       const std::vector<variant_spec>& variants, const fs::path& out_dir, const sweep_options& opt)
{
    sweep_result res = prepare_sweep(base_file, base_overrides, variants, opt);
    staged_output staged(out_dir, opt.overwrite, res.inputs);
    check_sweep_outputs(res, staged);
    staged.check("matched");
    staged.owns("matched");
    with_described_errors(staged, [&] {
        render_sweep(res, staged.dir(), opt);
        throw_if_cancelled();
        // Loudness-matched copies, as a pack has: each variant's WAV at one RMS, for listening side by side.
        std::vector<fs::path> wavs;
        std::vector<std::string> names;
        for (const auto& r : res.variants) {
            wavs.push_back(r.job.wav);
            names.push_back(r.spec.name);
        }
        res.matched = write_loudness_matched(wavs, names, staged.dir() / "matched", res.variants.front().scene.output.format);
        throw_if_cancelled();
        staged.publish();
    });
    relocate(res, staged);
    for (auto& g : res.matched) g.wav = staged.published(g.wav);
    for (auto& r : res.variants) {
        for (auto& w : r.job.warnings) w.message = staged.describe(w.message);
        for (auto& w : r.warnings) w.message = staged.describe(w.message);
    }
    return res;
}

void render_sweep(sweep_result& res, const fs::path& out_dir, const sweep_options& opt)
{
    const std::size_t count = res.variants.size();
    for (auto& r : res.variants) r.dir = out_dir / r.spec.name;
    res.csv = out_dir / "table.csv";
    res.markdown = out_dir / "table.md";

    unsigned threads = opt.threads != 0 ? opt.threads : std::max(1u, std::thread::hardware_concurrency());
    threads = std::min<unsigned>(threads, static_cast<unsigned>(count));
    std::atomic<std::size_t> next{0};
    std::atomic<bool> failed{false};
    std::exception_ptr first_error;
    std::size_t first_error_index = count;
    std::mutex m;
    // Progress (all under m): each render's share of the work is its programme time, so a tick's fraction
    // moves evenly through variants of different lengths; finished variants are reported in order.
    const auto t0 = std::chrono::steady_clock::now();
    std::vector<double> main_s(count), measure_s(count), part(count, 0.0);
    std::vector<char> done(count, 0);
    std::size_t reported = 0;
    double total_s = 0.0;
    auto last_tick = t0;
    if (opt.progress) {
        for (std::size_t i = 0; i < count; ++i) {
            const auto& r = res.variants[i];
            main_s[i] = std::max(programme_duration_s(r.scene), 1e-3);
            measure_s[i] = r.measured_separately ? r.measure_scene.programme.duration_s : 0.0;
            total_s += main_s[i] + measure_s[i];
        }
    }
    auto report = [&](std::string_view finished_name) {
        double worked = 0.0;
        for (std::size_t i = 0; i < count; ++i) worked += part[i];
        sweep_progress p;
        p.fraction = total_s > 0.0 ? std::min(1.0, worked / total_s) : 1.0;
        p.elapsed_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
        p.reported = reported;
        p.total = count;
        p.finished = finished_name;
        opt.progress(p);
    };
    auto tick = [&](std::size_t i, double worked_s) {
        std::lock_guard<std::mutex> lk(m);
        part[i] = worked_s;
        const auto now = std::chrono::steady_clock::now();
        if (now - last_tick < std::chrono::milliseconds(100)) return;
        last_tick = now;
        report({});
    };
    auto work = [&] {
        for (;;) {
            const std::size_t i = next.fetch_add(1);
            if (i >= count || failed.load() || cancel_requested() || (opt.cancel != nullptr && opt.cancel->requested())) return;
            try {
                auto& r = res.variants[i];
                std::error_code ec;
                fs::create_directories(r.dir, ec);
                if (ec) throw audio_error(fmt::format("{}: cannot create: {}", r.dir.string(), ec.message()));
                job_options jo;
                jo.overwrite = opt.overwrite;
                jo.stop = &failed;
                jo.cancel = opt.cancel;
                if (opt.progress) jo.progress = [&, i](double f) { tick(i, f * main_s[i]); };
                // The calibrated files wait for the common full scale (below), chosen once every render is known.
                r.job = render_job_unscaled(r.scene, r.dir, jo);
                if (r.measured_separately) {
                    fs::create_directories(r.dir / "measure", ec);
                    if (opt.progress) jo.progress = [&, i](double f) { tick(i, main_s[i] + f * measure_s[i]); };
                    r.measure = render_job_unscaled(r.measure_scene, r.dir / "measure", jo);
                    r.measure_earpiece_v = std::move(r.measure.analysis_v);
                }
                std::lock_guard<std::mutex> lk(m);
                done[i] = 1;
                if (opt.progress) {
                    part[i] = main_s[i] + measure_s[i];
                    while (reported < count && done[reported] != 0) {
                        ++reported;
                        report(res.variants[reported - 1].spec.name);
                    }
                }
            } catch (...) {
                std::lock_guard<std::mutex> lk(m);
                // A render stopped because another variant had already failed is not the cause.
                const bool secondary = failed.load() && !cancel_requested();
                failed = true;
                if (!secondary && i < first_error_index) {
                    first_error_index = i;
                    first_error = std::current_exception();
                }
            }
        }
    };
    if (threads <= 1) {
        work();
    } else {
        std::vector<std::thread> pool;
        for (unsigned t = 0; t < threads; ++t) pool.emplace_back(work);
        for (auto& t : pool) t.join();
    }
    if (first_error) {
        const std::string& name = res.variants[first_error_index].spec.name;
        try {
            std::rethrow_exception(first_error);
        } catch (const cancelled_error&) {
            throw;
        } catch (const config_error& e) {
            throw config_error(fmt::format("variant {}: {}", name, e.what()));
        } catch (const audio_error& e) {
            throw audio_error(fmt::format("variant {}: {}", name, e.what()));
        } catch (const integration_error& e) {
            throw integration_error(fmt::format("variant {}: {}", name, e.what()), e.time_s());
        }
    }
    throw_if_cancelled();
    if (opt.cancel != nullptr) opt.cancel->throw_if_requested();
    // One full scale for every variant that asks for the automatic one: from the loudest peak of them all
    // (their tone measurements included), so the files keep their relative loudness.
    double loudest = 0.0;
    for (const auto& r : res.variants) {
        if (r.scene.output.full_scale_v != 0.0) continue;
        loudest = std::max(loudest, r.job.peak_audio_v);
        if (r.measured_separately) loudest = std::max(loudest, r.measure.peak_audio_v);
    }
    const double common_v = choose_full_scale_v(loudest);
    job_options fo;
    fo.overwrite = opt.overwrite;
    for (auto& r : res.variants) {
        throw_if_cancelled();
        const bool automatic = r.scene.output.full_scale_v == 0.0;
        const double fsv = automatic ? common_v : r.scene.output.full_scale_v;
        try {
            finish_job(r.job, r.scene, fsv, automatic, fo);
            r.metrics = r.job.metrics;
            r.warnings = r.job.warnings;
            if (r.measured_separately) {
                finish_job(r.measure, r.measure_scene, fsv, automatic, fo);
                const job_outcome& mo = r.measure;
                // Levels of the programme itself; distortion figures from the tone.
                nlohmann::json merged = mo.metrics;
                for (const char* k : {"dc_v", "audio_rms_v", "audio_peak_v", "a_weighted_rms_v", "a_weighted_dbv", "peak_audio_v",
                                      "clipped_samples", "headroom_db", "rms_dbfs"})
                    if (r.job.metrics.contains(k)) merged[k] = r.job.metrics[k];
                merged["measure_dc_v"] = mo.metrics["dc_v"];
                merged["measure_audio_rms_v"] = mo.metrics["audio_rms_v"];
                r.warnings.clear();
                for (const auto& x : r.job.warnings)
                    if (x.code != warning_code::no_distortion_figures) r.warnings.push_back(x);
                for (const auto& x : mo.warnings) r.warnings.push_back(with_context("tone measurement: ", x));
                set_warnings(merged, r.warnings);
                merged["distortion_from"] = fmt::format("{:.6g} Hz tone render in measure/", opt.measure_tone_hz);
                r.metrics = merged;
            }
            write_text_atomic(r.dir / "variant.json",
                              nlohmann::json{{"name", r.spec.name}, {"label", r.spec.label}, {"set", r.spec.overrides}}.dump(2) + "\n");
        } catch (const audio_error& e) {
            throw audio_error(fmt::format("variant {}: {}", r.spec.name, e.what()));
        }
        // The scene as rendered: the chosen full scale (the page and tables read it from here).
        if (automatic) {
            r.scene.output.full_scale_v = fsv;
            r.measure_scene.output.full_scale_v = fsv;
        }
    }
    write_text_atomic(res.csv, table_csv(res.variants));
    write_text_atomic(res.markdown, table_markdown(res.variants));
}

std::string full_scale_text(const sweep_result& res)
{
    if (res.variants.empty()) return {};
    double lo = std::numeric_limits<double>::infinity(), hi = 0.0, peak = 0.0;
    bool all_auto = true;
    for (const auto& r : res.variants) {
        lo = std::min(lo, r.job.full_scale_v);
        hi = std::max(hi, r.job.full_scale_v);
        peak = std::max(peak, r.job.peak_audio_v);
        all_auto = all_auto && r.job.full_scale_auto;
    }
    const std::string v = format_quantity(hi, unit::volt, 3, true);
    if (lo != hi)
        return fmt::format("full scale from {} to {} peak (set per variant in output.full_scale_v)", format_quantity(lo, unit::volt, 3, true), v);
    const std::string headroom = peak > 0.0 ? fmt::format("headroom {:.1f} dB above the loudest peak", 20.0 * std::log10(hi / peak))
                                            : std::string("all silent");
    return fmt::format("full scale {} peak for every variant ({}; {})", v, all_auto ? "chosen automatically" : "output.full_scale_v",
                       headroom);
}

} // namespace galena
