#include "galena/scenario.hpp"
#include "galena/text_table.hpp"

#include "galena/error.hpp"
#include "galena/units.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cctype>
#include <cerrno>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <fmt/format.h>
#include <fstream>
#include <functional>
#include <limits>
#include <map>
#include <optional>
#include <sstream>
#include <toml++/toml.h>
#include <type_traits>

namespace galena {

namespace fs = std::filesystem;

namespace {

/// Where a key came from, for messages.
struct key_origin {
    std::string where; // "file:line" or "--set"
};

std::string source_of(const toml::node& n, const fs::path& file)
{
    const auto& src = n.source();
    if (src.begin.line > 0) return fmt::format("{}:{}", file.string(), src.begin.line);
    return file.string();
}

/// The node as TOML text, one line, for messages ("big" quoted, arrays and tables inline; long text cut).
std::string node_text(const toml::node& n)
{
    std::ostringstream os;
    n.visit([&](const auto& v) {
        if constexpr (toml::is_table<decltype(v)>) os << "{ table }";
        else os << v;
    });
    std::string t = detail::one_line(os.str());
    if (t.size() > 60) t = t.substr(0, 57) + "...";
    return t;
}

/// A number, or text in engineering notation for a key measured in `u` (parse_quantity: "47k", "10nF").
double as_number(const toml::node& n, const std::string& field, const std::string& where, unit u)
{
    if (auto v = n.value_exact<double>()) return *v;
    if (auto v = n.value_exact<int64_t>()) return static_cast<double>(*v);
    if (auto s = n.value_exact<std::string>()) {
        try {
            return parse_quantity(*s, u);
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: {} = {}: {}", where, field, node_text(n), e.what()));
        }
    }
    throw config_error(fmt::format("{}: {} = {}: must be a number, e.g. 47e3 or \"47k\" (README \"Values\")", where, field, node_text(n)));
}

/// Whether a tuner.capacitance_f node sets the dial: a capacitance other than 0 (0 asks for it to be solved
/// from tuned_hz). A value that does not parse counts as set: its key reports it.
bool sets_dial_capacitance(const toml::node& n)
{
    try {
        return as_number(n, "tuner.capacitance_f", "", unit::farad) != 0.0;
    } catch (const config_error&) {
        return true;
    }
}

std::string as_string(const toml::node& n, const std::string& field, const std::string& where)
{
    if (auto s = n.value_exact<std::string>()) return *s;
    throw config_error(fmt::format("{}: {} = {}: must be a string", where, field, node_text(n)));
}

bool as_bool(const toml::node& n, const std::string& field, const std::string& where)
{
    if (auto b = n.value_exact<bool>()) return *b;
    throw config_error(fmt::format("{}: {} = {}: must be true or false", where, field, node_text(n)));
}

std::size_t edit_distance(std::string_view a, std::string_view b)
{
    std::vector<std::size_t> prev(b.size() + 1), cur(b.size() + 1);
    for (std::size_t j = 0; j <= b.size(); ++j) prev[j] = j;
    for (std::size_t i = 1; i <= a.size(); ++i) {
        cur[0] = i;
        for (std::size_t j = 1; j <= b.size(); ++j)
            cur[j] = std::min({prev[j] + 1, cur[j - 1] + 1, prev[j - 1] + (a[i - 1] == b[j - 1] ? 0 : 1)});
        std::swap(prev, cur);
    }
    return prev[b.size()];
}

using setter = std::function<void(scenario&, const toml::node&, const std::string& field, const std::string& where)>;

/// One key of the contract: how to set it from a TOML node, and for numeric keys their unit (the one
/// source of the unit a value may carry) and the field they fill (for hints).
struct key_entry {
    setter set;
    unit u = unit::none;
    bool numeric = false;
    std::function<double&(scenario&)> ref; ///< the field, for numeric keys stored as a double

