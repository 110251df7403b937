// Scenario contract: keys, presets, overrides, messages that name file, line, field and rule.
#include "galena/error.hpp"
#include "galena/scenario.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>
#include <cmath>
#include <filesystem>
#include <fstream>

using namespace galena;

TEST_CASE("the contract's example parses, presets apply and fields override them")
{
    const std::string text = R"(
[signal]
tone_hz = 1000
duration_s = 0.5
carrier_hz = 1.0e6
carrier_peak_v = 0.3
modulation_index = 0.3
audio_cutoff_hz = 5000
[source]
resistance_ohm = 20e3
[diode]
preset = "small-signal-schottky"
emission_coefficient = 1.3
leakage_resistance_ohm = inf
[load]
bleeder_ohm = "inf"
filter_capacitance_f = 0
[earpiece]
kind = "piezo"
capacitance_f = 10e-9
leakage_ohm = inf
)";
    const auto s = parse_scenario(text, "x.toml");
    CHECK(s.am.carrier_hz == 1e6);
    CHECK(s.circuit.source.resistance_ohm == 20e3);
    CHECK(s.circuit.diode.saturation_current_a == find_diode_preset("small-signal-schottky").params.saturation_current_a);
    CHECK(s.circuit.diode.emission_coefficient == 1.3);
    CHECK(std::isinf(s.circuit.load.bleeder_ohm));
    CHECK(s.programme.kind == programme_kind::tone);
    // Round trip through the full TOML rendering.
    const auto again = parse_scenario(to_toml(s), "y.toml");
    CHECK(to_toml(again) == to_toml(s));
}

TEST_CASE("overrides use section.key=value")
{
    const auto s = parse_scenario("[signal]\ntone_hz = 400\n", "x.toml", {"load.bleeder_ohm=47e3", "diode.preset=silicon-junction-switching"});
    CHECK(s.circuit.load.bleeder_ohm == 47e3);
    CHECK(s.circuit.diode.name == "silicon-junction-switching");
    CHECK_THROWS_WITH_AS(parse_scenario("", "x.toml", {"bleeder=1"}), doctest::Contains("section.key=value"), config_error);
}

