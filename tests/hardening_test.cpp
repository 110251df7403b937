// Promises kept under adversarial use, end to end through the galena tool (issue 11): outputs all or
// nothing (a clash anywhere, parents included, moves nothing; --overwrite replaces the whole set; variant
// names cannot collide with galena's own), pack paths relative to the pack, CSV per RFC 4180 (read back by
// Python's csv module) and Markdown cells, determinism of every JSON file, m = 0, signals around external
// programs, EPIPE, FIFO clips, SIGHUP, stale stages, size-capped inputs, the work-based long-input guard,
// and the messages of issue 11's "Messages" list. Renders are short (a 200 kHz carrier, tens of ms).
#include "galena/audio_io.hpp"

#include "cli_support.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <sndfile.h>

#include <algorithm>
#include <cmath>
#include <csignal>
#include <filesystem>
#include <fstream>
#include <string>
#include <sys/stat.h>
#include <vector>

namespace fs = std::filesystem;
using galena_test::galena_cli;
using galena_test::run_result;
using galena_test::slurp;

namespace {

const fs::path src_dir = GALENA_SOURCE_DIR;
const fs::path tmp_root = fs::path(GALENA_TEST_TMP) / "hardening";

fs::path fresh(const std::string& name)
{
    const fs::path d = tmp_root / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

std::string q(const fs::path& p) { return "'" + p.string() + "'"; }

void write_file(const fs::path& p, const std::string& text)
{
    std::ofstream out(p, std::ios::binary | std::ios::trunc);
    out << text;
}

/// 50 ms of 1 kHz on a 200 kHz carrier at 16 kHz, [signal] last (extra keys land in [signal]).
std::string quick_scenario(const std::string& extra = "")
{
    return "[output]\nsample_rate_hz = 16000\n[signal]\ntest_signal = \"tone\"\ntone_hz = 1000\nduration_s = 0.05\n"
           "carrier_hz = 200e3\n" +
           extra;
}

std::vector<fs::path> leftovers(const fs::path& dir)
{
    std::vector<fs::path> found;
    std::error_code ec;
    for (auto it = fs::recursive_directory_iterator(dir, ec); !ec && it != fs::recursive_directory_iterator(); it.increment(ec))
        if (it->path().filename().string().find(".partial-") != std::string::npos) found.push_back(it->path());
    return found;
}

/// Exit code, one line on stderr, every needle present, no staging folder under `work`.
void expect_error(const run_result& r, int rc, std::initializer_list<std::string> needles, const fs::path& work)
{
    INFO("stderr: " << r.err);
    CHECK(r.rc == rc);
    CHECK(r.err.find("galena: error: ") != std::string::npos);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    for (const auto& n : needles) CHECK_MESSAGE(r.err.find(n) != std::string::npos, "missing: " << n);
    CHECK(leftovers(work).empty());
}

std::vector<float> read_samples(const fs::path& p, double* rate = nullptr) { return galena::read_mono(p, rate); }

double peak_of(const std::vector<float>& x)
{
    double p = 0.0;
    for (float v : x) p = std::max(p, std::fabs(static_cast<double>(v)));
    return p;
}

/// A stand-in for gnuplot on PATH: a shell script with `body` (it runs instead of every gnuplot call).
fs::path fake_gnuplot(const fs::path& dir, const std::string& body)
{
    fs::create_directories(dir);
    write_file(dir / "gnuplot", "#!/bin/sh\n" + body + "\n");
    fs::permissions(dir / "gnuplot", fs::perms::owner_all | fs::perms::group_read | fs::perms::others_read);
    return dir;
}

} // namespace

// ---------------------------------------------------------------------------------------------------------
// Outputs: all or nothing.

TEST_CASE("publish: a file where galena needs a folder (plots) refuses before anything is moved in")
{
    const fs::path d = fresh("plots-file");
    write_file(d / "s.toml", quick_scenario());
    fs::create_directories(d / "out");
    write_file(d / "out/plots", "a file named like galena's plot folder");
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q", d / "run");
    expect_error(r, 3, {"out/plots: is a file where the output needs a folder"}, d);
    // Nothing was moved in: the folder holds only the user's file.
    std::size_t n = 0;
    for ([[maybe_unused]] const auto& e : fs::directory_iterator(d / "out")) ++n;
    CHECK(n == 1);
    CHECK(slurp(d / "out/plots") == "a file named like galena's plot folder");
}

TEST_CASE("variant names that galena uses for its own files and folders are refused (any case)")
{
    const fs::path d = fresh("reserved-names");
    write_file(d / "s.toml", quick_scenario());
    // The collision of issue 11: variants "matched" and "recovered" in one pack.
    write_file(d / "pack.toml", "[pack]\nscenario = \"s.toml\"\n[[variant]]\nname = \"matched\"\n[[variant]]\nname = \"recovered\"\n");
    auto r = galena_cli("compare " + q(d / "pack.toml") + " --out " + q(d / "out") + " -q --no-curves", d / "a");
    expect_error(r, 2, {"name \"matched\"", "galena names its own output matched so"}, d);
    CHECK_FALSE(fs::exists(d / "out"));
    for (const std::string name : {"plots", "Table.csv", "index.html", "measure"}) {
        CAPTURE(name);
        r = galena_cli("sweep " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --variant " + name + ":load.bleeder_ohm=1e5", d / "b");
        expect_error(r, 2, {"name \"" + name + "\""}, d);
    }
    r = galena_cli("sweep " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --variant A:load.bleeder_ohm=1e5 --variant a:load.bleeder_ohm=1e4", d / "c");
    expect_error(r, 2, {"name \"a\" is used twice"}, d);
    CHECK_FALSE(fs::exists(d / "out"));
}

TEST_CASE("clipping path and --overwrite: recovered-normalised.wav peaks at -1 dBFS with its stated gain, and a later "
          "render with --overwrite leaves no stale copy")
{
    const fs::path d = fresh("overwrite-set");
    write_file(d / "s.toml", quick_scenario("modulation_index = 0.8\n"));
    // Full scale far below the earpiece level: the calibrated WAV clips.
    auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --set output.full_scale_v=0.01 --set output.format=float",
                        d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    const auto side = nlohmann::json::parse(slurp(d / "out/recovered.json"));
    REQUIRE(side["normalised_wav"] == "recovered-normalised.wav");
    const double peak_v = side["peak_audio_v"].get<double>();
    const double gain_db = side["normalised_gain_db"].get<double>();
    CHECK(side["clipped_samples"].get<double>() > 0);
    // The calibrated file is clipped at full scale; the copy peaks at -1 dBFS (README "Calibrated levels"),
    // which is full_scale x 10^(-1/20) = 0.8913 of it. Float WAVs: exact to float rounding (measured 6e-8).
    const auto clipped = read_samples(d / "out/recovered.wav");
    const auto norm = read_samples(d / "out/recovered-normalised.wav");
    CHECK(peak_of(clipped) == doctest::Approx(1.0).epsilon(1e-6));
    CHECK(peak_of(norm) == doctest::Approx(std::pow(10.0, -1.0 / 20.0)).epsilon(1e-5));
    // The stated gain is what maps the earpiece peak (V) to -1 dBFS of the 0.01 V full scale.
    CHECK(gain_db == doctest::Approx(20.0 * std::log10(0.01 * std::pow(10.0, -1.0 / 20.0) / peak_v)).epsilon(1e-9));
    // Unclipped samples of the copy are the calibrated ones times the gain (the fade included).
    const double g = std::pow(10.0, gain_db / 20.0);
    std::size_t compared = 0;
    for (std::size_t i = 0; i < clipped.size(); ++i)
        if (std::fabs(clipped[i]) < 0.5) {
            CHECK(norm[i] == doctest::Approx(clipped[i] * g).epsilon(1e-5).scale(1e-6));
            ++compared;
        }
    CHECK(compared > 100);
    r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --overwrite", d / "b");
    REQUIRE(r.rc == 0);
    CHECK(nlohmann::json::parse(slurp(d / "out/recovered.json"))["normalised_wav"].is_null());
    CHECK_FALSE(fs::exists(d / "out/recovered-normalised.wav"));
    CHECK(leftovers(d).empty());
}

TEST_CASE("a pack's set paths are relative to the pack file, wherever the command runs")
{
    const fs::path d = fresh("pack-relative");
    fs::create_directories(d / "pack");
    fs::copy_file(src_dir / "audio-samples/speech-count.wav", d / "pack/clip.wav");
    write_file(d / "pack/s.toml", quick_scenario());
    write_file(d / "pack/p.toml", "[pack]\nscenario = \"s.toml\"\n[[variant]]\nname = \"one\"\n"
                                  "set = [\"signal.audio=clip.wav\", \"signal.duration_s=0.1\"]\n");
    // Run from another folder (the test's own working directory has no clip.wav).
    const auto r = galena_cli("sweep " + q(d / "pack/s.toml") + " --out " + q(d / "unused") + " -q --variant x:signal.duration_s=0.05", d / "z");
    REQUIRE(r.rc == 0);
    const auto p = galena_cli("compare " + q(d / "pack/p.toml") + " --out " + q(d / "out") + " -q --no-curves", d / "a");
    INFO(p.err);
    CHECK(p.rc == 0);
    const auto v = nlohmann::json::parse(slurp(d / "out/one/variant.json"));
    CHECK(v["set"][0].get<std::string>().find((d / "pack/clip.wav").string()) != std::string::npos);
}

TEST_CASE("the same key on two --vary axes is refused")
{
    const fs::path d = fresh("vary-twice");
    write_file(d / "s.toml", quick_scenario());
    const auto r = galena_cli("sweep " + q(d / "s.toml") + " --out " + q(d / "out") +
                                  " -q --vary load.bleeder_ohm=1e4,1e5 --vary load.bleeder_ohm=2e4,3e4",
                              d / "a");
    expect_error(r, 2, {"--vary load.bleeder_ohm", "varied twice"}, d);
    CHECK_FALSE(fs::exists(d / "out"));
}

TEST_CASE("tables: labels with quotes, commas and newlines survive CSV (RFC 4180, read back by Python's csv module) "
          "and Markdown")
{
    const fs::path d = fresh("tables");
    write_file(d / "s.toml", quick_scenario());
    write_file(d / "p.toml", "[pack]\nscenario = \"s.toml\"\n[[variant]]\nname = \"a\"\nlabel = \"say \\\"hi\\\", then | go\\nnext line\"\n"
                             "[[variant]]\nname = \"b\"\nlabel = \"plain\"\n");
    const auto r = galena_cli("compare " + q(d / "p.toml") + " --out " + q(d / "out") + " -q --no-curves", d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    // Outside reference: Python's csv module (RFC 4180 dialect "excel") reads the label back unchanged.
    const std::string py = "python3 -c \"import csv,sys,json; rows=list(csv.reader(open(sys.argv[1], newline=''))); "
                           "print(json.dumps([rows[1][1], rows[2][1], len(rows)]))\" ";
    for (const char* f : {"table.csv", "playlist.csv"}) {
        CAPTURE(f);
        const int rc = std::system((py + q(d / "out" / f) + " > " + q(d / "py.json")).c_str());
        REQUIRE(rc == 0);
        const auto got = nlohmann::json::parse(slurp(d / "py.json"));
        if (std::string(f) == "table.csv") {
            CHECK(got[0] == "say \"hi\", then | go\nnext line");
            CHECK(got[1] == "plain");
            CHECK(got[2] == 3);
        } else {
            CHECK(got[0] == "a"); // playlist.csv: number, name, label
        }
    }
    // Python reads the playlist's label column (index 2) unchanged as well.
    REQUIRE(std::system(("python3 -c \"import csv,sys; rows=list(csv.reader(open(sys.argv[1], newline=''))); "
                         "sys.exit(0 if rows[1][2]=='say \\\"hi\\\", then | go\\nnext line' else 1)\" " +
                         q(d / "out/playlist.csv"))
                            .c_str()) == 0);
    // Markdown: one line per row (header, rule, two variants); the pipe is escaped, the newline is <br>.
    const std::string md = slurp(d / "out/table.md");
    CHECK(std::count(md.begin(), md.end(), '\n') == 4);
    CHECK(md.find("say \"hi\", then \\| go<br>next line") != std::string::npos);
}

TEST_CASE("determinism: recovered.json and metrics.json are byte-identical across runs (no wall time in them)")
{
    const fs::path d = fresh("determinism");
    write_file(d / "s.toml", quick_scenario());
    REQUIRE(galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "a") + " -q", d / "ra").rc == 0);
    REQUIRE(galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "b") + " -q", d / "rb").rc == 0);
    for (const char* f : {"recovered.json", "metrics.json", "recovered.wav"}) {
        CAPTURE(f);
        CHECK(slurp(d / "a" / f) == slurp(d / "b" / f));
    }
    CHECK(slurp(d / "a/recovered.json").find("wall") == std::string::npos);
}

