// WAV round-trips for every supported format, mono mixing, calibration metadata, atomic writes.
#include "galena/audio_io.hpp"
#include "galena/error.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>
#include <sndfile.h>
#include <cmath>
#include <filesystem>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {
fs::path scratch(const std::string& name)
{
    const fs::path d = fs::path(GALENA_TEST_TMP) / "audio_io";
    fs::create_directories(d);
    const fs::path p = d / name;
    fs::remove(p);
    return p;
}
} // namespace

TEST_CASE("WAV round-trip in every output format stays within the format's quantisation step")
{
    std::vector<double> volts(1000);
    for (std::size_t i = 0; i < volts.size(); ++i) volts[i] = 1.5 * std::sin(0.01 * static_cast<double>(i)) * std::cos(0.003 * i);
    const double full_scale = 2.0;
    // Quantisation step of each format relative to full scale: 2^-15, 2^-23, float ~ 2^-24 relative.
    for (auto [f, step] : {std::pair{wav_format::pcm16, std::ldexp(1.0, -15)}, std::pair{wav_format::pcm24, std::ldexp(1.0, -23)},
                           std::pair{wav_format::float32, std::ldexp(1.0, -23)}}) {
        const auto p = scratch(fmt::format("rt_{}.wav", to_string(f)));
        write_wav(p, volts, 48000.0, f, full_scale, false);
        double rate = 0;
        const auto back = read_mono(p, &rate);
        CHECK(rate == 48000.0);
        REQUIRE(back.size() == volts.size());
        double worst = 0;
        for (std::size_t i = 0; i < volts.size(); ++i) worst = std::max(worst, std::fabs(back[i] * full_scale - volts[i]));
        CHECK(worst <= step * full_scale);
        // The calibration is recorded in the file.
        SF_INFO info{};
        SNDFILE* sf = sf_open(p.c_str(), SFM_READ, &info);
        REQUIRE(sf != nullptr);
        const char* c = sf_get_string(sf, SF_STR_COMMENT);
        REQUIRE(c != nullptr);
        CHECK(std::string(c).find("full scale = 2 V peak") != std::string::npos);
        sf_close(sf);
    }
}

TEST_CASE("reading: stereo is mixed to mono; 32-bit PCM and odd rates are accepted")
{
    const auto p = scratch("stereo32.wav");
    SF_INFO info{};
    info.samplerate = 22050;
    info.channels = 2;
    info.format = SF_FORMAT_WAV | SF_FORMAT_PCM_32;
    SNDFILE* sf = sf_open(p.c_str(), SFM_WRITE, &info);
    REQUIRE(sf != nullptr);
    std::vector<float> inter{0.5f, -0.1f, 0.2f, 0.2f, -0.4f, 0.0f};
    sf_writef_float(sf, inter.data(), 3);
    sf_close(sf);
    double rate = 0;
    const auto m = read_mono(p, &rate);
    CHECK(rate == 22050.0);
    REQUIRE(m.size() == 3);
    CHECK(m[0] == doctest::Approx(0.2).epsilon(1e-6));
    CHECK(m[1] == doctest::Approx(0.2).epsilon(1e-6));
    CHECK(m[2] == doctest::Approx(-0.2).epsilon(1e-6));
}

TEST_CASE("writer: clipping is counted, non-finite samples refused, nothing left behind without commit")
{
    const auto p = scratch("clip.wav");
    {
        wav_writer w(p, 48000.0, wav_format::pcm16, 1.0, false);
        const std::vector<double> v{0.5, 1.5, -2.0, 0.1};
        w.write_volts(v);
        CHECK(w.clipped() == 2);
        const std::vector<double> bad{std::nan("")};
        CHECK_THROWS_AS(w.write_volts(bad), audio_error);
        // destroyed without commit
    }
    CHECK_FALSE(fs::exists(p));
    for (const auto& e : fs::directory_iterator(p.parent_path())) CHECK(e.path().filename().string().find("clip.wav.partial") == std::string::npos);
}