TEST_CASE("bad input: one message naming file, line, field, value and rule")
{
    CHECK_THROWS_WITH_AS(parse_scenario("[signal]\ncarrier_hz = = 3\n", "bad.toml"), doctest::Contains("bad.toml:2: malformed TOML"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[diode]\nemision_coefficient = 1.2\n", "k.toml"),
                         doctest::Contains("k.toml:2: diode.emision_coefficient: unknown key (did you mean diode.emission_coefficient?)"),
                         config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[loads]\nbleeder_ohm = 1\n", "s.toml"), doctest::Contains("(did you mean [load]?)"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[diode]\n\nemission_coefficient = 12\n", "r.toml"),
                         doctest::Contains("r.toml:3: diode.emission_coefficient = 12: must be in [0.5, 10]"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[load]\nbleeder_ohm = -5\n", "n.toml"), doctest::Contains("load.bleeder_ohm = -5"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[diode]\nsaturation_current_a = nan\n", "n.toml"), doctest::Contains("saturation_current_a = nan"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[signal]\nmodulation_index = 1.3\n", "m.toml"), doctest::Contains("allow_overmodulation"), config_error);
    CHECK_NOTHROW(parse_scenario("[signal]\nmodulation_index = 1.3\nallow_overmodulation = true\n", "m.toml"));
    CHECK_THROWS_WITH_AS(parse_scenario("[signal]\ncarrier_hz = 5e4\n", "c.toml"), doctest::Contains("Nyquist"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[diode]\npreset = \"gold-bonded\"\n", "p.toml"), doctest::Contains("unknown preset"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[earpiece]\nkind = \"horn\"\n", "e.toml"), doctest::Contains("e.toml:2: earpiece.kind"), config_error);
    CHECK_THROWS_WITH_AS(parse_scenario("[source]\nresistance_ohm = \"big\"\n", "t.toml"), doctest::Contains("must be a number"), config_error);
    CHECK_THROWS_WITH_AS(load_scenario("/nonexistent/file.toml"), doctest::Contains("cannot open"), config_error);
}

TEST_CASE("diode.file: a fitted diode file, relative to the scenario; keys beside it override it")
{
    namespace fs = std::filesystem;
    const fs::path dir = fs::path(GALENA_TEST_TMP) / "scenario_diode_file";
    fs::remove_all(dir);
    fs::create_directories(dir / "fits" / "b");
    auto write = [](const fs::path& p, const std::string& text) {
        std::ofstream f(p);
        f << text;
    };
    write(dir / "fits" / "b" / "diode.toml", "# a diode file\n[diode]\nsaturation_current_a = 3e-7\nemission_coefficient = 1.25\n"
                                           "series_resistance_ohm = 40.0\nleakage_resistance_ohm = 5e5\ntemperature_c = 21.0\n"
                                           "nominal_temperature_c = 21.0\n");
    const std::string base = "[signal]\ntone_hz = 1000\n[diode]\nfile = \"fits/b/diode.toml\"\n";
    write(dir / "s.toml", base);
    const auto s = load_scenario(dir / "s.toml");
    CHECK(s.circuit.diode.saturation_current_a == 3e-7);
    CHECK(s.circuit.diode.emission_coefficient == 1.25);
    CHECK(s.circuit.diode.series_resistance_ohm == 40.0);
    CHECK(s.circuit.diode.leakage_resistance_ohm == 5e5);
    CHECK(s.circuit.diode.nominal_temperature_c == 21.0);
    // Keys absent from the file take diode_params' defaults, not a preset's (no junction charge).
    CHECK(s.circuit.diode.junction_capacitance_f == 0.0);
    CHECK(fs::equivalent(s.diode_file, dir / "fits" / "b" / "diode.toml"));
    // Beside it, a key overrides the file; so does --set.
    write(dir / "s2.toml", base + "emission_coefficient = 1.5\n");
    CHECK(load_scenario(dir / "s2.toml").circuit.diode.emission_coefficient == 1.5);
    CHECK(load_scenario(dir / "s.toml", {"diode.series_resistance_ohm=10"}).circuit.diode.series_resistance_ohm == 10.0);
    // A --set diode.file replaces a preset in the file; to_toml names the file and round-trips.
    write(dir / "p.toml", "[signal]\ntone_hz = 1000\n[diode]\npreset = \"small-signal-schottky\"\n");
    const auto sp = load_scenario(dir / "p.toml", {"diode.file=" + (dir / "fits" / "b" / "diode.toml").string()});
    CHECK(sp.circuit.diode.saturation_current_a == 3e-7);
    const std::string t = to_toml(sp);
    CHECK(t.find("file = ") != std::string::npos);
    CHECK(to_toml(parse_scenario(t, dir / "p.toml")) == t);
    // Both in one file: an error naming the line.
    write(dir / "both.toml", "[diode]\npreset = \"small-signal-schottky\"\nfile = \"fits/b/diode.toml\"\n");
    CHECK_THROWS_WITH_AS(load_scenario(dir / "both.toml"), doctest::Contains("both.toml:3: diode.file and diode.preset"), config_error);
    // Mistakes inside the diode file name the diode file and its line.
    write(dir / "fits" / "bad.toml", "[diode]\nemission_coefficient = 1.2\nsaturation_current = 1e-7\n");
    write(dir / "s3.toml", "[diode]\nfile = \"fits/bad.toml\"\n");
    CHECK_THROWS_WITH_AS(load_scenario(dir / "s3.toml"),
                         doctest::Contains("bad.toml:3: diode.saturation_current: unknown key (did you mean diode.saturation_current_a?)"),
                         config_error);
    write(dir / "fits" / "range.toml", "[diode]\nemission_coefficient = 12\n");
    write(dir / "s4.toml", "[diode]\nfile = \"fits/range.toml\"\n");
    CHECK_THROWS_WITH_AS(load_scenario(dir / "s4.toml"), doctest::Contains("range.toml:2: diode.emission_coefficient = 12: must be in [0.5, 10]"),
                         config_error);
    write(dir / "fits" / "other.toml", "[load]\nbleeder_ohm = 1e3\n");
    write(dir / "s5.toml", "[diode]\nfile = \"fits/other.toml\"\n");
    CHECK_THROWS_WITH_AS(load_scenario(dir / "s5.toml"), doctest::Contains("other.toml:1: [load]: a diode file holds only a [diode] section"),
                         config_error);
    write(dir / "s6.toml", "[diode]\nfile = \"fits/missing.toml\"\n");
    CHECK_THROWS_WITH_AS(load_scenario(dir / "s6.toml"), doctest::Contains("s6.toml:2: diode.file = "), config_error);
}

TEST_CASE("one station of a [[station]] list is addressed as station.N.key; mistakes name the override and the rule")
{
    const std::string text = R"([signal]
duration_s = 0.3
[tuner]
layout = "coupled"
[[station]]
name = "near"
carrier_hz = 1.0e6
tone_hz = 400
[[station]]
name = "next"
carrier_hz = 1.01e6
field_v_per_m = 5e-3
)";
    const auto s = parse_scenario(text, "rx.toml", {"station.2.carrier_hz=1.02MHz", "station.1.tone_hz=500", "station.2.name=other"});
    REQUIRE(s.stations.size() == 2);
    CHECK(s.stations[0].params.carrier_hz == 1.0e6); // untouched
    CHECK(s.stations[0].tone_hz == 500.0);
    CHECK(s.stations[1].params.carrier_hz == 1.02e6);
    CHECK(s.stations[1].params.field_v_per_m == 5e-3); // the other keys of station 2 stay
    CHECK(s.stations[1].params.name == "other");
    CHECK(to_toml(parse_scenario(to_toml(s), "again.toml")) == to_toml(s));
    // Every numeric station key, written back in engineering notation with its unit, sets station 2 to the
    // same scenario (the keys' units come from the one key table).
    std::size_t station_keys = 0;
    for (const auto& k : scenario_keys()) {
        if (!k.numeric || k.field.rfind("station.", 0) != 0) continue;
        ++station_keys;
        const std::string key = k.field.substr(8);
        const std::string field = "station.2." + key;
        const double v = key == "carrier_hz" ? 1.02e6 : key == "tone_hz" ? 700.0 : 0.45;
        const scenario plain = parse_scenario(text, "rx.toml", {field + "=" + fmt::format("{}", v)});
        CHECK_MESSAGE(to_toml(plain) != to_toml(parse_scenario(text, "rx.toml")), field, " was not applied");
        for (const bool symbol : {false, true}) {
            const scenario eng = parse_scenario(text, "rx.toml", {field + "=" + format_quantity(v, k.u, 0, symbol)});
            CHECK_MESSAGE(to_toml(eng) == to_toml(plain), field, " = ", format_quantity(v, k.u, 0, symbol));
        }
    }
    CHECK(station_keys == 3); // carrier_hz, modulation_index, tone_hz
    CHECK(contract_field("station.2.carrier_hz") == "station.carrier_hz");
    CHECK(contract_field("tuner.coupling") == "tuner.coupling");
    CHECK(key_unit("station.12.carrier_hz") == unit::hertz);
    // Without a number, with a number out of range, and for a file without stations.
    CHECK_THROWS_WITH_AS((void)parse_scenario(text, "rx.toml", {"station.carrier_hz=1.02e6"}),
                         doctest::Contains("--set station.carrier_hz=1.02e6: the scenario has 2 [[station]] tables: address one as "
                                           "station.N.carrier_hz with N from 1 (the wanted station) to 2"),
                         config_error);
    for (const char* n : {"0", "3", "99999999999999999999"})
        CHECK_THROWS_WITH_AS((void)parse_scenario(text, "rx.toml", {std::string("station.") + n + ".carrier_hz=1e6"}),
                             doctest::Contains((std::string("station ") + n + ": must be a station number from 1 to 2").c_str()), config_error);
    CHECK_THROWS_WITH_AS((void)parse_scenario("[signal]\ntone_hz = 400\n", "bench.toml", {"station.1.carrier_hz=1e6"}),
                         doctest::Contains("--set station.1.carrier_hz=1e6: station 1: the scenario has no [[station]] tables to address"),
                         config_error);
    // The value's unit, its range and an unknown key: named with the --set that gave them.
    CHECK_THROWS_WITH_AS((void)parse_scenario(text, "rx.toml", {"station.2.carrier_hz=1.02MV"}),
                         doctest::Contains("rx.toml (--set station.2.carrier_hz=1.02MV): station.carrier_hz = '1.02MV': unit V does not "
                                           "match the key's unit, Hz"),
                         config_error);
    CHECK_THROWS_WITH_AS((void)parse_scenario(text, "rx.toml", {"station.2.modulation_index=1.5"}),
                         doctest::Contains("rx.toml (--set station.2.modulation_index=1.5): station 2 \"next\": station.modulation_index = "
                                           "1.5: must be in [0, 1]"),
                         config_error);
    CHECK_THROWS_WITH_AS((void)parse_scenario(text, "rx.toml", {"station.1.carrier=1e6"}),
                         doctest::Contains("rx.toml (--set station.1.carrier=1e6): station.carrier: unknown key (did you mean "
                                           "station.carrier_hz?)"),
                         config_error);
    // A value written in the file is named by its line.
    std::string bad = text;
    bad.replace(bad.find("5e-3"), 4, "-1");
    CHECK_THROWS_WITH_AS((void)parse_scenario(bad, "rx.toml"),
                         doctest::Contains("rx.toml:12: station 2 \"next\": station.field_v_per_m = -1: must be > 0 and <= 100 V/m"),
                         config_error);
}

TEST_CASE("the dial is set one way: tuned_hz or capacitance_f, the last override wins, and the written scenario parses again")
{
    const std::string base = "[[station]]\ncarrier_hz = 1e6\nfield_v_per_m = 10e-3\nmodulation_index = 0.3\ntone_hz = 400\n"
                             "[tuner]\nlayout = \"single-coil\"\ncoil_h = 240e-6\ncapacitance_f = \"104p\"\n";
    // Both in the file: one line naming the file, the line and both keys.
    CHECK_THROWS_WITH_AS(parse_scenario(base + "tuned_hz = \"900k\"\n", "both.toml"),
                         doctest::Contains("both.toml:9: tuner.capacitance_f and tuner.tuned_hz: give one of them"), config_error);
    // An override of one replaces the other, set in the file or by an earlier override.
    const auto by_f = parse_scenario(base, "x.toml", {"tuner.tuned_hz=900k"});
    CHECK(by_f.tuner.capacitance_f == 0.0);
    CHECK(by_f.tuner.tuned_hz == 900e3);
    const auto by_c = parse_scenario(base, "x.toml", {"tuner.tuned_hz=900k", "tuner.capacitance_f=120p"});
    CHECK(by_c.tuner.capacitance_f == doctest::Approx(120e-12).epsilon(1e-15));
    // capacitance_f = 0 asks for the capacitor to be solved: beside tuned_hz it is no conflict, and it leaves
    // tuned_hz in place.
    const auto solved = parse_scenario(base + "tuned_hz = \"900k\"\n", "x.toml", {"tuner.capacitance_f=0"});
    CHECK(solved.tuner.tuned_hz == 900e3);
    CHECK(solved.tuner.capacitance_f == 0.0);
    // The written scenario carries the dial as it was set, and parses to the same dial.
    for (const auto& s : {by_f, by_c}) {
        const auto again = parse_scenario(to_toml(s), "y.toml");
        CHECK(again.tuner.capacitance_f == s.tuner.capacitance_f);
        if (s.tuner.capacitance_f == 0.0) CHECK(again.tuner.tuned_hz == s.tuner.tuned_hz);
    }
}

TEST_CASE("a station's programme is a tone or a clip: both in one table is refused; an override of either replaces the other")
{
    const std::string one = "[tuner]\nlayout = \"single-coil\"\n[[station]]\ncarrier_hz = 1e6\nfield_v_per_m = 10e-3\nmodulation_index = 0.3\n";
    CHECK_THROWS_WITH_AS(parse_scenario(one + "tone_hz = 400\naudio = \"clip.wav\"\n", "both.toml"),
                         doctest::Contains("both.toml:8: station 1: tone_hz and audio: give one of them"), config_error);
    // A clip named on the command line replaces the tone, relative to the current directory (as signal.audio).
    const auto clip = parse_scenario(one + "tone_hz = 400\n", "sub/x.toml", {"station.1.audio=clip.wav"});
    REQUIRE(clip.stations.size() == 1);
    CHECK(clip.stations[0].kind == programme_kind::clip);
    CHECK(clip.stations[0].audio == std::filesystem::absolute("clip.wav"));
    // And a tone replaces a clip.
    const auto tone = parse_scenario(one + "audio = \"clip.wav\"\n", "x.toml", {"station.1.tone_hz=700"});
    CHECK(tone.stations[0].kind == programme_kind::tone);
    CHECK(tone.stations[0].tone_hz == 700.0);
}
