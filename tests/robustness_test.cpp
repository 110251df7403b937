// Bad input end to end through the galena tool, one case per mistake a user can make: each asserts the exit
// code, that stderr is one line naming the file (and line or --set), the field, the value and the rule, and
// that no output file (and no staging folder) is left behind. Also: disk full, unwritable output folder,
// Ctrl-C / SIGTERM during a render and a sweep, a solver failure, the long-input and sweep-size limits,
// multichannel input and determinism. Renders are kept short (a 200 kHz carrier, tens of milliseconds).
#include "galena/audio_io.hpp"
#include "galena/job.hpp"
#include "galena/sweep.hpp"

#include "cli_support.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>
#include <sndfile.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <initializer_list>
#include <limits>
#include <string>
#include <sys/wait.h>
#include <thread>
#include <unistd.h>
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
const fs::path tmp_root = fs::path(GALENA_TEST_TMP) / "robustness";

fs::path fresh(const std::string& name) { return galena_test::fresh_dir(tmp_root, name); }

/// The refusal contract: exit code, one line on stderr starting "galena: error: ", every needle present,
/// the output folder absent and no staging folder or temporary file anywhere in `work`.
void expect_refused(const run_result& r, int rc, std::initializer_list<std::string> needles, const fs::path& out,
                    const fs::path& work)
{
    INFO("stderr: " << r.err);
    CHECK(r.rc == rc);
    CHECK(r.err.rfind("galena: error: ", 0) == 0);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    for (const auto& n : needles) CHECK_MESSAGE(r.err.find(n) != std::string::npos, "missing: " << n);
    CHECK_FALSE(fs::exists(out));
    CHECK(leftovers(work).empty());
}

/// Renders scenario text `toml` (written to work/NAME.toml) with extra arguments; expects a refusal.
void refuse_scenario(const std::string& name, const std::string& toml, const std::string& args, int rc,
                     std::initializer_list<std::string> needles)
{
    CAPTURE(name);
    const fs::path d = fresh("scenario-" + name);
    const fs::path f = d / (name + ".toml");
    write_file(f, toml);
    const fs::path out = d / "out";
    const auto r = galena_cli("render " + q(f) + " --out " + q(out) + " " + args + " -q", d / "run");
    expect_refused(r, rc, needles, out, d);
}

/// A WAV written through libsndfile (any subformat, channels, rate), samples interleaved in [-1, 1].
void write_sndfile(const fs::path& p, int rate, int channels, int subformat, const std::vector<float>& interleaved)
{
    SF_INFO info{};
    info.samplerate = rate;
    info.channels = channels;
    info.format = SF_FORMAT_WAV | subformat;
    SNDFILE* f = sf_open(p.c_str(), SFM_WRITE, &info);
    REQUIRE(f != nullptr);
    sf_writef_float(f, interleaved.data(), static_cast<sf_count_t>(interleaved.size() / static_cast<std::size_t>(channels)));
    sf_close(f);
}

std::vector<float> sine(std::size_t n, double f, double rate, double amp = 0.5)
{
    std::vector<float> x(n);
    for (std::size_t i = 0; i < n; ++i) x[i] = static_cast<float>(amp * std::sin(2.0 * 3.14159265358979323846 * f * static_cast<double>(i) / rate));
    return x;
}

/// Renders the clip `wav` with the bundled demo base at a 200 kHz carrier; expects a refusal.
void refuse_clip(const std::string& name, const fs::path& wav, int rc, std::initializer_list<std::string> needles,
                 const std::string& extra = "")
{
    CAPTURE(name);
    const fs::path d = wav.parent_path();
    const fs::path out = d / ("out-" + name);
    const auto r = galena_cli("render " + q(src_dir / "scenarios/demo.toml") + " --out " + q(out) + " --set signal.audio=" + q(wav) +
                                  " --set signal.carrier_hz=200e3 " + extra + " -q",
                              d / ("run-" + name));
    expect_refused(r, rc, needles, out, d);
}

/// Whether this machine lets the tests mount a small tmpfs in a private mount namespace (root in a
/// container with CAP_SYS_ADMIN, as CI runs). The disk-full and read-only cases use it.
bool private_mounts_work()
{
    static const bool ok = [] {
        const fs::path m = tmp_root / "mount-probe";
        fs::create_directories(m);
        const std::string cmd = "unshare --mount sh -c 'mount -t tmpfs -o size=64k tmpfs " + q(m) + "' > /dev/null 2>&1";
        return std::system(cmd.c_str()) == 0;
    }();
    return ok;
}

struct spawned {
    pid_t pid = -1;
    fs::path err_file;
};

/// Starts galena with `args` (no shell), stdout and stderr to files in `dir`.
spawned spawn_galena(const std::vector<std::string>& args, const fs::path& dir)
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
    std::fflush(nullptr); // the child must not write the parent's buffered output again
    s.pid = fork();
    REQUIRE(s.pid >= 0);
    if (s.pid == 0) {
        if (std::freopen(out_file.c_str(), "w", stdout) == nullptr || std::freopen(err_file.c_str(), "w", stderr) == nullptr) _exit(126);
        execv(GALENA_CLI, argv.data());
        _exit(127);
    }
    return s;
}

