// Sweep axes, variants and pack files: parsing, limits and the messages of bad input.
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/pack_file.hpp"
#include "galena/sweep.hpp"
#include "galena/audio_io.hpp"
#include "galena/warning.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <utility>

#include <filesystem>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

TEST_CASE("the bundled demo pack parses: a crystal set whose variants answer coupling, tap, bleeder and diode")
{
    const fs::path file = fs::path(GALENA_SOURCE_DIR) / "scenarios/demo-pack.toml";
    const pack_spec p = load_pack(file);
    CHECK(p.scenario == file.parent_path() / "crystal-set.toml");
    CHECK(p.measure_tone_hz == 0.0); // the stations send test tones already
    REQUIRE(p.variants.size() >= 2);
    for (const auto& v : p.variants) CHECK_FALSE(v.overrides.empty());
    const auto scenes = load_pack_variants(p);
    REQUIRE(scenes.size() == p.variants.size());
    std::vector<double> couplings;
    for (std::size_t i = 0; i < scenes.size(); ++i) {
        const auto& s = scenes[i];
        CHECK(s.tuner.layout == tuner_layout::coupled);
        // An invented band on a 10 kHz raster, the wanted station first.
        REQUIRE(s.stations.size() == 3);
        for (const auto& st : s.stations) CHECK(std::fmod(st.params.carrier_hz, 10e3) == 0.0);
        CHECK(s.stations[0].params.carrier_hz == 1.0e6);
        if (p.variants[i].name.rfind("coupling-", 0) == 0) couplings.push_back(s.tuner.coupling);
    }
    CHECK(couplings == std::vector<double>{0.01, 0.028, 0.08}); // loose, near critical, tight
    // The bench pack keeps the bleeder and diode questions on the generator of demo.toml.
    const pack_spec bench = load_pack(file.parent_path() / "bench-pack.toml");
    CHECK(bench.scenario == file.parent_path() / "demo.toml");
    CHECK(bench.measure_tone_hz == 1000.0);
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

TEST_CASE("pack text: band sweeps ([[dial_sweep]]) with their file and line")
{
    const std::string head = "[pack]\nscenario = \"a.toml\"\n[[variant]]\nname = \"v\"\n";
    const auto p = parse_pack(head + "[[dial_sweep]]\nname = \"d\"\nband = \"b.toml\"\nfrom_hz = \"960k\"\nto_hz = \"1.03MHz\"\n"
                                     "glide_s = 2\nset = [\"tuner.coupling=0.02\"]\n",
                              "dir/p.toml");
    REQUIRE(p.dial_sweeps.size() == 1);
    const auto& d = p.dial_sweeps[0];
    CHECK(d.label == "d");
    CHECK(d.band == fs::path("dir/b.toml"));
    CHECK(d.start_hz == 960e3);
    CHECK(d.end_hz == 1.03e6);
    CHECK(d.glide_s == 2.0);
    CHECK(d.overrides == std::vector<std::string>{"tuner.coupling=0.02"});
    CHECK(p.variants.size() == 1); // the variants are kept beside the sweep
    CHECK_THROWS_WITH_AS(parse_pack(head + "[[dial_sweep]]\nname = \"d\"\nband = \"b.toml\"\nspeed = 2\n", "p.toml"),
                         doctest::Contains("p.toml:9: dial_sweep 1: speed: unknown key"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack(head + "[[dial_sweep]]\nname = \"d\"\nband = \"b.toml\"\nfrom_hz = \"96k\"\n", "p.toml"),
                         doctest::Contains("p.toml:9: from_hz = 96000: must be in [100 kHz, 30 MHz]"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack(head + "[[dial_sweep]]\nname = \"d\"\n", "p.toml"),
                         doctest::Contains("dial_sweep 1: band: missing"), config_error);
    CHECK_THROWS_WITH_AS(parse_pack(head + "[[dial_sweep]]\nname = \"d\"\nband = \"b.toml\"\n[[dial_sweep]]\nname = \"d\"\nband = \"b.toml\"\n", "p.toml"),
                         doctest::Contains("name = \"d\": used twice"), config_error);
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
    const pack_spec bench = load_pack(dir / "bench-pack.toml");
    const auto scenes = load_pack_variants(bench);
    REQUIRE(scenes.size() == bench.variants.size());
    CHECK(scenes[1].circuit.load.bleeder_ohm == 10e3); // ge-weak-10k
    pack_spec broken = bench;
    broken.variants[2].overrides.push_back("load.bleeder_ohm=10nF");
    std::string msg;
    try {
        (void)load_pack_variants(broken);
    } catch (const config_error& e) {
        msg = e.what();
    }
    CHECK(msg.rfind((dir / "bench-pack.toml").string() + ": variant ge-weak-47k: ", 0) == 0);
    CHECK(msg.find("load.bleeder_ohm = '10nF': unit F does not match the key's unit, ohm") != std::string::npos);
}

TEST_CASE("receiver axes: tuner keys and numbered stations, with engineering values in names and labels")
{
    const auto k = parse_sweep_axis("tuner.coupling=10m,28m,0.08");
    const auto t = parse_sweep_axis("tuner.detector_tap=log:0.25:1:3");
    REQUIRE(t.values.size() == 3);
    CHECK(t.values[1] == "0.5");
    const auto v = expand_sweep({k, t});
    REQUIRE(v.size() == 9);
    CHECK(v[0].name == "01-coupling-10m-detector_tap-250m");
    CHECK(v[8].label == "coupling = 80m, detector_tap = 1");
    // A station is addressed by its number; its key's unit applies (carrier_hz: Hz).
    const auto c = parse_sweep_axis("station.2.carrier_hz=log:1.01MHz:1.04MHz:2");
    CHECK(c.values == std::vector<std::string>{"1.01e+06", "1.04e+06"});
    const auto sv = expand_sweep({c});
    CHECK(sv[0].name == "01-station2.carrier_hz-1.01M");
    CHECK(sv[1].label == "station2.carrier_hz = 1.04M");
    CHECK(sv[1].overrides == std::vector<std::string>{"station.2.carrier_hz=1.04e+06"});
    CHECK_THROWS_WITH_AS(parse_sweep_axis("station.2.carrier_hz=log:1.01MV:1.04MHz:2"),
                         doctest::Contains("LO = \"1.01MV\": unit V does not match the key's unit, Hz"), config_error);
    // Each variant loads through the crystal-set scenario, and a refused value names the file, the override,
    // the field, the value and the rule.
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios/crystal-set.toml";
    const sweep_result ok = prepare_sweep(base, {}, expand_sweep({c, k}), sweep_options{});
    REQUIRE(ok.variants.size() == 6);
    CHECK(ok.variants[5].scene.stations[1].params.carrier_hz == 1.04e6);
    CHECK(ok.variants[5].scene.stations[0].params.carrier_hz == 1.0e6);
    CHECK(ok.variants[5].scene.tuner.coupling == 0.08);
    std::string msg;
    try {
        (void)prepare_sweep(base, {}, expand_sweep({parse_sweep_axis("tuner.coupling=0.05,1.2")}), sweep_options{});
    } catch (const config_error& e) {
        msg = e.what();
    }
    CHECK(msg.find("variant 02-coupling-1.2: ") != std::string::npos);
    CHECK(msg.find(base.string() + " (--set tuner.coupling=1.2)") != std::string::npos);
    CHECK(msg.find("tuner.coupling = 1.2: must be > 0 and <= 0.9 (did you mean 0.012, i.e. 1.2 %?)") != std::string::npos);
    msg.clear();
    try {
        (void)prepare_sweep(base, {}, expand_sweep({parse_sweep_axis("station.3.field_v_per_m=1m,-2m")}), sweep_options{});
    } catch (const config_error& e) {
        msg = e.what();
    }
    CHECK(msg.find(base.string() + " (--set station.3.field_v_per_m=-2m): station 3 \"Valley Regional\": "
                   "station.field_v_per_m = -0.002: must be > 0 and <= 100 V/m") != std::string::npos);
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

TEST_CASE("tables: whole-receiver rows get the front end's columns, bench rows keep theirs")
{
    variant_result bench;
    bench.spec.name = "b";
    bench.metrics = {{"carrier_peak_v", 0.15}, {"dc_v", 0.02}, {"warnings", nlohmann::json::array()}};
    variant_result rx;
    rx.spec.name = "r";
    rx.metrics = {{"tuned_hz", 1.0e6}, {"loaded_q", 26.5}, {"rf_bandwidth_hz", 37.7e3}, {"wanted_tone_v", 0.105},
                  {"loudest_neighbour_db", 1.9}, {"warnings", nlohmann::json::array()}};
    const std::string b = table_csv({bench});
    CHECK(b.rfind("variant,label,carrier_peak_v,dc_v,", 0) == 0);
    const std::string r = table_csv({rx});
    CHECK(r.rfind("variant,label,tuned_hz,loaded_q,rf_bandwidth_hz,detector_rf_peak_v,", 0) == 0);
    CHECK(r.find("wanted_tone_v,loudest_neighbour_db") != std::string::npos);
    CHECK(r.find("\nr,,1000000,26.5,37700,,") != std::string::npos); // no label: an empty cell
    const std::string m = table_markdown({rx});
    CHECK(m.find("| tuned Hz | loaded Q | RF BW Hz |") != std::string::npos);
    CHECK(m.find("| 1M | 26.5 | 37.7k |") != std::string::npos);
    CHECK(m.find("| 105m | 1.9 |") != std::string::npos);
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

TEST_CASE("a sweep's own cancel token stops that sweep before it finishes, leaves no output and no process-wide cancel")
{
    const fs::path out = fs::path(GALENA_TEST_TMP) / "sweep-token";
    fs::remove_all(out);
    std::vector<variant_spec> variants;
    for (const char* d : {"0.3", "0.3"}) variants.push_back({fmt::format("v{}", variants.size()), "", {std::string("signal.duration_s=") + d}});
    cancel_token token;
    sweep_options opt;
    opt.threads = 1;
    opt.cancel = &token;
    int ticks = 0;
    opt.progress = [&](const sweep_progress& p) {
        ++ticks;
        if (p.fraction > 0.0) token.request(); // during or right after the first variant's render
    };
    CHECK_THROWS_AS((void)run_sweep(fs::path(GALENA_SOURCE_DIR) / "scenarios/example.toml", {"signal.carrier_hz=200k"}, variants, out, opt),
                    cancelled_error);
    CHECK(ticks >= 1);
    CHECK_FALSE(fs::exists(out));
    CHECK_FALSE(cancel_requested());
}

namespace {
/// RMS and peak of a WAV's samples (digital full scale = 1), read through libsndfile by read_mono.
std::pair<double, double> wav_rms_peak(const fs::path& p)
{
    const auto x = read_mono(p);
    double ss = 0.0, pk = 0.0;
    for (float v : x) {
        ss += static_cast<double>(v) * v;
        pk = std::max(pk, static_cast<double>(std::fabs(v)));
    }
    return {std::sqrt(ss / static_cast<double>(x.size())), pk};
}
} // namespace

TEST_CASE("levels: one automatic full scale for every variant with its headroom stated, no file below -60 dBFS, matched copies")
{
    // dBFS here is 20 log10 of the RMS of the samples, full scale = 1 (a full-scale sine reads -3.01 dBFS;
    // AES17 would add 3.01 dB). The rule (the loudest peak + 1 dB, rounded up to two significant digits;
    // -1 dBFS peaks are common mastering practice) is restated here on the WAVs' own samples.
    const fs::path out = fs::path(GALENA_TEST_TMP) / "sweep-levels";
    fs::remove_all(out);
    sweep_options opt;
    opt.threads = 2;
    // A weak and two stronger carriers: 20 dB and more apart at the earpiece.
    const auto res = run_sweep(fs::path(GALENA_SOURCE_DIR) / "scenarios/example.toml",
                               {"signal.carrier_hz=200k", "signal.duration_s=0.15", "output.full_scale_v=auto"},
                               {{"weak", "", {"signal.carrier_peak_v=0.1"}, {}}, {"mid", "", {"signal.carrier_peak_v=0.3"}, {}},
                                {"strong", "", {"signal.carrier_peak_v=1"}, {}}},
                               out, opt);
    REQUIRE(res.variants.size() == 3);
    const double fsv = res.variants[0].job.full_scale_v;
    double loudest_v = 0.0;
    for (const auto& r : res.variants) {
        CAPTURE(r.spec.name);
        CHECK(r.job.full_scale_v == fsv); // one calibration for the command
        CHECK(r.metrics.at("full_scale_auto").get<bool>());
        CHECK(r.scene.output.full_scale_v == fsv);
        const auto [rms, pk] = wav_rms_peak(r.job.wav);
        loudest_v = std::max(loudest_v, pk * fsv);
        const double rms_dbfs = 20.0 * std::log10(rms);
        MESSAGE(r.spec.name << ": " << rms_dbfs << " dBFS RMS, full scale " << fsv << " V");
        CHECK(rms_dbfs > -60.0);
        CHECK(std::fabs(r.metrics.at("rms_dbfs").get<double>() - rms_dbfs) < 0.01);
        CHECK_FALSE(has_warning(r.warnings, warning_code::quiet_output));
        CHECK_FALSE(has_warning(r.warnings, warning_code::output_clipped));
    }
    // The headroom: at least 1 dB, and one step less in the second significant digit would leave less.
    const double headroom = 20.0 * std::log10(fsv / loudest_v);
    CHECK(headroom >= 1.0 - 0.01);
    const double step = std::pow(10.0, std::floor(std::log10(fsv)) - 1.0);
    CHECK(std::fabs(fsv / step - std::round(fsv / step)) < 1e-6); // two significant digits
    CHECK(20.0 * std::log10((fsv - step) / loudest_v) < 1.0);
    const auto& strong = res.variants[2];
    CHECK(strong.metrics.at("headroom_db").get<double>() == doctest::Approx(headroom).epsilon(1e-3).scale(0));
    // Loudness-matched copies, as a pack has: every copy at -26 dBFS RMS (peaks permitting).
    REQUIRE(res.matched.size() == 3);
    CHECK(fs::is_regular_file(out / "matched/gains.csv"));
    for (const auto& g : res.matched) {
        CAPTURE(g.name);
        const auto [rms, pk] = wav_rms_peak(g.wav);
        if (!g.peak_limited) CHECK(20.0 * std::log10(rms) == doctest::Approx(-26.0).epsilon(0.0005).scale(0));
        CHECK(pk <= std::pow(10.0, -1.0 / 20.0) + 1e-4);
    }
}

TEST_CASE("levels: an explicit full scale is kept, and a file below -60 dBFS RMS says so")
{
    const fs::path out = fs::path(GALENA_TEST_TMP) / "sweep-quiet";
    fs::remove_all(out);
    sweep_options opt;
    opt.threads = 1;
    const auto res = run_sweep(fs::path(GALENA_SOURCE_DIR) / "scenarios/example.toml",
                               {"signal.carrier_hz=200k", "signal.duration_s=0.15", "output.full_scale_v=2"},
                               {{"weak", "", {"signal.carrier_peak_v=0.01"}, {}}}, out, opt);
    const auto& r = res.variants.front();
    CHECK(r.job.full_scale_v == 2.0);
    CHECK_FALSE(r.metrics.at("full_scale_auto").get<bool>());
    const auto [rms, pk] = wav_rms_peak(r.job.wav);
    MESSAGE("10 mV carrier at 2 V full scale: " << 20.0 * std::log10(rms) << " dBFS RMS");
    REQUIRE(20.0 * std::log10(rms) < -60.0);
    CHECK(has_warning(r.warnings, warning_code::quiet_output));
}
