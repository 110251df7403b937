// Promises kept under adversarial use, end to end through the galena tool (issue 11): outputs all or
// nothing (a clash anywhere, parents included, moves nothing; --overwrite replaces the whole set; variant
// names cannot collide with galena's own), pack paths relative to the pack, CSV per RFC 4180 (read back by
// Python's csv module) and Markdown cells, determinism of every JSON file, m = 0, signals around external
// programs, EPIPE, FIFO clips, SIGHUP, stale stages, size-capped inputs, the work-based long-input guard,
// and the messages of issue 11's "Messages" list. Renders are short (a 200 kHz carrier, tens of ms).
#include "galena/audio_io.hpp"
#include "galena/job.hpp"
#include "galena/report.hpp"
#include "galena/scenario.hpp"
#include "galena/text_table.hpp"

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
#include <fcntl.h>
#include <sys/stat.h>
#include <vector>

namespace fs = std::filesystem;
using galena_test::galena_cli;
using galena_test::run_result;
using galena_test::leftovers;
using galena_test::q;
using galena_test::quick_scenario;
using galena_test::slurp;
using galena_test::write_file;

namespace {

const fs::path src_dir = GALENA_SOURCE_DIR;
const fs::path tmp_root = fs::path(GALENA_TEST_TMP) / "hardening";

fs::path fresh(const std::string& name) { return galena_test::fresh_dir(tmp_root, name); }

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
    // which is full_scale x 10^(-1/20) = 0.8913 of it. Float WAVs: exact to float rounding.
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
    expect_error(p, 2, {"/dev/zero: the", "file is larger than the 1024 kB limit"}, d);
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
    // A two-tone pair whose IMD sidebands fall outside the band: the field and the rule, before rendering,
    // not "too short to measure".
    r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "o") +
                       " -q --set signal.test_signal=two-tone --set signal.tone_hz=1000 --set signal.tone2_hz=6000",
                   d / "f");
    expect_error(r, 2, {"signal.tone2_hz = 6000", "IMD analysis needs", "0.49 x output.sample_rate_hz"}, d);
    CHECK(r.err.find("too short") == std::string::npos);
}

// ---------------------------------------------------------------------------------------------------------
// Behaviour that had no test: fades, loudness matching and its peak limit, solver.dc_block_hz,
// overmodulation, and two-tone and log-sweep programmes end to end.

namespace {

/// Least-squares amplitude of a sinusoid at f (with a DC term) over samples [from, to) at rate fs.
double fit_amplitude(const std::vector<float>& y, double fs, double f, std::size_t from, std::size_t to)
{
    double ss = 0, cc = 0, sc = 0, ys = 0, yc = 0, s1 = 0, c1 = 0, y1 = 0;
    const double n = static_cast<double>(to - from);
    for (std::size_t i = from; i < to; ++i) {
        const double w = 2.0 * 3.14159265358979323846 * f * static_cast<double>(i) / fs;
        const double s = std::sin(w), c = std::cos(w), v = y[i];
        ss += s * s, cc += c * c, sc += s * c, ys += v * s, yc += v * c, s1 += s, c1 += c, y1 += v;
    }
    // Remove the mean first (normal equations with a constant column, eliminated).
    ss -= s1 * s1 / n, cc -= c1 * c1 / n, sc -= s1 * c1 / n, ys -= y1 * s1 / n, yc -= y1 * c1 / n;
    const double det = ss * cc - sc * sc;
    return std::hypot((ys * cc - yc * sc) / det, (yc * ss - ys * sc) / det);
}

/// A strong, fast detector (linear detection, resistive earpiece, no capacitance but the 10 pF stray):
/// the earpiece follows the envelope within microseconds. Tone keys are appended by the caller.
std::string fast_linear_scenario(const std::string& signal)
{
    return "[output]\nsample_rate_hz = 16000\nformat = \"float\"\nfull_scale_v = 4\n[source]\nresistance_ohm = 1000\n"
           "[diode]\npreset = \"small-signal-schottky\"\njunction_capacitance_f = 0\n[earpiece]\nkind = \"resistor\"\n"
           "resistance_ohm = 100e3\n[load]\nbleeder_ohm = inf\n[signal]\ncarrier_hz = 200e3\ncarrier_peak_v = 2\n" +
           signal;
}

} // namespace