/// Waits until a file whose name contains `name` and holds more than `min_bytes` exists somewhere under
/// `dir` (the render is writing), or the process ends, or 120 s pass. Returns true when the file was seen
/// with the process alive.
bool wait_for_file(const spawned& s, const fs::path& dir, const std::string& name, std::uintmax_t min_bytes)
{
    const auto t0 = std::chrono::steady_clock::now();
    while (std::chrono::steady_clock::now() - t0 < std::chrono::seconds(120)) {
        int st = 0;
        if (waitpid(s.pid, &st, WNOHANG) == s.pid) return false;
        std::error_code ec;
        for (auto it = fs::recursive_directory_iterator(dir, ec); !ec && it != fs::recursive_directory_iterator(); it.increment(ec)) {
            std::error_code e2;
            if (it->path().filename().string().find(name) != std::string::npos && fs::file_size(it->path(), e2) > min_bytes)
                return true;
        }
        std::this_thread::sleep_for(std::chrono::milliseconds(20));
    }
    return false;
}

/// Sends `sig` and returns the exit status (exit code, or -1 when killed by a signal).
int signal_and_wait(const spawned& s, int sig)
{
    kill(s.pid, sig);
    int st = 0;
    waitpid(s.pid, &st, 0);
    return WIFEXITED(st) ? WEXITSTATUS(st) : -1;
}

} // namespace

// ---------------------------------------------------------------------------------------------------------
// Scenario files: syntax, names, types (exit 2).

TEST_CASE("scenario: malformed TOML names the file and line")
{
    refuse_scenario("malformed", "[signal]\ncarrier_hz = = 3\n", "", 2, {"malformed.toml:2:", "malformed TOML"});
    refuse_scenario("unclosed", "[signal\ncarrier_hz = 3e5\n", "", 2, {"unclosed.toml:1:", "malformed TOML"});
}

TEST_CASE("scenario: unknown sections and keys are named, with the nearest valid one")
{
    refuse_scenario("section", quick_scenario("[loads]\nbleeder_ohm = 1e3\n"), "", 2,
                    {"section.toml:8:", "[loads]", "unknown section", "did you mean [load]?"});
    refuse_scenario("key", quick_scenario("[diode]\nemision_coefficient = 1.2\n"), "", 2,
                    {"key.toml:9:", "diode.emision_coefficient", "unknown key", "did you mean diode.emission_coefficient?"});
    refuse_scenario("set-key", quick_scenario(), "--set load.bleder_ohm=1e3", 2,
                    {"set-key.toml (--set load.bleder_ohm=1e3)", "load.bleder_ohm", "unknown key", "did you mean load.bleeder_ohm?"});
    refuse_scenario("set-form", quick_scenario(), "--set bleeder=1e3", 2, {"--set bleeder=1e3", "must look like section.key=value"});
    refuse_scenario("set-empty-audio", quick_scenario(), "--set signal.audio=", 2, {"--set signal.audio=", "the clip path is empty"});
    refuse_scenario("empty-audio", quick_scenario("audio = \"\"\n"), "", 2, {"empty-audio.toml:8: signal.audio = \"\": must name an audio file"});
}

TEST_CASE("scenario: wrong types name the field, the value given and the type wanted")
{
    refuse_scenario("string-for-number", quick_scenario("[source]\nresistance_ohm = \"big\"\n"), "", 2,
                    {"string-for-number.toml:9:", "source.resistance_ohm = ", "big", "must be a number"});
    refuse_scenario("array-for-number", quick_scenario("[load]\nbleeder_ohm = [1, 2]\n"), "", 2,
                    {"array-for-number.toml:9:", "load.bleeder_ohm = [ 1, 2 ]", "must be a number"});
    refuse_scenario("string-for-bool", quick_scenario("allow_overmodulation = \"yes\"\n"), "", 2,
                    {"string-for-bool.toml:8:", "signal.allow_overmodulation = ", "yes", "must be true or false"});
    refuse_scenario("number-for-string", "[output]\nformat = 24\n" + quick_scenario().substr(quick_scenario().find("[signal]")), "", 2,
                    {"number-for-string.toml:2:", "output.format = 24", "must be a string"});
    refuse_scenario("value-for-section", "load = 5\n" + quick_scenario(), "", 2, {"load = 5", "must be a section [load]"});
    refuse_scenario("set-word-for-number", quick_scenario(), "--set signal.carrier_hz=fast", 2,
                    {"(--set signal.carrier_hz=fast)", "signal.carrier_hz = ", "fast", "must be a number"});
    refuse_scenario("unknown-word", quick_scenario("[earpiece]\nkind = \"horn\"\n"), "", 2,
                    {"unknown-word.toml:9:", "earpiece.kind = \"horn\"", "must be one of piezo, magnetic, resistor"});
    refuse_scenario("unknown-preset", quick_scenario("[diode]\npreset = \"unobtainium\"\n"), "", 2,
                    {"unknown-preset.toml:9:", "diode.preset = \"unobtainium\"", "unknown preset"});
}

// ---------------------------------------------------------------------------------------------------------
// Values: negative, zero, NaN, absurd (exit 2). The rule and the value given are in the message.

