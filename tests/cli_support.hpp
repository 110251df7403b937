// Helpers shared by the tests that run the built galena tool: run it with arguments, read files back.
#pragma once

#include <doctest/doctest.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <sys/wait.h>

namespace galena_test {

namespace fs = std::filesystem;

inline std::string slurp(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    std::ostringstream ss;
    ss << in.rdbuf();
    return ss.str();
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

} // namespace galena_test
