// libFuzzer harness for the WAV reading path: the bytes are written to a scratch file and read as a clip
// the way a render reads it (wav_reader: header checks, mono mix, NaN/Inf and truncation checks; then,
// for short files, make_programme's conditioning: band limit, resampling, peak normalisation).
// Properties checked: every rejection is a galena::error with a one-line message that names the file;
// accepted samples are finite; the conditioned programme stays within [-1, 1]. Anything else escaping
// (std::exception, a crash, a sanitizer report) is a finding.
#include "galena/audio_io.hpp"
#include "galena/error.hpp"
#include "galena/scenario.hpp"

#include <cmath>
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <string>
#include <unistd.h>
#include <vector>

namespace {
void require(bool ok, const char* what, const std::string& detail)
{
    if (ok) return;
    std::fprintf(stderr, "wav_fuzz: property broken: %s: %s\n", what, detail.c_str());
    std::abort();
}

const std::filesystem::path& scratch()
{
    static const std::filesystem::path p = [] {
        const char* dir = std::getenv("TMPDIR");
        return std::filesystem::path(dir != nullptr ? dir : "/tmp") / ("galena-wav-fuzz-" + std::to_string(getpid()) + ".wav");
    }();
    // libFuzzer ends a bounded run with exit(): the scratch file goes with the process.
    static const bool cleanup = std::atexit([] {
        std::error_code ec;
        std::filesystem::remove(p, ec);
    }) == 0;
    (void)cleanup;
    return p;
}

void check_message(const galena::error& e)
{
    const std::string m = e.what();
    require(m.find('\n') == std::string::npos, "error message spans lines", m);
    require(m.find(scratch().string()) != std::string::npos, "error message does not name the file", m);
}
} // namespace

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size)
{
    {
        std::ofstream out(scratch(), std::ios::binary | std::ios::trunc);
        out.write(reinterpret_cast<const char*>(data), static_cast<std::streamsize>(size));
    }
    try {
        galena::wav_reader r(scratch());
        std::vector<float> buf(4096);
        std::size_t total = 0;
        while (const std::size_t n = r.read(buf)) {
            for (std::size_t i = 0; i < n; ++i) require(std::isfinite(buf[i]), "non-finite sample accepted", std::to_string(total + i));
            total += n;
            if (total > (std::size_t{1} << 22)) break; // a header may claim more than the fuzzer's bytes hold
        }
        // The render's own path, for clips short enough to condition quickly.
        if (r.frames() <= 20000 && r.sample_rate_hz() >= 8000.0) {
            galena::scenario s;
            s.file = "fuzz.toml";
            s.programme.kind = galena::programme_kind::clip;
            s.programme.audio = scratch();
            s.programme.audio_cutoff_hz = 0.4 * r.sample_rate_hz() < 5000.0 ? 0.4 * r.sample_rate_hz() : 5000.0;
            require(galena::programme_duration_s(s) > 0.0, "accepted clip has no duration", "");
            auto prog = galena::make_programme(s);
            const double d = prog->duration_s();
            prog->prepare(0.0, d);
            for (int k = 0; k <= 64; ++k) {
                const double x = prog->value(d * k / 64.0);
                require(std::isfinite(x) && std::fabs(x) <= 1.0, "programme value outside [-1, 1]", std::to_string(x));
            }
        }
    } catch (const galena::error& e) {
        check_message(e);
    }
    return 0;
}
