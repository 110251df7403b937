// staged_output: all-or-nothing publishing of an output folder, input protection, cleanup; and the cancel
// flag that stops long work.
#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/staged_output.hpp"

#include <doctest/doctest.h>

#include <csignal>
#include <fmt/format.h>
#include <sys/wait.h>
#include <unistd.h>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

using namespace galena;
namespace fs = std::filesystem;

namespace {
fs::path fresh(const std::string& name)
{
    const fs::path d = fs::path(GALENA_TEST_TMP) / "staged_output" / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

std::string read(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    std::ostringstream s;
    s << in.rdbuf();
    return s.str();
}

std::size_t entries(const fs::path& d)
{
    std::size_t n = 0;
    for ([[maybe_unused]] const auto& e : fs::directory_iterator(d)) ++n;
    return n;
}
} // namespace

TEST_CASE("a new target is published by one rename; paths and messages map to it")
{
    const fs::path d = fresh("new");
    staged_output st(d / "deep/out", false);
    CHECK(st.dir().parent_path() == d / "deep");
    CHECK(st.dir().filename().string().rfind(".out.partial-", 0) == 0);
    write_text_atomic(st.dir() / "a.txt", "A");
    fs::create_directories(st.dir() / "sub");
    write_text_atomic(st.dir() / "sub/b.txt", "B");
    CHECK(st.published(st.dir() / "sub/b.txt") == d / "deep/out/sub/b.txt");
    CHECK(st.published(d / "elsewhere.txt") == d / "elsewhere.txt");
    CHECK(st.describe(st.dir().string() + "/a.txt: oops") == (d / "deep/out").string() + "/a.txt: oops");
    st.publish();
    CHECK(read(d / "deep/out/a.txt") == "A");
    CHECK(read(d / "deep/out/sub/b.txt") == "B");
    CHECK(entries(d / "deep") == 1);
}

TEST_CASE("an unpublished stage leaves nothing, not even the parent folders it made")
{
    const fs::path d = fresh("abandon");
    {
        staged_output st(d / "x/y/out", false);
        write_text_atomic(st.dir() / "a.txt", "A");
    }
    CHECK(entries(d) == 0);
}

TEST_CASE("into an existing folder: a clash moves nothing without overwrite; overwrite replaces; inputs never")
{
    const fs::path d = fresh("existing");
    fs::create_directories(d / "out");
    write_text_atomic(d / "out/keep.txt", "old");
    write_text_atomic(d / "out/input.wav", "input");
    {
        staged_output st(d / "out", false);
        write_text_atomic(st.dir() / "new.txt", "N");
        write_text_atomic(st.dir() / "keep.txt", "new");
        CHECK_THROWS_WITH_AS(st.check("keep.txt"), doctest::Contains("keep.txt: already exists (pass --overwrite"), audio_error);
        CHECK_THROWS_WITH_AS(st.publish(), doctest::Contains("already exists"), audio_error);
    }
    CHECK(read(d / "out/keep.txt") == "old");
    CHECK_FALSE(fs::exists(d / "out/new.txt"));
    CHECK(entries(d) == 1);
    {
        staged_output st(d / "out", true, {d / "out/input.wav"});
        write_text_atomic(st.dir() / "input.wav", "clobber");
        CHECK_THROWS_WITH_AS(st.publish(), doctest::Contains("input.wav: is an input of this run"), audio_error);
    }
    CHECK(read(d / "out/input.wav") == "input");
    staged_output st(d / "out", true);
    write_text_atomic(st.dir() / "keep.txt", "new");
    st.publish();
    CHECK(read(d / "out/keep.txt") == "new");
    CHECK(entries(d) == 1);
}

TEST_CASE("a target that is a file, or an input, is refused before anything is made")
{
    const fs::path d = fresh("refuse");
    write_text_atomic(d / "f.toml", "x");
    CHECK_THROWS_WITH_AS(staged_output(d / "f.toml", true), doctest::Contains("f.toml: --out exists and is not a directory"), audio_error);
    CHECK_THROWS_WITH_AS(staged_output(d / "f.toml/out", true), doctest::Contains("cannot create the output directory"), audio_error);
    CHECK(entries(d) == 1);
}

TEST_CASE("publish checks every parent first: a file where a folder must go moves nothing")
{
    const fs::path d = fresh("parents");
    fs::create_directories(d / "out");
    write_text_atomic(d / "out/plots", "a file");
    staged_output st(d / "out", true);
    write_text_atomic(st.dir() / "a.txt", "A");
    fs::create_directories(st.dir() / "plots");
    write_text_atomic(st.dir() / "plots/p.svg", "P");
    CHECK_THROWS_WITH_AS(st.publish(), doctest::Contains("out/plots: is a file where the output needs a folder"), audio_error);
    CHECK_FALSE(fs::exists(d / "out/a.txt"));
    CHECK(read(d / "out/plots") == "a file");
}

TEST_CASE("a move that fails midway is rolled back: the old set stays, no new file, no new folder")
{
    const fs::path d = fresh("rollback");
    fs::create_directories(d / "out");
    write_text_atomic(d / "out/a.txt", "old a");
    write_text_atomic(d / "out/stale.txt", "old stale");
    for (int fail_at = 0; fail_at < 5; ++fail_at) { // five moves: two aside, three in
        CAPTURE(fail_at);
        {
            staged_output st(d / "out", true);
            st.owns("stale.txt");
            write_text_atomic(st.dir() / "a.txt", "new a");
            fs::create_directories(st.dir() / "sub/deeper");
            write_text_atomic(st.dir() / "sub/deeper/b.txt", "new b");
            write_text_atomic(st.dir() / "c.txt", "new c");
            detail::publish_fault_after_moves = fail_at;
            CHECK_THROWS_WITH_AS(st.publish(), doctest::Contains("nothing was changed in"), audio_error);
            detail::publish_fault_after_moves = -1;
        }
        CHECK(read(d / "out/a.txt") == "old a");
        CHECK(read(d / "out/stale.txt") == "old stale");
        CHECK_FALSE(fs::exists(d / "out/sub"));
        CHECK_FALSE(fs::exists(d / "out/c.txt"));
        CHECK(entries(d / "out") == 2);
        CHECK(entries(d) == 1);
    }
    // Without a fault the same publish replaces the whole owned set.
    staged_output st(d / "out", true);
    st.owns("stale.txt");
    write_text_atomic(st.dir() / "a.txt", "new a");
    st.publish();
    CHECK(read(d / "out/a.txt") == "new a");
    CHECK_FALSE(fs::exists(d / "out/stale.txt"));
    CHECK(entries(d) == 1);
}

TEST_CASE("stale stages: a dead process's stage is removed and reported; a live one is left alone")
{
    const fs::path d = fresh("stale");
    (void)take_staging_notices();
    const pid_t dead = fork();
    if (dead == 0) _exit(0);
    waitpid(dead, nullptr, 0);
    const fs::path gone = d / fmt::format(".out.partial-{}-00000001", dead);
    const fs::path live = d / fmt::format(".out.partial-{}-00000002", getppid());
    fs::create_directories(gone);
    fs::create_directories(live);
    {
        staged_output st(d / "out", false);
    }
    CHECK_FALSE(fs::exists(gone));
    CHECK(fs::exists(live));
    const auto notes = take_staging_notices();
    REQUIRE(notes.size() == 1);
    CHECK(notes[0].find(fmt::format("left by process {}, which no longer runs", dead)) != std::string::npos);
}

TEST_CASE("cancel: the flag is raised once, names the signal, and throws until reset")
{
    reset_cancel();
    CHECK_FALSE(cancel_requested());
    CHECK_NOTHROW(throw_if_cancelled());
    request_cancel(SIGTERM);
    request_cancel(SIGINT); // the first request wins
    CHECK(cancel_requested());
    try {
        throw_if_cancelled();
        FAIL("no cancelled_error");
    } catch (const cancelled_error& e) {
        CHECK(e.signal_number() == SIGTERM);
        CHECK(std::string(e.what()).find("interrupted by SIGTERM") == 0);
    }
    reset_cancel();
    CHECK_NOTHROW(throw_if_cancelled());
    request_cancel();
    CHECK_THROWS_WITH_AS(throw_if_cancelled(), doctest::Contains("cancelled"), cancelled_error);
    reset_cancel();
}