TEST_CASE("fades: the WAV starts and ends with a 10 ms raised-cosine fade, and nothing else changes")
{
    // Raised-cosine (Hann half-window) fade, gain 0.5 (1 - cos(pi t / T)): common practice for click-free
    // edges. The same scenario is rendered without a fade and with the default one, via the library.
    const fs::path d = fresh("fades");
    galena::scenario s = galena::parse_scenario("[output]\nformat = \"float\"\n" + quick_scenario().substr(9), d / "s.toml");
    // One explicit calibration for both (the automatic one follows each render's own peak).
    s.output.full_scale_v = 2.0;
    for (const char* leaf : {"plain", "faded"}) fs::create_directories(d / leaf);
    galena::job_options plain;
    plain.fade_s = 0.0;
    galena::job_options faded; // default fade_s
    (void)galena::render_job_into(s, d / "plain", plain);
    (void)galena::render_job_into(s, d / "faded", faded);
    double fs = 0.0;
    const auto a = read_samples(d / "plain/recovered.wav", &fs);
    const auto b = read_samples(d / "faded/recovered.wav");
    REQUIRE(a.size() == b.size());
    const double T = faded.fade_s;
    CHECK(T == 0.01);
    const std::size_t n = a.size();
    double worst = 0.0;
    for (std::size_t i = 0; i < n; ++i) {
        const double t = std::min(static_cast<double>(i), static_cast<double>(n - 1 - i)) / fs;
        const double g = t >= T ? 1.0 : 0.5 * (1.0 - std::cos(3.14159265358979323846 * t / T));
        worst = std::max(worst, std::fabs(b[i] - g * a[i]));
    }
    // Float WAVs: agreement to float rounding (half an ulp of a sample below 1, 6e-8; bound 1e-6).
    CHECK(worst < 1e-6);
    CHECK(b.front() == 0.0f);
    CHECK(b.back() == 0.0f);
}

TEST_CASE("loudness matching: every copy at the target RMS, unless its peak would pass -1 dBFS, where the peak limit holds")
{
    const fs::path d = fresh("loudness");
    const double fs = 16000.0;
    std::vector<double> quiet(16000), spiky(16000);
    for (std::size_t i = 0; i < quiet.size(); ++i) {
        quiet[i] = 0.01 * std::sin(2.0 * 3.14159265358979323846 * 440.0 * static_cast<double>(i) / fs);
        spiky[i] = 0.05 * std::sin(2.0 * 3.14159265358979323846 * 440.0 * static_cast<double>(i) / fs);
    }
    spiky[8000] = 0.8; // one click: a high crest factor
    galena::write_wav(d / "quiet.wav", quiet, fs, galena::wav_format::float32, 1.0, false);
    galena::write_wav(d / "spiky.wav", spiky, fs, galena::wav_format::float32, 1.0, false);
    const auto g = galena::write_loudness_matched({d / "quiet.wav", d / "spiky.wav"}, {"quiet", "spiky"}, d / "matched",
                                                  galena::wav_format::float32, -26.0);
    REQUIRE(g.size() == 2);
    auto rms_of = [](const std::vector<float>& x) {
        double s = 0.0;
        for (float v : x) s += static_cast<double>(v) * v;
        return std::sqrt(s / static_cast<double>(x.size()));
    };
    const auto q = read_samples(d / "matched/quiet.wav");
    const auto k = read_samples(d / "matched/spiky.wav");
    // The quiet sine reaches -26 dBFS RMS exactly (its peak, 0.071, is far below the limit).
    CHECK(20.0 * std::log10(rms_of(q)) == doctest::Approx(-26.0).epsilon(1e-6));
    CHECK_FALSE(g[0].peak_limited);
    CHECK(g[0].gain_db == doctest::Approx(-26.0 - 20.0 * std::log10(0.01 / std::sqrt(2.0))).epsilon(1e-6));
    // The spiky one would need +3 dB, which lifts its 0.8 click past -1 dBFS (0.8913): the gain stops there.
    CHECK(g[1].peak_limited);
    CHECK(peak_of(k) == doctest::Approx(std::pow(10.0, -1.0 / 20.0)).epsilon(1e-6));
    CHECK(g[1].gain_db == doctest::Approx(20.0 * std::log10(std::pow(10.0, -1.0 / 20.0) / 0.8)).epsilon(1e-6));
    CHECK(20.0 * std::log10(rms_of(k)) < -26.0);
    // gains.csv says the same (RFC 4180, read back by galena's reader).
    const auto rows = galena::parse_csv(slurp(d / "matched/gains.csv"), d / "matched/gains.csv");
    REQUIRE(rows.size() == 3);
    CHECK(rows[1][4] == "no");
    CHECK(rows[2][4] == "yes");
}