TEST_CASE("scenario: out-of-range component values")
{
    struct value_case {
        const char* name;
        const char* section_line;
        std::initializer_list<std::string> needles;
    };
    // Each line goes into the file after quick_scenario(); the value's line is 9 (section header on 8).
    const value_case cases[] = {
        {"negative-source-r", "[source]\nresistance_ohm = -5\n", {"source.resistance_ohm = -5", "must be in [0, 1e+09] ohm"}},
        {"zero-bleeder", "[load]\nbleeder_ohm = 0\n", {"load.bleeder_ohm = 0", "must be > 0 and <= inf ohm"}},
        {"negative-capacitance", "[load]\nfilter_capacitance_f = -1e-9\n", {"load.filter_capacitance_f = -1e-09", "must be in [0, 0.0001] F"}},
        {"absurd-capacitance", "[earpiece]\ncapacitance_f = 1\n", {"earpiece.capacitance_f = 1", "must be in [0, 1e-05] F"}},
        {"nan-is", "[diode]\nsaturation_current_a = nan\n", {"diode.saturation_current_a = nan", "must be > 0 and <= 0.01 A"}},
        {"absurd-is", "[diode]\nsaturation_current_a = 5\n", {"diode.saturation_current_a = 5", "must be > 0 and <= 0.01 A"}},
        {"zero-is", "[diode]\nsaturation_current_a = 0\n", {"diode.saturation_current_a = 0", "must be > 0"}},
        {"high-n", "[diode]\nemission_coefficient = 12\n", {"diode.emission_coefficient = 12", "must be in [0.5, 10]"}},
        {"low-n", "[diode]\nemission_coefficient = 0.1\n", {"diode.emission_coefficient = 0.1", "must be in [0.5, 10]"}},
        {"nan-n", "[diode]\nemission_coefficient = nan\n", {"diode.emission_coefficient = nan", "must be in [0.5, 10]"}},
        {"cold", "[diode]\ntemperature_c = -300\n", {"diode.temperature_c = -300", "must be in [-60, 150] degC"}},
        {"hot", "[diode]\ntemperature_c = 1e4\n", {"diode.temperature_c = 10000", "must be in [-60, 150] degC"}},
        {"negative-rs", "[diode]\nseries_resistance_ohm = -1\n", {"diode.series_resistance_ohm = -1", "must be in [0, 1e+06] ohm"}},
        {"inf-inductance", "[earpiece]\nkind = \"magnetic\"\ninductance_h = inf\n", {"earpiece.inductance_h = inf", "must be > 0 and <= 1000 H"}},
    };
    for (const auto& c : cases) {
        CAPTURE(c.name);
        std::vector<std::string> needles(c.needles);
        needles.push_back(std::string(c.name) + ".toml:");
        const fs::path d = fresh(std::string("value-") + c.name);
        const fs::path f = d / (std::string(c.name) + ".toml");
        write_file(f, quick_scenario(c.section_line));
        const fs::path out = d / "out";
        const auto r = galena_cli("render " + q(f) + " --out " + q(out) + " -q", d / "run");
        INFO("stderr: " << r.err);
        CHECK(r.rc == 2);
        CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
        for (const auto& n : needles) CHECK_MESSAGE(r.err.find(n) != std::string::npos, "missing: " << n);
        CHECK_FALSE(fs::exists(out));
        CHECK(leftovers(d).empty());
    }
}

TEST_CASE("scenario: frequencies, sample rates, durations and solver settings out of range")
{
    refuse_scenario("zero-carrier", quick_scenario(), "--set signal.carrier_hz=0", 2,
                    {"(--set signal.carrier_hz=0)", "signal.carrier_hz = 0", "must be in [10000, 1e+08] Hz"});
    refuse_scenario("nan-carrier", quick_scenario(), "--set signal.carrier_hz=nan", 2, {"signal.carrier_hz = nan", "must be in [10000, 1e+08] Hz"});
    refuse_scenario("absurd-carrier", quick_scenario(), "--set signal.carrier_hz=1e12", 2, {"signal.carrier_hz = 1e+12", "must be in [10000, 1e+08] Hz"});
    refuse_scenario("zero-tone", quick_scenario(), "--set signal.tone_hz=0", 2, {"signal.tone_hz = 0", "must be in [1, 7200] Hz"});
    refuse_scenario("tone-above-band", quick_scenario(), "--set signal.tone_hz=9000", 2, {"signal.tone_hz = 9000", "must be in [1, 7200] Hz"});
    refuse_scenario("low-rate", quick_scenario(), "--set output.sample_rate_hz=1000", 2,
                    {"output.sample_rate_hz = 1000", "must be in [8000, 192000] Hz"});
    refuse_scenario("high-rate", quick_scenario(), "--set output.sample_rate_hz=1e6", 2,
                    {"output.sample_rate_hz = 1e+06", "must be in [8000, 192000] Hz"});
    refuse_scenario("negative-duration", quick_scenario(), "--set signal.duration_s=-1", 2, {"signal.duration_s = -1", "must be in [0, 36000] s"});
    refuse_scenario("zero-tone-duration", quick_scenario(), "--set signal.duration_s=0", 2,
                    {"signal.duration_s = 0", "a test signal needs a duration > 0 s"});
    refuse_scenario("zero-rtol", quick_scenario(), "--set solver.relative_tolerance=0", 2,
                    {"solver.relative_tolerance = 0", "must be in [1e-10, 0.1]"});
    refuse_scenario("negative-preroll", quick_scenario(), "--set solver.preroll_s=-5", 2,
                    {"solver.preroll_s = -5", "(the audio chain's start-up at output.sample_rate_hz), or -1 for the automatic preroll"});
    refuse_scenario("negative-full-scale", quick_scenario(), "--set output.full_scale_v=-2", 2,
                    {"output.full_scale_v = -2", "must be in [1e-09, 10000] V"});
}

