/// Range checks shared by every module that validates user-facing values.
#pragma once

#include <string>
#include <string_view>

namespace galena::detail {

/// Throws config_error "FIELD = VALUE: must be in [LO, HI] UNIT" unless lo <= value <= hi (NaN fails).
void require_range(std::string_view field, double value, double lo, double hi, std::string_view unit = "");
/// Throws unless value > lo and value <= hi (an open lower bound); hi may be +inf.
void require_above(std::string_view field, double value, double lo, double hi, std::string_view unit = "");
/// Formats a double compactly for messages (inf, nan, %.6g).
[[nodiscard]] std::string format_value(double value);


} // namespace galena::detail
