#include "galena/validate.hpp"

#include "galena/error.hpp"

#include <cmath>
#include <fmt/format.h>

namespace galena::detail {

std::string format_value(double value)
{
    if (std::isnan(value)) return "nan";
    if (std::isinf(value)) return value > 0 ? "inf" : "-inf";
    return fmt::format("{:.6g}", value);
}

void require_range(std::string_view field, double value, double lo, double hi, std::string_view unit)
{
    if (!(value >= lo && value <= hi))
        throw config_error(fmt::format("{} = {}: must be in [{}, {}]{}{}", field, format_value(value),
                                       format_value(lo), format_value(hi), unit.empty() ? "" : " ", unit));
}

void require_above(std::string_view field, double value, double lo, double hi, std::string_view unit)
{
    if (!(value > lo && value <= hi))
        throw config_error(fmt::format("{} = {}: must be > {} and <= {}{}{}", field, format_value(value),
                                       format_value(lo), format_value(hi), unit.empty() ? "" : " ", unit));
}

} // namespace galena::detail