TEST_CASE("m = 0: no tone to measure, so the tone figures are null with the reason, not noise as distortion")
{
    const fs::path d = fresh("m0");
    write_file(d / "s.toml", quick_scenario("modulation_index = 0\n"));
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q", d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    for (const char* k : {"fundamental_v", "thd_percent", "thd_n_percent", "sinad_db", "h2_ratio", "detection_efficiency"}) {
        CAPTURE(k);
        CHECK(m[k].is_null());
    }
    CHECK(m["tone_not_applicable"].get<std::string>().find("signal.modulation_index = 0") != std::string::npos);
    CHECK(r.err.find("no tone to measure") != std::string::npos);
}

// ---------------------------------------------------------------------------------------------------------
// Signals and external programs.

TEST_CASE("a signal to galena's pid alone while gnuplot runs stops gnuplot; exit 130/143/129, nothing published")
{
    for (const int sig : {SIGINT, SIGTERM, SIGHUP}) {
        CAPTURE(sig);
        const fs::path d = fresh(fmt::format("gnuplot-signal-{}", sig));
        write_file(d / "s.toml", quick_scenario());
        // The stand-in writes its pid, then sleeps far longer than the test waits.
        const fs::path bin = fake_gnuplot(d / "bin", "echo $$ > " + q(d / "gnuplot.pid") + "\nexec sleep 60");
        const auto s = galena_test::spawn_galena({"render", (d / "s.toml").string(), "--out", (d / "out").string(), "-q"}, d / "run",
                                                 {"PATH=" + bin.string() + ":" + std::getenv("PATH")});
        const bool running = galena_test::wait_until(s, [&] { return fs::exists(d / "gnuplot.pid") && fs::file_size(d / "gnuplot.pid") > 0; });
        const auto t0 = std::chrono::steady_clock::now();
        const int rc = galena_test::signal_and_wait(s, sig);
        const double took_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
        REQUIRE(running);
        const std::string err = slurp(s.err_file);
        INFO("stderr: " << err);
        CHECK(rc == 128 + sig);
        CHECK(took_s < 10.0); // it did not wait for the 60 s sleep
        CHECK(std::count(err.begin(), err.end(), '\n') == 1);
        CHECK_FALSE(fs::exists(d / "out"));
        CHECK(leftovers(d).empty());
        const pid_t gp = std::stoi(slurp(d / "gnuplot.pid"));
        std::this_thread::sleep_for(std::chrono::milliseconds(100));
        CHECK(kill(gp, 0) != 0); // the stand-in was stopped with galena
    }
}