TEST_CASE("solver.dc_block_hz: at its corner the second-order Butterworth high-pass passes 1/sqrt(2)")
{
    // |H(f)| = 1 / sqrt(1 + (fc/f)^4) for a second-order Butterworth high-pass (any filter text); the
    // bilinear transform is prewarped to the corner, so at f = fc it is exactly -3.01 dB.
    const fs::path d = fresh("dc-block");
    write_file(d / "s.toml", fast_linear_scenario("test_signal = \"tone\"\ntone_hz = 100\nduration_s = 0.6\nmodulation_index = 0.3\n"));
    double amp[2] = {};
    int k = 0;
    for (const char* hz : {"100", "1"}) {
        const fs::path out = d / (std::string("out-") + hz);
        const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(out) + " -q --set solver.dc_block_hz=" + hz, d / "a");
        INFO(r.err);
        REQUIRE(r.rc == 0);
        double fs = 0.0;
        const auto x = read_samples(out / "recovered.wav", &fs);
        amp[k++] = fit_amplitude(x, fs, 100.0, static_cast<std::size_t>(0.3 * fs), static_cast<std::size_t>(0.58 * fs));
    }
    const double expected = (1.0 / std::sqrt(2.0)) / (1.0 / std::sqrt(1.0 + std::pow(1.0 / 100.0, 4)));
    MESSAGE("ratio " << amp[0] / amp[1] << " against " << expected);
    // Measured 1.7e-5 (the fit over 0.28 s and the render's own accuracy).
    CHECK(amp[0] / amp[1] == doctest::Approx(expected).epsilon(2e-4));
}

