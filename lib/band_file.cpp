#include "galena/band_file.hpp"

#include "galena/error.hpp"
#include "galena/synthetic_programme.hpp"
#include "galena/text_table.hpp"
#include "galena/units.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <fmt/format.h>
#include <optional>
#include <set>
#include <toml++/toml.h>

namespace galena {

namespace fs = std::filesystem;

namespace {

std::string where(const toml::node& n, const fs::path& file)
{
    const auto& src = n.source();
    return src.begin.line > 0 ? fmt::format("{}:{}", file.string(), src.begin.line) : file.string();
}

void only_keys(const toml::table& t, const std::string& section, std::initializer_list<const char*> keys, const fs::path& file)
{
    for (const auto& [k, v] : t) {
        const std::string key(k.str());
        if (std::none_of(keys.begin(), keys.end(), [&](const char* x) { return key == x; })) {
            std::string known;
            for (const char* x : keys) known += (known.empty() ? "" : ", ") + std::string(x);
            throw config_error(fmt::format("{}: {}.{}: unknown key (known: {})", where(v, file), section, key, known));
        }
    }
}

std::optional<std::string> text_at(const toml::table& t, const char* key, const std::string& field, const fs::path& file)
{
    const toml::node* n = t.get(key);
    if (n == nullptr) return std::nullopt;
    if (auto v = n->value_exact<std::string>()) return *v;
    throw config_error(fmt::format("{}: {}: must be a string", where(*n, file), field));
}

/// A number (or engineering text with unit u), checked by `check` (which throws config_error with the rule).
template <class Check>
std::optional<double> number_at(const toml::table& t, const char* key, const std::string& field, const fs::path& file, unit u,
                                Check check)
{
    const toml::node* n = t.get(key);
    if (n == nullptr) return std::nullopt;
    double v = 0.0;
    std::string shown;
    if (auto d = n->value_exact<double>()) v = *d, shown = detail::format_value(v);
    else if (auto i = n->value_exact<int64_t>()) v = static_cast<double>(*i), shown = std::to_string(*i);
    else if (auto text = n->value_exact<std::string>()) {
        shown = "\"" + *text + "\"";
        try {
            v = parse_quantity(*text, u);
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: {} = {}: {}", where(*n, file), field, shown, e.what()));
        }
    } else {
        throw config_error(fmt::format("{}: {}: must be a number", where(*n, file), field));
    }
    try {
        check(field, v);
    } catch (const config_error& e) {
        // The rule from the shared range checks, with the file and line in front.
        throw config_error(fmt::format("{}: {}", where(*n, file), e.what()));
    }
    return v;
}

} // namespace

band_spec parse_band(const std::string& text, const fs::path& file)
{
    toml::table root;
    try {
        root = toml::parse(text, file.string());
    } catch (const toml::parse_error& e) {
        throw config_error(fmt::format("{}:{}: malformed TOML: {}", file.string(), e.source().begin.line, e.description()));
    }
    only_keys(root, "band file", {"band", "dial", "station"}, file);
    band_spec b;
    b.file = file;
    if (const auto* t = root["band"].as_table()) {
        only_keys(*t, "band", {"title"}, file);
        b.title = text_at(*t, "title", "band.title", file).value_or(b.title);
    }
    const auto* arr = root["station"].as_array();
    if (arr == nullptr || arr->empty()) throw config_error(fmt::format("{}: [[station]]: a band needs at least one station", file.string()));
    if (arr->size() > 64) throw config_error(fmt::format("{}: [[station]]: {} stations: must be at most 64", file.string(), arr->size()));
    std::set<std::string> names;
    for (std::size_t i = 0; i < arr->size(); ++i) {
        const auto* t = (*arr)[i].as_table();
        const std::string sec = fmt::format("station.{}", i + 1);
        if (t == nullptr) throw config_error(fmt::format("{}: {}: must be a table", where((*arr)[i], file), sec));
        only_keys(*t, sec, {"name", "carrier_hz", "field_v_per_m", "modulation_index", "programme", "tone_hz", "audio", "seed"}, file);
        band_station s;
        s.params.name = text_at(*t, "name", sec + ".name", file).value_or(fmt::format("station {}", i + 1));
        if (!names.insert(s.params.name).second)
            throw config_error(fmt::format("{}: {}.name = \"{}\": another station has this name", where(*t, file), sec, s.params.name));
        auto range = [](double lo, double hi, const char* u) {
            return [=](const std::string& f, double v) { detail::require_range(f, v, lo, hi, u); };
        };
        auto above = [](double lo, double hi, const char* u) {
            return [=](const std::string& f, double v) { detail::require_above(f, v, lo, hi, u); };
        };
        s.params.carrier_hz = number_at(*t, "carrier_hz", sec + ".carrier_hz", file, unit::hertz, range(1e4, 1e8, "Hz")).value_or(0.0);
        if (s.params.carrier_hz == 0.0) throw config_error(fmt::format("{}: {}.carrier_hz: missing", where(*t, file), sec));
        s.params.field_v_per_m =
            number_at(*t, "field_v_per_m", sec + ".field_v_per_m", file, unit::none, above(0.0, 100.0, "V/m")).value_or(s.params.field_v_per_m);
        s.params.modulation_index =
            number_at(*t, "modulation_index", sec + ".modulation_index", file, unit::none, range(0.0, 1.0, "")).value_or(s.params.modulation_index);
        // Without `programme`, a station with tone_hz plays that tone and one with audio its clip (speech-like
        // noise otherwise); a tone_hz or audio that the programme would not play is refused, not ignored.
        const bool has_tone = t->contains("tone_hz"), has_clip = t->contains("audio");
        if (has_tone && has_clip)
            throw config_error(fmt::format("{}: {}: tone_hz and audio: give one of them (the programme is a tone or a clip)",
                                           where(*t->get("audio"), file), sec));
        const std::string prog =
            text_at(*t, "programme", sec + ".programme", file).value_or(has_tone ? "tone" : has_clip ? "clip" : "speech-noise");
        if ((has_tone && prog != "tone") || (has_clip && prog != "clip"))
            throw config_error(fmt::format("{}: {}.{}: not played by programme = \"{}\" (give programme = \"{}\", or remove it)",
                                           where(*t->get(has_tone ? "tone_hz" : "audio"), file), sec, has_tone ? "tone_hz" : "audio", prog,
                                           has_tone ? "tone" : "clip"));
        if (prog == "tone") s.programme = band_programme::tone;
        else if (prog == "speech-noise") s.programme = band_programme::speech_noise;
        else if (prog == "clip") s.programme = band_programme::clip;
        else
            throw config_error(fmt::format("{}: {}.programme = \"{}\": must be tone, speech-noise or clip", where(*t->get("programme"), file), sec, prog));
        s.tone_hz = number_at(*t, "tone_hz", sec + ".tone_hz", file, unit::hertz, above(0.0, 20000.0, "Hz")).value_or(s.tone_hz);
        s.seed = static_cast<std::uint64_t>(
            number_at(*t, "seed", sec + ".seed", file, unit::none, range(0.0, 9007199254740992.0, "")).value_or(static_cast<double>(i + 1)));
        if (auto a = text_at(*t, "audio", sec + ".audio", file)) {
            fs::path p(*a);
            s.audio = p.is_absolute() ? p : file.parent_path() / p;
        }
        if (s.programme == band_programme::clip && s.audio.empty())
            throw config_error(fmt::format("{}: {}.audio: missing (programme = \"clip\" needs a file)", where(*t, file), sec));
        b.stations.push_back(std::move(s));
    }
    double lo = 1e300, hi = 0.0;
    for (const auto& s : b.stations) lo = std::min(lo, s.params.carrier_hz), hi = std::max(hi, s.params.carrier_hz);
    b.dial.start_hz = std::max(1e4, lo - 5e3);
    b.dial.end_hz = hi + 5e3;
    b.dial.glide_s = 10.0;
    if (const auto* t = root["dial"].as_table()) {
        only_keys(*t, "dial", {"from_hz", "to_hz", "glide_s", "law", "stops", "dwell_s"}, file);
        b.dial.start_hz = number_at(*t, "from_hz", "dial.from_hz", file, unit::hertz, [](const std::string& f, double v) {
                              detail::require_range(f, v, 1e4, 1e8, "Hz");
                          }).value_or(b.dial.start_hz);
        b.dial.end_hz = number_at(*t, "to_hz", "dial.to_hz", file, unit::hertz, [](const std::string& f, double v) {
                            detail::require_range(f, v, 1e4, 1e8, "Hz");
                        }).value_or(b.dial.end_hz);
        b.dial.glide_s = number_at(*t, "glide_s", "dial.glide_s", file, unit::second, [](const std::string& f, double v) {
                             detail::require_above(f, v, 0.0, 3600.0, "s");
                         }).value_or(b.dial.glide_s);
        b.dial.dwell_s = number_at(*t, "dwell_s", "dial.dwell_s", file, unit::second, [](const std::string& f, double v) {
                             detail::require_range(f, v, 0.0, 3600.0, "s");
                         }).value_or(b.dial.dwell_s);
        const std::string law = text_at(*t, "law", "dial.law", file).value_or("frequency");
        if (law == "frequency") b.dial.law = dial_law::frequency;
        else if (law == "capacitance") b.dial.law = dial_law::capacitance;
        else throw config_error(fmt::format("{}: dial.law = \"{}\": must be frequency or capacitance", where(*t->get("law"), file), law));
        const std::string stops = text_at(*t, "stops", "dial.stops", file).value_or("");
        if (stops == "stations") {
            for (const auto& s : b.stations) b.dial.stops_hz.push_back(s.params.carrier_hz);
            std::sort(b.dial.stops_hz.begin(), b.dial.stops_hz.end());
        } else if (!stops.empty()) {
            throw config_error(fmt::format("{}: dial.stops = \"{}\": must be \"stations\" or empty", where(*t->get("stops"), file), stops));
        }
    }
    return b;
}

band_spec load_band(const fs::path& file)
{
    const std::string text = read_text_input(file, "band file");
    refuse_audio_file(file, text, "band file");
    return parse_band(text, file);
}

std::vector<std::unique_ptr<modulation>> make_band_programmes(const band_spec& band, const scenario& base, double duration_s)
{
    std::vector<std::unique_ptr<modulation>> out;
    for (const auto& s : band.stations) {
        switch (s.programme) {
        case band_programme::tone:
            out.push_back(std::make_unique<tone_modulation>(std::vector{s.tone_hz}, std::vector{1.0}, duration_s));
            break;
        case band_programme::speech_noise:
            out.push_back(std::make_unique<speech_noise_modulation>(duration_s, s.seed));
            break;
        case band_programme::clip: {
            scenario one = base;
            one.programme.kind = programme_kind::clip;
            one.programme.audio = s.audio;
            one.programme.duration_s = duration_s;
            out.push_back(make_programme(one));
            break;
        }
        }
    }
    return out;
}

} // namespace galena
