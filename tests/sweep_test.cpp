// Sweep axes, variants and pack files: parsing, limits and the messages of bad input.
#include "galena/error.hpp"
#include "galena/sweep.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <filesystem>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

TEST_CASE("the bundled demo pack parses: its scenario resolves beside it and every variant has overrides")
{
    const fs::path file = fs::path(GALENA_SOURCE_DIR) / "scenarios/demo-pack.toml";
    const pack_spec p = load_pack(file);
    CHECK(p.scenario == file.parent_path() / "demo.toml");
    CHECK(p.measure_tone_hz == 1000.0);
    REQUIRE(p.variants.size() >= 2);
    for (const auto& v : p.variants) CHECK_FALSE(v.overrides.empty());
}

TEST_CASE("axes: lists, log ranges and their limits")
{
    const auto a = parse_sweep_axis("load.bleeder_ohm=log:1e3:1e5:3");
    REQUIRE(a.values.size() == 3);
    CHECK(a.values[0] == "1000");
    CHECK(a.values[1] == "10000");
    CHECK(a.values[2] == "100000");
    CHECK_THROWS_WITH_AS(parse_sweep_axis("load.bleeder_ohm="), doctest::Contains("must look like section.key=a,b,c"), config_error);
    CHECK_THROWS_WITH_AS(parse_sweep_axis("load.bleeder_ohm=1,,2"), doctest::Contains("empty value in the list"), config_error);
    CHECK_THROWS_WITH_AS(parse_sweep_axis("load.bleeder_ohm=log:1e3:1e5:1001"), doctest::Contains("[2, 1000]"), config_error);
    // 40 x 30 = 1200 variants: past the hard limit.
    const auto x = parse_sweep_axis("load.bleeder_ohm=log:1e3:1e5:40");
    const auto y = parse_sweep_axis("load.filter_capacitance_f=log:1e-10:1e-8:30");
    CHECK_THROWS_WITH_AS((void)expand_sweep({x, y}), doctest::Contains("1200 variants"), config_error);
    // 1000 variants: allowed, numbered with four digits so the folders sort.
    const auto z = parse_sweep_axis("load.filter_capacitance_f=log:1e-10:1e-8:25");
    const auto v = expand_sweep({x, z});
    REQUIRE(v.size() == 1000);
    CHECK(v.front().name.rfind("0001-", 0) == 0);
    CHECK(v.back().name.rfind("1000-", 0) == 0);
}

TEST_CASE("pack text: every mistake names the file and line")
{
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = \"a.toml\"\ntitel = \"x\"\n[[variant]]\nname = \"v\"\n", "p.toml"),
                         doctest::Contains("p.toml:3: pack.titel: unknown key"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = 5\n[[variant]]\nname = \"v\"\n", "p.toml"),
                         doctest::Contains("p.toml:2: pack.scenario: must be a string"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = \"a.toml\"\nmeasure_duration_s = 0\n[[variant]]\nname = \"v\"\n", "p.toml"),
                         doctest::Contains("p.toml:3: pack.measure_duration_s = 0: must be in (0, 10] s"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = \"a.toml\"\n[[variant]]\nname = \"v\"\nset = [1]\n", "p.toml"),
                         doctest::Contains("p.toml:5: variant 1: set: must be a list of strings"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = \"a.toml\"\n[[variant]]\nname = \"v\"\nlabel = \"x\"\nlabel = \"y\"\n", "p.toml"),
                         doctest::Contains("p.toml:6: malformed TOML"), config_error);
    const auto p = parse_pack("[pack]\nscenario = \"sub/a.toml\"\n[[variant]]\nname = \"v-1\"\nset = [\"load.bleeder_ohm=1e3\"]\n", "dir/p.toml");
    CHECK(p.scenario == fs::path("dir/sub/a.toml"));
    CHECK(p.title == "galena comparison");
    REQUIRE(p.variants.size() == 1);
    CHECK(p.variants[0].label == "v-1");
    CHECK(p.variants[0].overrides == std::vector<std::string>{"load.bleeder_ohm=1e3"});
}

