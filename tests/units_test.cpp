// Engineering values: SI prefixes and unit symbols parsed exactly, written back so that they parse to the
// same double, units that do not match refused with both named, and every numeric key of the scenario's
// key table covered.
//
// Outside references: the SI prefixes and their factors are those of the SI Brochure (BIPM, 9th edition,
// 2019, Table 7); expected doubles come from the C library's strtod on the equivalent decimal text in
// scientific notation (correctly rounded per C11 7.22.1.3 with glibc), never from galena's own parser.
#include "galena/error.hpp"
#include "galena/scenario.hpp"
#include "galena/units.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <cmath>
#include <cstdlib>
#include <limits>
#include <random>
#include <string>
#include <vector>

using namespace galena;

namespace {

/// The double that the decimal text denotes, by the C library (an outside reference).
double libc(const std::string& decimal) { return std::strtod(decimal.c_str(), nullptr); }

/// SI Brochure, 9th ed., Table 7: the prefixes galena accepts, with their decimal exponents.
struct si_prefix {
    const char* text;
    int exponent;
};
const std::vector<si_prefix> brochure = {{"p", -12}, {"n", -9}, {"u", -6}, {"\u00b5", -6}, {"\u03bc", -6},
                                         {"m", -3},  {"", 0},   {"k", 3},  {"M", 6},       {"G", 9}};

/// Every spelling of each unit that the README lists.
std::vector<std::string> spellings(unit u)
{
    switch (u) {
    case unit::none: return {""};
    case unit::ohm: return {"", "ohm", "ohms", " ohm", "\u03a9", "\u2126"};
    case unit::farad: return {"", "F", " F"};
    case unit::henry: return {"", "H"};
    case unit::hertz: return {"", "Hz", " Hz", "hz"};
    case unit::volt: return {"", "V"};
    case unit::ampere: return {"", "A"};
    case unit::second: return {"", "s"};
    case unit::celsius: return {"", "degC", "\u00b0C", "C"};
    case unit::electronvolt: return {"", "eV"};
    case unit::metre: return {"m"};
    }
    return {""};
}

const std::vector<unit> all_units = {unit::none,   unit::ohm,    unit::farad,   unit::henry,        unit::hertz, unit::volt,
                                     unit::ampere, unit::second, unit::celsius, unit::electronvolt, unit::metre};

} // namespace

TEST_CASE("SI prefixes scale the decimal text exactly (SI Brochure Table 7; strtod as reference)")
{
    for (const auto& p : brochure) {
        for (const char* mantissa : {"1", "4.7", "47", "365", "2.2", "0.1", "999.999", "-3.3", "+6.8"}) {
            const std::string text = std::string(mantissa) + p.text;
            const double expected = libc(fmt::format("{}e{}", mantissa, p.exponent));
            CHECK_MESSAGE(parse_quantity(text, unit::none) == expected, text);
        }
    }
    // The values of the issue, as builders write them.
    CHECK(parse_quantity("47k", unit::ohm) == 47000.0);
    CHECK(parse_quantity("2.2M", unit::ohm) == 2.2e6);
    CHECK(parse_quantity("10n", unit::farad) == libc("10e-9"));
    CHECK(parse_quantity("365p", unit::farad) == libc("365e-12"));
    CHECK(parse_quantity("240u", unit::henry) == libc("240e-6"));
    CHECK(parse_quantity("700k", unit::ohm) == 700e3);
    // "4.7n" is the double nearest 4.7e-9, not 4.7 * 1e-9 (which differs in the last bit).
    CHECK(parse_quantity("4.7n", unit::farad) == libc("4.7e-9"));
}

