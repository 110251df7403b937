// Sweep axes, variants and pack files: parsing, limits and the messages of bad input.
#include "galena/error.hpp"
#include "galena/sweep.hpp"

#include <doctest/doctest.h>

#include <filesystem>
#include <string>

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
