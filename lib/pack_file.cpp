#include "galena/pack_file.hpp"

#include "galena/error.hpp"
#include "galena/text_table.hpp"
#include "galena/units.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cstdlib>
#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <optional>
#include <toml++/toml.h>

namespace galena {

namespace fs = std::filesystem;

namespace {

std::string trim(const std::string& s)
{
    const auto b = s.find_first_not_of(" \t");
    if (b == std::string::npos) return {};
    const auto e = s.find_last_not_of(" \t");
    return s.substr(b, e - b + 1);
}

} // namespace

namespace {
std::string pack_where(const toml::node& n, const fs::path& file)
{
    const auto& src = n.source();
    return src.begin.line > 0 ? fmt::format("{}:{}", file.string(), src.begin.line) : file.string();
}

std::string pack_string(const toml::table& t, const char* key, const std::string& field, const fs::path& file)
{
    const toml::node* n = t.get(key);
    if (n == nullptr) return {};
    if (auto v = n->value_exact<std::string>()) return *v;
    throw config_error(fmt::format("{}: {}: must be a string", pack_where(*n, file), field));
}

std::optional<double> pack_number(const toml::table& t, const char* key, const std::string& field, const fs::path& file, unit u)
{
    const toml::node* n = t.get(key);
    if (n == nullptr) return std::nullopt;
    if (auto v = n->value_exact<double>()) return *v;
    if (auto v = n->value_exact<int64_t>()) return static_cast<double>(*v);
    if (auto text = n->value_exact<std::string>()) {
        try {
            return parse_quantity(*text, u);
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: {}: {}", pack_where(*n, file), field, e.what()));
        }
    }
    throw config_error(fmt::format("{}: {}: must be a number", pack_where(*n, file), field));
}

/// A pack's `set` entry with a relative signal.audio or diode.file made absolute against the pack file's folder: paths in
/// a file are relative to that file, wherever the command runs.
std::string pack_relative(const std::string& entry, const fs::path& file, const std::string& where)
{
    const auto eq = entry.find('=');
    if (eq == std::string::npos) return entry;
    const std::string key = trim(entry.substr(0, eq));
    if (key != "signal.audio" && key != "diode.file") return entry;
    std::string path = trim(entry.substr(eq + 1));
    try {
        toml::table parsed = toml::parse("v = " + path);
        if (auto str = parsed["v"].value<std::string>()) path = *str;
    } catch (const toml::parse_error&) {
    }
    if (path.empty()) throw config_error(fmt::format("{}: set {}: {}: the path is empty", where, entry, key));
    fs::path p(path);
    if (p.is_relative()) {
        std::error_code ec;
        p = fs::absolute(file.parent_path() / p, ec);
        if (ec) throw config_error(fmt::format("{}: set {}: {}: cannot resolve the path: {}", where, entry, key, ec.message()));
    }
    nlohmann::json q = p.string(); // a TOML basic string: JSON string escaping is a subset of it
    return key + "=" + q.dump();
}
} // namespace

pack_spec parse_pack(const std::string& text, const fs::path& file)
{
    toml::table root;
    try {
        root = toml::parse(text, file.string());
    } catch (const toml::parse_error& e) {
        throw config_error(fmt::format("{}:{}: malformed TOML: {}", file.string(), e.source().begin.line, e.description()));
    }
    pack_spec p;
    p.file = file;
    for (const auto& [k, v] : root) {
        const std::string key(k.str());
        if (key != "pack" && key != "variant" && key != "dial_sweep")
            throw config_error(fmt::format("{}: {}: unknown section (a pack file holds [pack], [[variant]] and [[dial_sweep]])",
                                           pack_where(v, file), key));
    }
    const auto* pack = root["pack"].as_table();
    if (pack == nullptr) throw config_error(fmt::format("{}: [pack]: missing section, or not a table (needs pack.scenario)", file.string()));
    for (const auto& [k, v] : *pack) {
        const std::string key(k.str());
        if (key != "title" && key != "scenario" && key != "measure_tone_hz" && key != "measure_duration_s")
            throw config_error(fmt::format("{}: pack.{}: unknown key (known: title, scenario, measure_tone_hz, measure_duration_s)",
                                           pack_where(v, file), key));
    }
    p.title = pack_string(*pack, "title", "pack.title", file);
    if (p.title.empty()) p.title = "galena comparison";
    const std::string sc = pack_string(*pack, "scenario", "pack.scenario", file);
    if (sc.empty()) throw config_error(fmt::format("{}: pack.scenario: missing (the base scenario file)", file.string()));
    p.scenario = fs::path(sc).is_absolute() ? fs::path(sc) : file.parent_path() / sc;
    p.measure_tone_hz = pack_number(*pack, "measure_tone_hz", "pack.measure_tone_hz", file, unit::hertz).value_or(default_measure_tone_hz);
    p.measure_duration_s =
        pack_number(*pack, "measure_duration_s", "pack.measure_duration_s", file, unit::second).value_or(default_measure_duration_s);
    if (!(p.measure_tone_hz >= 0.0) || p.measure_tone_hz > 20000.0)
        throw config_error(fmt::format("{}: pack.measure_tone_hz = {}: must be 0 (off) or in (0, 20000] Hz",
                                       pack_where(*pack->get("measure_tone_hz"), file), detail::format_value(p.measure_tone_hz)));
    if (!(p.measure_duration_s > 0.0) || p.measure_duration_s > 10.0)
        throw config_error(fmt::format("{}: pack.measure_duration_s = {}: must be in (0, 10] s",
                                       pack_where(*pack->get("measure_duration_s"), file), detail::format_value(p.measure_duration_s)));
    const auto* arr = root["variant"].as_array();
    if (arr == nullptr || arr->empty())
        throw config_error(fmt::format("{}: [[variant]]: at least one variant is needed", file.string()));
    if (arr->size() > sweep_hard_limit)
        throw config_error(fmt::format("{}: [[variant]]: {} variants: must be at most {}", file.string(), arr->size(), sweep_hard_limit));
    // A table's `set` list: "section.key=value" texts (paths made relative to this file), with their file:line.
    const auto read_set = [&](const toml::table& t, const std::string& what, std::vector<std::string>& out, std::vector<std::string>* origins) {
        const toml::node* set = t.get("set");
        if (set == nullptr) return;
        const auto* list = set->as_array();
        if (list == nullptr) throw config_error(fmt::format("{}: {}: set: must be a list of strings \"section.key=value\"", pack_where(*set, file), what));
        for (const auto& e : *list) {
            const auto s = e.value_exact<std::string>();
            if (!s) throw config_error(fmt::format("{}: {}: set: must be a list of strings \"section.key=value\"", pack_where(e, file), what));
            out.push_back(pack_relative(*s, file, pack_where(e, file)));
            if (origins != nullptr) origins->push_back(pack_where(e, file));
        }
    };
    for (std::size_t i = 0; i < arr->size(); ++i) {
        const auto* t = (*arr)[i].as_table();
        const std::string where = fmt::format("{}: variant {}", pack_where((*arr)[i], file), i + 1);
        if (t == nullptr) throw config_error(where + ": must be a table [[variant]]");
        for (const auto& [k, v] : *t) {
            const std::string key(k.str());
            if (key != "name" && key != "label" && key != "set")
                throw config_error(fmt::format("{}: variant {}: {}: unknown key (known: name, label, set)", pack_where(v, file), i + 1, key));
        }
        variant_spec v;
        v.name = pack_string(*t, "name", "name", file);
        if (!is_variant_name(v.name))
            throw config_error(fmt::format("{}: name = \"{}\": needs letters, digits, '-', '_' or '.' only", where, v.name));
        v.label = pack_string(*t, "label", "label", file);
        if (v.label.empty()) v.label = v.name;
        read_set(*t, fmt::format("variant {}", i + 1), v.overrides, &v.origins);
        p.variants.push_back(std::move(v));
    }
    if (const toml::node* dn = root.get("dial_sweep")) {
        const auto* darr = dn->as_array();
        if (darr == nullptr) throw config_error(fmt::format("{}: dial_sweep: must be tables [[dial_sweep]]", pack_where(*dn, file)));
        if (darr->size() > 8)
            throw config_error(fmt::format("{}: [[dial_sweep]]: {} sweeps: must be at most 8", pack_where(*dn, file), darr->size()));
        for (std::size_t i = 0; i < darr->size(); ++i) {
            const auto* t = (*darr)[i].as_table();
            const std::string where = fmt::format("{}: dial_sweep {}", pack_where((*darr)[i], file), i + 1);
            if (t == nullptr) throw config_error(where + ": must be a table [[dial_sweep]]");
            for (const auto& [k, v] : *t) {
                const std::string key(k.str());
                if (key != "name" && key != "label" && key != "band" && key != "set" && key != "from_hz" && key != "to_hz" && key != "glide_s")
                    throw config_error(fmt::format("{}: dial_sweep {}: {}: unknown key (known: name, label, band, set, from_hz, to_hz, glide_s)",
                                                   pack_where(v, file), i + 1, key));
            }
            pack_dial_sweep d;
            d.name = pack_string(*t, "name", "name", file);
            if (!is_variant_name(d.name))
                throw config_error(fmt::format("{}: name = \"{}\": needs letters, digits, '-', '_' or '.' only", where, d.name));
            for (const auto& other : p.dial_sweeps)
                if (other.name == d.name) throw config_error(fmt::format("{}: name = \"{}\": used twice", where, d.name));
            d.label = pack_string(*t, "label", "label", file);
            if (d.label.empty()) d.label = d.name;
            const std::string band = pack_string(*t, "band", "band", file);
            if (band.empty()) throw config_error(where + ": band: missing (the band file: [band], [dial], [[station]])");
            d.band = fs::path(band).is_absolute() ? fs::path(band) : file.parent_path() / band;
            read_set(*t, fmt::format("dial_sweep {}", i + 1), d.overrides, nullptr);
            d.start_hz = pack_number(*t, "from_hz", "from_hz", file, unit::hertz);
            d.end_hz = pack_number(*t, "to_hz", "to_hz", file, unit::hertz);
            d.glide_s = pack_number(*t, "glide_s", "glide_s", file, unit::second);
            for (const auto& [key, value] : {std::pair{"from_hz", d.start_hz}, std::pair{"to_hz", d.end_hz}})
                if (value && !(*value >= 100e3 && *value <= 30e6))
                    throw config_error(fmt::format("{}: {} = {}: must be in [100 kHz, 30 MHz]", pack_where(*t->get(key), file), key,
                                                   detail::format_value(*value)));
            if (d.glide_s && !(*d.glide_s > 0.0 && *d.glide_s <= 600.0))
                throw config_error(fmt::format("{}: glide_s = {}: must be in (0, 600] s", pack_where(*t->get("glide_s"), file),
                                               detail::format_value(*d.glide_s)));
            p.dial_sweeps.push_back(std::move(d));
        }
    }
    return p;
}

pack_spec load_pack(const fs::path& file)
{
    const std::string text = read_text_input(file, "pack file");
    refuse_audio_file(file, text, "pack");
    return parse_pack(text, file);
}

bool is_pack_file(const fs::path& file)
{
    // The same capped, checked read as every input file (a device such as /dev/zero must not hang here);
    // a file that cannot be read is not a pack, and the caller's own read names the problem.
    std::string text;
    try {
        text = read_text_input(file, "pack file");
    } catch (const config_error&) {
        return false;
    }
    try {
        const toml::table root = toml::parse(text, file.string());
        return root.contains("pack") || root.contains("variant") || root.contains("dial_sweep");
    } catch (const toml::parse_error&) {
        return false;
    }
}

std::vector<scenario> load_pack_variants(const pack_spec& pack, const std::vector<std::string>& base_overrides)
{
    std::vector<scenario> out;
    for (std::size_t i = 0; i < pack.variants.size(); ++i) {
        const auto& v = pack.variants[i];
        for (std::size_t j = 0; j < i; ++j)
            if (pack.variants[j].name == v.name)
                throw config_error(fmt::format("{}: variant {}: name \"{}\" is used twice", pack.file.string(), i + 1, v.name));
        std::vector<std::string> ov = base_overrides;
        ov.insert(ov.end(), v.overrides.begin(), v.overrides.end());
        try {
            out.push_back(load_scenario(pack.scenario, ov));
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: variant {}: {}", pack.file.string(), v.name, e.what()));
        }
    }
    return out;
}

fs::path find_bundled_file(const fs::path& relative, const fs::path& executable, const fs::path& installed_data_dir)
{
    std::vector<fs::path> tried;
    auto hit = [&](const fs::path& dir) {
        tried.push_back(dir);
        std::error_code ec;
        return !dir.empty() && fs::is_regular_file(dir / relative, ec);
    };
    if (const char* env = std::getenv("GALENA_DATA_DIR"); env != nullptr && hit(env)) return fs::path(env) / relative;
    std::error_code ec;
    for (fs::path start : {fs::weakly_canonical(executable, ec).parent_path(), fs::current_path(ec)}) {
        for (fs::path d = start; !d.empty(); d = d.parent_path()) {
            if (hit(d)) return d / relative;
            if (d == d.parent_path()) break;
        }
    }
    if (!installed_data_dir.empty() && hit(installed_data_dir)) return installed_data_dir / relative;
    std::string where;
    for (const auto& t : tried) where += (where.empty() ? "" : ", ") + t.string();
    throw config_error(fmt::format("{}: bundled file not found (searched {}); set GALENA_DATA_DIR to the galena source folder",
                                   relative.string(), where));
}

} // namespace galena
