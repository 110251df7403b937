// Warning codes: stable names that round-trip, and every one documented in DEVELOPERS.md (the map that
// tells a program what each code means).
#include "galena/warning.hpp"

#include <doctest/doctest.h>

#include <fstream>
#include <set>
#include <sstream>
#include <string>

using namespace galena;

TEST_CASE("every warning code has one stable name that parses back to it")
{
    std::set<std::string> seen;
    for (warning_code c : all_warning_codes()) {
        const std::string name(to_string(c));
        CHECK(name != "unknown");
        CHECK(seen.insert(name).second); // unique
        for (char ch : name) CHECK(((ch >= 'a' && ch <= 'z') || ch == '-'));
        REQUIRE(parse_warning_code(name).has_value());
        CHECK(*parse_warning_code(name) == c);
    }
    CHECK(seen.size() == all_warning_codes().size());
    CHECK_FALSE(parse_warning_code("Output-Clipped").has_value());
    CHECK_FALSE(parse_warning_code("the earpiece audio peaks at").has_value());
}

TEST_CASE("context goes before the sentence and keeps the code")
{
    const warning w{warning_code::dc_tolerance_not_met, "not reached"};
    const warning v = with_context("tone measurement: ", w);
    CHECK(v.code == warning_code::dc_tolerance_not_met);
    CHECK(v.message == "tone measurement: not reached");
    CHECK(warning_messages({w, v}) == std::vector<std::string>{"not reached", "tone measurement: not reached"});
    CHECK(warning_code_names({w}) == std::vector<std::string>{"dc-tolerance-not-met"});
    CHECK(has_warning({w}, warning_code::dc_tolerance_not_met));
    CHECK_FALSE(has_warning({w}, warning_code::output_clipped));
}

TEST_CASE("DEVELOPERS.md documents every warning code")
{
    std::ifstream f(std::string(GALENA_SOURCE_DIR) + "/DEVELOPERS.md");
    REQUIRE(f);
    std::stringstream ss;
    ss << f.rdbuf();
    const std::string doc = ss.str();
    for (warning_code c : all_warning_codes()) {
        INFO(to_string(c));
        CHECK(doc.find("`" + std::string(to_string(c)) + "`") != std::string::npos);
    }
}
