// Sweep scaling: the same 8-variant sweep (bleeder values on the demo scenario at a 1 MHz carrier) on one
// worker thread and on two, measured in this run; prints both wall times, the speed-up, and whether the
// outputs are byte-identical (variants are rendered independently, so they must be).
//
// Each configuration runs `repeats` times and the best wall time counts (both the same way; it removes the
// noise of a shared virtual machine, not any cost of the sweep).
//
// Usage: bench_sweep [clip_seconds = 2] [repeats = 3]   (finds scenarios/ in the source tree)
#include "galena/sweep.hpp"

#include <chrono>
#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <iterator>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

std::string read_all(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

} // namespace

int main(int argc, char** argv)
{
    const double clip_s = argc > 1 ? std::atof(argv[1]) : 2.0;
    const int repeats = argc > 2 ? std::max(1, std::atoi(argv[2])) : 3;
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios" / "demo.toml";
    const std::vector<std::string> sets{"signal.carrier_hz=1e6", fmt::format("signal.duration_s={}", clip_s),
                                        "signal.audio=\"" + (fs::path(GALENA_SOURCE_DIR) / "audio-samples" / "speech-bulletin.wav").string() + "\""};
    std::vector<variant_spec> variants = expand_sweep({parse_sweep_axis("load.bleeder_ohm=10e3,22e3,33e3,47e3,68e3,100e3,220e3,1e6")});
    const fs::path root = fs::temp_directory_path() / "galena-bench-sweep";
    fs::remove_all(root);
    double wall[2] = {1e300, 1e300};
    for (int rep = 0; rep < repeats; ++rep)
        for (unsigned threads : {1u, 2u}) {
            sweep_options opt;
            opt.threads = threads;
            opt.overwrite = true;
            const auto t0 = std::chrono::steady_clock::now();
            const auto r = run_sweep(base, sets, variants, root / fmt::format("threads-{}", threads), opt);
            const double w = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
            wall[threads - 1] = std::min(wall[threads - 1], w);
            fmt::print(stderr, "{} thread(s): {:.2f} s for {} variants\n", threads, w, r.variants.size());
        }
    bool identical = true;
    for (const auto& e : fs::recursive_directory_iterator(root / "threads-1")) {
        if (!e.is_regular_file() || e.path().extension() != ".wav") continue;
        const fs::path other = root / "threads-2" / fs::relative(e.path(), root / "threads-1");
        identical = identical && read_all(e.path()) == read_all(other);
    }
    fmt::print("## Sweep scaling: 8 variants x {:.3g} s clip at a 1 MHz carrier (best of {})\n\n", clip_s, repeats);
    fmt::print("| worker threads | wall s | speed-up |\n|---:|---:|---:|\n");
    fmt::print("| 1 | {:.2f} | 1.00x |\n| 2 | {:.2f} | {:.2f}x |\n\n", wall[0], wall[1], wall[0] / wall[1]);
    fmt::print("WAV outputs byte-identical across thread counts: {}\n", identical ? "yes" : "NO");
    fs::remove_all(root);
    return identical ? 0 : 1;
}
