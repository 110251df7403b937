// `galena dial`: one command sweeps a user's set across a band and writes the audio, the dial map and the
// band survey; mistakes leave nothing behind.
#include "cli_support.hpp"

#include "galena/text_table.hpp"

#include <doctest/doctest.h>

using namespace galena_test;

TEST_CASE("galena dial: a short glide writes the WAV, the dial map and the survey; a bench set is refused")
{
    const fs::path root(GALENA_SOURCE_DIR);
    const fs::path tmp = fresh_dir(GALENA_TEST_TMP, "dial_cli");
    const fs::path out = tmp / "out";
    const auto r = galena_cli("dial " + q(root / "scenarios/receiver.toml") + " --band " + q(root / "scenarios/demo-band.toml") +
                                  " --out " + q(out) + " --from 1200k --to 1220k --glide 0.05 -q",
                              tmp);
    INFO(r.err);
    REQUIRE(r.rc == 0);
    for (const char* f : {"dial.wav", "dial-map.csv", "survey.csv", "survey.md"}) CHECK(fs::exists(out / f));
    const auto rows = galena::parse_csv(slurp(out / "survey.csv"), out / "survey.csv");
    REQUIRE(rows.size() == 9); // header + the 8 invented stations
    CHECK(rows[0][0] == "station");
    CHECK(r.out.find("Band survey") != std::string::npos);
    CHECK(leftovers(tmp).empty());

    // A bench scenario has no tuning capacitor to turn: usage error (2), no output, no stage.
    const fs::path out2 = tmp / "out2";
    const auto bad = galena_cli("dial " + q(root / "scenarios/example.toml") + " --band " + q(root / "scenarios/demo-band.toml") +
                                    " --out " + q(out2) + " --glide 0.05 -q",
                                tmp);
    CHECK(bad.rc == 2);
    CHECK(bad.err.find("tuner.layout") != std::string::npos);
    CHECK(!fs::exists(out2));
    CHECK(leftovers(tmp).empty());
}
