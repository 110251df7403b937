// Memory of a long render: synthesises a long test clip (default 10 minutes: a speech-like mix of tones
// with a slow syllable envelope, made here), renders it as `galena render` does (run_render_job: WAV,
// JSON, metrics) and prints the peak resident set size of this process, the wall time per simulated
// second, and the clip's share of that memory. Streaming and chunked I/O keep the peak independent of the
// clip length.
//
// Usage: bench_memory [minutes = 10] [carrier_hz = 1e6]
#include "galena/audio_io.hpp"
#include "galena/constants.hpp"
#include "galena/job.hpp"
#include "galena/scenario.hpp"

#include <sys/resource.h>

#include <chrono>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fmt/format.h>
#include <sndfile.h>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

double peak_rss_mb()
{
    rusage u{};
    getrusage(RUSAGE_SELF, &u);
    return static_cast<double>(u.ru_maxrss) / 1024.0; // Linux reports kilobytes
}

/// Writes a mono 16 kHz, 16-bit WAV of `seconds` (block by block, never the whole clip in memory).
void write_clip(const fs::path& p, double seconds)
{
    SF_INFO info{};
    info.samplerate = 16000;
    info.channels = 1;
    info.format = SF_FORMAT_WAV | SF_FORMAT_PCM_16;
    SNDFILE* f = sf_open(p.c_str(), SFM_WRITE, &info);
    if (f == nullptr) throw std::runtime_error("cannot write " + p.string());
    const auto total = static_cast<std::size_t>(seconds * 16000.0);
    std::vector<float> block(16000);
    for (std::size_t i0 = 0; i0 < total; i0 += block.size()) {
        const std::size_t n = std::min(block.size(), total - i0);
        for (std::size_t i = 0; i < n; ++i) {
            const double t = static_cast<double>(i0 + i) / 16000.0;
            const double syllable = 0.5 * (1.0 - std::cos(two_pi * 4.0 * t)); // 4 syllables per second
            const double voice = 0.5 * std::sin(two_pi * 140.0 * t) + 0.3 * std::sin(two_pi * 720.0 * t + 1.0) +
                                 0.15 * std::sin(two_pi * 2300.0 * t + 2.0);
            block[i] = static_cast<float>(0.7 * syllable * voice);
        }
        sf_write_float(f, block.data(), static_cast<sf_count_t>(n));
    }
    sf_close(f);
}

} // namespace

int main(int argc, char** argv)
{
    const double minutes = argc > 1 ? std::atof(argv[1]) : 10.0;
    const double fc = argc > 2 ? std::atof(argv[2]) : 1e6;
    const fs::path dir = fs::temp_directory_path() / "galena-bench-memory";
    fs::remove_all(dir);
    fs::create_directories(dir);
    const fs::path clip = dir / "long-clip.wav";
    write_clip(clip, minutes * 60.0);
    const double rss_before = peak_rss_mb();
    const auto s = load_scenario(fs::path(GALENA_SOURCE_DIR) / "scenarios" / "demo.toml",
                                 {"signal.audio=\"" + clip.string() + "\"", "signal.duration_s=0", fmt::format("signal.carrier_hz={}", fc),
                                  "output.sample_rate_hz=48000", "output.format=\"pcm24\""});
    job_options opt;
    opt.allow_long = true;
    const auto t0 = std::chrono::steady_clock::now();
    const auto o = run_render_job(s, dir / "out", opt);
    const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    const double rss = peak_rss_mb();
    fmt::print("## Long clip: {:.3g} minutes at a {:.3g} MHz carrier\n\n", minutes, fc * 1e-6);
    fmt::print("| figure | value |\n|---|---:|\n");
    fmt::print("| peak resident set size | {:.1f} MB |\n", rss);
    fmt::print("| peak before the render (clip written, libraries loaded) | {:.1f} MB |\n", rss_before);
    fmt::print("| output WAV | {:.1f} MB |\n", static_cast<double>(fs::file_size(o.wav)) / 1e6);
    fmt::print("| simulated | {:.1f} s |\n| wall | {:.1f} s |\n| wall s per simulated s | {:.3f} |\n", o.render.simulated_s, wall,
               o.render.wall_s / o.render.simulated_s);
    fs::remove_all(dir);
    return 0;
}