TEST_CASE("scenario: modulation index above 1 needs the overmodulation opt-in")
{
    refuse_scenario("overmodulation", quick_scenario("modulation_index = 1.3\n"), "", 2,
                    {"overmodulation.toml:8:", "signal.modulation_index = 1.3", "must be in [0, 1]", "allow_overmodulation = true"});
    refuse_scenario("negative-m", quick_scenario("modulation_index = -0.1\n"), "", 2, {"signal.modulation_index = -0.1", "must be in [0, 1]"});
    refuse_scenario("far-overmodulation", quick_scenario("modulation_index = 2.5\nallow_overmodulation = true\n"), "", 2,
                    {"signal.modulation_index = 2.5", "must be in [0, 2]"});
}

TEST_CASE("scenario: a carrier too low for the audio bandwidth (sidebands on DC or aliased) is refused")
{
    // 16 kHz output: the carrier must be >= 2.5 x 8 kHz; and >= 4 x the audio cutoff.
    refuse_scenario("carrier-vs-nyquist", quick_scenario(), "--set signal.carrier_hz=15e3", 2,
                    {"signal.carrier_hz = 15000", "at least 2.5 x the audio Nyquist frequency (8000 Hz)", "sidebands"});
    refuse_scenario("carrier-vs-cutoff", quick_scenario(), "--set signal.carrier_hz=30e3 --set signal.audio_cutoff_hz=8000", 2,
                    {"signal.carrier_hz = 30000", "at least 4 x signal.audio_cutoff_hz"});
}

TEST_CASE("scenario files that are missing, directories or the wrong thing")
{
    const fs::path d = fresh("scenario-files");
    auto r = galena_cli("render " + q(d / "nope.toml") + " --out " + q(d / "out") + " -q", d / "a");
    expect_refused(r, 2, {"nope.toml", "cannot open the scenario file", "No such file"}, d / "out", d);
    r = galena_cli("render " + q(d) + " --out " + q(d / "out") + " -q", d / "b");
    expect_refused(r, 2, {d.string(), "is a directory, not a scenario file"}, d / "out", d);
    r = galena_cli("render " + q(src_dir / "audio-samples/tone-1khz.wav") + " --out " + q(d / "out") + " -q", d / "c");
    expect_refused(r, 2, {"tone-1khz.wav:", "is an audio file", "not a scenario file", "--set signal.audio="}, d / "out", d);
}

TEST_CASE("pack files: unknown sections and keys, wrong types and bad values name the file and line")
{
    const fs::path d = fresh("pack-files");
    write_file(d / "base.toml", quick_scenario());
    auto refuse_pack = [&](const std::string& name, const std::string& text, std::initializer_list<std::string> needles) {
        CAPTURE(name);
        write_file(d / (name + ".toml"), text);
        const auto r = galena_cli("compare " + q(d / (name + ".toml")) + " --out " + q(d / "out") + " -q", d / ("run-" + name));
        expect_refused(r, 2, needles, d / "out", d);
    };
    const std::string head = "[pack]\nscenario = \"base.toml\"\n";
    refuse_pack("no-variants", head, {"no-variants.toml: [[variant]]: at least one variant is needed"});
    refuse_pack("variant-key", head + "[[variant]]\nname = \"a\"\nsett = [\"load.bleeder_ohm=1e3\"]\n",
                {"variant-key.toml:5: variant 1: sett: unknown key (known: name, label, set)"});
    refuse_pack("set-type", head + "[[variant]]\nname = \"a\"\nset = \"load.bleeder_ohm=1e3\"\n",
                {"set-type.toml:5: variant 1: set: must be a list of strings"});
    refuse_pack("tone-type", head + "measure_tone_hz = \"loud\"\n[[variant]]\nname = \"a\"\n", {"tone-type.toml:3: pack.measure_tone_hz: must be a number"});
    refuse_pack("tone-range", head + "measure_tone_hz = -1\n[[variant]]\nname = \"a\"\n",
                {"tone-range.toml:3: pack.measure_tone_hz = -1: must be 0 (off) or in (0, 20000] Hz"});
    refuse_pack("bad-name", head + "[[variant]]\nname = \"a/b\"\n", {"bad-name.toml:3: variant 1: name = \"a/b\"", "letters, digits"});
    refuse_pack("section", head + "[varient]\nname = \"a\"\n", {"section.toml:3: varient: unknown section"});
    refuse_pack("variant-value", head + "[[variant]]\nname = \"a\"\nset = [\"load.bleeder_ohm=-1\"]\n",
                {"variant-value.toml:5 (set \"load.bleeder_ohm=-1\" of variant a)", "load.bleeder_ohm = -1", "must be > 0"});
}

