// Scenario values as builders write them: every numeric key takes engineering text with its unit and
// round-trips through the scenario; mismatched units are refused naming the key's unit; likely slips (a
// missing prefix, a percentage, a key without its section, an audio file or a pack file given as the
// scenario, an unquoted prefix in a file) get a hint; a clip plays whole unless limited.
#include "galena/audio_io.hpp"
#include "galena/error.hpp"
#include "galena/scenario.hpp"
#include "galena/units.hpp"

#include <doctest/doctest.h>

#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <map>
#include <sstream>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

const fs::path src_dir = GALENA_SOURCE_DIR;

const std::string base = R"(
[signal]
tone_hz = 1000
carrier_hz = 1.0e6
carrier_peak_v = 0.3
modulation_index = 0.3
[source]
resistance_ohm = 20e3
[load]
bleeder_ohm = 47e3
[earpiece]
kind = "piezo"
capacitance_f = 10e-9
)";

/// "section.key" -> value text, read from to_toml's output with a plain line reader (not galena's parser).
std::map<std::string, std::string> toml_values(const std::string& text)
{
    std::map<std::string, std::string> out;
    std::istringstream in(text);
    std::string line, section;
    while (std::getline(in, line)) {
        if (line.size() > 2 && line.front() == '[') section = line.substr(1, line.size() - 2);
        const auto eq = line.find(" = ");
        if (eq != std::string::npos) out[section + "." + line.substr(0, eq)] = line.substr(eq + 3);
    }
    return out;
}

std::string message_of(const std::string& text, const std::vector<std::string>& overrides = {})
{
    try {
        (void)parse_scenario(text, "mine.toml", overrides);
    } catch (const config_error& e) {
        return e.what();
    }
    return "(accepted)";
}

} // namespace

TEST_CASE("every numeric key: its value written back in engineering notation with its unit parses to the same scenario")
{
    const scenario s0 = parse_scenario(base, "mine.toml");
    const std::string t0 = to_toml(s0);
    const auto values = toml_values(t0);
    std::size_t covered = 0;
    std::size_t per_station = 0;
    for (const auto& k : scenario_keys()) {
        if (!k.numeric) continue;
        // A [[station]]'s keys belong to each station (station.N.key): scenario_test round-trips them.
        if (k.field.rfind("station.", 0) == 0) {
            ++per_station;
            continue;
        }
        const auto it = values.find(k.field);
        REQUIRE_MESSAGE(it != values.end(), k.field, " is missing from to_toml");
        const double v = std::strtod(it->second.c_str(), nullptr); // libc reads to_toml's decimal text
        for (const bool symbol : {false, true}) {
            const std::string text = format_quantity(v, k.u, 0, symbol);
            const scenario s1 = parse_scenario(base, "mine.toml", {k.field + "=" + text});
            CHECK_MESSAGE(to_toml(s1) == t0, k.field, " = ", text);
        }
        ++covered;
    }
    CHECK(covered + per_station == static_cast<std::size_t>(std::count_if(scenario_keys().begin(), scenario_keys().end(),
                                                            [](const scenario_key& k) { return k.numeric; })));
    // In a file, quoted engineering text; on the command line, bare.
    const scenario s2 = parse_scenario(base + "[diode]\njunction_capacitance_f = \"0.5pF\"\nsaturation_current_a = \"2uA\"\n",
                                       "mine.toml", {"load.bleeder_ohm=47k ohm", "signal.carrier_hz=1MHz"});
    CHECK(s2.circuit.diode.junction_capacitance_f == std::strtod("0.5e-12", nullptr));
    CHECK(s2.circuit.diode.saturation_current_a == std::strtod("2e-6", nullptr));
    CHECK(s2.circuit.load.bleeder_ohm == 47e3);
    CHECK(s2.am.carrier_hz == 1e6);
}