TEST_CASE("gnuplot failures are decoded: exit code and its last line; a resource signal is exit 5 without an install hint")
{
    const fs::path d = fresh("gnuplot-fail");
    write_file(d / "s.toml", quick_scenario());
    const std::string path = std::getenv("PATH");
    fake_gnuplot(d / "bin3", "echo 'line 1: boom' >&2\nexit 3");
    auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "a") + " -q", d / "ra", "env PATH=" + q(d / "bin3") + ":" + path);
    INFO(r.err);
    CHECK(r.rc == 0); // plots are optional for a render: a warning
    CHECK(r.err.find("plots left out: plot zoom: gnuplot failed with exit code 3; gnuplot said: line 1: boom") != std::string::npos);
    CHECK(r.err.find("exit status") == std::string::npos);
    CHECK(r.err.find(".partial-") == std::string::npos); // no pointer into the removed stage
    CHECK_FALSE(fs::exists(d / "a/plots"));
    fake_gnuplot(d / "bin9", "kill -9 $$");
    r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "b") + " -q", d / "rb", "env PATH=" + q(d / "bin9") + ":" + path);
    expect_error(r, 5, {"gnuplot was killed by signal 9", "limit"}, d);
    CHECK(r.err.find("install") == std::string::npos);
    CHECK_FALSE(fs::exists(d / "b"));
}

