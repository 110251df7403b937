#include "galena/units.hpp"

#include "galena/error.hpp"

#include <array>
#include <charconv>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <system_error>
#include <vector>

namespace galena {

namespace {

/// The accepted spellings of each unit; the first is the symbol messages use.
struct unit_spelling {
    unit u;
    std::vector<std::string_view> names;
};

const std::array<unit_spelling, 10>& spellings()
{
    static const std::array<unit_spelling, 10> t = {{
        {unit::none, {""}},
        {unit::ohm, {"ohm", "ohms", "Ohm", "Ohms", "\u03a9", "\u2126"}},
        {unit::farad, {"F"}},
        {unit::henry, {"H"}},
        {unit::hertz, {"Hz", "hz", "HZ"}},
        {unit::volt, {"V"}},
        {unit::ampere, {"A"}},
        {unit::second, {"s"}},
        {unit::celsius, {"degC", "\u00b0C", "C"}},
        {unit::electronvolt, {"eV"}},
    }};
    return t;
}

/// The SI prefixes galena accepts (SI Brochure, 9th edition, Table 7), as decimal exponents.
struct prefix {
    std::string_view text;
    int exponent;
};
constexpr std::array<prefix, 9> prefixes = {{
    {"p", -12}, {"n", -9}, {"u", -6}, {"\u00b5", -6}, {"\u03bc", -6}, {"m", -3}, {"k", 3}, {"M", 6}, {"G", 9},
}};

bool is_unit(std::string_view s, unit u)
{
    if (u == unit::metre) return s == "m";
    for (const auto& e : spellings())
        if (e.u == u)
            for (auto n : e.names)
                if (!n.empty() && n == s) return true;
    return false;
}

/// The unit whose spelling `s` is, other than `u`; "" when none.
std::string_view other_unit(std::string_view s, unit u)
{
    for (const auto& e : spellings())
        if (e.u != u)
            for (auto n : e.names)
                if (!n.empty() && n == s) return e.names.front();
    if (u != unit::metre && s == "m") return "m";
    return {};
}

std::string_view trim(std::string_view s)
{
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return s;
}

std::string expected_form(unit u)
{
    const std::string_view sym = unit_symbol(u);
    return fmt::format("must be a number with an optional SI prefix (p n u µ m k M G; m is milli, M is mega){}",
                       sym.empty() ? std::string(" and no unit") : fmt::format(" and the unit {}", sym));
}

bool is_digit(char c) { return c >= '0' && c <= '9'; }

} // namespace

std::string_view unit_symbol(unit u)
{
    if (u == unit::metre) return "m";
    for (const auto& e : spellings())
        if (e.u == u) return e.names.front();
    return {};
}

double parse_quantity(std::string_view text, unit u)
{
    const std::string_view t = trim(text);
    {
        std::string low(t);
        for (char& c : low) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
        if (low == "inf" || low == "+inf" || low == "infinity" || low == "+infinity" || low == "none")
            return std::numeric_limits<double>::infinity();
    }
    // The number: [sign] digits [. digits] [e [sign] digits], at least one digit.
    std::size_t i = 0;
    std::string mantissa;
    if (i < t.size() && (t[i] == '+' || t[i] == '-')) {
        if (t[i] == '-') mantissa += '-';
        ++i;
    }
    std::size_t digits = 0;
    while (i < t.size() && is_digit(t[i])) mantissa += t[i++], ++digits;
    if (i < t.size() && t[i] == '.') {
        mantissa += t[i++];
        while (i < t.size() && is_digit(t[i])) mantissa += t[i++], ++digits;
    }
    if (digits == 0) throw config_error(expected_form(u));
    long exponent = 0;
    if (i < t.size() && (t[i] == 'e' || t[i] == 'E')) {
        std::size_t j = i + 1;
        int sign = 1;
        if (j < t.size() && (t[j] == '+' || t[j] == '-')) sign = t[j++] == '-' ? -1 : 1;
        if (j < t.size() && is_digit(t[j])) {
            long e = 0;
            while (j < t.size() && is_digit(t[j])) {
                e = std::min(e * 10 + (t[j++] - '0'), 100000L);
            }
            exponent = sign * e;
            i = j;
        } // else: the 'e' belongs to the suffix (e.g. "1.1eV")
    }
    const std::string_view rest = trim(t.substr(i));
    bool ok = rest.empty() || is_unit(rest, u);
    if (!ok) {
        for (const auto& p : prefixes) {
            if (rest.substr(0, p.text.size()) != p.text) continue;
            const std::string_view after = trim(rest.substr(p.text.size()));
            if (after.empty() || is_unit(after, u)) {
                exponent += p.exponent;
                ok = true;
                break;
            }
            if (auto other = other_unit(after, u); !other.empty()) {
                throw config_error(u == unit::none ? fmt::format("unit {} given, but the key has no unit", other)
                                                   : fmt::format("unit {} does not match the key's unit, {}", other, unit_symbol(u)));
            }
        }
    }
    if (!ok) {
        if (auto other = other_unit(rest, u); !other.empty())
            throw config_error(u == unit::none ? fmt::format("unit {} given, but the key has no unit", other)
                                               : fmt::format("unit {} does not match the key's unit, {}", other, unit_symbol(u)));
        throw config_error(expected_form(u));
    }
    // Scale the decimal text, not the double, so that "4.7n" is exactly the double nearest 4.7e-9.
    const std::string full = fmt::format("{}e{}", mantissa, exponent);
    double v = 0.0;
    const auto res = std::from_chars(full.data(), full.data() + full.size(), v);
    if (res.ec == std::errc::result_out_of_range || !std::isfinite(v))
        throw config_error("out of the range of a double (about 1e-308 to 1e308)");
    if (res.ec != std::errc() || res.ptr != full.data() + full.size()) throw config_error(expected_form(u));
    return v;
}

std::string format_quantity(double value, unit u, int significant_digits, bool with_symbol)
{
    const std::string_view sym = with_symbol ? unit_symbol(u) : std::string_view();
    const std::string space = sym.empty() ? "" : " "; // "4.7 nF", "47 kohm": SI style puts a space before prefix + unit
    if (std::isnan(value)) return "nan";
    if (std::isinf(value)) return value > 0 ? "inf" : "-inf";
    if (value == 0.0) return fmt::format("0{}{}", space, sym);
    char buf[64];
    const auto res = significant_digits <= 0
                         ? std::to_chars(buf, buf + sizeof buf, value, std::chars_format::scientific)
                         : std::to_chars(buf, buf + sizeof buf, value, std::chars_format::scientific, std::min(significant_digits, 17) - 1);
    const std::string sci(buf, res.ptr);
    // sci = [-]d[.ddd]e(+|-)XX
    const auto epos = sci.find('e');
    std::string head = sci.substr(0, epos);
    const int e10 = std::stoi(sci.substr(epos + 1));
    const bool negative = head[0] == '-';
    if (negative) head.erase(0, 1);
    std::string d;
    for (char c : head)
        if (c != '.') d += c;
    while (d.size() > 1 && d.back() == '0') d.pop_back();
    const int e3 = static_cast<int>(std::floor(e10 / 3.0)) * 3;
    if (e3 < -12 || e3 > 9) {
        const std::string m = d.size() > 1 ? d.substr(0, 1) + "." + d.substr(1) : d;
        return fmt::format("{}{}e{}{}{}", negative ? "-" : "", m, e10, space, sym);
    }
    const auto int_digits = static_cast<std::size_t>(e10 - e3 + 1);
    std::string m = d.size() <= int_digits ? d + std::string(int_digits - d.size(), '0')
                                           : d.substr(0, int_digits) + "." + d.substr(int_digits);
    std::string_view pre;
    for (const auto& p : prefixes)
        if (p.exponent == e3 && p.text != "\u00b5" && p.text != "\u03bc") pre = p.text;
    return fmt::format("{}{}{}{}{}", negative ? "-" : "", m, space, pre, sym);
}

} // namespace galena