TEST_CASE("a unit that does not match the key is refused, naming the file, line, key, value and both units")
{
    CHECK(message_of(base + "[diode]\njunction_capacitance_f = \"10nH\"\n") ==
          "mine.toml:15: diode.junction_capacitance_f = '10nH': unit H does not match the key's unit, F");
    CHECK(message_of(base, {"load.bleeder_ohm=10nF"}) ==
          "mine.toml (--set load.bleeder_ohm=10nF): load.bleeder_ohm = '10nF': unit F does not match the key's unit, ohm");
    CHECK(message_of(base, {"signal.modulation_index=30V"}).find("unit V given, but the key has no unit") != std::string::npos);
}

TEST_CASE("likely slips get a hint, checked against the real rules")
{
    // A frequency typed in kHz.
    const std::string khz = message_of(base, {"signal.carrier_hz=1000"});
    CHECK(khz.find("signal.carrier_hz = 1000: must be in [10000, 1e+08] Hz") != std::string::npos);
    CHECK(khz.find("(did you mean 1000e3 or 1000k?)") != std::string::npos);
    // A modulation index typed in per cent.
    CHECK(message_of(base, {"signal.modulation_index=30"}).find("(did you mean 0.3, i.e. 30 %?)") != std::string::npos);
    // A capacitance typed in pF: only the pico prefix makes it valid.
    CHECK(message_of(base, {"diode.junction_capacitance_f=365"}).find("(did you mean 365e-12 or 365p?)") != std::string::npos);
    // No hint when no scaling makes the value valid.
    const std::string negative = message_of(base, {"signal.modulation_index=-0.5"});
    CHECK(negative.find("must be in [0, 1]") != std::string::npos);
    CHECK(negative.find("did you mean") == std::string::npos);
    // A key without its section: every section that holds it.
    CHECK(message_of(base, {"bleeder_ohm=47k"}) ==
          "--set bleeder_ohm=47k: must look like section.key=value (did you mean load.bleeder_ohm=47k?)");
    CHECK(message_of(base, {"resistance_ohm=1k"}).find("did you mean antenna.resistance_ohm=1k, earpiece.resistance_ohm=1k or source.resistance_ohm=1k?") !=
          std::string::npos);
    CHECK(message_of(base, {"bleder_ohm=47k"}).find("did you mean load.bleeder_ohm=47k?") != std::string::npos);
    // A prefix left unquoted in a file.
    const std::string bare = message_of("[load]\nbleeder_ohm = 47k\n");
    CHECK(bare.rfind("mine.toml:2: malformed TOML: ", 0) == 0);
    CHECK(bare.find("write bleeder_ohm = \"47k\"") != std::string::npos);
    // A pack file given as a scenario.
    CHECK(message_of("[pack]\nscenario = \"x.toml\"\n").find("[pack]: this is a pack file, not a scenario") != std::string::npos);
}

TEST_CASE("an audio file given as the scenario says so and shows how to use it as the clip")
{
    const fs::path wav = src_dir / "audio-samples/tone-1khz.wav";
    CHECK_THROWS_WITH_AS((void)load_scenario(wav),
                         doctest::Contains(("is an audio file (WAV (Microsoft), 2 s), not a scenario file; to render it, make it the clip "
                                            "of a scenario: render scenarios/example.toml --set signal.audio=" + wav.string())
                                               .c_str()),
                         config_error);
}

TEST_CASE("a clip plays whole unless signal.duration_s limits it")
{
    const fs::path clip = src_dir / "audio-samples/speech-count.wav";
    const wav_reader header(clip);
    const double whole_s = static_cast<double>(header.frames()) / header.sample_rate_hz();
    // The bundled example is a tone scenario; a clip set on the command line is rendered whole.
    const scenario ex = load_scenario(src_dir / "scenarios/example.toml", {"signal.audio=" + clip.string()});
    CHECK(ex.programme.kind == programme_kind::clip);
    CHECK(ex.programme.duration_s == 0.0);
    CHECK(programme_duration_s(ex) == whole_s);
    // The tone keeps its documented default length.
    CHECK(load_scenario(src_dir / "scenarios/example.toml").programme.duration_s == 0.5);
    // A limit the user sets is kept.
    const scenario cut = load_scenario(src_dir / "scenarios/example.toml", {"signal.audio=" + clip.string(), "signal.duration_s=1.5"});
    CHECK(programme_duration_s(cut) == 1.5);
}