TEST_CASE("progress piped into a reader that goes away: galena finishes, publishes, exits 0, leaves no stage")
{
    const fs::path d = fresh("epipe");
    write_file(d / "s.toml", quick_scenario());
    // Not -q: progress lines go to stderr, here into `head -n 1`, which exits after the first line.
    const std::string cmd = "bash -c '" + std::string(GALENA_CLI) + " render " + (d / "s.toml").string() + " --out " + (d / "out").string() +
                            " --set signal.duration_s=0.3 2>&1 | head -n 1 > /dev/null; echo ${PIPESTATUS[0]} > " + (d / "rc.txt").string() + "'";
    REQUIRE(std::system(cmd.c_str()) == 0);
    CHECK(std::stoi(slurp(d / "rc.txt")) == 0);
    CHECK(fs::is_regular_file(d / "out/recovered.wav"));
    CHECK(leftovers(d).empty());
}

TEST_CASE("Ctrl-C during a blocking open of the clip (a FIFO) is an interruption (130), not a file error")
{
    const fs::path d = fresh("fifo");
    REQUIRE(mkfifo((d / "clip.wav").c_str(), 0600) == 0);
    const auto s = galena_test::spawn_galena({"render", (src_dir / "scenarios/demo.toml").string(), "--out", (d / "out").string(), "--set",
                                              "signal.audio=" + (d / "clip.wav").string(), "--set", "signal.carrier_hz=200e3", "-q"},
                                             d / "run");
    // Nothing to wait for: the open blocks until a writer appears. Give it time to get there.
    std::this_thread::sleep_for(std::chrono::milliseconds(500));
    const int rc = galena_test::signal_and_wait(s, SIGINT);
    const std::string err = slurp(s.err_file);
    INFO("stderr: " << err);
    CHECK(rc == 130);
    CHECK(err.find("interrupted by SIGINT") != std::string::npos);
    CHECK(leftovers(d).empty());
}

