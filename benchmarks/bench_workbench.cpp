// Workbench latency: from a changed value to playable audio, through the HTTP API (POST /api/render, then
// GET the WAV), for 50 changes of the bleeder on the workbench's base scenario (bench layout, 1 MHz carrier,
// a 3 s excerpt). Peers measured in the same run: the same render by the library in this process
// (render_job_into as the workbench runs it, with a second core when one is free, and on one core), and by
// the command line (`galena render ... --set`, a new process each time, which also draws its plots).
// Prints the median and 95th percentile of each and the ratios. Target: the API's median and p95 at most
// 1 s on the project's 2-core machine. CPU seconds per change are printed too: on a machine shared with
// other work the wall figures grow with the load, the CPU figures much less.
//
// Usage: bench_workbench [changes = 50] [excerpt_s = 3] [cli_runs = 5]   (finds scenarios/ in the source tree)
#include "galena/job.hpp"
#include "galena/scenario.hpp"
#include "galena/workbench.hpp"

#include <httplib.h>
#include <nlohmann/json.hpp>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fmt/format.h>
#include <string>
#include <sys/resource.h>
#include <ctime>
#include <vector>

namespace fs = std::filesystem;
using steady = std::chrono::steady_clock;

namespace {

double seconds_since(steady::time_point t0) { return std::chrono::duration<double>(steady::now() - t0).count(); }

/// CPU seconds (user + system) of this process (`who` = RUSAGE_SELF) or of its waited-for children.
double cpu_s(int who)
{
    rusage u{};
    getrusage(who, &u);
    return static_cast<double>(u.ru_utime.tv_sec + u.ru_stime.tv_sec) + 1e-6 * static_cast<double>(u.ru_utime.tv_usec + u.ru_stime.tv_usec);
}

/// CPU seconds of the calling thread.
double thread_cpu_s()
{
    timespec t{};
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &t);
    return static_cast<double>(t.tv_sec) + 1e-9 * static_cast<double>(t.tv_nsec);
}

/// Median and 95th percentile (nearest rank) of the samples.
std::pair<double, double> median_p95(std::vector<double> v)
{
    std::sort(v.begin(), v.end());
    const auto rank = [&](double p) { return v[std::min(v.size() - 1, static_cast<std::size_t>(std::ceil(p * static_cast<double>(v.size()))) - 1)]; };
    const double median = v.size() % 2 == 1 ? v[v.size() / 2] : 0.5 * (v[v.size() / 2 - 1] + v[v.size() / 2]);
    return {median, rank(0.95)};
}

/// The n-th bleeder value of the run: 10k to 1M in a repeating log-spaced cycle, as engineering text.
std::string bleeder(int n) { return fmt::format("{:.3g}", 1e4 * std::pow(10.0, 2.0 * (n % 10) / 9.0)); }

} // namespace