TEST_CASE("writer refuses to replace an existing file unless asked; reader errors name the file")
{
    const auto p = scratch("exists.wav");
    write_wav(p, std::vector<double>{0.1, 0.2}, 8000.0, wav_format::pcm16, 1.0, false);
    CHECK_THROWS_WITH_AS(write_wav(p, std::vector<double>{0.1}, 8000.0, wav_format::pcm16, 1.0, false),
                         doctest::Contains("already exists"), audio_error);
    CHECK_NOTHROW(write_wav(p, std::vector<double>{0.1}, 8000.0, wav_format::pcm16, 1.0, true));
    CHECK_THROWS_WITH_AS(wav_reader{p.parent_path() / "missing.wav"}, doctest::Contains("missing.wav: no such file"), audio_error);
    CHECK_THROWS_WITH_AS(wav_reader{p.parent_path()}, doctest::Contains("is a directory"), audio_error);
    const auto txt = scratch("not-audio.wav");
    write_text_atomic(txt, "this is not audio\n");
    CHECK_THROWS_WITH_AS(wav_reader{txt}, doctest::Contains("cannot read as audio"), audio_error);
}

TEST_CASE("truncated files are refused for every container and subtype, with frames declared and found")
{
    // Each format is written whole by libsndfile, then cut to 40 % of its bytes (an interrupted copy).
    struct fmt_case {
        const char* name;
        int format;
        int channels;
    };
    const fmt_case cases[] = {
        {"pcm16.wav", SF_FORMAT_WAV | SF_FORMAT_PCM_16, 1},      {"alaw.wav", SF_FORMAT_WAV | SF_FORMAT_ALAW, 1},
        {"ulaw.wav", SF_FORMAT_WAV | SF_FORMAT_ULAW, 1},         {"ima.wav", SF_FORMAT_WAV | SF_FORMAT_IMA_ADPCM, 1},
        {"msadpcm.wav", SF_FORMAT_WAV | SF_FORMAT_MS_ADPCM, 2},  {"ext24.wav", SF_FORMAT_WAVEX | SF_FORMAT_PCM_24, 1},
        {"ext6ch.wav", SF_FORMAT_WAVEX | SF_FORMAT_PCM_16, 6},   {"float.wav", SF_FORMAT_WAV | SF_FORMAT_FLOAT, 2},
        {"pcm16.aiff", SF_FORMAT_AIFF | SF_FORMAT_PCM_16, 1},    {"pcm24.aiff", SF_FORMAT_AIFF | SF_FORMAT_PCM_24, 2},
    };
    const int frames = 8000;
    for (const auto& c : cases) {
        CAPTURE(c.name);
        const fs::path whole = scratch(std::string("whole-") + c.name);
        SF_INFO info{};
        info.samplerate = 16000;
        info.channels = c.channels;
        info.format = c.format;
        SNDFILE* f = sf_open(whole.c_str(), SFM_WRITE, &info);
        REQUIRE(f != nullptr);
        std::vector<float> x(static_cast<std::size_t>(frames * c.channels));
        for (std::size_t i = 0; i < x.size(); ++i) x[i] = 0.5f * static_cast<float>(std::sin(0.05 * static_cast<double>(i)));
        sf_writef_float(f, x.data(), frames);
        sf_close(f);
        // The whole file reads in full (ADPCM pads its last block: up to one block of 505 or 1012 frames more).
        const std::size_t whole_frames = read_mono(whole).size();
        CHECK(whole_frames >= static_cast<std::size_t>(frames));
        CHECK(whole_frames < static_cast<std::size_t>(frames) + 1024);
        const auto size = fs::file_size(whole);
        const fs::path cut = scratch(std::string("cut-") + c.name);
        fs::copy_file(whole, cut);
        fs::resize_file(cut, size * 2 / 5);
        // Declared: the fact chunk's exact count where there is one (MS ADPCM: 8000), else whole blocks.
        std::string msg;
        try {
            wav_reader r(cut);
        } catch (const audio_error& e) {
            msg = e.what();
        }
        const bool named = msg.find(fmt::format("truncated: the header declares {} frames but the file holds", frames)) != std::string::npos ||
                           msg.find(fmt::format("truncated: the header declares {} frames but the file holds", whole_frames)) != std::string::npos;
        CHECK_MESSAGE(named, msg);
    }
}
