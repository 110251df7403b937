// Band files and the synthetic speech-like programme.
#include "galena/band_file.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/synthetic_programme.hpp"

#include <doctest/doctest.h>
#include <fmt/format.h>

#include <cmath>
#include <complex>
#include <set>

using namespace galena;

TEST_CASE("the bundled demo band: 6-10 invented stations on a 9 kHz raster, a strong local and a 9 kHz pair")
{
    const band_spec b = load_band(std::filesystem::path(GALENA_SOURCE_DIR) / "scenarios/demo-band.toml");
    CHECK(b.stations.size() >= 6);
    CHECK(b.stations.size() <= 10);
    double strongest = 0.0, weakest = 1e9;
    int pairs = 0;
    for (std::size_t i = 0; i < b.stations.size(); ++i) {
        const auto& s = b.stations[i].params;
        // The 9 kHz raster of medium-wave broadcasting (ITU Region 1 plan: multiples of 9 kHz).
        CHECK(std::fmod(s.carrier_hz, 9e3) == 0.0);
        CHECK(s.carrier_hz >= 530e3);
        CHECK(s.carrier_hz <= 1700e3);
        strongest = std::max(strongest, s.field_v_per_m);
        weakest = std::min(weakest, s.field_v_per_m);
        for (std::size_t j = i + 1; j < b.stations.size(); ++j)
            if (std::fabs(b.stations[j].params.carrier_hz - s.carrier_hz) == 9e3) ++pairs;
    }
    CHECK(strongest / weakest >= 100.0);
    CHECK(pairs >= 1);
    CHECK(b.dial.start_hz == 530e3);
    CHECK(b.dial.end_hz == 1700e3);
    CHECK(b.dial.glide_s == 10.0);
}

TEST_CASE("band files: mistakes name the file, the line, the field and the rule")
{
    const std::string ok = "[[station]]\nname = \"A\"\ncarrier_hz = \"1M\"\n";
    CHECK(parse_band(ok, "b.toml").stations.at(0).params.carrier_hz == 1e6);
    CHECK_THROWS_WITH_AS((void)parse_band("[band]\ntitle = \"x\"\n", "b.toml"), doctest::Contains("b.toml: [[station]]: a band needs at least one"),
                         config_error);
    CHECK_THROWS_WITH_AS((void)parse_band("[[station]]\ncarrier_hz = 1e6\nfeild_v_per_m = 1\n", "b.toml"),
                         doctest::Contains("b.toml:3: station.1.feild_v_per_m: unknown key"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band("[[station]]\ncarrier_hz = 1e6\nfield_v_per_m = -1\n", "b.toml"),
                         doctest::Contains("b.toml:3: station.1.field_v_per_m = -1"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band("[[station]]\ncarrier_hz = 1e6\nprogramme = \"music\"\n", "b.toml"),
                         doctest::Contains("b.toml:3: station.1.programme = \"music\": must be tone, speech-noise or clip"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band("[[station]]\nname = \"A\"\ncarrier_hz = 1e6\n[[station]]\nname = \"A\"\ncarrier_hz = 2e6\n", "b.toml"),
                         doctest::Contains("another station has this name"), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band(ok + "[dial]\nlaw = \"log\"\n", "b.toml"), doctest::Contains("dial.law = \"log\""), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band("[[station]]\ncarrier_hz = \"1 MHzz\"\n", "b.toml"), doctest::Contains("b.toml:2: station.1.carrier_hz"),
                         config_error);
}

TEST_CASE("a band station's programme: tone_hz alone plays that tone, audio alone its clip; one the programme would not play is refused")
{
    const std::string st = "[[station]]\ncarrier_hz = 1e6\n";
    const auto tone = parse_band(st + "tone_hz = 700\n", "b.toml");
    CHECK(tone.stations.at(0).programme == band_programme::tone);
    CHECK(tone.stations.at(0).tone_hz == 700.0);
    CHECK(parse_band(st + "audio = \"x.wav\"\n", "b.toml").stations.at(0).programme == band_programme::clip);
    CHECK(parse_band(st, "b.toml").stations.at(0).programme == band_programme::speech_noise);
    CHECK_THROWS_WITH_AS((void)parse_band(st + "programme = \"speech-noise\"\ntone_hz = 700\n", "b.toml"),
                         doctest::Contains("b.toml:4: station.1.tone_hz: not played by programme = \"speech-noise\""), config_error);
    CHECK_THROWS_WITH_AS((void)parse_band(st + "tone_hz = 700\naudio = \"x.wav\"\n", "b.toml"),
                         doctest::Contains("b.toml:4: station.1: tone_hz and audio: give one of them"), config_error);
}

TEST_CASE("speech-like noise: seeded, bounded, and shaped as stated")
{
    const speech_noise_modulation a(10.0, 7), b(10.0, 7), c(10.0, 8);
    CHECK(a.samples() == b.samples());
    CHECK(a.samples() != c.samples());
    float peak = 0.0f;
    for (float v : a.samples()) peak = std::max(peak, std::fabs(v));
    CHECK(peak == doctest::Approx(0.95).epsilon(1e-6));
    // Spectrum: averaged Hann-windowed DFT power (Welch's method) in 50 Hz bands at 1 kHz and 5 kHz, against
    // the stated filters' magnitude. A 2nd-order Butterworth low-pass by the bilinear transform with its
    // corner pre-warped has |H(f)|^2 = 1 / (1 + (tan(pi f / fs) / tan(pi fc / fs))^4) (Oppenheim & Schafer,
    // Discrete-Time Signal Processing, bilinear transformation); the high-pass the same with the ratio
    // inverted. The syllabic envelope (4 Hz) does not change the shape at these frequencies.
    const double fs = speech_noise_modulation::sample_rate_hz;
    auto lp2 = [&](double f, double fc) { const double r = std::tan(pi * f / fs) / std::tan(pi * fc / fs); return 1.0 / (1.0 + std::pow(r, 4)); };
    auto hp2 = [&](double f, double fc) { const double r = std::tan(pi * fc / fs) / std::tan(pi * f / fs); return 1.0 / (1.0 + std::pow(r, 4)); };
    auto shape = [&](double f) { return hp2(f, 300.0) * lp2(f, 2500.0) * lp2(f, 2500.0); };
    const int n = 1024;
    auto band_power = [&](double f0) {
        double p = 0.0;
        const auto& x = a.samples();
        for (std::size_t start = 0; start + n <= x.size(); start += n / 2)
            for (double f = f0 - 25.0; f <= f0 + 25.0; f += fs / n) {
                std::complex<double> acc = 0.0;
                for (int i = 0; i < n; ++i)
                    acc += x[start + static_cast<std::size_t>(i)] * (0.5 - 0.5 * std::cos(two_pi * i / n)) * std::polar(1.0, -two_pi * f * i / fs);
                p += std::norm(acc);
            }
        return p;
    };
    const double measured_db = 10.0 * std::log10(band_power(1000.0) / band_power(5000.0));
    const double stated_db = 10.0 * std::log10(shape(1000.0) / shape(5000.0));
    MESSAGE(fmt::format("1 kHz over 5 kHz: measured {:.2f} dB, stated {:.2f} dB", measured_db, stated_db));
    CHECK(std::fabs(measured_db - stated_db) < 1.0);
}