TEST_CASE("plain and scientific numbers, infinity words and unit symbols")
{
    CHECK(parse_quantity("47000", unit::ohm) == 47000.0);
    CHECK(parse_quantity("4.7e4", unit::ohm) == 47000.0);
    CHECK(parse_quantity("4.7E+4", unit::ohm) == 47000.0);
    CHECK(parse_quantity("-1", unit::second) == -1.0);
    CHECK(parse_quantity(".5", unit::none) == 0.5);
    CHECK(parse_quantity("  2.5  ", unit::none) == 2.5);
    CHECK(parse_quantity("1e3k", unit::hertz) == 1e6);
    for (const char* w : {"inf", "+inf", "Inf", "infinity", "none"}) CHECK(std::isinf(parse_quantity(w, unit::ohm)));
    CHECK(parse_quantity("47k\u03a9", unit::ohm) == 47000.0);
    CHECK(parse_quantity("47k ohm", unit::ohm) == 47000.0);
    CHECK(parse_quantity("47 k ohm", unit::ohm) == 47000.0);
    CHECK(parse_quantity("10nF", unit::farad) == libc("10e-9"));
    CHECK(parse_quantity("1MHz", unit::hertz) == 1e6);
    CHECK(parse_quantity("1 MHz", unit::hertz) == 1e6);
    CHECK(parse_quantity("2V", unit::volt) == 2.0);
    CHECK(parse_quantity("300mV", unit::volt) == libc("300e-3"));
    CHECK(parse_quantity("300ms", unit::second) == libc("300e-3"));
    CHECK(parse_quantity("1.1eV", unit::electronvolt) == 1.1); // the 'e' of eV is not an exponent
    CHECK(parse_quantity("25\u00b0C", unit::celsius) == 25.0);
    CHECK(parse_quantity("2uA", unit::ampere) == libc("2e-6"));
    // m is milli; mega is M. For a length, a bare m is the metre.
    CHECK(parse_quantity("1m", unit::hertz) == libc("1e-3"));
    CHECK(parse_quantity("1M", unit::hertz) == 1e6);
    CHECK(parse_quantity("10m", unit::metre) == 10.0);
    CHECK(parse_quantity("10mm", unit::metre) == libc("10e-3"));
    CHECK(parse_quantity("2km", unit::metre) == 2000.0);
}

