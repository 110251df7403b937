// What the tool tells a new user: the short render summary (the full figures with --verbose and always in
// metrics.json), each warning once (a stereo clip's "mixed to mono" among them), a whole clip unless
// limited and one line when a limit cuts it, `check` on a pack file, `compare` on a plain scenario, and an
// audio file given as the scenario. Renders use a 200 kHz carrier to stay short (the detector laws do not
// depend on the carrier while R C >> 1/fc).
#include "galena/audio_io.hpp"

#include "cli_support.hpp"

#include <doctest/doctest.h>
#include <nlohmann/json.hpp>
#include <sndfile.h>

#include <cmath>
#include <filesystem>
#include <string>
#include <vector>

namespace fs = std::filesystem;
using galena_test::galena_cli;
using galena_test::slurp;

namespace {

const fs::path src_dir = GALENA_SOURCE_DIR;
const fs::path tmp_root = fs::path(GALENA_TEST_TMP) / "cli_summary";

fs::path fresh(const std::string& name)
{
    const fs::path d = tmp_root / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

std::size_t count(const std::string& text, const std::string& what)
{
    std::size_t n = 0;
    for (auto p = text.find(what); p != std::string::npos; p = text.find(what, p + 1)) ++n;
    return n;
}

std::size_t lines(const std::string& text) { return count(text, "\n"); }

std::string q(const fs::path& p) { return "'" + p.string() + "'"; }

const std::string example = q(src_dir / "scenarios/example.toml");

} // namespace

TEST_CASE("render prints a short summary; --verbose prints every figure; metrics.json always holds them")
{
    const fs::path d = fresh("summary");
    const auto r = galena_cli("render " + example + " --out " + q(d / "out") +
                                  " --set signal.carrier_hz=200k --set signal.duration_s=0.3 --set output.full_scale_v=2",
                              d);
    REQUIRE_MESSAGE(r.rc == 0, r.err);
    CHECK(r.out.find("wrote " + (d / "out/recovered.wav").string() + ": 0.3 s, 48 kHz pcm24, full scale 2 V peak\n") != std::string::npos);
    CHECK(r.out.find("\nlevel: ") != std::string::npos);
    CHECK(r.out.find("\ndistortion: THD ") != std::string::npos);
    CHECK(r.out.find(" (1 kHz tone)\n") != std::string::npos);
    CHECK(r.out.find("all figures: " + (d / "out/metrics.json").string()) != std::string::npos);
    CHECK(lines(r.out) <= 5);
    CHECK(r.out.find("thd_percent") == std::string::npos);
    const auto metrics = nlohmann::json::parse(slurp(d / "out/metrics.json"));
    CHECK(metrics.contains("thd_percent"));
    CHECK(metrics.contains("sinad_db"));
    CHECK(metrics.contains("detection_efficiency"));

    const auto v = galena_cli("render " + example + " --out " + q(d / "verbose") +
                                  " --set signal.carrier_hz=200k --set signal.duration_s=0.3 --verbose",
                              d / "v");
    REQUIRE_MESSAGE(v.rc == 0, v.err);
    CHECK(v.out.find("thd_percent") != std::string::npos);
    CHECK(v.out.find("detection_efficiency") != std::string::npos);
    CHECK(v.out.find("steps per carrier cycle") != std::string::npos);
    // The automatic full scale (the default) says so, with the headroom.
    CHECK(v.out.find(" peak (chosen automatically: ") != std::string::npos);
    CHECK(v.out.find("full_scale_auto") != std::string::npos);
    CHECK(lines(v.out) > 20);
    // No warning line in the figures: each warning is printed once, on stderr.
    CHECK(v.out.find("warning") == std::string::npos);
}

TEST_CASE("a stereo clip is rendered whole; its mixed-to-mono warning appears once; a limit that cuts it is one line")
{
    const fs::path d = fresh("stereo");
    const fs::path clip = d / "stereo.wav";
    // 0.6 s of a 440 Hz tone in both channels, 16 kHz, written with libsndfile.
    SF_INFO info{};
    info.samplerate = 16000;
    info.channels = 2;
    info.format = SF_FORMAT_WAV | SF_FORMAT_PCM_16;
    SNDFILE* sf = sf_open(clip.c_str(), SFM_WRITE, &info);
    REQUIRE(sf != nullptr);
    std::vector<float> frames(2 * 9600);
    for (std::size_t i = 0; i < 9600; ++i) frames[2 * i] = frames[2 * i + 1] = 0.5f * static_cast<float>(std::sin(2 * M_PI * 440.0 * i / 16000.0));
    sf_writef_float(sf, frames.data(), 9600);
    sf_close(sf);

    const std::string set = " --set signal.carrier_hz=200k --set signal.audio=" + q(clip);
    const auto r = galena_cli("render " + example + " --out " + q(d / "whole") + set, d / "whole-run");
    REQUIRE_MESSAGE(r.rc == 0, r.err);
    CHECK(count(r.out + r.err, "channels mixed to mono") == 1);
    CHECK(r.out.find("wrote " + (d / "whole/recovered.wav").string() + ": 0.6 s,") != std::string::npos);
    CHECK(r.err.find("is rendered") == std::string::npos);
    const galena::wav_reader whole(d / "whole/recovered.wav");
    CHECK(whole.frames() == 28800); // 0.6 s at 48 kHz: the whole clip

    const auto c = galena_cli("render " + example + " --out " + q(d / "cut") + set + " --set signal.duration_s=0.25", d / "cut-run");
    REQUIRE_MESSAGE(c.rc == 0, c.err);
    CHECK(count(c.err, "signal.duration_s = 0.25 s: only the first 0.25 s of stereo.wav (0.6 s long) is rendered; set "
                       "signal.duration_s = 0 for the whole clip") == 1);
    CHECK(galena::wav_reader(d / "cut/recovered.wav").frames() == 12000);
}

TEST_CASE("check validates a pack file; compare on a plain scenario and an audio file as the scenario explain themselves")
{
    const fs::path d = fresh("check");
    const auto p = galena_cli("check " + q(src_dir / "scenarios/bench-pack.toml"), d / "pack");
    CHECK(p.rc == 0);
    CHECK(p.err.find("is a valid pack file (12 variants)") != std::string::npos);
    CHECK(p.out.find("measurement tone 1 kHz, 300 ms") != std::string::npos);
    // A variant broken by a --set on the base is named.
    const auto bad = galena_cli("check " + q(src_dir / "scenarios/example-pack.toml") + " --set load.filter_capacitance_f=1H", d / "bad");
    CHECK(bad.rc == 2);
    CHECK(bad.err.find("variant bleeder-none: ") != std::string::npos);
    CHECK(bad.err.find("unit H does not match the key's unit, F") != std::string::npos);

    const auto c = galena_cli("compare " + example + " --out " + q(d / "cmp"), d / "compare");
    CHECK(c.rc == 2);
    CHECK(c.err.find("is a scenario without variants: compare needs --vary section.key=a,b,c, --variant NAME:section.key=value or "
                     "a pack file") != std::string::npos);
    CHECK_FALSE(fs::exists(d / "cmp"));

    const fs::path wav = src_dir / "audio-samples/speech-count.wav";
    const auto w = galena_cli("render " + q(wav) + " --out " + q(d / "wav"), d / "wav-run");
    CHECK(w.rc == 2);
    CHECK(w.err.find("is an audio file") != std::string::npos);
    CHECK(w.err.find("--set signal.audio=" + wav.string()) != std::string::npos);
    CHECK(lines(w.err) == 1);
}
