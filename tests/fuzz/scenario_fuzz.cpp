// libFuzzer harness for the scenario contract: TOML text plus command-line overrides (and the same text as
// a comparison-pack file).
// Input: scenario text; lines that start with "@set " are taken out and passed as --set overrides.
// Properties checked: every rejection is a galena::error with a one-line, non-empty message that names
// the file; anything else escaping (std::exception, a crash, a sanitizer report) is a finding. A scenario
// that parses renders to TOML that parses again to the same text (to_toml round trip).
#include "galena/error.hpp"
#include "galena/scenario.hpp"
#include "galena/pack_file.hpp"
#include "galena/sweep.hpp"

#include <cstddef>
#include <cstdint>
#include <cstdlib>
#include <cstdio>
#include <string>
#include <vector>

namespace {
void require(bool ok, const char* what, const std::string& detail)
{
    if (ok) return;
    std::fprintf(stderr, "scenario_fuzz: property broken: %s: %s\n", what, detail.c_str());
    std::abort();
}

void check_message(const galena::error& e)
{
    const std::string m = e.what();
    require(!m.empty(), "empty error message", m);
    require(m.find('\n') == std::string::npos, "error message spans lines", m);
}
} // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size)
{
    const std::string in(reinterpret_cast<const char*>(data), size);
    std::string text;
    std::vector<std::string> sets;
    std::size_t at = 0;
    while (at <= in.size()) {
        const std::size_t nl = in.find('\n', at);
        const std::string line = in.substr(at, nl == std::string::npos ? std::string::npos : nl - at);
        if (line.rfind("@set ", 0) == 0) sets.push_back(line.substr(5));
        else text += line + "\n";
        if (nl == std::string::npos) break;
        at = nl + 1;
    }
    try {
        const galena::pack_spec p = galena::parse_pack(text, "fuzz-pack.toml");
        require(!p.variants.empty() && !p.scenario.empty(), "accepted pack without variants or scenario", text);
    } catch (const galena::error& e) {
        check_message(e);
    }
    galena::scenario s;
    try {
        s = galena::parse_scenario(text, "fuzz.toml", sets);
    } catch (const galena::error& e) {
        check_message(e);
        return 0;
    }
    const std::string once = galena::to_toml(s);
    try {
        const galena::scenario again = galena::parse_scenario(once, "fuzz.toml");
        require(galena::to_toml(again) == once, "to_toml round trip changed the scenario", once);
    } catch (const galena::error& e) {
        require(false, "to_toml output does not parse", std::string(e.what()) + "\n" + once);
    }
    return 0;
}