TEST_CASE("malformed values are refused with the accepted form; K and MEG are not prefixes")
{
    for (const char* bad : {"", "k", "abc", "1..2", "0x10", "nan", "47K", "1MEG", "1 2", "1kk", "--1", "1e", "1e3e3", "47k ohmx"})
        CHECK_THROWS_WITH_AS((void)parse_quantity(bad, unit::ohm), doctest::Contains("must be a number with an optional SI prefix"),
                             config_error);
    CHECK_THROWS_WITH_AS((void)parse_quantity("47K", unit::ohm), doctest::Contains("m is milli, M is mega"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_quantity("1e400", unit::none), doctest::Contains("out of the range"), config_error);
}

TEST_CASE("a unit that does not match the key's is refused, naming both units")
{
    for (const unit key : all_units)
        for (const unit given : all_units) {
            if (given == key || given == unit::none) continue;
            const std::string sym(unit_symbol(given));
            const std::string text = "1k" + sym;
            // "1km" for a key in m, and "1k" + "m" for any other key: "m" after a prefix is the metre.
            const std::string expected = key == unit::none ? fmt::format("unit {} given, but the key has no unit", sym)
                                                           : fmt::format("unit {} does not match the key's unit, {}", sym, unit_symbol(key));
            CHECK_THROWS_WITH_AS((void)parse_quantity(text, key), doctest::Contains(expected.c_str()), config_error);
        }
    CHECK_THROWS_WITH_AS((void)parse_quantity("10nF", unit::ohm), "unit F does not match the key's unit, ohm", config_error);
    CHECK_THROWS_WITH_AS((void)parse_quantity("1 MHz", unit::volt), "unit Hz does not match the key's unit, V", config_error);
}

TEST_CASE("writing back: labels round to 4 digits; the exact form parses to the same double")
{
    // Labels and tables (4 significant digits).
    CHECK(format_quantity(47000.0, unit::ohm, 4) == "47k");
    CHECK(format_quantity(std::sqrt(10.0) * 1e4, unit::ohm, 4) == "31.62k");
    CHECK(format_quantity(1e-8, unit::farad, 4) == "10n");
    CHECK(format_quantity(0.0151, unit::volt, 4) == "15.1m");
    CHECK(format_quantity(2.2e6, unit::ohm, 4) == "2.2M");
    CHECK(format_quantity(999.96e3, unit::ohm, 4) == "1M"); // rounding carries into the next prefix
    CHECK(format_quantity(4.7e-9, unit::farad, 4, true) == "4.7 nF");
    CHECK(format_quantity(47000.0, unit::ohm, 0, true) == "47 kohm");
    CHECK(format_quantity(-0.25, unit::volt, 0, true) == "-250 mV");
    CHECK(format_quantity(0.0, unit::farad) == "0");
    CHECK(format_quantity(1e-15, unit::none) == "1e-15");
    CHECK(format_quantity(6.02e23, unit::none) == "6.02e23");
    CHECK(format_quantity(std::numeric_limits<double>::infinity(), unit::ohm) == "inf");
    CHECK(format_quantity(123.0, unit::none) == "123");

    // Exact round trip over doubles spread over 30 decades (fixed seed: the run is reproducible).
    std::mt19937_64 rng(12);
    std::uniform_real_distribution<double> decade(-15.0, 15.0);
    for (int i = 0; i < 20000; ++i) {
        const double v = (i % 2 == 0 ? 1.0 : -1.0) * std::pow(10.0, decade(rng));
        const std::string t = format_quantity(v, unit::farad, 0, i % 3 == 0);
        REQUIRE_MESSAGE(parse_quantity(t, unit::farad) == v, t);
    }
}

TEST_CASE("every numeric key of the key table round-trips each prefix and each spelling of its unit")
{
    const std::vector<std::string> mantissas = {"1", "4.7", "47", "365", "31.62", "2.2", "-1", "0.001", "1000", "602"};
    std::size_t keys = 0, checked = 0;
    for (const auto& k : scenario_keys()) {
        if (!k.numeric) continue;
        ++keys;
        CHECK(key_unit(k.field) == k.u);
        for (const auto& p : brochure)
            for (const auto& m : mantissas)
                for (const auto& sp : spellings(k.u)) {
                    if (k.u == unit::metre && p.text == std::string("m") && sp == "m") continue;
                    const std::string text = m + p.text + sp;
                    const double v = parse_quantity(text, k.u);
                    CHECK_MESSAGE(v == libc(fmt::format("{}e{}", m, p.exponent)), k.field, " ", text);
                    for (const bool sym : {false, true}) {
                        const std::string back = format_quantity(v, k.u, 0, sym);
                        CHECK_MESSAGE(parse_quantity(back, k.u) == v, k.field, " ", text, " -> ", back);
                    }
                    ++checked;
                }
    }
    CHECK(keys >= 40); // the contract has 44 numeric keys today
    MESSAGE(keys << " numeric keys, " << checked << " values round-tripped");
}

TEST_CASE("the key table's units agree with the unit each key's name carries")
{
    // An independent check of the table (the parser never looks at the names): a planted wrong unit in
    // the table fails here.
    const std::vector<std::pair<std::string, unit>> suffixes = {{"_ohm", unit::ohm}, {"_f", unit::farad}, {"_h", unit::henry},
                                                                {"_hz", unit::hertz}, {"_v", unit::volt},  {"_a", unit::ampere},
                                                                {"_s", unit::second}, {"_c", unit::celsius}, {"_ev", unit::electronvolt}};
    for (const auto& k : scenario_keys()) {
        if (!k.numeric) continue;
        unit by_name = unit::none;
        for (const auto& [suf, u] : suffixes)
            if (k.field.size() > suf.size() && k.field.compare(k.field.size() - suf.size(), suf.size(), suf) == 0) by_name = u;
        CHECK_MESSAGE(k.u == by_name, k.field);
    }
    CHECK_THROWS_WITH_AS((void)key_unit("load.bleder_ohm"), doctest::Contains("did you mean load.bleeder_ohm"), config_error);
    CHECK_THROWS_WITH_AS((void)key_unit("earpiece.kind"), doctest::Contains("not a numeric key"), config_error);
}
