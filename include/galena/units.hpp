/// Engineering values as builders write them: a number with an optional SI prefix and unit symbol
/// ("47k", "47kΩ", "47k ohm", "10nF", "1 MHz", "2.2e-9"), parsed and written back with one set of rules.
#pragma once

#include <string>
#include <string_view>

namespace galena {

/// The unit of a numeric value (scenario keys carry one in their key table). Symbols as the messages
/// and the README write them.
enum class unit {
    none,         ///< dimensionless (ratios, coefficients, counts)
    ohm,          ///< ohm: "ohm", "ohms", "Ω" (U+03A9) or "Ω" (U+2126)
    farad,        ///< F
    henry,        ///< H
    hertz,        ///< Hz (also "hz", "HZ")
    volt,         ///< V
    ampere,       ///< A
    second,       ///< s
    celsius,      ///< degC: "degC", "°C" or "C"
    electronvolt, ///< eV
    metre,        ///< m (a bare "m" after the number is the metre, not milli: "10m" = 10 m, "10mm" = 0.01 m)
};

/// The unit's symbol as messages write it ("ohm", "F", "Hz", "degC", ...; "" for unit::none).
[[nodiscard]] std::string_view unit_symbol(unit u);

/// Parses one value for a key measured in `u`: a plain or scientific number ("47000", "4.7e4", "-1"),
/// optionally followed (spaces allowed) by one SI prefix — p n u µ m k M G (1e-12 ... 1e9; `m` is milli,
/// mega is `M`; µ may be U+00B5 or U+03BC) — and optionally by the unit's symbol: "47k", "47kΩ",
/// "47k ohm", "10nF", "1MHz", "2V", "300ms". "inf", "+inf", "infinity" and "none" give +infinity (the
/// caller's range check decides whether that is allowed). The prefix scales the decimal text exactly:
/// "4.7n" is the same double as 4.7e-9.
/// Throws config_error whose message is the rule alone, for the caller to prefix with the file, field
/// and value: a unit of another kind names both ("unit F does not match the key's unit, ohm"), anything
/// else names the accepted form. Not for lists or ranges: split those first.
[[nodiscard]] double parse_quantity(std::string_view text, unit u);

/// Writes `value` in engineering notation: mantissa in [1, 1000) with an SI prefix from p to G, then the
/// unit's symbol after a space when `with_symbol` ("47k", "31.62k", "10n", "4.7 nF", "47 kohm"; 0 -> "0";
/// +inf -> "inf").
/// `significant_digits` 0 writes the shortest text that parses back to the same double (a round trip
/// through parse_quantity is exact); 1..17 rounds to that many digits (trailing zeros dropped), for tables
/// and labels. Values outside the prefixes' reach are written in scientific notation. Never uses µ (ASCII
/// "u"), so the text is safe in file names.
[[nodiscard]] std::string format_quantity(double value, unit u = unit::none, int significant_digits = 0,
                                          bool with_symbol = false);

} // namespace galena