TEST_CASE("two-tone end to end: imd_* keys; a square-law detector gives IMD = m a1 / sqrt(2)")
{
    // Square-law detection of A (1 + m x)^2 with x = a1 sin w1 t + a2 sin w2 t: the f2 line is 2 m a2, each of
    // f2 +- f1 is m^2 a1 a2 (product-to-sum), so IMD (sidebands' RSS over f2) = sqrt(2) m a1 / 2 (derived
    // from the square law, as the H2/H1 = m/4 check in cli_test). With the 4:1 pair, a1 = 0.8; m = 0.3:
    // 16.97 %. 10 mV carrier against n Vt ~ 28 mV: the next term of the I0 series moves it by about 1 %.
    const fs::path d = fresh("two-tone");
    const auto r = galena_cli("render " + q(src_dir / "scenarios/example.toml") + " --out " + q(d / "out") +
                                  " -q --set signal.test_signal=two-tone --set signal.tone_hz=100 --set signal.tone2_hz=4000"
                                  " --set signal.tone_ratio=4 --set signal.duration_s=0.15 --set signal.carrier_hz=200e3"
                                  " --set signal.carrier_peak_v=0.01 --set signal.modulation_index=0.3 --set diode.junction_capacitance_f=0"
                                  " --set earpiece.kind=resistor --set earpiece.resistance_ohm=47e3 --set load.bleeder_ohm=inf"
                                  " --set output.full_scale_v=1e-3",
                              d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    for (const char* k : {"imd_percent", "imd_f1_v", "imd_f2_v", "imd_f1_hz", "imd_f2_hz"}) {
        CAPTURE(k);
        REQUIRE(m.contains(k));
        CHECK(m[k].is_number());
    }
    CHECK(m["thd_percent"].is_null()); // two tones: no single-tone THD
    const double expected = 100.0 * 0.3 * 0.8 / std::sqrt(2.0);
    MESSAGE("imd_percent " << m["imd_percent"].get<double>() << " against " << expected);
    // Measured 17.05 % (0.45 % high) and f1/f2 = 4.015: within the ~1 % of the I0 series' next term.
    CHECK(m["imd_percent"].get<double>() == doctest::Approx(expected).epsilon(0.015));
    CHECK(m["imd_f1_v"].get<double>() / m["imd_f2_v"].get<double>() == doctest::Approx(4.0).epsilon(0.01));
}

TEST_CASE("log sweep end to end: the recovered audio's frequency follows f1 (f2/f1)^(t/T)")
{
    // Exponential sweep law (Farina, AES preprint 5093, 2000). A fast linear detector passes the envelope,
    // so the recovered audio's zero-crossing rate at programme time t is the sweep's frequency there.
    const fs::path d = fresh("log-sweep");
    write_file(d / "s.toml", fast_linear_scenario("test_signal = \"log-sweep\"\nsweep_start_hz = 100\nsweep_stop_hz = 3000\n"
                                                  "duration_s = 0.5\nmodulation_index = 0.3\n"));
    const auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q", d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    double fs = 0.0;
    const auto x = read_samples(d / "out/recovered.wav", &fs);
    REQUIRE(x.size() == static_cast<std::size_t>(0.5 * fs));
    for (const double t : {0.1, 0.25, 0.4}) {
        CAPTURE(t);
        const double f_law = 100.0 * std::pow(30.0, t / 0.5);
        std::vector<double> zc;
        const auto i0 = static_cast<std::size_t>((t - 2.0 / f_law) * fs), i1 = static_cast<std::size_t>((t + 2.0 / f_law) * fs);
        for (std::size_t i = i0 + 1; i <= i1; ++i)
            if ((x[i] > 0.0f) != (x[i - 1] > 0.0f))
                zc.push_back((static_cast<double>(i) - static_cast<double>(x[i]) / (static_cast<double>(x[i]) - x[i - 1])) / fs);
        REQUIRE(zc.size() >= 5);
        const double f_meas = static_cast<double>(zc.size() - 1) / (2.0 * (zc.back() - zc.front()));
        const double f_mid = 100.0 * std::pow(30.0, 0.5 * (zc.front() + zc.back()) / 0.5);
        MESSAGE("t = " << t << ": " << f_meas << " Hz against " << f_mid << " Hz");
        // Measured 1.2e-4 .. 1.7e-4 (float samples, linear interpolation of the crossings).
        CHECK(f_meas == doctest::Approx(f_mid).epsilon(1e-3));
    }
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    CHECK(m["thd_percent"].is_null());
}

TEST_CASE("overmodulation (m = 1.5, allowed): the detector recovers the envelope |1 + m sin|, distortion and all")
{
    // DSB full-carrier AM with m > 1 has the envelope A |1 + m x(t)| (phase reversal where 1 + m x < 0; any
    // communications text). A linear envelope detector therefore recovers |1 + 1.5 sin|, whose THD is
    // computed here by a direct DFT of that function; the measured THD must match it.
    const fs::path d = fresh("overmodulation");
    write_file(d / "s.toml", fast_linear_scenario("test_signal = \"tone\"\ntone_hz = 500\nduration_s = 0.2\nmodulation_index = 1.5\n"
                                                  "allow_overmodulation = true\n"));
    auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "out") + " -q", d / "a");
    INFO(r.err);
    REQUIRE(r.rc == 0);
    const int n = 4096;
    double h[10] = {};
    for (int k = 1; k <= 9; ++k) {
        double re = 0.0, im = 0.0;
        for (int i = 0; i < n; ++i) {
            const double th = 2.0 * 3.14159265358979323846 * i / n;
            const double e = std::fabs(1.0 + 1.5 * std::sin(th));
            re += e * std::cos(k * th);
            im += e * std::sin(k * th);
        }
        h[k] = 2.0 * std::hypot(re, im) / n;
    }
    double hs = 0.0;
    for (int k = 2; k <= 9; ++k) hs += h[k] * h[k];
    const double thd_ideal = 100.0 * std::sqrt(hs) / h[1];
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    const double thd = m["thd_percent"].get<double>();
    MESSAGE("THD " << thd << " % against the ideal envelope's " << thd_ideal << " %");
    // Measured 27.96 % against 28.32 % (1.3 % low): near the envelope's zeros the diode leaves linear
    // detection (its drop and square-law knee round the cusps), which lowers the harmonics a little.
    CHECK(thd == doctest::Approx(thd_ideal).epsilon(0.03));
    // Without the opt-in, m = 1.5 is refused (exit 2).
    write_file(d / "t.toml", fast_linear_scenario("test_signal = \"tone\"\ntone_hz = 500\nduration_s = 0.2\nmodulation_index = 1.5\n"));
    r = galena_cli("render " + q(d / "t.toml") + " --out " + q(d / "out2") + " -q", d / "b");
    expect_error(r, 2, {"signal.modulation_index = 1.5"}, d);
}