TEST_CASE("a stale staging folder of a process that no longer runs is removed by the next run, which says so")
{
    const fs::path d = fresh("stale");
    write_file(d / "s.toml", quick_scenario());
    // A pid that surely ran and ended: a child we start and reap.
    const pid_t dead = fork();
    if (dead == 0) _exit(0);
    waitpid(dead, nullptr, 0);
    const fs::path stale = d / fmt::format(".out.partial-{}-0badf00d", dead);
    fs::create_directories(stale);
    write_file(stale / "recovered.wav", "half");
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q", d / "a");
    INFO(r.err);
    CHECK(r.rc == 0);
    CHECK_FALSE(fs::exists(stale));
    CHECK(r.err.find(fmt::format("removed the staging folder left by process {}", dead)) != std::string::npos);
}

// ---------------------------------------------------------------------------------------------------------
// Limits and messages.

TEST_CASE("input files are capped: `galena check /dev/zero` ends at once with one line")
{
    const fs::path d = fresh("cap");
    const auto r = galena_cli("check /dev/zero", d / "a");
    expect_error(r, 2, {"/dev/zero: the scenario file is larger than the 1024 kB limit"}, d);
    const auto p = galena_cli("compare /dev/zero --out " + q(d / "out"), d / "b");
    expect_error(p, 2, {"/dev/zero: the pack file is larger than the 1024 kB limit"}, d);
}

TEST_CASE("the long-input guard counts work: a short programme at a 100 MHz carrier is refused up front with the estimate")
{
    const fs::path d = fresh("work-guard");
    write_file(d / "s.toml", quick_scenario());
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --set signal.carrier_hz=100e6 --set signal.duration_s=2",
                              d / "a");
    expect_error(r, 2, {"s.toml: ", "carrier cycles x", "steps per cycle", "solver steps", "step limit", "estimated wall time about",
                        "--allow-long"},
                 d);
    CHECK_FALSE(fs::exists(d / "out"));
}

TEST_CASE("a programme too short to measure is refused before rendering, naming the field and the reason")
{
    const fs::path d = fresh("too-short");
    write_file(d / "s.toml", quick_scenario());
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q --set signal.duration_s=0.001", d / "a");
    expect_error(r, 2, {"signal.duration_s", "too short to measure", "settling"}, d);
    CHECK_FALSE(fs::exists(d / "out"));
}

TEST_CASE("messages: 8 kHz output renders; preroll and full-scale errors name the file or --set; a pack's set names the pack")
{
    const fs::path d = fresh("messages");
    write_file(d / "s.toml", quick_scenario());
    auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "o8") + " -q --set output.sample_rate_hz=8000", d / "a");
    INFO(r.err);
    CHECK(r.rc == 0);
    write_file(d / "pre.toml", "[output]\nsample_rate_hz = 8000\n[signal]\ntest_signal = \"tone\"\ntone_hz = 1000\nduration_s = 0.05\n"
                               "carrier_hz = 200e3\n[solver]\npreroll_s = 0.002\n");
    r = galena_cli("render " + q(d / "pre.toml") + " --out " + q(d / "o") + " -q", d / "b");
    expect_error(r, 2, {"pre.toml:9: solver.preroll_s = 0.002", "start-up"}, d);
    r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "o") + " -q --set output.full_scale_v=1e-320", d / "c");
    expect_error(r, 2, {"s.toml (--set output.full_scale_v=1e-320): output.full_scale_v"}, d);
    write_file(d / "pack.toml", "[pack]\nscenario = \"s.toml\"\n[[variant]]\nname = \"a\"\nset = [\n  \"load.bleeder_ohm=-5\",\n]\n");
    r = galena_cli("compare " + q(d / "pack.toml") + " --out " + q(d / "o") + " -q", d / "e");
    expect_error(r, 2, {"pack.toml:6", "load.bleeder_ohm=-5", "must be > 0"}, d);
    CHECK(r.err.find("--set") == std::string::npos);
}
