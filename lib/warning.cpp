#include "galena/warning.hpp"

#include <algorithm>
#include <array>
#include <utility>

namespace galena {

namespace {
// One table: code and stable name, in declaration order.
constexpr std::array<std::pair<warning_code, std::string_view>, 18> names{{
    {warning_code::adaptive_fallback, "adaptive-fallback"},
    {warning_code::coarse_step_floor, "coarse-step-floor"},
    {warning_code::step_count_fallback, "step-count-fallback"},
    {warning_code::dc_tolerance_not_met, "dc-tolerance-not-met"},
    {warning_code::samples_missing, "samples-missing"},
    {warning_code::channels_mixed, "channels-mixed"},
    {warning_code::clip_shortened, "clip-shortened"},
    {warning_code::output_clipped, "output-clipped"},
    {warning_code::no_distortion_figures, "no-distortion-figures"},
    {warning_code::unmodulated_tone, "unmodulated-tone"},
    {warning_code::diagonal_clipping, "diagonal-clipping"},
    {warning_code::negative_peak_clipping, "negative-peak-clipping"},
    {warning_code::failure_to_follow, "failure-to-follow"},
    {warning_code::station_tone_unmeasured, "station-tone-unmeasured"},
    {warning_code::transfer_one_region, "transfer-one-region"},
    {warning_code::plots_left_out, "plots-left-out"},
    {warning_code::quiet_output, "quiet-output"},
    {warning_code::speech_unavailable, "speech-unavailable"},
}};
} // namespace

std::string_view to_string(warning_code code) noexcept
{
    for (const auto& [c, n] : names)
        if (c == code) return n;
    return "unknown";
}

std::optional<warning_code> parse_warning_code(std::string_view name) noexcept
{
    for (const auto& [c, n] : names)
        if (n == name) return c;
    return std::nullopt;
}

const std::vector<warning_code>& all_warning_codes()
{
    static const std::vector<warning_code> all = [] {
        std::vector<warning_code> v;
        for (const auto& e : names) v.push_back(e.first);
        return v;
    }();
    return all;
}

warning with_context(std::string_view context, warning w)
{
    w.message.insert(0, context);
    return w;
}

std::vector<std::string> warning_messages(const std::vector<warning>& ws)
{
    std::vector<std::string> v;
    v.reserve(ws.size());
    for (const auto& w : ws) v.push_back(w.message);
    return v;
}

std::vector<std::string> warning_code_names(const std::vector<warning>& ws)
{
    std::vector<std::string> v;
    v.reserve(ws.size());
    for (const auto& w : ws) v.emplace_back(to_string(w.code));
    return v;
}

bool has_warning(const std::vector<warning>& ws, warning_code code) noexcept
{
    return std::any_of(ws.begin(), ws.end(), [&](const warning& w) { return w.code == code; });
}

} // namespace galena