TEST_CASE("engineering values in axes, labels and pack files; the pack's default measurement tone")
{
    // log: ranges and lists take prefixes and the key's unit; labels and names write them back.
    const auto a = parse_sweep_axis("load.bleeder_ohm=log:10k:1M ohm:3");
    REQUIRE(a.values.size() == 3);
    const auto v = expand_sweep({a, parse_sweep_axis("load.filter_capacitance_f=0,4.7nF")});
    REQUIRE(v.size() == 6);
    CHECK(v[0].name == "01-bleeder_ohm-10k-filter_capacitance_f-0");
    CHECK(v[3].label == "bleeder_ohm = 100k, filter_capacitance_f = 4.7n");
    CHECK(v[5].name == "06-bleeder_ohm-1M-filter_capacitance_f-4.7n");
    CHECK_THROWS_WITH_AS(parse_sweep_axis("load.bleeder_ohm=log:10kF:1M:3"),
                         doctest::Contains("LO = \"10kF\": unit F does not match the key's unit, ohm"), config_error);
    CHECK_THROWS_WITH_AS(parse_sweep_axis("bleeder_ohm=10k,47k"), doctest::Contains("(did you mean load.bleeder_ohm=10k,47k?)"),
                         config_error);
    CHECK_THROWS_WITH_AS(parse_variant("x:bleeder_ohm=47k"), doctest::Contains("(did you mean load.bleeder_ohm=47k?)"), config_error);
    // Pack numbers take prefixes and units too; without measure_tone_hz the documented default applies.
    const auto p = parse_pack("[pack]\nscenario = \"a.toml\"\nmeasure_duration_s = \"200ms\"\n[[variant]]\nname = \"v\"\n", "p.toml");
    CHECK(p.measure_tone_hz == default_measure_tone_hz);
    CHECK(p.measure_duration_s == 0.2);
    CHECK(parse_pack("[pack]\nscenario = \"a.toml\"\nmeasure_tone_hz = \"400 Hz\"\n[[variant]]\nname = \"v\"\n", "p.toml").measure_tone_hz == 400.0);
    CHECK(parse_pack("[pack]\nscenario = \"a.toml\"\nmeasure_tone_hz = 0\n[[variant]]\nname = \"v\"\n", "p.toml").measure_tone_hz == 0.0);
    CHECK_THROWS_WITH_AS(parse_pack("[pack]\nscenario = \"a.toml\"\nmeasure_tone_hz = \"1kV\"\n[[variant]]\nname = \"v\"\n", "p.toml"),
                         doctest::Contains("p.toml:3: pack.measure_tone_hz: unit V does not match the key's unit, Hz"), config_error);
}

TEST_CASE("pack files are told from scenarios; check loads every variant and names the one that fails")
{
    const fs::path dir = fs::path(GALENA_SOURCE_DIR) / "scenarios";
    CHECK(is_pack_file(dir / "demo-pack.toml"));
    CHECK(is_pack_file(dir / "example-pack.toml"));
    CHECK_FALSE(is_pack_file(dir / "example.toml"));
    CHECK_FALSE(is_pack_file(fs::path(GALENA_SOURCE_DIR) / "audio-samples/tone-1khz.wav"));
    const pack_spec demo = load_pack(dir / "demo-pack.toml");
    const auto scenes = load_pack_variants(demo);
    REQUIRE(scenes.size() == demo.variants.size());
    CHECK(scenes[1].circuit.load.bleeder_ohm == 10e3); // ge-weak-10k
    pack_spec broken = demo;
    broken.variants[2].overrides.push_back("load.bleeder_ohm=10nF");
    std::string msg;
    try {
        (void)load_pack_variants(broken);
    } catch (const config_error& e) {
        msg = e.what();
    }
    CHECK(msg.rfind((dir / "demo-pack.toml").string() + ": variant ge-weak-47k: ", 0) == 0);
    CHECK(msg.find("load.bleeder_ohm = '10nF': unit F does not match the key's unit, ohm") != std::string::npos);
}

