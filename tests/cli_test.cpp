// The command-line tool end to end on bundled material: render (calibration round-trip, square-law
// harmonic), bad input, sweeps identical across thread counts, the announced playlist's segment table, and
// the comparison page in headless Chromium. Renders are kept short (0.1-0.2 s at a 200 kHz carrier).
#include "galena/audio_io.hpp"
#include "galena/report.hpp"

#include "cli_support.hpp"

#include <doctest/doctest.h>
#include <nlohmann/json.hpp>
#include <fmt/format.h>

#include <algorithm>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

namespace fs = std::filesystem;
using namespace galena;

namespace {
constexpr double k_pi = 3.14159265358979323846;

const fs::path src_dir = GALENA_SOURCE_DIR;
const fs::path tmp_root = fs::path(GALENA_TEST_TMP) / "cli";

using galena_test::galena_cli;
using galena_test::slurp;

fs::path fresh(const std::string& name)
{
    const fs::path d = tmp_root / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

/// Settings that keep a render short: the bundled demo base at a 200 kHz carrier (the detector laws do not
/// depend on the carrier while R C >> 1/fc; 200 kHz still leaves > 12 x the 16 kHz output rate).
const std::string quick = " --set signal.carrier_hz=200e3 --set signal.duration_s=0.15";

/// Least-squares DC + sinusoid at f over [from, to): returns the amplitude (independent of the library's fit).
double fit_amplitude(const std::vector<double>& y, double fs, double f, std::size_t from, std::size_t to)
{
    // Normal equations for y ~ c0 + a sin + b cos, solved by Cramer's rule on the 3x3 system.
    double m[3][3] = {}, v[3] = {};
    for (std::size_t i = from; i < to; ++i) {
        const double b[3] = {1.0, std::sin(2 * k_pi * f * i / fs), std::cos(2 * k_pi * f * i / fs)};
        for (int r = 0; r < 3; ++r) {
            v[r] += b[r] * y[i];
            for (int c = 0; c < 3; ++c) m[r][c] += b[r] * b[c];
        }
    }
    auto det3 = [](double a[3][3]) {
        return a[0][0] * (a[1][1] * a[2][2] - a[1][2] * a[2][1]) - a[0][1] * (a[1][0] * a[2][2] - a[1][2] * a[2][0]) +
               a[0][2] * (a[1][0] * a[2][1] - a[1][1] * a[2][0]);
    };
    const double d = det3(m);
    double coef[3];
    for (int k = 0; k < 3; ++k) {
        double t[3][3];
        for (int r = 0; r < 3; ++r)
            for (int c = 0; c < 3; ++c) t[r][c] = c == k ? v[r] : m[r][c];
        coef[k] = det3(t) / d;
    }
    return std::hypot(coef[1], coef[2]);
}

} // namespace

TEST_CASE("render on a bundled clip writes the WAV, metrics.json and plots; the contract keys are present")
{
    const fs::path d = fresh("render-clip");
    const auto r = galena_cli("render '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + (d / "out").string() + "'" +
                                  quick + " -q",
                              d);
    INFO(r.err);
    REQUIRE(r.rc == 0);
    for (const char* f : {"recovered.wav", "recovered.json", "metrics.json", "plots/zoom.svg", "plots/zoom.png", "plots/spectrum.svg"})
        CHECK(fs::is_regular_file(d / "out" / f));
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    for (const char* k : {"dc_v", "audio_rms_v", "fundamental_v", "h2_ratio", "h3_ratio", "thd_percent", "thd_n_percent", "sinad_db", "warnings"})
        CHECK_MESSAGE(m.contains(k), k);
    // A clip has no single tone: the distortion keys are null and a warning says why.
    CHECK(m["thd_percent"].is_null());
    CHECK(m["warnings"].size() >= 1);
    // Length: duration_s x sample rate exactly (programme-aligned output; 0.15 s at 16 kHz = 2400 samples).
    double fs = 0.0;
    const auto wav = read_mono(d / "out/recovered.wav", &fs);
    CHECK(fs == 16000.0);
    CHECK(wav.size() == 2400);
    // Something was recovered: a DC bias at the earpiece (rectification) and audio above the 16-bit floor.
    CHECK(m["dc_v"].get<double>() > 0.0);
    CHECK(m["audio_rms_v"].get<double>() > 10 * 0.3 / 32768.0);
}

TEST_CASE("render of a weak tone: square-law H2/H1 = m/4, and the WAV's calibration matches metrics.json")
{
    // Square-law detection of A(1 + m cos)^2 (standard AM detector analysis in communication-systems textbooks, e.g. Haykin, Communication Systems; derived): H2/H1 = m/4 = 0.075 at m = 0.3 when the
    // carrier is far below n Vt (here 10 mV against n Vt ~ 33 mV; the next term of I0 changes the ratio by
    // about (V/nVt)^2/8 ~ 1 %, derived from the I0 series). A resistive earpiece and no capacitances keep
    // the load memoryless in the audio band, so the low-pass filtering does not tilt H2 against H1.
    const fs::path d = fresh("render-tone");
    const std::string sets =
        " --set signal.test_signal=tone --set signal.tone_hz=1000 --set signal.duration_s=0.12 --set signal.carrier_hz=200e3"
        " --set signal.carrier_peak_v=0.01 --set signal.modulation_index=0.3 --set diode.junction_capacitance_f=0"
        " --set earpiece.kind=resistor --set earpiece.resistance_ohm=47e3 --set load.bleeder_ohm=inf"
        " --set solver.absolute_tolerance_v=1e-10 --set output.format=pcm24 --set output.full_scale_v=1e-3";
    // signal.audio must not be set for a tone: use the example scenario (a tone) as the base.
    const auto r = galena_cli("render '" + (src_dir / "scenarios/example.toml").string() + "' --out '" + (d / "out").string() + "'" +
                                  sets + " -q",
                              d);
    INFO(r.err);
    REQUIRE(r.rc == 0);
    const auto m = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    const double h2 = m["h2_ratio"].get<double>();
    CHECK(h2 == doctest::Approx(0.075).epsilon(0.04).scale(0));
    // Round-trip of the calibration: WAV samples x full_scale_v are earpiece volts. Fit the 1 kHz amplitude
    // independently over the middle of the file (past the settling window and the 10 ms fades).
    double fs = 0.0;
    const auto wav = read_mono(d / "out/recovered.wav", &fs);
    std::vector<double> v(wav.begin(), wav.end());
    for (double& x : v) x *= 1e-3;
    const double a = fit_amplitude(v, fs, 1000.0, static_cast<std::size_t>(0.03 * fs), static_cast<std::size_t>(0.11 * fs));
    // The WAV has the 10 Hz DC high-pass applied: at 1 kHz its 2nd-order gain is 1 - O((10/1000)^2) (derived).
    CHECK(a == doctest::Approx(m["fundamental_v"].get<double>()).epsilon(0.005).scale(0));
}

TEST_CASE("bad input: one-line errors naming the field, exit codes, no half-written outputs, inputs never overwritten")
{
    const fs::path d = fresh("bad");
    const auto r = galena_cli("render '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + (d / "out").string() +
                                  "' --set load.bleeder_ohm=-5 -q",
                              d);
    CHECK(r.rc == 2);
    CHECK(r.err.find("load.bleeder_ohm") != std::string::npos);
    CHECK(std::count(r.err.begin(), r.err.end(), '\n') == 1);
    CHECK_FALSE(fs::exists(d / "out" / "recovered.wav"));

    const auto t = galena_cli("render '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + (d / "out2").string() +
                                  "' --set lod.bleeder_ohm=1e3 -q",
                              d);
    CHECK(t.rc == 2);
    CHECK(t.err.find("did you mean [load]") != std::string::npos);

    // The scenario's audio input is the target file: refused (exit 3), the input is unchanged.
    const fs::path in = d / "io" / "recovered.wav";
    fs::create_directories(in.parent_path());
    fs::copy_file(src_dir / "audio-samples/speech-count.wav", in);
    const std::string before = slurp(in);
    const auto u = galena_cli("render '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + in.parent_path().string() +
                                  "' --set signal.audio='\"" + in.string() + "\"'" + quick + " --overwrite -q",
                              d);
    CHECK(u.rc == 3);
    CHECK(u.err.find("input") != std::string::npos);
    CHECK(slurp(in) == before);

    const auto v = galena_cli("sweep '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + (d / "sw").string() +
                                  "' --vary load.bleeder_ohm=log:1e3:0:4 -q",
                              d);
    CHECK(v.rc == 2);
    CHECK(v.err.find("log range") != std::string::npos);
}

TEST_CASE("sweep: identical tables and WAVs with 1 and 3 threads; the DC falls as the bleeder gets smaller")
{
    const fs::path d = fresh("sweep");
    const std::string base = "sweep '" + (src_dir / "scenarios/example.toml").string() + "' --vary load.bleeder_ohm=inf,1e6,47e3,10e3" +
                             " --set signal.carrier_hz=200e3 --set signal.duration_s=0.06 --set output.sample_rate_hz=16000 -q";
    const auto a = galena_cli(base + " --threads 1 --out '" + (d / "one").string() + "'", d / "a");
    const auto b = galena_cli(base + " --threads 3 --out '" + (d / "three").string() + "'", d / "b");
    INFO(a.err, b.err);
    REQUIRE(a.rc == 0);
    REQUIRE(b.rc == 0);
    CHECK(slurp(d / "one/table.csv") == slurp(d / "three/table.csv"));
    CHECK(slurp(d / "one/table.md") == slurp(d / "three/table.md"));
    std::vector<double> dc;
    for (const auto& e : fs::directory_iterator(d / "one")) {
        if (!e.is_directory()) continue;
        const std::string n = e.path().filename().string();
        CHECK(slurp(d / "one" / n / "recovered.wav") == slurp(d / "three" / n / "recovered.wav"));
    }
    for (const char* n : {"1-bleeder_ohm-none", "2-bleeder_ohm-1M", "3-bleeder_ohm-47k", "4-bleeder_ohm-10k"}) {
        const fs::path p = d / "one" / (std::string("0") + n) / "metrics.json";
        REQUIRE(fs::exists(p));
        dc.push_back(nlohmann::json::parse(slurp(p))["dc_v"].get<double>());
    }
    // Torrey & Whitmer, Crystal Rectifiers, MIT Radiation Laboratory Series vol. 15, 1948 (from memory): Is (I0(V/nVt) exp(-Vdc/nVt) - 1) = Vdc / RL has a root Vdc that grows with RL
    // (the left side falls with Vdc, the right side's slope 1/RL falls with RL), so the DC is ordered.
    CHECK(dc[0] > dc[1]);
    CHECK(dc[1] > dc[2]);
    CHECK(dc[2] > dc[3]);
}

TEST_CASE("announced playlist: each segment's audio sits exactly where the table says, announced by its tone code")
{
    const fs::path d = fresh("playlist");
    // Three known inputs of different lengths: sines at distinct frequencies and levels.
    const double fs = 16000.0;
    std::vector<fs::path> wavs;
    std::vector<std::vector<double>> sig;
    const int count = 7;
    for (int k = 0; k < count; ++k) {
        std::vector<double> x(static_cast<std::size_t>(800 + 173 * k));
        for (std::size_t i = 0; i < x.size(); ++i) x[i] = 0.05 * (k + 1) * std::sin(2 * k_pi * (300.0 + 150 * k) * i / fs);
        wavs.push_back(d / fmt::format("in{}.wav", k));
        write_wav(wavs.back(), x, fs, wav_format::pcm24, 1.0, true);
        sig.push_back(x);
    }
    std::vector<std::string> names, labels;
    for (int k = 0; k < count; ++k) {
        names.push_back(fmt::format("v{}", k + 1));
        labels.push_back(fmt::format("variant, number {}", k + 1));
    }
    playlist_options opt;
    opt.speak = false; // the tone code (the fallback when espeak-ng is missing); speech_test covers speech
    (void)write_playlist(wavs, names, labels, d / "playlist.wav", d / "playlist.csv", wav_format::pcm24, opt);
    const auto segs = read_playlist_table(d / "playlist.csv");
    REQUIRE(segs.size() == static_cast<std::size_t>(count));
    double rate = 0.0;
    const auto p = read_mono(d / "playlist.wav", &rate);
    CHECK(rate == fs);
    std::size_t prev_end = 0;
    for (int k = 0; k < count; ++k) {
        const auto& s = segs[static_cast<std::size_t>(k)];
        CHECK(s.label == labels[static_cast<std::size_t>(k)]);
        REQUIRE(s.audio_samples == sig[static_cast<std::size_t>(k)].size());
        CHECK(s.audio_start_s == doctest::Approx(static_cast<double>(s.audio_start_sample) / fs).epsilon(1e-6).scale(0));
        // Samples equal to 24-bit resolution (2^-23 per step; written twice, so within 2 steps).
        double worst = 0.0;
        for (std::size_t i = 0; i < s.audio_samples; ++i)
            worst = std::max(worst, std::fabs(static_cast<double>(p[s.audio_start_sample + i]) - sig[static_cast<std::size_t>(k)][i]));
        CHECK(worst < 2.5 / 8388608.0);
        // Just outside the segment: silence (the gap before it ends in the code's pause, and one follows).
        CHECK(p[s.audio_start_sample - 1] == 0.0f);
        CHECK(p[s.audio_start_sample + s.audio_samples] == 0.0f);
        // The code: count beeps between the previous segment's end and this audio start by the 880 Hz
        // energy in 2.5 ms windows; long beeps (>= 0.2 s) count five, short ones one.
        const auto code_from = static_cast<std::size_t>(std::llround(s.code_start_s * fs));
        CHECK(code_from >= prev_end);
        for (std::size_t i = prev_end; i < code_from; ++i) REQUIRE(p[i] == 0.0f);
        int value = 0, run = 0;
        const std::size_t w = 40;
        for (std::size_t i = code_from; i + w <= s.audio_start_sample + w; i += w) {
            double e = 0.0;
            for (std::size_t j = i; j < std::min(i + w, s.audio_start_sample); ++j) e += p[j] * p[j];
            const bool on = std::sqrt(e / w) > 0.01;
            if (on) ++run;
            if (!on && run > 0) {
                value += static_cast<double>(run * w) / fs >= 0.2 ? 5 : 1;
                run = 0;
            }
        }
        CHECK(value == k + 1);
        prev_end = s.audio_start_sample + s.audio_samples;
    }
}

TEST_CASE("compare: the pack page opens in headless Chromium with its players and plots; the screenshot is not blank")
{
    const fs::path d = fresh("pack");
    const auto r = galena_cli("compare '" + (src_dir / "scenarios/demo.toml").string() + "' --out '" + (d / "pack").string() +
                                  "' --variant 'ge:diode.preset=germanium-point-contact' --variant 'sk:diode.preset=small-signal-schottky'"
                                  " --set signal.carrier_hz=200e3 --set signal.duration_s=0.12 --measure-duration 0.1 -q",
                              d);
    INFO(r.err);
    REQUIRE(r.rc == 0);
    for (const char* f : {"index.html", "playlist.wav", "playlist.csv", "table.csv", "table.md", "matched/gains.csv", "ge/recovered.wav",
                          "plots/thd.svg", "plots/level.png", "plots/transfer.svg", "plots/response.svg"})
        CHECK_MESSAGE(fs::is_regular_file(d / "pack" / f), f);
    // The pack's own playlist: the segment boundaries hold the variants' WAVs (16-bit, written twice).
    const auto segs = read_playlist_table(d / "pack/playlist.csv");
    REQUIRE(segs.size() == 2);
    // Level rules of the pack's playlist (automatic full scale, the default): every item above -60 dBFS RMS,
    // no neighbour step above 10 dB without a fade; items spoken when espeak-ng is there.
    const bool speech = std::system("command -v espeak-ng > /dev/null 2>&1") == 0;
    for (const auto& s : segs) {
        CHECK(s.rms_dbfs > -60.0);
        CHECK((s.fade_in_s > 0.0) == (std::fabs(s.step_db) > 10.0));
        CHECK(s.spoken == speech);
    }
    const auto pl = read_mono(d / "pack/playlist.wav");
    for (const auto& s : segs) {
        const auto x = read_mono(d / "pack" / s.name / "recovered.wav");
        REQUIRE(x.size() == s.audio_samples);
        double worst = 0.0;
        // Past the fade-in that a step above 10 dB from the previous item gets.
        for (auto i = static_cast<std::size_t>(std::llround(s.fade_in_s * 16000.0)); i < x.size(); ++i) worst = std::max(worst, static_cast<double>(std::fabs(pl[s.audio_start_sample + i] - x[i])));
        CHECK(worst <= 1.0 / 32768.0);
    }

    if (std::system("command -v chromium > /dev/null 2>&1") != 0) {
        MESSAGE("chromium not installed (Debian package chromium): page check skipped");
        return;
    }
    const fs::path profile = d / "profile";
    fs::create_directories(profile);
    const std::string flags = "chromium --headless --no-sandbox --disable-gpu --disable-quic --no-first-run --disable-background-networking "
                              "--disable-component-update --disable-sync --user-data-dir='" + profile.string() + "' ";
    const std::string url = "file://" + fs::absolute(d / "pack/index.html").string();
    REQUIRE(std::system((flags + "--dump-dom '" + url + "' > '" + (d / "dom.html").string() + "' 2> /dev/null").c_str()) == 0);
    const std::string dom = slurp(d / "dom.html");
    auto count = [&](const std::string& needle) {
        std::size_t n = 0;
        for (auto at = dom.find(needle); at != std::string::npos; at = dom.find(needle, at + 1)) ++n;
        return n;
    };
    // Both playlists, each variant level-consistent and matched, the quiz's A, B and X, the presenter's A and B.
    CHECK(count("<audio") == 2 + 2 * 2 + 3 + 2);
    CHECK(count("<svg") >= 7);           // zoom, spectrum, thd, level, transfer, response, diode_levels
    CHECK(count("<figure") == 7);        // the two variants differ only in the diode: level against carrier too
    REQUIRE(std::system((flags + "--screenshot='" + (d / "shot.png").string() + "' --window-size=1280,2000 '" + url +
                         "' > /dev/null 2>&1").c_str()) == 0);
    REQUIRE(fs::is_regular_file(d / "shot.png"));
    // Not blank: a share of pixels differs from the background, and there are many distinct colours
    // (PIL from Debian's python3-pil decodes the PNG).
    const std::string py = "/usr/bin/python3 -c \"import sys; from PIL import Image; im = Image.open(sys.argv[1]).convert('RGB'); "
                           "cs = im.getcolors(1 << 24); n = im.width * im.height; "
                           "print((n - max(cs)[0]) / n, len(cs))\" '" + (d / "shot.png").string() + "' > '" +
                           (d / "shot.txt").string() + "'";
    REQUIRE(std::system(py.c_str()) == 0);
    std::istringstream in(slurp(d / "shot.txt"));
    double ink = 0.0;
    int colours = 0;
    in >> ink >> colours;
    CHECK(ink > 0.02);
    CHECK(colours > 50);
}