TEST_CASE("command line: unknown options and missing arguments cost one line (exit 2)")
{
    const fs::path d = fresh("cli");
    auto r = galena_cli("render --out " + q(d / "out") + " -q", d / "a");
    expect_refused(r, 2, {"scenario is required", "--help"}, d / "out", d);
    r = galena_cli("render " + q(src_dir / "scenarios/example.toml") + " --out " + q(d / "out") + " --frobnicate", d / "b");
    expect_refused(r, 2, {"--frobnicate"}, d / "out", d);
    r = galena_cli("sweep " + q(src_dir / "scenarios/example.toml") + " --out " + q(d / "out") + " --threads many", d / "c");
    expect_refused(r, 2, {"many"}, d / "out", d);
}

// ---------------------------------------------------------------------------------------------------------
// Audio input (exit 3; exit 2 where a scenario value breaks a rule of the clip).

TEST_CASE("audio input: missing, empty, truncated, non-audio, zero-length, NaN/Inf, odd rates, silent, a directory")
{
    const fs::path d = fresh("audio");
    refuse_clip("missing", d / "missing.wav", 3, {"missing.wav: no such file"});

    write_file(d / "empty.wav", "");
    refuse_clip("empty", d / "empty.wav", 3, {"empty.wav: cannot read as audio"});

    write_file(d / "text.wav", "this is a shopping list, not audio\n");
    refuse_clip("non-audio", d / "text.wav", 3, {"text.wav: cannot read as audio"});

    // A header declaring 4000 frames, cut after 1000 (an interrupted copy).
    write_sndfile(d / "whole.wav", 16000, 1, SF_FORMAT_PCM_16, sine(4000, 1000, 16000));
    {
        const std::string bytes = slurp(d / "whole.wav");
        write_file(d / "truncated.wav", bytes.substr(0, bytes.size() - 2 * 3000));
    }
    refuse_clip("truncated", d / "truncated.wav", 3, {"truncated.wav: truncated: the header declares 4000 frames but the file holds 1000"});

    write_sndfile(d / "zero.wav", 16000, 1, SF_FORMAT_PCM_16, {});
    refuse_clip("zero-frames", d / "zero.wav", 3, {"zero.wav: the audio file holds no samples"});

    std::vector<float> x = sine(8000, 500, 16000);
    x[5000] = std::numeric_limits<float>::quiet_NaN();
    write_sndfile(d / "nan.wav", 16000, 1, SF_FORMAT_FLOAT, x);
    refuse_clip("nan-middle", d / "nan.wav", 3, {"nan.wav: sample 5000 is not finite (NaN or Inf)"});
    x[5000] = 0.0f;
    x[7999] = std::numeric_limits<float>::infinity();
    write_sndfile(d / "inf.wav", 16000, 1, SF_FORMAT_FLOAT, x);
    refuse_clip("inf-end", d / "inf.wav", 3, {"inf.wav: sample 7999 is not finite (NaN or Inf)"});

    write_sndfile(d / "slow.wav", 500, 1, SF_FORMAT_PCM_16, sine(500, 50, 500));
    refuse_clip("low-rate", d / "slow.wav", 3, {"slow.wav: sample rate 500 Hz", "must be in [1000, 768000] Hz"});
    write_sndfile(d / "fast.wav", 1000000, 1, SF_FORMAT_PCM_16, sine(5000, 1000, 1e6));
    refuse_clip("high-rate", d / "fast.wav", 3, {"fast.wav: sample rate 1000000 Hz", "must be in [1000, 768000] Hz"});
    // A legal rate whose band cannot hold the scenario's audio cutoff: a scenario rule (exit 2).
    write_sndfile(d / "narrow.wav", 4000, 1, SF_FORMAT_PCM_16, sine(4000, 300, 4000));
    refuse_clip("cutoff-above-clip-band", d / "narrow.wav", 2,
                {"demo.toml: signal.audio_cutoff_hz = 5000", "must be at most 0.45 x the sample rate (4000 Hz)", "narrow.wav"});

    write_sndfile(d / "silent.wav", 16000, 1, SF_FORMAT_PCM_16, std::vector<float>(4000, 0.0f));
    refuse_clip("silent", d / "silent.wav", 3, {"silent.wav: audio clip is silent"});

    fs::create_directories(d / "folder.wav");
    refuse_clip("directory", d / "folder.wav", 3, {"folder.wav: is a directory, not an audio file"});
}

TEST_CASE("audio input: a multichannel clip is mixed to mono, and the render says so")
{
    const fs::path d = fresh("multichannel");
    const auto a = sine(4800, 700, 16000, 0.6);
    std::vector<float> inter;
    for (std::size_t i = 0; i < a.size(); ++i)
        for (int c = 0; c < 4; ++c) inter.push_back(c == 0 ? a[i] : 0.1f * static_cast<float>(c) * a[i]);
    write_sndfile(d / "quad.wav", 16000, 4, SF_FORMAT_FLOAT, inter);
    const auto r = galena_cli("render " + q(src_dir / "scenarios/demo.toml") + " --out " + q(d / "out") + " --set signal.audio=" +
                                  q(d / "quad.wav") + " --set signal.carrier_hz=200e3 -q",
                              d / "run");
    INFO(r.err);
    CHECK(r.rc == 0);
    CHECK(r.err.find("quad.wav: 4 channels mixed to mono (their average)") != std::string::npos);
    CHECK(fs::is_regular_file(d / "out/recovered.wav"));
    CHECK(slurp(d / "out/metrics.json").find("4 channels mixed to mono") != std::string::npos);
}