TEST_CASE("sweep progress: finished variants reported once each, in variant order, with a rising work fraction")
{
    const fs::path out = fs::path(GALENA_TEST_TMP) / "sweep-progress";
    fs::remove_all(out);
    std::vector<variant_spec> variants;
    // Unequal lengths, so that on two threads the short later variants finish before the long first one.
    for (const char* d : {"0.3", "0.05", "0.05", "0.05", "0.2"}) variants.push_back({fmt::format("v{}", variants.size()), "", {std::string("signal.duration_s=") + d}});
    sweep_options opt;
    opt.threads = 2;
    std::vector<std::string> finished;
    std::vector<std::size_t> reported;
    std::vector<double> fractions;
    opt.progress = [&](const sweep_progress& p) {
        CHECK(p.total == variants.size());
        fractions.push_back(p.fraction);
        if (!p.finished.empty()) {
            finished.emplace_back(p.finished);
            reported.push_back(p.reported);
        }
    };
    (void)run_sweep(fs::path(GALENA_SOURCE_DIR) / "scenarios/example.toml", {"signal.carrier_hz=200k"}, variants, out, opt);
    CHECK(finished == std::vector<std::string>{"v0", "v1", "v2", "v3", "v4"});
    CHECK(reported == std::vector<std::size_t>{1, 2, 3, 4, 5});
    REQUIRE_FALSE(fractions.empty());
    for (std::size_t i = 1; i < fractions.size(); ++i) CHECK(fractions[i] >= fractions[i - 1]);
    CHECK(fractions.back() == 1.0);
}

TEST_CASE("a clip variant measured on a tone: its warnings are chosen by code, not by sentence")
{
    // The clip's own render has no single tone (no-distortion-figures); its distortion figures come from the
    // tone render in measure/, so that warning is dropped and the tone render's are kept with a prefix.
    const fs::path out = fs::path(GALENA_TEST_TMP) / "sweep-warning-codes";
    fs::remove_all(out);
    const std::string clip = (fs::path(GALENA_SOURCE_DIR) / "audio-samples/speech-count.wav").string();
    sweep_options opt;
    opt.threads = 1;
    opt.measure_tone_hz = 1000.0;
    opt.measure_duration_s = 0.1;
    const auto res = run_sweep(fs::path(GALENA_SOURCE_DIR) / "scenarios/example.toml",
                               {"signal.carrier_hz=200k", "signal.audio=" + clip, "signal.duration_s=0.1"}, {{"clip", "", {}}}, out, opt);
    REQUIRE(res.variants.size() == 1);
    const auto& r = res.variants.front();
    REQUIRE(r.measured_separately);
    CHECK(has_warning(r.job.warnings, warning_code::no_distortion_figures));
    CHECK(has_warning(r.job.warnings, warning_code::clip_shortened));
    CHECK_FALSE(has_warning(r.warnings, warning_code::no_distortion_figures));
    CHECK(has_warning(r.warnings, warning_code::clip_shortened));
    // metrics.json-style keys: sentences and codes side by side, in the same order.
    REQUIRE(r.metrics.at("warning_codes").size() == r.warnings.size());
    REQUIRE(r.metrics.at("warnings").size() == r.warnings.size());
    for (std::size_t i = 0; i < r.warnings.size(); ++i) {
        CHECK(r.metrics["warning_codes"][i].get<std::string>() == to_string(r.warnings[i].code));
        CHECK(r.metrics["warnings"][i].get<std::string>() == r.warnings[i].message);
        CHECK(r.metrics["warning_codes"][i].get<std::string>() != "no-distortion-figures");
    }
}
