// Helpers shared by the tests that run the built galena tool: run it with arguments, read files back.
#pragma once

#include <doctest/doctest.h>

#include <chrono>
#include <csignal>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <sys/wait.h>
#include <thread>
#include <unistd.h>
#include <vector>

namespace galena_test {

namespace fs = std::filesystem;

inline std::string slurp(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    std::ostringstream ss;
    ss << in.rdbuf();
    return ss.str();
}

/// A fresh, empty folder `root/name`.
inline fs::path fresh_dir(const fs::path& root, const std::string& name)
{
    const fs::path d = root / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

/// A path quoted for the shell command line galena_cli builds.
inline std::string q(const fs::path& p) { return "'" + p.string() + "'"; }

inline void write_file(const fs::path& p, const std::string& text)
{
    std::ofstream out(p, std::ios::binary | std::ios::trunc);
    out << text;
}

/// A quick tone scenario: 50 ms of 1 kHz on a 200 kHz carrier, 16 kHz output, seven lines with [signal]
/// last. `extra` is appended as is (bare keys land in [signal], on line 8).
inline std::string quick_scenario(const std::string& extra = "")
{
    return "[output]\nsample_rate_hz = 16000\n[signal]\ntest_signal = \"tone\"\ntone_hz = 1000\nduration_s = 0.05\n"
           "carrier_hz = 200e3\n" +
           extra;
}

/// Any staging folder or temporary file (".NAME.partial-XXXXXXXX") under dir.
inline std::vector<fs::path> leftovers(const fs::path& dir)
{
    std::vector<fs::path> found;
    std::error_code ec;
    for (auto it = fs::recursive_directory_iterator(dir, ec); !ec && it != fs::recursive_directory_iterator(); it.increment(ec))
        if (it->path().filename().string().find(".partial-") != std::string::npos) found.push_back(it->path());
    return found;
}

struct run_result {
    int rc = -1;
    std::string out, err;
};

/// Runs `prefix 'galena' args` through /bin/sh (args already shell-quoted where needed); stdout and stderr
/// are kept in `dir`. `prefix` is an optional wrapper command (e.g. "prlimit --fsize=65536 --").
inline run_result galena_cli(const std::string& args, const fs::path& dir, const std::string& prefix = "")
{
    REQUIRE_MESSAGE(std::string(GALENA_CLI).size() > 0, "the galena tool is not built (GALENA_BUILD_TOOLS=OFF)");
    fs::create_directories(dir);
    const std::string cmd = prefix + (prefix.empty() ? "" : " ") + "'" + GALENA_CLI + "' " + args + " > '" +
                            (dir / "stdout.txt").string() + "' 2> '" + (dir / "stderr.txt").string() + "'";
    const int st = std::system(cmd.c_str());
    run_result r;
    r.rc = WIFEXITED(st) ? WEXITSTATUS(st) : -1;
    r.out = slurp(dir / "stdout.txt");
    r.err = slurp(dir / "stderr.txt");
    return r;
}

/// A galena process started without a shell (see spawn_galena).
struct spawned {
    pid_t pid = -1;
    fs::path err_file;
};

/// Starts galena with `args` (no shell), stdout and stderr to files in `dir`; `env` entries ("NAME=value")
/// are set in the child only.
inline spawned spawn_galena(const std::vector<std::string>& args, const fs::path& dir, const std::vector<std::string>& env = {})
{
    REQUIRE(std::string(GALENA_CLI).size() > 0);
    fs::create_directories(dir);
    spawned s;
    s.err_file = dir / "stderr.txt";
    const std::string out_file = (dir / "stdout.txt").string();
    const std::string err_file = s.err_file.string();
    std::vector<std::string> all{GALENA_CLI};
    all.insert(all.end(), args.begin(), args.end());
    std::vector<char*> argv;
    for (auto& a : all) argv.push_back(a.data());
    argv.push_back(nullptr);
    std::vector<std::string> env_copy = env;
    std::fflush(nullptr); // the child must not write the parent's buffered output again
    s.pid = fork();
    REQUIRE(s.pid >= 0);
    if (s.pid == 0) {
        for (auto& e : env_copy) putenv(e.data());
        if (std::freopen(out_file.c_str(), "w", stdout) == nullptr || std::freopen(err_file.c_str(), "w", stderr) == nullptr) _exit(126);
        execv(GALENA_CLI, argv.data());
        _exit(127);
    }
    return s;
}

/// Waits (up to `limit_s`) until `ready()` is true while the process runs. Returns false when the process
/// ended first or the time ran out.
template <class Ready>
bool wait_until(const spawned& s, Ready ready, double limit_s = 120.0)
{
    const auto t0 = std::chrono::steady_clock::now();
    while (std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count() < limit_s) {
        int st = 0;
        if (waitpid(s.pid, &st, WNOHANG) == s.pid) return false;
        if (ready()) return true;
        std::this_thread::sleep_for(std::chrono::milliseconds(20));
    }
    return false;
}

/// Sends `sig` to the process id alone and returns the exit status (exit code, or -1 when killed by a
/// signal).
inline int signal_and_wait(const spawned& s, int sig)
{
    kill(s.pid, sig);
    int st = 0;
    waitpid(s.pid, &st, 0);
    return WIFEXITED(st) ? WEXITSTATUS(st) : -1;
}

} // namespace galena_test