int main(int argc, char** argv)
{
    const int changes = argc > 1 ? std::max(2, std::atoi(argv[1])) : 50;
    const double excerpt_s = argc > 2 ? std::atof(argv[2]) : 3.0;
    const int cli_runs = argc > 3 ? std::max(1, std::atoi(argv[3])) : 5;
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios" / "workbench.toml";
    const fs::path work = fs::temp_directory_path() / "galena-bench-workbench";
    fs::remove_all(work);
    fs::create_directories(work);

    galena::workbench_options o;
    o.base_scenario = base;
    o.temp_parent = work;
    galena::workbench bench(o);
    httplib::Client client("127.0.0.1", bench.port());
    client.set_read_timeout(60, 0);

    std::vector<double> api;
    const double api_cpu0 = cpu_s(RUSAGE_SELF);
    for (int n = 0; n < changes; ++n) {
        const nlohmann::json body = {{"load.bleeder_ohm", bleeder(n)}, {"signal.duration_s", excerpt_s}};
        const auto t0 = steady::now();
        const auto r = client.Post("/api/render?session=bench", body.dump(), "application/json");
        if (!r || r->status != 200) {
            fmt::print(stderr, "bench_workbench: render {} failed: {}\n", n, r ? r->body : std::string("no answer"));
            return 1;
        }
        const auto wav = client.Get(nlohmann::json::parse(r->body)["audio_url"].get<std::string>().c_str());
        if (!wav || wav->status != 200) return 1;
        api.push_back(seconds_since(t0));
    }

    const double api_cpu = (cpu_s(RUSAGE_SELF) - api_cpu0) / static_cast<double>(changes);
    // The library peer as the workbench runs it (a second core when one is free), then on one core.
    // The calling thread's own CPU seconds bound the wall time from below on an idle machine (the second
    // thread runs beside it): a load-independent view of the split.
    std::vector<double> lib, lib1;
    double lib_cpu = 0.0, lib1_cpu = 0.0, lib_main = 0.0, lib1_main = 0.0;
    for (int n = 0; n < std::min(changes, 10); ++n) {
        const auto s = galena::load_scenario(base, {"load.bleeder_ohm=" + bleeder(n), fmt::format("signal.duration_s={}", excerpt_s)});
        for (const bool two : {true, false}) {
            const fs::path dir = work / fmt::format("lib-{}-{}", n, two ? 2 : 1);
            fs::create_directories(dir);
            galena::job_options jo;
            jo.use_second_core = two;
            const double c0 = cpu_s(RUSAGE_SELF), m0 = thread_cpu_s();
            const auto t0 = steady::now();
            (void)galena::render_job_into(s, dir, jo);
            (two ? lib : lib1).push_back(seconds_since(t0));
            (two ? lib_cpu : lib1_cpu) += cpu_s(RUSAGE_SELF) - c0;
            (two ? lib_main : lib1_main) += thread_cpu_s() - m0;
        }
    }
    lib_cpu /= static_cast<double>(lib.size());
    lib1_cpu /= static_cast<double>(lib1.size());
    lib_main /= static_cast<double>(lib.size());
    lib1_main /= static_cast<double>(lib1.size());
    std::vector<double> cli;
    const double cli_cpu0 = cpu_s(RUSAGE_CHILDREN);
    const std::string tool = GALENA_CLI;
    for (int n = 0; n < cli_runs && !tool.empty(); ++n) {
        const std::string cmd = fmt::format("'{}' render '{}' --quiet --overwrite --out '{}' --set load.bleeder_ohm={} --set signal.duration_s={} > /dev/null",
                                            tool, base.string(), (work / "cli").string(), bleeder(n), excerpt_s);
        const auto t0 = steady::now();
        if (std::system(cmd.c_str()) != 0) {
            fmt::print(stderr, "bench_workbench: the CLI render failed: {}\n", cmd);
            return 1;
        }
        cli.push_back(seconds_since(t0));
    }

    const auto [api_med, api_p95] = median_p95(api);
    const auto [lib_med, lib_p95] = median_p95(lib);
    const auto [lib1_med, lib1_p95] = median_p95(lib1);
    const double cli_cpu = cli.empty() ? 0.0 : (cpu_s(RUSAGE_CHILDREN) - cli_cpu0) / static_cast<double>(cli.size());
    fmt::print("workbench latency, {:.3g} s excerpt at 1 MHz (bench layout), change -> playable WAV:\n", excerpt_s);
    fmt::print("  HTTP API        {:3} changes: median {:.3f} s, p95 {:.3f} s, CPU {:.3f} s each   (target <= 1 s: {})\n", api.size(),
               api_med, api_p95, api_cpu, api_p95 <= 1.0 ? "met" : "missed");
    fmt::print("  library render  {:3} renders: median {:.3f} s, p95 {:.3f} s, CPU {:.3f} s each   API / library (median) = {:.3f}\n",
               lib.size(), lib_med, lib_p95, lib_cpu, api_med / lib_med);
    fmt::print("  ... one core    {:3} renders: median {:.3f} s, p95 {:.3f} s, CPU {:.3f} s each   one core / two (median) = {:.3f}\n",
               lib1.size(), lib1_med, lib1_p95, lib1_cpu, lib1_med / lib_med);
    fmt::print("  calling thread CPU per library render: {:.3f} s on two cores, {:.3f} s on one (ratio {:.3f})\n", lib_main, lib1_main,
               lib1_main / lib_main);
    if (!cli.empty()) {
        const auto [cli_med, cli_p95] = median_p95(cli);
        fmt::print("  CLI render      {:3} runs:    median {:.3f} s, p95 {:.3f} s, CPU {:.3f} s each   API / CLI (median) = {:.3f}\n",
                   cli.size(), cli_med, cli_p95, cli_cpu, api_med / cli_med);
    }
    bench.stop();
    fs::remove_all(work);
    return 0;
}
