/// Small helpers shared by the report's parts (playlist, plots, page); not installed.
#pragma once

#include "galena/error.hpp"

#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <limits>
#include <nlohmann/json.hpp>
#include <sstream>
#include <string>

namespace galena::detail {

/// The whole file as text. Throws audio_error naming the file when it cannot be read.
inline std::string read_report_text(const std::filesystem::path& p)
{
    std::ifstream in(p, std::ios::binary);
    if (!in) throw audio_error(fmt::format("{}: cannot read", p.string()));
    std::ostringstream ss;
    ss << in.rdbuf();
    return ss.str();
}

/// The number at `key` of a flat metrics object, or NaN when it is missing or not a number.
inline double number_or_nan(const nlohmann::json& j, const char* key)
{
    if (!j.contains(key) || !j[key].is_number()) return std::numeric_limits<double>::quiet_NaN();
    return j[key].get<double>();
}

} // namespace galena::detail