// ---------------------------------------------------------------------------------------------------------
// Outputs: inputs never overwritten, existing outputs kept, unwritable folders, full disks (exit 3).

TEST_CASE("outputs: an output path equal to an input is refused, even with --overwrite; the input is unchanged")
{
    const fs::path d = fresh("out-is-input");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    const std::string scen_before = slurp(scen);
    // --out names the scenario file itself.
    auto r = galena_cli("render " + q(scen) + " --out " + q(scen) + " --overwrite -q", d / "a");
    CHECK(r.rc == 3);
    CHECK(r.err.find("scene.toml: --out exists and is not a directory") != std::string::npos);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK(slurp(scen) == scen_before);
    // The clip is where the render would write recovered.wav.
    fs::create_directories(d / "io");
    fs::copy_file(src_dir / "audio-samples/speech-count.wav", d / "io/recovered.wav");
    const std::string clip_before = slurp(d / "io/recovered.wav");
    r = galena_cli("render " + q(src_dir / "scenarios/demo.toml") + " --out " + q(d / "io") + " --set signal.audio=" + q(d / "io/recovered.wav") +
                       " --set signal.carrier_hz=200e3 --overwrite -q",
                   d / "b");
    CHECK(r.rc == 3);
    CHECK(r.err.find("io/recovered.wav: is an input of this run; refusing to overwrite an input") != std::string::npos);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK(slurp(d / "io/recovered.wav") == clip_before);
    CHECK_FALSE(fs::exists(d / "io/recovered.json"));
    CHECK(leftovers(d).empty());
    // A pack file named as the pack's output folder.
    r = galena_cli("compare " + q(src_dir / "scenarios/demo-pack.toml") + " --out " + q(src_dir / "scenarios/demo-pack.toml") + " -q", d / "c");
    CHECK(r.rc == 3);
    CHECK(r.err.find("demo-pack.toml: --out exists and is not a directory") != std::string::npos);
}

TEST_CASE("outputs: an existing output is replaced only with --overwrite")
{
    const fs::path d = fresh("existing");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    fs::create_directories(d / "out");
    write_file(d / "out/recovered.wav", "precious");
    auto r = galena_cli("render " + q(scen) + " --out " + q(d / "out") + " -q", d / "a");
    CHECK(r.rc == 3);
    CHECK(r.err.find("out/recovered.wav: already exists (pass --overwrite to replace it)") != std::string::npos);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK(slurp(d / "out/recovered.wav") == "precious");
    CHECK_FALSE(fs::exists(d / "out/metrics.json"));
    CHECK(leftovers(d).empty());
    r = galena_cli("render " + q(scen) + " --out " + q(d / "out") + " --overwrite -q", d / "b");
    INFO(r.err);
    CHECK(r.rc == 0);
    CHECK(slurp(d / "out/recovered.wav").rfind("RIFF", 0) == 0);
    CHECK(fs::is_regular_file(d / "out/metrics.json"));
    CHECK(leftovers(d).empty());
}

TEST_CASE("outputs: an unwritable output folder is reported with the system's reason")
{
    const fs::path d = fresh("unwritable");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    const fs::path ro = d / "ro";
    fs::create_directories(ro);
    // --out below a regular file: no folder can be made there, for any user.
    write_file(d / "plain", "x");
    auto r = galena_cli("render " + q(scen) + " --out " + q(d / "plain/out") + " -q", d / "a");
    expect_refused(r, 3, {"plain", "cannot create the output directory"}, d / "plain/out", d);
    if (geteuid() != 0) {
        fs::permissions(ro, fs::perms::owner_read | fs::perms::owner_exec);
        r = galena_cli("render " + q(scen) + " --out " + q(ro / "out") + " -q", d / "b");
        fs::permissions(ro, fs::perms::owner_all);
        expect_refused(r, 3, {"ro/out", "cannot create the output directory", "Permission denied"}, ro / "out", d);
    } else if (private_mounts_work()) {
        // Root ignores permission bits: a read-only tmpfs in a private mount namespace instead.
        const std::string inner = "mount -t tmpfs -o ro,size=64k tmpfs " + q(ro) + " && exec";
        r = galena_cli("render " + q(scen) + " --out " + q(ro / "out") + " -q", d / "b", "unshare --mount sh -c \"" + inner + " \\\"\\$0\\\" \\\"\\$@\\\"\"");
        expect_refused(r, 3, {"ro/out", "cannot create the output directory", "Read-only file system"}, ro / "out", d);
    } else {
        MESSAGE("running as root without private mounts: the read-only folder case is covered by the file-parent case only");
    }
}