    /// A text or flag key.
    template <class F>
        requires std::is_invocable_v<F, scenario&, const toml::node&, const std::string&, const std::string&>
    key_entry(F f) : set(std::move(f)) // NOLINT(google-explicit-constructor): table entries read as plain lambdas
    {
    }
    key_entry(setter f, unit unit_, std::function<double&(scenario&)> field)
        : set(std::move(f)), u(unit_), numeric(true), ref(std::move(field))
    {
    }
};

/// A numeric key stored as a double, measured in `u`.
template <class Get>
key_entry quantity(unit u, Get get)
{
    return key_entry([get, u](scenario& s, const toml::node& n, const std::string& f, const std::string& w) { get(s) = as_number(n, f, w, u); },
                     u, get);
}

/// The old spelling of a numeric key, kept so that a table entry written before units existed still builds;
/// the warning names the fix.
template <class Get>
[[deprecated("give the key its unit: quantity(unit::ohm, get), quantity(unit::hertz, get), ... (units.hpp)")]] key_entry
number_into(Get get)
{
    return quantity(unit::none, get);
}

/// Every key of the contract, by section. Order matters only for to_toml and listings.
const std::map<std::string, std::map<std::string, key_entry>>& key_table()
{
    static const std::map<std::string, std::map<std::string, key_entry>> t = {
        {"signal",
         {
             {"audio", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  s.programme.audio = as_string(n, f, w);
                  if (s.programme.audio.empty()) throw config_error(fmt::format("{}: {} = \"\": must name an audio file", w, f));
                  s.programme.kind = programme_kind::clip;
              }},
             {"tone_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.programme.tone_hz; })},
             {"tone2_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.programme.tone2_hz; })},
             {"tone_ratio", quantity(unit::none, [](scenario& s) -> double& { return s.programme.tone_ratio; })},
             {"sweep_start_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.programme.sweep_start_hz; })},
             {"sweep_stop_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.programme.sweep_stop_hz; })},
             {"test_signal", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  const std::string v = as_string(n, f, w);
                  if (v == "tone") s.programme.kind = programme_kind::tone;
                  else if (v == "two-tone") s.programme.kind = programme_kind::two_tone;
                  else if (v == "log-sweep") s.programme.kind = programme_kind::log_sweep;
                  else throw config_error(fmt::format("{}: {} = \"{}\": must be one of tone, two-tone, log-sweep", w, f, v));
              }},
             {"duration_s", quantity(unit::second, [](scenario& s) -> double& { return s.programme.duration_s; })},
             {"carrier_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.am.carrier_hz; })},
             {"carrier_peak_v", quantity(unit::volt, [](scenario& s) -> double& { return s.am.carrier_peak_v; })},
             {"modulation_index", quantity(unit::none, [](scenario& s) -> double& { return s.am.modulation_index; })},
             {"allow_overmodulation", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  s.am.allow_overmodulation = as_bool(n, f, w);
              }},
             {"audio_cutoff_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.programme.audio_cutoff_hz; })},
         }},
        {"source", {{"resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.source.resistance_ohm; })}}},
        {"diode",
         {
             {"preset", [](scenario&, const toml::node&, const std::string&, const std::string&) {}}, // applied first
             {"file", [](scenario&, const toml::node&, const std::string&, const std::string&) {}},   // applied first
             {"saturation_current_a", quantity(unit::ampere, [](scenario& s) -> double& { return s.circuit.diode.saturation_current_a; })},
             {"emission_coefficient", quantity(unit::none, [](scenario& s) -> double& { return s.circuit.diode.emission_coefficient; })},
             {"series_resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.diode.series_resistance_ohm; })},
             {"leakage_resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.diode.leakage_resistance_ohm; })},
             {"junction_capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.circuit.diode.junction_capacitance_f; })},
             {"junction_potential_v", quantity(unit::volt, [](scenario& s) -> double& { return s.circuit.diode.junction_potential_v; })},
             {"grading_coefficient", quantity(unit::none, [](scenario& s) -> double& { return s.circuit.diode.grading_coefficient; })},
             {"breakdown_voltage_v", quantity(unit::volt, [](scenario& s) -> double& { return s.circuit.diode.breakdown_voltage_v; })},
             {"breakdown_current_a", quantity(unit::ampere, [](scenario& s) -> double& { return s.circuit.diode.breakdown_current_a; })},
             {"temperature_c", quantity(unit::celsius, [](scenario& s) -> double& { return s.circuit.diode.temperature_c; })},
             {"nominal_temperature_c", quantity(unit::celsius, [](scenario& s) -> double& { return s.circuit.diode.nominal_temperature_c; })},
             {"energy_gap_ev", quantity(unit::electronvolt, [](scenario& s) -> double& { return s.circuit.diode.energy_gap_ev; })},
             {"saturation_current_exponent", quantity(unit::none, [](scenario& s) -> double& { return s.circuit.diode.saturation_current_exponent; })},
         }},
        {"load",
         {
             {"bleeder_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.load.bleeder_ohm; })},
             {"filter_capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.circuit.load.filter_capacitance_f; })},
             {"stray_capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.circuit.load.stray_capacitance_f; })},
         }},
        {"earpiece",
         {
             {"kind", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  try {
                      s.circuit.earpiece.kind = parse_earpiece_kind(as_string(n, f, w));
                  } catch (const config_error& e) {
                      throw config_error(fmt::format("{}: {}", w, e.what()));
                  }
              }},
             {"capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.circuit.earpiece.capacitance_f; })},
             {"leakage_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.earpiece.leakage_ohm; })},
             {"motional_resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.earpiece.motional_resistance_ohm; })},
             {"motional_inductance_h", quantity(unit::henry, [](scenario& s) -> double& { return s.circuit.earpiece.motional_inductance_h; })},
             {"motional_capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.circuit.earpiece.motional_capacitance_f; })},
             {"resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.earpiece.resistance_ohm; })},
             {"inductance_h", quantity(unit::henry, [](scenario& s) -> double& { return s.circuit.earpiece.inductance_h; })},
             {"loss_resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.circuit.earpiece.loss_resistance_ohm; })},
             {"piezo_force_factor_n_per_volt", quantity(unit::none, [](scenario& s) -> double& { return s.circuit.earpiece.piezo_force_factor_n_per_volt; })},
             {"magnetic_force_factor_tm", quantity(unit::none, [](scenario& s) -> double& { return s.circuit.earpiece.magnetic_force_factor_tm; })},
         }},
        {"output",
         {
             {"sample_rate_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.render.audio_rate_hz; })},
             // "auto" (any case) or 0: the automatic full scale; otherwise a voltage.
             {"full_scale_v", key_entry(
                                  [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                                      if (n.is_string()) {
                                          std::string t(*n.value<std::string>());
                                          for (char& c : t) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
                                          if (t == "auto") {
                                              s.output.full_scale_v = 0.0;
                                              return;
                                          }
                                      }
                                      try {
                                          s.output.full_scale_v = as_number(n, f, w, unit::volt);
                                      } catch (const config_error& e) {
                                          throw config_error(std::string(e.what()) + ", or \"auto\" (the default: chosen from the loudest peak)");
                                      }
                                  },
                                  unit::volt, [](scenario& s) -> double& { return s.output.full_scale_v; })},
             {"format", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  try {
                      s.output.format = parse_wav_format(as_string(n, f, w));
                  } catch (const config_error& e) {
                      throw config_error(fmt::format("{}: {}", w, e.what()));
                  }
              }},
         }},
        {"solver",
         {
             {"relative_tolerance", quantity(unit::none, [](scenario& s) -> double& { return s.render.stepper.relative_tolerance; })},
             {"absolute_tolerance_v", quantity(unit::volt, [](scenario& s) -> double& { return s.render.stepper.absolute_tolerance_v; })},
             {"preroll_s", quantity(unit::second, [](scenario& s) -> double& { return s.render.preroll_s; })},
             {"dc_block_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.render.dc_block_hz; })},
             {"carrier_steps_floor", quantity(unit::none, [](scenario& s) -> double& { return s.render.carrier_steps_floor; })},
             {"method", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  try {
                      s.render.method = parse_solver_method(as_string(n, f, w));
                  } catch (const config_error& e) {
                      throw config_error(fmt::format("{}: {}", w, e.what()));
                  }
              }},
             {"steps_per_cycle", key_entry([](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  const double v = as_number(n, f, w, unit::none);
                  if (!(v == 0.0 || (v >= 8.0 && v <= 4096.0 && std::floor(v) == v && std::fmod(v, 2.0) == 0.0)))
                      throw config_error(fmt::format("{}: {} = {}: must be 0 (automatic) or an even whole number in [8, 4096]", w,
                                                     f, detail::format_value(v)));
                  s.render.steps_per_cycle = static_cast<int>(v);
              }, unit::none, nullptr)},
             {"dc_tolerance", quantity(unit::none, [](scenario& s) -> double& { return s.render.dc_tolerance; })},
             {"newton_tolerance", quantity(unit::none, [](scenario& s) -> double& { return s.render.newton_tolerance; })},
         }},
        {"antenna",
         {
             {"preset", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  s.antenna.preset = as_string(n, f, w);
                  if (s.antenna.preset != "standard-dummy")
                      throw config_error(fmt::format("{}: {} = \"{}\": must be standard-dummy (or leave it out and give the fields)", w, f,
                                                     s.antenna.preset));
              }},
             {"effective_height_m", quantity(unit::metre, [](scenario& s) -> double& { return s.antenna.effective_height_m; })},
             {"capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.antenna.capacitance_f; })},
             {"inductance_h", quantity(unit::henry, [](scenario& s) -> double& { return s.antenna.inductance_h; })},
             {"resistance_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.antenna.resistance_ohm; })},
             // Background noise: V/m per sqrt(Hz) (engineering prefixes: "8n"), or "quiet-rural" (stations.hpp).
             {"noise_field_density", key_entry([](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  if (auto v = n.value_exact<std::string>(); v && *v == "quiet-rural") {
                      s.noise.field_density = quiet_rural_noise_field_density();
                      return;
                  }
                  try {
                      s.noise.field_density = as_number(n, f, w, unit::none);
                  } catch (const config_error& e) {
                      if (!n.is_string()) throw;
                      throw config_error(fmt::format("{}; or \"quiet-rural\"", e.what()));
                  }
              }, unit::none, [](scenario& s) -> double& { return s.noise.field_density; })},
             {"noise_half_band_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.noise.half_band_hz; })},
             {"noise_seed", key_entry([](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  const double v = as_number(n, f, w, unit::none);
                  if (!(v >= 0.0 && v <= 9007199254740992.0 && std::floor(v) == v))
                      throw config_error(fmt::format("{}: {} = {}: must be a whole number in [0, 2^53]", w, f, detail::format_value(v)));
                  s.noise.seed = static_cast<std::uint64_t>(v);
              }, unit::none, nullptr)},
         }},
        {"tuner",
         {
             {"layout", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  try {
                      s.tuner.layout = parse_tuner_layout(as_string(n, f, w));
                  } catch (const config_error& e) {
                      throw config_error(fmt::format("{}: {}", w, e.what()));
                  }
              }},
             {"coil_h", quantity(unit::henry, [](scenario& s) -> double& { return s.tuner.coil_h; })},
             {"coil_q", quantity(unit::none, [](scenario& s) -> double& { return s.tuner.coil_q; })},
             {"tuned_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.tuner.tuned_hz; })},
             {"capacitance_f", quantity(unit::farad, [](scenario& s) -> double& { return s.tuner.capacitance_f; })},
             {"detector_tap", quantity(unit::none, [](scenario& s) -> double& { return s.tuner.detector_tap; })},
             {"antenna_tap", quantity(unit::none, [](scenario& s) -> double& { return s.tuner.antenna_tap; })},
             {"antenna_coil_h", quantity(unit::henry, [](scenario& s) -> double& { return s.tuner.antenna_coil_h; })},
             {"antenna_coil_q", quantity(unit::none, [](scenario& s) -> double& { return s.tuner.antenna_coil_q; })},
             {"coupling", quantity(unit::none, [](scenario& s) -> double& { return s.tuner.coupling; })},
             {"dc_return_ohm", quantity(unit::ohm, [](scenario& s) -> double& { return s.tuner.dc_return_ohm; })},
         }},
        // [[station]]: an array of tables; each key sets the station being read (the last one).
        {"station",
         {
             {"name", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  s.stations.back().params.name = as_string(n, f, w);
              }},
             // Numeric keys with their unit (sweeps and hints read it from here), filling the station being read.
             {"carrier_hz", quantity(unit::hertz, [](scenario& s) -> double& { return s.stations.back().params.carrier_hz; })},
             // V/m is no unit of units.hpp: read as a plain number (and listed as a text key, so that the name's
             // "_m" is not taken for metres).
             {"field_v_per_m", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) { s.stations.back().params.field_v_per_m = as_number(n, f, w, unit::none); }},
             {"modulation_index", quantity(unit::none, [](scenario& s) -> double& { return s.stations.back().params.modulation_index; })},
             {"tone_hz", key_entry(
                             [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                                 s.stations.back().tone_hz = as_number(n, f, w, unit::hertz);
                                 s.stations.back().kind = programme_kind::tone;
                             },
                             unit::hertz, [](scenario& s) -> double& { return s.stations.back().tone_hz; })},
             {"audio", [](scenario& s, const toml::node& n, const std::string& f, const std::string& w) {
                  s.stations.back().audio = as_string(n, f, w);
                  if (s.stations.back().audio.empty()) throw config_error(fmt::format("{}: {} = \"\": must name an audio file", w, f));
                  s.stations.back().kind = programme_kind::clip;
              }},
         }},
    };
    return t;
}

std::string nearest(std::string_view word, const std::vector<std::string>& candidates)
{
    std::string best;
    std::size_t best_d = std::numeric_limits<std::size_t>::max();
    for (const auto& c : candidates) {
        const std::size_t dd = edit_distance(word, c);
        if (dd < best_d) {
            best_d = dd;
            best = c;
        }
    }
    return best_d <= std::max<std::size_t>(3, word.size() / 2) ? best : std::string();
}

/// True for well-formed UTF-8 (no overlong forms, surrogates or code points above U+10FFFF).
bool valid_utf8(std::string_view s)
{
    std::size_t i = 0;
    while (i < s.size()) {
        const auto c = static_cast<unsigned char>(s[i]);
        std::size_t n = 0;
        std::uint32_t cp = 0;
        if (c < 0x80) { ++i; continue; }
        if ((c & 0xE0) == 0xC0) { n = 1; cp = c & 0x1Fu; }
        else if ((c & 0xF0) == 0xE0) { n = 2; cp = c & 0x0Fu; }
        else if ((c & 0xF8) == 0xF0) { n = 3; cp = c & 0x07u; }
        else return false;
        if (i + n >= s.size()) return false;
        for (std::size_t k = 1; k <= n; ++k) {
            const auto d = static_cast<unsigned char>(s[i + k]);
            if ((d & 0xC0) != 0x80) return false;
            cp = (cp << 6) | (d & 0x3Fu);
        }
        if ((n == 1 && cp < 0x80) || (n == 2 && cp < 0x800) || (n == 3 && cp < 0x10000) || cp > 0x10FFFF ||
            (cp >= 0xD800 && cp <= 0xDFFF))
            return false;
        i += n + 1;
    }
    return true;
}

/// The valid "section.key" fields nearest to `text` (given with or without its section), for hints.
std::vector<std::string> nearest_fields(std::string_view text)
{
    std::vector<std::string> exact, all;
    for (const auto& [sec, keys] : key_table())
        for (const auto& [key, entry] : keys) {
            all.push_back(sec + "." + key);
            if (key == text) exact.push_back(sec + "." + key);
        }
    if (!exact.empty() || text.find('.') != std::string_view::npos) {
        if (!exact.empty()) return exact;
        const std::string near = nearest(text, all);
        return near.empty() ? std::vector<std::string>{} : std::vector<std::string>{near};
    }
    // A key without its section: the nearest key name, in every section that has it.
    std::vector<std::string> names;
    for (const auto& f : all) names.push_back(f.substr(f.find('.') + 1));
    const std::string near = nearest(text, names);
    std::vector<std::string> out;
    if (!near.empty())
        for (const auto& f : all)
            if (f.substr(f.find('.') + 1) == near) out.push_back(f);
    return out;
}

/// " (did you mean load.bleeder_ohm=VALUE?)" for an override or axis written without its section.
std::string field_hint(std::string_view key, std::string_view value)
{
    const auto fields = nearest_fields(key);
    if (fields.empty()) return {};
    std::string list;
    for (std::size_t i = 0; i < fields.size(); ++i)
        list += fmt::format("{}{}={}", i == 0 ? "" : (i + 1 == fields.size() ? " or " : ", "), fields[i], value);
    return fmt::format(" (did you mean {}?)", list);
}

/// Where a --set of a station points: its table in the [[station]] list and its 1-based number, and the key.
struct station_target {
    toml::table* table = nullptr; ///< null: a plain station.key (no [[station]] list to address)
    std::size_t number = 0;
    std::string key;
};

/// Resolves "station.N.key" (key = "N.key" after the section) against the [[station]] list of `root`.
/// "station.key" without a number is accepted only where the file has no [[station]] list (it then makes
/// one [station] table). Throws config_error naming the override and the rule.
station_target station_address(const std::string& o, const std::string& key, toml::table& root)
{
    toml::array* list = root["station"].as_array();
    const auto dot = key.find('.');
    const std::string number_text = key.substr(0, dot);
    const bool numbered = dot != std::string::npos && !number_text.empty() &&
                          std::all_of(number_text.begin(), number_text.end(), [](unsigned char c) { return std::isdigit(c); });
    const std::size_t count = list != nullptr ? list->size() : 0;
    if (numbered && list == nullptr && root["station"].is_table() && number_text == "1") {
        // One [station] table (not a list): it is station 1.
        return {root["station"].as_table(), 1, key.substr(dot + 1)};
    }
    if (!numbered) {
        if (list == nullptr) return {};
        throw config_error(fmt::format("--set {}: the scenario has {} [[station]] table{}: address one as station.N.{} with N from 1 "
                                       "(the wanted station) to {}",
                                       o, count, count == 1 ? "" : "s", key, count));
    }
    station_target t;
    t.key = key.substr(dot + 1);
    if (t.key.empty() || t.key.find('.') != std::string::npos)
        throw config_error(fmt::format("--set {}: must look like station.N.key=value", o));
    // Whole numbers only, and no more digits than any list can hold (no overflow).
    t.number = number_text.size() > 6 ? 0 : static_cast<std::size_t>(std::stoul(number_text));
    if (t.number < 1 || t.number > count)
        throw config_error(fmt::format("--set {}: station {}: {}", o, number_text,
                                       count == 0 ? std::string("the scenario has no [[station]] tables to address")
                                                  : fmt::format("must be a station number from 1 to {} (the scenario's [[station]] "
                                                                "tables in file order)",
                                                                count)));
    t.table = (*list)[t.number - 1].as_table();
    if (t.table == nullptr) throw config_error(fmt::format("--set {}: station {} is not a table", o, t.number));
    return t;
}

/// A file named on the command line (a clip, a diode file): relative to the current directory, not to the
/// scenario file, so made absolute here. Throws config_error naming the override.
std::string command_line_path(const std::string& o, const std::string& field, const std::string& path)
{
    std::error_code ec;
    const fs::path abs = fs::absolute(fs::path(path), ec);
    if (ec) throw config_error(fmt::format("--set {}: {}: cannot resolve the path: {}", o, field, ec.message()));
    return abs.string();
}

/// Two keys that set one thing two ways (a tuned frequency or a tuning capacitance; a station's tone or
/// clip): the one just set replaces `other` in `tab`, whether the file or an earlier override set it (the
/// last override wins: a pack item's `set` on top of the command line's). `field` is other's origin name.
void drop_alternative(toml::table& tab, std::map<std::string, std::string>& origin, const std::string& other, const std::string& field)
{
    tab.erase(other);
    origin.erase(field);
}

/// Applies the overrides; returns, for each field set, the --set text that set it (for messages).
std::map<std::string, std::string> apply_overrides(toml::table& root, const std::vector<std::string>& overrides)
{
    std::map<std::string, std::string> origin;
    for (const auto& o : overrides) {
        const auto eq = o.find('=');
        const auto dot = o.find('.');
        if (eq == std::string::npos || dot == std::string::npos || dot > eq)
            throw config_error(fmt::format("--set {}: must look like section.key=value{}", o,
                                           eq == std::string::npos ? std::string() : field_hint(o.substr(0, eq), o.substr(eq + 1))));
        const std::string section = o.substr(0, dot);
        const std::string key = o.substr(dot + 1, eq - dot - 1);
        const std::string value = o.substr(eq + 1);
        if (section.empty() || key.empty())
            throw config_error(fmt::format("--set {}: must look like section.key=value", o));
        if (!valid_utf8(o)) throw config_error(fmt::format("--set {}: must be valid UTF-8 text", o));
        if (section == "station") {
            // One station of a [[station]] list: station.N.key (N from 1, the wanted station, in file order).
            const auto at = station_address(o, key, root);
            if (at.table != nullptr) {
                origin[fmt::format("station.{}.{}", at.number, at.key)] = o;
                try {
                    toml::table parsed = toml::parse("v = " + value);
                    at.table->insert_or_assign(at.key, *parsed["v"].node());
                } catch (const toml::parse_error&) {
                    at.table->insert_or_assign(at.key, value); // a bare word: a string
                }
                // A station's programme is a test tone or a clip (a clip named here is relative to the current
                // directory, as signal.audio).
                if (at.key == "audio") {
                    if (const auto str = at.table->get(at.key)->value<std::string>(); str && !str->empty())
                        at.table->insert_or_assign(at.key, command_line_path(o, fmt::format("station.{}.audio", at.number), *str));
                    drop_alternative(*at.table, origin, "tone_hz", fmt::format("station.{}.tone_hz", at.number));
                }
                if (at.key == "tone_hz") drop_alternative(*at.table, origin, "audio", fmt::format("station.{}.audio", at.number));
                continue;
            }
        }
        origin[section + "." + key] = o;
        if (root.contains(section) && !root[section].is_table())
            throw config_error(fmt::format("--set {}: {} is not a section in the scenario file", o, section));
        toml::table* tab = root[section].as_table();
        if (tab == nullptr) {
            root.insert(section, toml::table{});
            tab = root[section].as_table();
        }
        if ((section == "signal" && key == "audio") || (section == "diode" && key == "file")) {
            // A clip or diode file named on the command line is relative to the current directory, not to
            // the scenario file. The value may be a bare path or a quoted TOML string.
            std::string path = value;
            try {
                toml::table parsed = toml::parse("v = " + value);
                if (auto str = parsed["v"].value<std::string>()) path = *str;
            } catch (const toml::parse_error&) {
            }
            if (path.empty())
                throw config_error(fmt::format("--set {}: {}.{}: the {} path is empty", o, section, key, key == "audio" ? "clip" : "diode file"));
            const std::string abs = command_line_path(o, section + "." + key, path);
            if (section == "diode" && !origin.contains("diode.preset")) tab->erase("preset");
            tab->insert_or_assign(key, abs);
            continue;
        }
        // A diode file on the command line replaces a preset in the scenario file, and the other way round.
        if (section == "diode" && key == "file" && !origin.contains("diode.preset")) tab->erase("preset");
        if (section == "diode" && key == "preset" && !origin.contains("diode.file")) tab->erase("file");
        try {
            toml::table parsed = toml::parse("v = " + value);
            tab->insert_or_assign(key, *parsed["v"].node());
        } catch (const toml::parse_error&) {
            tab->insert_or_assign(key, value); // a bare word: a string
        }
        // The dial is set one way at a time: a tuned frequency, or a capacitance (0 asks for it to be solved).
        if (section == "tuner" && key == "tuned_hz") drop_alternative(*tab, origin, "capacitance_f", "tuner.capacitance_f");
        if (section == "tuner" && key == "capacitance_f" && sets_dial_capacitance(*tab->get(key)))
            drop_alternative(*tab, origin, "tuned_hz", "tuner.tuned_hz");
    }
    return origin;
}

/// Where a field's value came from: "file:line", or "file (--set TEXT)" for an override.
std::string origin_of(const toml::node& n, const std::string& field, const fs::path& file,
                      const std::map<std::string, std::string>& overridden)
{
    if (auto it = overridden.find(field); it != overridden.end()) return fmt::format("{} (--set {})", file.string(), it->second);
    return source_of(n, file);
}

/// Finds "file:line" for a dotted field name, for messages raised after parsing.
std::string where_is(const toml::table& root, std::string_view field, const fs::path& file,
                     const std::map<std::string, std::string>& overridden)
{
    const auto dot = field.find('.');
    if (dot == std::string_view::npos) return file.string();
    if (auto it = overridden.find(std::string(field)); it != overridden.end())
        return fmt::format("{} (--set {})", file.string(), it->second);
    const toml::node* n = root.at_path(field).node();
    return n != nullptr ? source_of(*n, file) : file.string();
}

/// Every rule that spans keys or belongs to the models; throws config_error "section.key = VALUE: rule".
void validate_scenario(const scenario& s)
{
    s.am.validate();
    (void)detector_network(s.circuit);
    auto& p = s.programme;
    detail::require_range("signal.duration_s", p.duration_s, 0.0, 36000.0, "s");
    if (p.kind != programme_kind::clip && !(p.duration_s > 0.0))
        throw config_error(fmt::format("signal.duration_s = {}: a test signal needs a duration > 0 s",
                                       detail::format_value(p.duration_s)));
    const double nyq = 0.5 * s.render.audio_rate_hz;
    detail::require_range("output.sample_rate_hz", s.render.audio_rate_hz, 8000.0, 192000.0, "Hz");
    detail::require_range("signal.audio_cutoff_hz", p.audio_cutoff_hz, 100.0, 20000.0, "Hz");
    if (p.kind == programme_kind::tone || p.kind == programme_kind::two_tone)
        detail::require_range("signal.tone_hz", p.tone_hz, 1.0, 0.45 * 2.0 * nyq, "Hz");
    if (p.kind == programme_kind::two_tone) {
        detail::require_range("signal.tone2_hz", p.tone2_hz, 1.0, 0.45 * 2.0 * nyq, "Hz");
        detail::require_range("signal.tone_ratio", p.tone_ratio, 1e-3, 1e3);
        // The IMD analysis fits f2 +- k f1 for k = 1..3 (metrics, analyze_two_tone): all inside (0, 0.49 fs).
        if (!(p.tone2_hz - 3.0 * p.tone_hz > 0.0) || !(p.tone2_hz + 3.0 * p.tone_hz < 0.49 * s.render.audio_rate_hz))
            throw config_error(fmt::format("signal.tone2_hz = {}: with signal.tone_hz = {} the IMD analysis needs tone2_hz - 3 x "
                                           "tone_hz > 0 and tone2_hz + 3 x tone_hz < 0.49 x output.sample_rate_hz = {} Hz (its "
                                           "sidebands up to the third order inside the band)",
                                           detail::format_value(p.tone2_hz), detail::format_value(p.tone_hz),
                                           detail::format_value(0.49 * s.render.audio_rate_hz)));
    }
    if (p.kind == programme_kind::log_sweep) {
        detail::require_range("signal.sweep_start_hz", p.sweep_start_hz, 1.0, nyq, "Hz");
        detail::require_above("signal.sweep_stop_hz", p.sweep_stop_hz, p.sweep_start_hz, nyq, "Hz");
    }
    // 1 nV floor: a subnormal full scale passes "> 0" but its inverse overflows at write time.
    if (s.output.full_scale_v != 0.0) // 0: automatic
        detail::require_range("output.full_scale_v", s.output.full_scale_v, 1e-9, 1e4, "V");
    detail::require_range("solver.relative_tolerance", s.render.stepper.relative_tolerance, 1e-10, 1e-1);
    detail::require_above("solver.absolute_tolerance_v", s.render.stepper.absolute_tolerance_v, 0.0, 1.0, "V");
    // -1 (the default, written by to_toml) asks for the automatic preroll; any other value is a duration.
    if (s.render.preroll_s != -1.0)
        detail::require_range("solver.preroll_s", s.render.preroll_s, std::max(1e-3, audio_chain_warm_up_s(s.render.audio_rate_hz)),
                              100.0, "s (the audio chain's start-up at output.sample_rate_hz), or -1 for the automatic preroll");
    detail::require_range("solver.dc_block_hz", s.render.dc_block_hz, 1e-3, 200.0, "Hz");
    detail::require_range("solver.carrier_steps_floor", s.render.carrier_steps_floor, 4.0, 1000.0);
    detail::require_above("solver.dc_tolerance", s.render.dc_tolerance, 0.0, 0.1);
    detail::require_above("solver.newton_tolerance", s.render.newton_tolerance, 0.0, 1e-3);
    if (s.am.carrier_hz < 2.5 * nyq)
        throw config_error(fmt::format("signal.carrier_hz = {}: must be at least 2.5 x the audio Nyquist frequency "
                                       "({} Hz) so the sidebands stay clear of DC and the audio band",
                                       detail::format_value(s.am.carrier_hz), nyq));
    if (s.tuner.layout != tuner_layout::bench) {
        s.tuner.validate();
        s.antenna.validate();
        if (s.stations.empty())
            throw config_error(fmt::format("tuner.layout = \"{}\": needs at least one [[station]]", to_string(s.tuner.layout)));
        s.noise.validate();
        if (s.noise.field_density > 0.0 && !(s.noise.half_band_hz <= 0.45 * s.stations.front().params.carrier_hz))
            throw config_error(fmt::format("antenna.noise_half_band_hz = {}: must be at most 0.45 x the wanted carrier ({} Hz)",
                                           detail::format_value(s.noise.half_band_hz),
                                           detail::format_value(0.45 * s.stations.front().params.carrier_hz)));
        for (const auto& st : s.stations) {
            if (st.params.carrier_hz < 2.5 * nyq || st.params.carrier_hz < 4.0 * p.audio_cutoff_hz)
                throw config_error(fmt::format("tuner.layout: station \"{}\": carrier_hz = {}: must be at least 2.5 x the audio "
                                               "Nyquist frequency ({} Hz) and 4 x signal.audio_cutoff_hz",
                                               st.params.name, detail::format_value(st.params.carrier_hz), nyq));
            if (st.kind == programme_kind::tone && !(st.tone_hz >= 1.0 && st.tone_hz <= 0.45 * 2.0 * nyq))
                throw config_error(fmt::format("tuner.layout: station \"{}\": tone_hz = {}: must be in [1, {}] Hz", st.params.name,
                                               detail::format_value(st.tone_hz), 0.45 * 2.0 * nyq));
        }
    } else if (s.noise.field_density != 0.0) {
        throw config_error(fmt::format("antenna.noise_field_density = {}: needs tuner.layout = untuned, single-coil or coupled "
                                       "(the bench layout has no antenna)",
                                       detail::format_value(s.noise.field_density)));
    } else if (!s.stations.empty()) {
        throw config_error("tuner.layout = \"bench\": [[station]] needs tuner.layout = untuned, single-coil or coupled "
                           "(the bench layout uses [signal] and [source])");
    }
    if (s.am.carrier_hz < 4.0 * p.audio_cutoff_hz)
        throw config_error(fmt::format("signal.carrier_hz = {}: must be at least 4 x signal.audio_cutoff_hz",
                                       detail::format_value(s.am.carrier_hz)));
}

/// For a rule broken by a numeric key's value: the value scaled as a likely slip would have it (a missing
/// SI prefix, or a percentage for a fraction) when that makes the whole scenario valid, as
/// " (did you mean 1000e3 or 1000k?)"; "" otherwise. The candidates are checked against the real rules,
/// so the hint never suggests a value that is refused too.
std::string slip_hint(const scenario& s, const std::string& field)
{
    const auto dot = field.find('.');
    if (dot == std::string::npos) return {};
    // A station's keys fill the station being read (stations.back()): not a probe of the whole scenario.
    if (field.rfind("station.", 0) == 0) return {};
    const auto& table = key_table();
    const auto sec = table.find(field.substr(0, dot));
    if (sec == table.end()) return {};
    const auto key = sec->second.find(field.substr(dot + 1));
    if (key == sec->second.end() || !key->second.ref) return {};
    const auto& entry = key->second;
    scenario probe = s;
    const double v = entry.ref(probe);
    if (!std::isfinite(v) || v == 0.0) return {};
    auto valid_with = [&](double candidate) {
        entry.ref(probe) = candidate;
        try {
            validate_scenario(probe);
            return true;
        } catch (const config_error&) {
            return false;
        }
    };
    const std::string text = detail::format_value(v);
    if (entry.u == unit::none && valid_with(v * 1e-2))
        return fmt::format(" (did you mean {}, i.e. {} %?)", detail::format_value(v * 1e-2), text);
    static const std::pair<int, const char*> scales[] = {{3, "k"}, {-3, "m"}, {6, "M"}, {-6, "u"}, {9, "G"}, {-9, "n"}, {-12, "p"}};
    std::vector<std::pair<int, const char*>> ok;
    for (const auto& [e, p] : scales)
        if (valid_with(v * std::pow(10.0, e))) ok.emplace_back(e, p);
    if (ok.empty()) return {};
    if (ok.size() == 1) return fmt::format(" (did you mean {}e{} or {}{}?)", text, ok[0].first, text, ok[0].second);
    std::string list;
    for (std::size_t i = 0; i < ok.size() && i < 3; ++i)
        list += fmt::format("{}{}{}", i == 0 ? "" : (i + 1 == std::min<std::size_t>(ok.size(), 3) ? " or " : ", "), text, ok[i].second);
    return fmt::format(" (did you mean {}?)", list);
}

/// For a malformed line such as `bleeder_ohm = 47k`: the hint that engineering values are quoted in a file.
std::string quote_hint(const std::string& text, std::size_t line)
{
    std::istringstream in(text);
    std::string l;
    for (std::size_t i = 0; i < line && std::getline(in, l); ++i) {
    }
    const auto eq = l.find('=');
    if (line == 0 || eq == std::string::npos) return {};
    std::string rhs = l.substr(eq + 1);
    if (const auto hash = rhs.find('#'); hash != std::string::npos) rhs.erase(hash);
    const auto b = rhs.find_first_not_of(" \t");
    const auto e = rhs.find_last_not_of(" \t\r");
    if (b == std::string::npos) return {};
    rhs = rhs.substr(b, e - b + 1);
    for (const unit u : {unit::none, unit::ohm, unit::farad, unit::henry, unit::hertz, unit::volt, unit::ampere, unit::second,
                         unit::celsius, unit::electronvolt}) {
        try {
            (void)parse_quantity(rhs, u);
            return fmt::format(" (a value with a prefix or unit is text in a file: write {} = \"{}\")",
                               detail::one_line(l.substr(0, l.find_last_not_of(" \t", eq == 0 ? 0 : eq - 1) + 1)), rhs);
        } catch (const config_error&) {
        }
    }
    return {};
}

/// Reads a diode file (`diode.file`): a TOML file with one [diode] section of diode keys (no preset, no
/// file). Starts from diode_params' defaults; messages name the diode file and line. `where` names the
/// scenario key that pointed here.
diode_params load_diode_file(const fs::path& path, const std::string& where)
{
    std::error_code ec;
    if (fs::is_directory(path, ec))
        throw config_error(fmt::format("{}: diode.file = \"{}\": is a directory, not a diode file", where, path.string()));
    // Only regular files of a sensible size (a device such as /dev/zero would never end).
    if (fs::exists(path, ec) && (!fs::is_regular_file(path, ec) || fs::file_size(path, ec) > 1000000))
        throw config_error(fmt::format("{}: diode.file = \"{}\": must be a regular text file of at most 1 MB", where, path.string()));
    std::ifstream in(path, std::ios::binary);
    if (!in)
        throw config_error(fmt::format("{}: diode.file = \"{}\": cannot open the diode file: {}", where, path.string(), std::strerror(errno)));
    std::stringstream ss;
    ss << in.rdbuf();
    toml::table root;
    try {
        root = toml::parse(ss.str(), path.string());
    } catch (const toml::parse_error& e) {
        throw config_error(fmt::format("{}:{}: malformed TOML: {}", path.string(), e.source().begin.line, detail::one_line(e.description())));
    }
    scenario tmp;
    tmp.circuit.diode = diode_params{};
    tmp.circuit.diode.name = "file";
    const auto& keys = key_table().at("diode");
    std::vector<std::string> names;
    for (const auto& [k, v] : keys)
        if (k != "preset" && k != "file") names.push_back(k);
    for (const auto& [sec_name, sec_node] : root) {
        const std::string sec(sec_name.str());
        if (sec != "diode" || !sec_node.is_table())
            throw config_error(fmt::format("{}: [{}]: a diode file holds only a [diode] section", source_of(sec_node, path), sec));
        for (const auto& [key_name, node] : *sec_node.as_table()) {
            const std::string key(key_name.str());
            const std::string field = "diode." + key;
            const std::string w = source_of(node, path);
            if (key == "preset" || key == "file")
                throw config_error(fmt::format("{}: {}: not allowed in a diode file (it is the diode itself)", w, field));
            const auto kt = keys.find(key);
            if (kt == keys.end()) {
                const std::string near = nearest(key, names);
                throw config_error(fmt::format("{}: {}: unknown key{}", w, field, near.empty() ? "" : fmt::format(" (did you mean diode.{}?)", near)));
            }
            kt->second.set(tmp, node, field, w);
        }
    }
    if (!root.contains("diode")) throw config_error(fmt::format("{}: no [diode] section: not a diode file", path.string()));
    try {
        tmp.circuit.diode.validate();
    } catch (const config_error& e) {
        const std::string msg = e.what();
        const std::string field = msg.substr(0, msg.find(' '));
        const toml::node* n = root.at_path(field).node();
        throw config_error(fmt::format("{}: {}", n != nullptr ? source_of(*n, path) : path.string(), msg));
    }
    return tmp.circuit.diode;
}

} // namespace

scenario parse_scenario(const std::string& text, const fs::path& file, const std::vector<std::string>& overrides)
{
    toml::table root;
    try {
        root = toml::parse(text, file.string());
    } catch (const toml::parse_error& e) {
        throw config_error(fmt::format("{}:{}: malformed TOML: {}{}", file.string(), e.source().begin.line,
                                       detail::one_line(e.description()), quote_hint(text, e.source().begin.line)));
    }
    const auto overridden = apply_overrides(root, overrides);

    scenario s;
    s.file = file;
    // The dial is set by the tuning capacitance or solved from a tuned frequency: not both.
    if (const toml::node* cap = root.at_path("tuner.capacitance_f").node();
        cap != nullptr && sets_dial_capacitance(*cap) && root.at_path("tuner.tuned_hz").node() != nullptr)
        throw config_error(fmt::format("{}: tuner.capacitance_f and tuner.tuned_hz: give one of them (the capacitor sets the dial; "
                                       "tuned_hz solves the capacitor for that frequency)",
                                       origin_of(*cap, "tuner.capacitance_f", file, overridden)));
    // Preset or diode file first, so explicit diode fields override it.
    const toml::node* diode_file_node = root.at_path("diode.file").node();
    if (diode_file_node != nullptr && root.at_path("diode.preset").node() != nullptr)
        throw config_error(fmt::format("{}: diode.file and diode.preset: give one of them (keys beside either override it)",
                                       origin_of(*diode_file_node, "diode.file", file, overridden)));
    if (diode_file_node != nullptr) {
        const std::string w = origin_of(*diode_file_node, "diode.file", file, overridden);
        const std::string name = as_string(*diode_file_node, "diode.file", w);
        if (name.empty()) throw config_error(fmt::format("{}: diode.file = \"\": must name a diode file", w));
        fs::path p = name;
        if (!p.is_absolute()) p = file.parent_path() / p;
        std::error_code ec;
        const fs::path abs = fs::absolute(p, ec);
        if (ec) throw config_error(fmt::format("{}: diode.file = \"{}\": cannot resolve the path: {}", w, name, ec.message()));
        s.circuit.diode = load_diode_file(abs, w);
        s.diode_file = abs;
    } else if (const toml::node* p = root.at_path("diode.preset").node()) {
        const std::string w = origin_of(*p, "diode.preset", file, overridden);
        const std::string name = as_string(*p, "diode.preset", w);
        try {
            s.circuit.diode = find_diode_preset(name).params;
        } catch (const config_error& e) {
            throw config_error(fmt::format("{}: {}", w, e.what()));
        }
    } else {
        s.circuit.diode = find_diode_preset("germanium-point-contact").params;
    }
    const auto& table = key_table();
    std::vector<std::string> sections;
    for (const auto& [name, keys] : table) sections.push_back(name);
    bool audio_set = false;
    bool duration_set = false;
    for (const auto& [sec_name, sec_node] : root) {
        const std::string sec(sec_name.str());
        const std::string w = source_of(sec_node, file);
        auto it = table.find(sec);
        if (it == table.end()) {
            if (sec == "pack" || sec == "variant")
                throw config_error(fmt::format("{}: [{}]: this is a pack file, not a scenario: `galena compare` renders it and "
                                               "`galena check` validates it (README \"Pack files\")", w, sec));
            const std::string near = nearest(sec, sections);
            throw config_error(fmt::format("{}: [{}]: unknown section{}", w, sec,
                                           near.empty() ? "" : fmt::format(" (did you mean [{}]?)", near)));
        }
        std::vector<std::string> keys;
        for (const auto& [k, v] : it->second) keys.push_back(k);
        if (sec == "station") {
            // [[station]] (an array of tables), or one [station] table (also what --set station.key=v makes).
            std::vector<const toml::table*> tabs;
            if (const toml::array* arr = sec_node.as_array()) {
                for (const auto& el : *arr) {
                    if (el.as_table() == nullptr)
                        throw config_error(fmt::format("{}: station = {}: must be [[station]] tables", source_of(el, file), node_text(el)));
                    tabs.push_back(el.as_table());
                }
            } else if (sec_node.as_table() != nullptr) {
                tabs.push_back(sec_node.as_table());
            } else {
                throw config_error(fmt::format("{}: station = {}: must be [[station]] tables", w, node_text(sec_node)));
            }
            for (const toml::table* st : tabs) {
                s.stations.emplace_back();
                const std::string numbered = fmt::format("station.{}.", s.stations.size());
                if (const toml::node* clip = st->get("audio"); clip != nullptr && st->contains("tone_hz"))
                    throw config_error(fmt::format("{}: station {}: tone_hz and audio: give one of them (the programme is a test tone or a clip)",
                                                   source_of(*clip, file), s.stations.size()));
                for (const auto& [key_name, node] : *st) {
                    const std::string key(key_name.str());
                    const std::string field = "station." + key;
                    const std::string kw =
                        overridden.contains(numbered + key) ? origin_of(node, numbered + key, file, overridden) : origin_of(node, field, file, overridden);
                    auto kt = it->second.find(key);
                    if (kt == it->second.end()) {
                        const std::string near = nearest(key, keys);
                        throw config_error(fmt::format("{}: {}: unknown key{}", kw, field,
                                                       near.empty() ? "" : fmt::format(" (did you mean station.{}?)", near)));
                    }
                    kt->second.set(s, node, field, kw);
                }
                auto& sp = s.stations.back();
                try {
                    sp.params.validate();
                } catch (const config_error& e) {
                    // Named where the refused value was written: its line, or the --set that gave it.
                    const std::string msg = e.what();
                    const std::string key = msg.substr(0, msg.find(' ')).substr(std::string("station.").size());
                    const toml::node* kn = st->get(key);
                    const std::string at = kn == nullptr                               ? source_of(*st, file)
                                           : overridden.contains(numbered + key) ? origin_of(*kn, numbered + key, file, overridden)
                                                                                 : origin_of(*kn, "station." + key, file, overridden);
                    throw config_error(fmt::format("{}: station {} \"{}\": {}", at, s.stations.size(), sp.params.name, msg));
                }
                if (sp.kind == programme_kind::clip && !sp.audio.is_absolute()) sp.audio = file.parent_path() / sp.audio;
            }
            continue;
        }
        const toml::table* tab = sec_node.as_table();
        if (tab == nullptr)
            throw config_error(fmt::format("{}: {} = {}: must be a section [{}], not a value", w, sec, node_text(sec_node), sec));
        for (const auto& [key_name, node] : *tab) {
            const std::string key(key_name.str());
            const std::string field = sec + "." + key;
            const std::string kw = origin_of(node, field, file, overridden);
            auto kt = it->second.find(key);
            if (kt == it->second.end()) {
                const std::string near = nearest(key, keys);
                throw config_error(fmt::format("{}: {}: unknown key{}", kw, field,
                                               near.empty() ? "" : fmt::format(" (did you mean {}.{}?)", sec, near)));
            }
            kt->second.set(s, node, field, kw);
            if (field == "signal.audio") audio_set = true;
            if (field == "signal.duration_s") duration_set = true;
        }
    }
    if (audio_set) s.programme.kind = programme_kind::clip; // a clip wins over test_signal
    // signal.duration_s is a test signal's length (default 0.5 s); a clip plays whole unless it is set.
    if (audio_set && !duration_set) s.programme.duration_s = 0.0;
    if (audio_set && !s.programme.audio.is_absolute()) s.programme.audio = file.parent_path() / s.programme.audio;
    if (!audio_set && s.programme.kind == programme_kind::tone && s.programme.tone2_hz > 0.0)
        s.programme.kind = programme_kind::two_tone;

    // Validate everything, naming the key's line when the rule belongs to one, with a hint for a likely slip.
    try {
        validate_scenario(s);
    } catch (const config_error& e) {
        const std::string msg = e.what();
        const auto sp = msg.find(' ');
        const std::string field = msg.substr(0, sp);
        throw config_error(fmt::format("{}: {}{}", where_is(root, field, file, overridden), msg, slip_hint(s, field)));
    }
    return s;
}

scenario load_scenario(const fs::path& file, const std::vector<std::string>& overrides)
{
    const std::string text = read_text_input(file, "scenario file");
    refuse_audio_file(file, text, "scenario");
    return parse_scenario(text, file, overrides);
}

void refuse_audio_file(const fs::path& file, const std::string& text, std::string_view expected)
{
    try {
        (void)toml::parse(text, file.string());
        return; // TOML: not audio
    } catch (const toml::parse_error&) {
    }
    std::optional<audio_file_info> info;
    try {
        info = wav_reader(file).info();
    } catch (const error&) {
        return; // neither: the caller's parser reports the TOML error
    }
    throw config_error(fmt::format("{}: is an audio file ({}, {:.3g} s), not a {} file; to render it, make it the clip of a "
                                   "scenario: render scenarios/example.toml --set signal.audio={} --out DIR",
                                   file.string(), info->format.substr(0, info->format.find(" /")),
                                   static_cast<double>(info->frames) / info->sample_rate_hz, expected, file.string()));
}

std::vector<std::string> suggest_fields(std::string_view text) { return nearest_fields(text); }

const std::vector<scenario_key>& scenario_keys()
{
    static const std::vector<scenario_key> keys = [] {
        std::vector<scenario_key> k;
        for (const auto& [sec, entries] : key_table())
            for (const auto& [key, entry] : entries) k.push_back({sec + "." + key, entry.u, entry.numeric});
        return k;
    }();
    return keys;
}

std::string contract_field(std::string_view field)
{
    if (field.rfind("station.", 0) != 0) return std::string(field);
    const std::string_view rest = field.substr(8);
    const auto dot = rest.find('.');
    if (dot == std::string_view::npos || dot == 0) return std::string(field);
    if (!std::all_of(rest.begin(), rest.begin() + static_cast<std::ptrdiff_t>(dot), [](unsigned char c) { return std::isdigit(c); }))
        return std::string(field);
    return "station." + std::string(rest.substr(dot + 1));
}

unit key_unit(std::string_view field_text)
{
    const std::string field = contract_field(field_text);
    for (const auto& k : scenario_keys())
        if (k.field == field) {
            if (!k.numeric) throw config_error(fmt::format("{}: is not a numeric key", field));
            return k.u;
        }
    const auto near = nearest_fields(field);
    throw config_error(fmt::format("{}: unknown key{}", field, near.empty() ? std::string() : fmt::format(" (did you mean {}?)", near.front())));
}

std::unique_ptr<modulation> make_programme(const scenario& s)
{
    const auto& p = s.programme;
    switch (p.kind) {
    case programme_kind::clip: {
        conditioning_settings cs;
        cs.cutoff_hz = p.audio_cutoff_hz;
        cs.max_duration_s = p.duration_s;
        auto reader = std::make_unique<wav_reader>(p.audio);
        if (p.audio_cutoff_hz > 0.45 * reader->sample_rate_hz())
            throw config_error(fmt::format("{}: signal.audio_cutoff_hz = {}: must be at most 0.45 x the sample rate ({} Hz) of {}",
                                           s.file.string(), detail::format_value(p.audio_cutoff_hz), reader->sample_rate_hz(),
                                           p.audio.string()));
        // The conditioning reads the whole clip once (peak, non-finite samples, truncation): name the file in
        // what it reports unless the message already does.
        const std::string name = p.audio.string();
        auto named = [&](const std::string& msg) { return msg.rfind(name, 0) == 0 ? msg : name + ": " + msg; };
        try {
            return std::make_unique<clip_modulation>(std::move(reader), cs);
        } catch (const audio_error& e) {
            throw audio_error(named(e.what()));
        } catch (const config_error& e) {
            throw config_error(named(e.what()));
        }
    }
    case programme_kind::tone: return std::make_unique<tone_modulation>(std::vector{p.tone_hz}, std::vector{1.0}, p.duration_s);
    case programme_kind::two_tone:
        return std::make_unique<tone_modulation>(std::vector{p.tone_hz, p.tone2_hz}, std::vector{p.tone_ratio, 1.0}, p.duration_s);
    case programme_kind::log_sweep:
        return std::make_unique<log_sweep_modulation>(p.sweep_start_hz, p.sweep_stop_hz, p.duration_s);
    }
    throw config_error("unknown programme kind");
}

std::vector<std::unique_ptr<modulation>> make_station_programmes(const scenario& s)
{
    std::vector<std::unique_ptr<modulation>> out;
    for (const auto& st : s.stations) {
        if (st.kind != programme_kind::clip) {
            out.push_back(std::make_unique<tone_modulation>(std::vector{st.tone_hz}, std::vector{1.0}, s.programme.duration_s));
            continue;
        }
        // A clip: the same conditioning as signal.audio (make_programme), on the station's file.
        scenario one = s;
        one.programme.kind = programme_kind::clip;
        one.programme.audio = st.audio;
        out.push_back(make_programme(one));
    }
    return out;
}

double programme_duration_s(const scenario& s)
{
    const auto& p = s.programme;
    if (s.tuner.layout != tuner_layout::bench && !s.stations.empty()) {
        if (s.stations.front().kind != programme_kind::clip) return p.duration_s;
        const wav_reader r(s.stations.front().audio);
        const double whole = static_cast<double>(r.frames()) / r.sample_rate_hz();
        return p.duration_s > 0.0 ? std::min(whole, p.duration_s) : whole;
    }
    if (p.kind != programme_kind::clip) return p.duration_s;
    const wav_reader r(p.audio);
    const double whole = static_cast<double>(r.frames()) / r.sample_rate_hz();
    return p.duration_s > 0.0 ? std::min(whole, p.duration_s) : whole;
}

namespace {
/// A TOML basic string: quotes, backslashes and control characters escaped.
std::string toml_quote(std::string_view text)
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

std::string num(double v)
{
    if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
    return fmt::format("{:.9g}", v).find_first_of(".e") == std::string::npos ? fmt::format("{:.9g}.0", v)
                                                                               : fmt::format("{:.9g}", v);
}
} // namespace

std::string to_toml(const scenario& s)
{
    const auto& p = s.programme;
    const auto& d = s.circuit.diode;
    const auto& e = s.circuit.earpiece;
    std::string o;
    o += "[signal]\n";
    if (p.kind == programme_kind::clip) o += fmt::format("audio = {}\n", toml_quote(p.audio.string()));
    else o += fmt::format("test_signal = \"{}\"\n", p.kind == programme_kind::tone ? "tone" : p.kind == programme_kind::two_tone ? "two-tone" : "log-sweep");
    o += fmt::format("tone_hz = {}\ntone2_hz = {}\ntone_ratio = {}\nsweep_start_hz = {}\nsweep_stop_hz = {}\n", num(p.tone_hz),
                     num(p.tone2_hz), num(p.tone_ratio), num(p.sweep_start_hz), num(p.sweep_stop_hz));
    o += fmt::format("duration_s = {}\ncarrier_hz = {}\ncarrier_peak_v = {}\nmodulation_index = {}\nallow_overmodulation = {}\naudio_cutoff_hz = {}\n",
                     num(p.duration_s), num(s.am.carrier_hz), num(s.am.carrier_peak_v), num(s.am.modulation_index),
                     s.am.allow_overmodulation ? "true" : "false", num(p.audio_cutoff_hz));
    o += fmt::format("\n[source]\nresistance_ohm = {}\n", num(s.circuit.source.resistance_ohm));
    o += s.diode_file.empty() ? fmt::format("\n[diode]\npreset = \"{}\"\n", d.name == "custom" || d.name == "file" ? "germanium-point-contact" : d.name)
                              : fmt::format("\n[diode]\nfile = {}\n", toml_quote(s.diode_file.string()));
    o += fmt::format("saturation_current_a = {}\nemission_coefficient = {}\nseries_resistance_ohm = {}\n"
                     "leakage_resistance_ohm = {}\njunction_capacitance_f = {}\njunction_potential_v = {}\ngrading_coefficient = {}\n"
                     "breakdown_voltage_v = {}\nbreakdown_current_a = {}\ntemperature_c = {}\nnominal_temperature_c = {}\n"
                     "energy_gap_ev = {}\nsaturation_current_exponent = {}\n",
                     num(d.saturation_current_a), num(d.emission_coefficient),
                     num(d.series_resistance_ohm), num(d.leakage_resistance_ohm), num(d.junction_capacitance_f),
                     num(d.junction_potential_v), num(d.grading_coefficient), num(d.breakdown_voltage_v),
                     num(d.breakdown_current_a), num(d.temperature_c), num(d.nominal_temperature_c), num(d.energy_gap_ev),
                     num(d.saturation_current_exponent));
    o += fmt::format("\n[load]\nbleeder_ohm = {}\nfilter_capacitance_f = {}\nstray_capacitance_f = {}\n", num(s.circuit.load.bleeder_ohm),
                     num(s.circuit.load.filter_capacitance_f), num(s.circuit.load.stray_capacitance_f));
    o += fmt::format("\n[earpiece]\nkind = \"{}\"\ncapacitance_f = {}\nleakage_ohm = {}\nmotional_resistance_ohm = {}\n"
                     "motional_inductance_h = {}\nmotional_capacitance_f = {}\nresistance_ohm = {}\ninductance_h = {}\nloss_resistance_ohm = {}\n"
                     "piezo_force_factor_n_per_volt = {}\nmagnetic_force_factor_tm = {}\n",
                     to_string(e.kind), num(e.capacitance_f), num(e.leakage_ohm), num(e.motional_resistance_ohm),
                     num(e.motional_inductance_h), num(e.motional_capacitance_f), num(e.resistance_ohm), num(e.inductance_h),
                     num(e.loss_resistance_ohm), num(e.piezo_force_factor_n_per_volt), num(e.magnetic_force_factor_tm));
    o += fmt::format("\n[output]\nsample_rate_hz = {}\nformat = \"{}\"\nfull_scale_v = {}\n", num(s.render.audio_rate_hz),
                     to_string(s.output.format), s.output.full_scale_v == 0.0 ? std::string("\"auto\"") : num(s.output.full_scale_v));
    o += fmt::format("\n[solver]\nmethod = \"{}\"\nsteps_per_cycle = {}\ndc_tolerance = {}\nnewton_tolerance = {}\n"
                     "relative_tolerance = {}\nabsolute_tolerance_v = {}\npreroll_s = {}\ndc_block_hz = {}\ncarrier_steps_floor = {}\n",
                     to_string(s.render.method), s.render.steps_per_cycle, num(s.render.dc_tolerance), num(s.render.newton_tolerance),
                     num(s.render.stepper.relative_tolerance), num(s.render.stepper.absolute_tolerance_v),
                     num(s.render.preroll_s), num(s.render.dc_block_hz), num(s.render.carrier_steps_floor));
    // Every key explicit, in the bench layout too (the front end's keys are then unused but round-trip).
    const auto& a = s.antenna;
    const auto& t = s.tuner;
    o += "\n[antenna]\n";
    if (!a.preset.empty()) o += fmt::format("preset = {}\n", toml_quote(a.preset));
    o += fmt::format("effective_height_m = {}\ncapacitance_f = {}\ninductance_h = {}\nresistance_ohm = {}\n", num(a.effective_height_m),
                     num(a.capacitance_f), num(a.inductance_h), num(a.resistance_ohm));
    o += fmt::format("noise_field_density = {}\nnoise_half_band_hz = {}\nnoise_seed = {}\n", num(s.noise.field_density),
                     num(s.noise.half_band_hz), s.noise.seed);
    // The dial as it was set: a tuning capacitance, or the frequency it is solved for (capacitance 0).
    const std::string dial = t.capacitance_f != 0.0 ? fmt::format("capacitance_f = {}\n", num(t.capacitance_f))
                                                    : fmt::format("tuned_hz = {}\ncapacitance_f = 0\n", num(t.tuned_hz));
    o += fmt::format("\n[tuner]\nlayout = \"{}\"\ncoil_h = {}\ncoil_q = {}\n{}detector_tap = {}\n"
                     "antenna_tap = {}\nantenna_coil_h = {}\nantenna_coil_q = {}\ncoupling = {}\ndc_return_ohm = {}\n",
                     to_string(t.layout), num(t.coil_h), num(t.coil_q), dial, num(t.detector_tap),
                     num(t.antenna_tap), num(t.antenna_coil_h), num(t.antenna_coil_q), num(t.coupling), num(t.dc_return_ohm));
    for (const auto& st : s.stations) {
        o += fmt::format("\n[[station]]\nname = {}\ncarrier_hz = {}\nfield_v_per_m = {}\nmodulation_index = {}\n", toml_quote(st.params.name),
                         num(st.params.carrier_hz), num(st.params.field_v_per_m), num(st.params.modulation_index));
        if (st.kind == programme_kind::clip) o += fmt::format("audio = {}\n", toml_quote(st.audio.string()));
        else o += fmt::format("tone_hz = {}\n", num(st.tone_hz));
    }
    return o;
}

} // namespace galena