// ---------------------------------------------------------------------------------------------------------
// Resource exhaustion: its own exit class (5), naming what ran out; no stage left.

#if defined(__SANITIZE_ADDRESS__)
#define GALENA_TEST_UNDER_ASAN 1
#elif defined(__has_feature)
#if __has_feature(address_sanitizer)
#define GALENA_TEST_UNDER_ASAN 1
#endif
#endif

TEST_CASE("resource exhaustion: too few file descriptors and too little memory are exit 5, naming what ran out")
{
#ifdef GALENA_TEST_UNDER_ASAN
    MESSAGE("skipped under AddressSanitizer: its shadow memory and descriptors change both limits");
#else
    const fs::path d = fresh("resources");
    write_file(d / "s.toml", quick_scenario());
    // RLIMIT_NOFILE bounds descriptor numbers: new descriptors take the lowest free numbers below it. A
    // limit one above the lowest free number (after what the test runner left open) leaves galena exactly
    // one: enough to load and read the scenario, not for two outputs open at once.
    int lowest_free = 0;
    while (fcntl(lowest_free, F_GETFD) != -1) ++lowest_free;
    auto r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "a") + " -q", d / "ra",
                        fmt::format("prlimit --nofile={} --", lowest_free + 1));
    expect_error(r, 5, {"Too many open files", "file-descriptor"}, d);
    CHECK(r.err.find(".partial-") == std::string::npos); // the message names the target, not the stage
    CHECK_FALSE(fs::exists(d / "a"));
    // 24 MB of address space: enough to load and start, not enough for the analysis of a 5 s tone.
    r = galena_cli("render " + q(d / "s.toml") + " --out " + q(d / "b") + " -q --set signal.duration_s=5", d / "rb",
                   "prlimit --as=25165824 --");
    expect_error(r, 5, {"out of memory"}, d);
    CHECK_FALSE(fs::exists(d / "b"));
#endif
}