TEST_CASE("outputs: a full disk (ENOSPC) and a file-size limit (EFBIG) leave no partial file")
{
    const fs::path d = fresh("disk-full");
    const fs::path scen = d / "scene.toml";
    // 0.5 s at 16 kHz: the float intermediate alone is 32 kB, the WAVs 24 kB each.
    write_file(scen, quick_scenario());
    const std::string args = "render " + q(scen) + " --set signal.duration_s=0.5 -q --out ";
    // A file-size limit of 16 kB (RLIMIT_FSIZE): galena ignores SIGXFSZ, so write() fails with EFBIG.
    auto r = galena_cli(args + q(d / "out"), d / "a", "prlimit --fsize=16384 --");
    expect_refused(r, 3, {"out/", "write failed (disk full or file-size limit?)", "File too large"}, d / "out", d);
    if (!private_mounts_work()) {
        MESSAGE("private mounts unavailable: the ENOSPC case needs unshare + tmpfs (root with CAP_SYS_ADMIN)");
        return;
    }
    // A real full disk: a 24 kB tmpfs (no space for the WAV) in a private mount namespace. The listing
    // of the tmpfs is taken inside the namespace, before it goes away.
    const fs::path mnt = d / "small";
    fs::create_directories(mnt);
    const std::string inner = "mount -t tmpfs -o size=24k tmpfs " + q(mnt) + " || exit 99; \\\"\\$0\\\" \\\"\\$@\\\"; rc=\\$?; ls -A " + q(mnt) +
                              " > " + q(d / "listing.txt") + "; exit \\$rc";
    r = galena_cli(args + q(mnt / "out"), d / "b", "unshare --mount sh -c \"" + inner + "\"");
    INFO("stderr: " << r.err);
    CHECK(r.rc == 3);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK(r.err.find("small/out") != std::string::npos);
    CHECK(r.err.find("No space left on device") != std::string::npos);
    CHECK(fs::exists(d / "listing.txt"));
    CHECK(slurp(d / "listing.txt").empty());
}

// ---------------------------------------------------------------------------------------------------------
// Numerical failure (exit 4).

TEST_CASE("numerical failure: the solver's error names the simulated time, the scenario and the likely cause")
{
    const fs::path d = fresh("numerical");
    const fs::path scen = d / "wild.toml";
    // Legal but far-out values: 1000 V on an ideal (Rs = 0, source R = 0) diode with Is = 10 mA, n = 0.5.
    write_file(scen, quick_scenario("carrier_peak_v = 1000\n[source]\nresistance_ohm = 0\n[diode]\nsaturation_current_a = 1e-2\n"
                                    "emission_coefficient = 0.5\nseries_resistance_ohm = 0\njunction_capacitance_f = 0\n"));
    const auto r = galena_cli("render " + q(scen) + " --out " + q(d / "out") + " -q", d / "run");
    expect_refused(r, 4, {"wild.toml:", "the solver could not advance at t = ", "below the floor", "far out of range",
                          "diode.saturation_current_a = 0.01", "diode.emission_coefficient = 0.5", "signal.carrier_peak_v = 1000 V"},
                   d / "out", d);
}

// ---------------------------------------------------------------------------------------------------------
// Sweeps and long inputs (exit 2 without the opt-in).

TEST_CASE("sweeps: empty lists, no axes, and sizes above the confirmation limit need an explicit flag")
{
    const fs::path d = fresh("sweeps");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    const std::string base = "sweep " + q(scen) + " --out " + q(d / "out") + " -q ";
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=", d / "a"), 2, {"--vary load.bleeder_ohm=", "must look like section.key=a,b,c"},
                   d / "out", d);
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=1e3,,2e3", d / "b"), 2, {"--vary load.bleeder_ohm=1e3,,2e3", "empty value in the list"},
                   d / "out", d);
    expect_refused(galena_cli(base, d / "c"), 2, {"no variants"}, d / "out", d);
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=log:1e3:1e6:1", d / "d"), 2,
                   {"COUNT = 1", "must be a whole number in [2, 1000]"}, d / "out", d);
    // 60 variants: above the stated limit without --allow-large.
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=log:1e3:1e6:60", d / "e"), 2,
                   {"scene.toml: sweep: 60 variants", fmt::format("more than {} need --allow-large", galena::sweep_confirm_limit)}, d / "out", d);
    // 40 x 40: above the hard limit whatever the flags.
    expect_refused(galena_cli(base + "--allow-large --vary load.bleeder_ohm=log:1e3:1e6:40 --vary earpiece.capacitance_f=log:1e-9:1e-8:40", d / "f"),
                   2, {"--vary earpiece.capacitance_f", "1600 variants", "must hold at most 1000"}, d / "out", d);
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=1e3,2e3 --measure-tone -5", d / "h"), 2,
                   {"--measure-tone = -5", "must be 0 (off) or in (0, 20000] Hz"}, d / "out", d);
    // A variant with a bad value is named, and nothing is rendered.
    expect_refused(galena_cli(base + "--vary load.bleeder_ohm=1e3,-5", d / "g"), 2,
                   {"variant 02-bleeder_ohm--5", "load.bleeder_ohm = -5", "must be > 0"}, d / "out", d);
}

TEST_CASE("long inputs: above the programme-time limit a render is refused with the estimated wall time and the opt-in")
{
    const fs::path d = fresh("long");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    // A one-hour tone.
    auto r = galena_cli("render " + q(scen) + " --out " + q(d / "out") + " --set signal.duration_s=3600 -q", d / "a");
    expect_refused(r, 2, {"scene.toml: 3600 s of programme", fmt::format("more than the {:g} s limit", galena::long_render_limit_s),
                          "estimated wall time about", "--allow-long", "signal.duration_s"},
                   d / "out", d);
    // A clip longer than the limit (130 s at 8 kHz): the header alone decides, nothing is conditioned.
    {
        std::vector<float> x(130 * 8000);
        for (std::size_t i = 0; i < x.size(); ++i) x[i] = 0.5f * static_cast<float>(std::sin(0.3 * static_cast<double>(i)));
        write_sndfile(d / "long.wav", 8000, 1, SF_FORMAT_PCM_16, x);
    }
    r = galena_cli("render " + q(src_dir / "scenarios/demo.toml") + " --out " + q(d / "out") + " --set signal.audio=" + q(d / "long.wav") +
                       " --set signal.duration_s=0 --set signal.audio_cutoff_hz=3000 -q",
                   d / "b");
    expect_refused(r, 2, {"demo.toml: 130 s of programme", "estimated wall time about", "--allow-long"}, d / "out", d);
    // A sweep whose variants add up past the limit.
    r = galena_cli("sweep " + q(scen) + " --out " + q(d / "out") + " --set signal.duration_s=50 --vary load.bleeder_ohm=1e3,1e4,1e5 -q", d / "c");
    expect_refused(r, 2, {"scene.toml: 150 s of programme to render in 3 renders", "--allow-long"}, d / "out", d);
}

// ---------------------------------------------------------------------------------------------------------
// Ctrl-C and SIGTERM (exit 128 + signal).

namespace {

/// Starts galena with `args` (the scenario path is appended after the command word) in a fresh folder
/// `leaf`, sends `sig` once its first samples are being written, and checks the exit code, the one-line
/// message starting with `message`, that `out` (relative to the folder) does not exist and that no
/// staging folder is left.
void interrupt_and_check(const std::string& leaf, std::vector<std::string> args, const std::string& out, int sig, int expect_rc,
                         const std::string& message)
{
    const fs::path d = fresh(leaf);
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    args.insert(args.begin() + 1, scen.string());
    args.insert(args.begin() + 2, {"--out", (d / out).string()});
    const auto s = spawn_galena(args, d / "run");
    const bool running = wait_for_file(s, d, ".recovered.unclipped.wav", 4096);
    const int rc = signal_and_wait(s, sig);
    REQUIRE(running);
    const std::string err = slurp(s.err_file);
    INFO("stderr: " << err);
    CHECK(rc == expect_rc);
    CHECK(err.rfind(message, 0) == 0);
    CHECK(std::count(err.begin(), err.end(), '\n') == 1);
    CHECK_FALSE(fs::exists(d / out));
    CHECK(leftovers(d).empty());
}

} // namespace

TEST_CASE("Ctrl-C during a render stops it cleanly: exit 130, one line, no output, no staging folder")
{
    // 60 s of programme: far longer than the test waits; the signal comes once samples are being written.
    interrupt_and_check("sigint", {"render", "--set", "signal.duration_s=60", "-q"}, "out", SIGINT, 130,
                        "galena: error: interrupted by SIGINT (Ctrl-C)");
}

TEST_CASE("SIGTERM during a sweep stops every variant: exit 143, no table, no variant folder, no staging folder")
{
    interrupt_and_check("sigterm",
                        {"sweep", "--set", "signal.duration_s=30", "--vary", "load.bleeder_ohm=1e4,1e5", "--threads", "2", "-q"}, "out",
                        SIGTERM, 143, "galena: error: interrupted by SIGTERM");
}

TEST_CASE("Ctrl-C during a comparison pack leaves no pack: no page, no playlist, no variant folder")
{
    interrupt_and_check("sigint-pack",
                        {"compare", "--set", "signal.duration_s=30", "--variant", "a:load.bleeder_ohm=1e4", "--variant",
                         "b:load.bleeder_ohm=1e5", "--threads", "2", "-q"},
                        "pack", SIGINT, 130, "galena: error: interrupted by SIGINT (Ctrl-C)");
}

// ---------------------------------------------------------------------------------------------------------
// Determinism.

TEST_CASE("determinism: the same render twice gives byte-identical WAV and metrics")
{
    const fs::path d = fresh("determinism");
    const fs::path scen = d / "scene.toml";
    write_file(scen, quick_scenario());
    const auto a = galena_cli("render " + q(scen) + " --out " + q(d / "a") + " -q", d / "ra");
    const auto b = galena_cli("render " + q(scen) + " --out " + q(d / "b") + " -q", d / "rb");
    REQUIRE(a.rc == 0);
    REQUIRE(b.rc == 0);
    CHECK(slurp(d / "a/recovered.wav") == slurp(d / "b/recovered.wav"));
    CHECK(slurp(d / "a/metrics.json") == slurp(d / "b/metrics.json"));
    CHECK(slurp(d / "a/recovered.wav").size() > 44 + 3 * 700);
}
