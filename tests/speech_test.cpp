// Spoken announcements: numbers and labels in words, speech made by espeak-ng, and the spoken playlist
// (each announcement holds speech, each programme segment starts where playlist.csv says, level steps
// above 10 dB are announced and faded in, the tone code when speech is missing).
#include "galena/audio_io.hpp"
#include "galena/report_playlist.hpp"
#include "galena/speech.hpp"
#include "galena/warning.hpp"

#include <algorithm>
#include <cmath>
#include <complex>
#include <cstdlib>
#include <doctest/doctest.h>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

namespace fs = std::filesystem;
using namespace galena;

namespace {

constexpr double k_pi = 3.14159265358979323846;

fs::path fresh(const std::string& name)
{
    const fs::path d = fs::path(GALENA_TEST_TMP) / "speech" / name;
    fs::remove_all(d);
    fs::create_directories(d);
    return d;
}

bool have_espeak() { return std::system("command -v espeak-ng > /dev/null 2>&1") == 0; }

/// In-place radix-2 FFT (Cooley-Tukey, decimation in time); n a power of two. Written here so the spectrum
/// check does not use the project's own spectrum code.
void fft(std::vector<std::complex<double>>& a)
{
    const std::size_t n = a.size();
    for (std::size_t i = 1, j = 0; i < n; ++i) {
        std::size_t bit = n >> 1;
        for (; (j & bit) != 0; bit >>= 1) j ^= bit;
        j ^= bit;
        if (i < j) std::swap(a[i], a[j]);
    }
    for (std::size_t len = 2; len <= n; len <<= 1) {
        const std::complex<double> w = std::polar(1.0, -2.0 * k_pi / static_cast<double>(len));
        for (std::size_t i = 0; i < n; i += len) {
            std::complex<double> wk = 1.0;
            for (std::size_t k = 0; k < len / 2; ++k) {
                const auto u = a[i + k];
                const auto v = a[i + k + len / 2] * wk;
                a[i + k] = u + v;
                a[i + k + len / 2] = u - v;
                wk *= w;
            }
        }
    }
}

/// Spectrum measures of a segment over 300-3000 Hz (Welch: Hann frames of 1024 samples, half overlap).
struct spread {
    double flatness = 0.0;          ///< geometric / arithmetic mean of the PSD bins in 300-3000 Hz
    int bands_within_30db = 0;      ///< of the ten third-octave bands 315 .. 2500 Hz (centres), those within 30 dB of the strongest
    double strongest_share = 0.0;   ///< the strongest band's share of the energy in those bands
};

spread measure_spread(const std::vector<float>& x, std::size_t from, std::size_t to, double fs)
{
    const std::size_t n = 1024;
    std::vector<double> psd(n / 2 + 1, 0.0);
    for (std::size_t s = from; s + n <= to; s += n / 2) {
        std::vector<std::complex<double>> a(n);
        for (std::size_t i = 0; i < n; ++i) a[i] = x[s + i] * 0.5 * (1.0 - std::cos(2.0 * k_pi * static_cast<double>(i) / n));
        fft(a);
        for (std::size_t k = 0; k <= n / 2; ++k) psd[k] += std::norm(a[k]);
    }
    spread r;
    double lsum = 0.0, sum = 0.0;
    int count = 0;
    for (std::size_t k = 0; k <= n / 2; ++k) {
        const double f = static_cast<double>(k) * fs / n;
        if (f < 300.0 || f > 3000.0) continue;
        lsum += std::log(psd[k] + 1e-30);
        sum += psd[k];
        ++count;
    }
    r.flatness = std::exp(lsum / count) / (sum / count);
    // Third-octave bands (IEC 61260 nominal centres 315 .. 2500 Hz; edges at fc * 2^(+-1/6)).
    std::vector<double> band;
    for (double fc : {315.0, 400.0, 500.0, 630.0, 800.0, 1000.0, 1250.0, 1600.0, 2000.0, 2500.0}) {
        double e = 0.0;
        for (std::size_t k = 0; k <= n / 2; ++k) {
            const double f = static_cast<double>(k) * fs / n;
            if (f >= fc * std::pow(2.0, -1.0 / 6.0) && f < fc * std::pow(2.0, 1.0 / 6.0)) e += psd[k];
        }
        band.push_back(e);
    }
    const double top = *std::max_element(band.begin(), band.end());
    double total = 0.0;
    for (double e : band) {
        total += e;
        if (e >= top * 1e-3) ++r.bands_within_30db;
    }
    r.strongest_share = top / total;
    return r;
}

/// Speech as the test means it. The long-term average speech spectrum spreads its energy over the whole
/// 250-4000 Hz range within some 20-30 dB (Byrne et al., "An international comparison of long-term average
/// speech spectra", J. Acoust. Soc. Am. 96(4), 1994; from memory). A tone puts nearly all of it in one band.
/// Thresholds: at least 8 of 10 bands within 30 dB of the strongest, no band above 45 % of the energy, and
/// a spectral flatness above 0.1. Measured here: espeak-ng's announcements 10 bands, share 0.19-0.27,
/// flatness 0.26-0.41; the 880 Hz tone code 2 bands, share 0.99, flatness 3e-9.
bool speech_like(const spread& s) { return s.bands_within_30db >= 8 && s.strongest_share < 0.45 && s.flatness > 0.1; }

std::vector<fs::path> write_items(const fs::path& d, double fs, const std::vector<double>& amp, double seconds)
{
    std::vector<fs::path> wavs;
    for (std::size_t k = 0; k < amp.size(); ++k) {
        std::vector<double> x(static_cast<std::size_t>(seconds * fs) + 37 * k);
        for (std::size_t i = 0; i < x.size(); ++i) x[i] = amp[k] * std::sin(2 * k_pi * (400.0 + 100.0 * static_cast<double>(k)) * i / fs);
        wavs.push_back(d / fmt::format("item{}.wav", k));
        write_wav(wavs.back(), x, fs, wav_format::pcm24, 1.0, true);
    }
    return wavs;
}

std::string slurp(const fs::path& p)
{
    std::ifstream f(p, std::ios::binary);
    std::ostringstream s;
    s << f.rdbuf();
    return s.str();
}

} // namespace

TEST_CASE("numbers and quantities in words")
{
    // English number names, compound numbers 21-99 hyphenated (common usage; e.g. the Chicago Manual of
    // Style, from memory); SI prefixes pico .. giga (BIPM, The International System of Units, 9th ed., 2019).
    CHECK(spoken_number(3) == "three");
    CHECK(spoken_number(47) == "forty-seven");
    CHECK(spoken_number(4.7) == "four point seven");
    CHECK(spoken_number(0.3) == "zero point three");
    CHECK(spoken_number(-2) == "minus two");
    CHECK(spoken_number(1200) == "one thousand two hundred");
    CHECK(spoken_number(220000) == "two hundred twenty thousand");
    CHECK(spoken_number(115) == "one hundred fifteen");
    CHECK(spoken_quantity(47000.0, "ohm") == "forty-seven k ohm");
    CHECK(spoken_quantity(4.7e4, "ohm") == "forty-seven k ohm");
    CHECK(spoken_quantity(1e-8, "farad") == "ten nano farad");
    CHECK(spoken_quantity(1e6, "hertz") == "one mega hertz");
    CHECK(spoken_quantity(2.2e5, "ohm") == "two hundred twenty k ohm");
    CHECK(spoken_quantity(0.3, "") == "zero point three");
    CHECK(spoken_quantity(47000.0, "") == "forty-seven k");
    CHECK(spoken_quantity(1e-3, "volt") == "one milli volt");
    CHECK(spoken_quantity(999.96, "hertz") == "one k hertz");
    CHECK(spoken_quantity(std::numeric_limits<double>::infinity(), "ohm") == "none");
}

TEST_CASE("labels are made readable aloud: values with their units, key names without underscores")
{
    CHECK(speakable_label("Germanium, 47k bleeder, weak signal") == "Germanium, forty-seven k bleeder, weak signal");
    CHECK(speakable_label("Germanium, 47kΩ bleeder") == "Germanium, forty-seven k ohm bleeder");
    CHECK(speakable_label("bleeder_ohm = 47k") == "bleeder, forty-seven k ohm");
    CHECK(speakable_label("bleeder_ohm = 4.7e4") == "bleeder, forty-seven k ohm");
    CHECK(speakable_label("load.bleeder_ohm = inf") == "load bleeder, none");
    CHECK(speakable_label("10nF filter, 1MHz carrier, m = 0.3") == "ten nano farad filter, one mega hertz carrier, m, zero point three");
    CHECK(speakable_label("diode.preset = germanium-point-contact") == "diode preset, germanium point contact");
    CHECK(speakable_label("carrier_peak_v = 1m") == "carrier peak, one milli volt");
    CHECK(speakable_label("coupling k = 0.028 (near critical), tap 1/2") == "coupling k, zero point zero two eight, near critical, tap one half");
    CHECK(speakable_label("detector on 1/4 of the turns, dial 105.2 pF") == "detector on one quarter of the turns, dial one hundred five point two pico farad");
    CHECK(speakable_label("3/4 and 2/3, 47 kΩ, 5 min") == "three quarters and two over three, forty-seven k ohm, five min");
}

TEST_CASE("the spoken playlist: speech in each announcement, programme where playlist.csv says, steps above 10 dB faded in")
{
    if (!have_espeak()) {
        MESSAGE("espeak-ng not installed (Debian package espeak-ng): spoken playlist check skipped");
        return;
    }
    const fs::path d = fresh("spoken");
    const double fs = 16000.0;
    // Item levels (sine amplitudes): -20.0, -23.5 (3.5 dB step), -48.5 (25.0 dB down), -45.0 (3.5 dB up), -23 (22 dB up) dBFS RMS.
    const std::vector<double> amp{0.1414, 0.0946, 0.0053, 0.00795, 0.1001};
    const auto wavs = write_items(d, fs, amp, 1.0);
    const std::vector<std::string> names{"ge-47k", "ge-220k", "weak", "weak-sk", "strong"};
    const std::vector<std::string> labels{"Germanium, 47k bleeder, weak signal", "bleeder_ohm = 220k", "carrier_peak_v = 1m",
                                          "Schottky", "carrier_peak_v = 0.5"};
    std::vector<warning> w;
    const auto segs = write_playlist(wavs, names, labels, d / "playlist.wav", d / "playlist.csv", wav_format::pcm24, {}, &w);
    CHECK(w.empty());
    const auto table = read_playlist_table(d / "playlist.csv");
    REQUIRE(table.size() == names.size());
    double rate = 0.0;
    const auto p = read_mono(d / "playlist.wav", &rate);
    REQUIRE(rate == fs);
    CHECK(table[0].announcement == "Item one. Germanium, forty-seven k bleeder, weak signal.");
    CHECK(table[2].announcement == "Item three. Carrier peak, one milli volt. Twenty-five decibels quieter, fading in.");
    std::size_t prev_end = 0;
    for (std::size_t k = 0; k < table.size(); ++k) {
        const auto& s = table[k];
        CAPTURE(k);
        CHECK(s.spoken);
        // The announcement: from code_start to 0.5 s (after_code_s) before the audio.
        const auto a0 = static_cast<std::size_t>(std::llround(s.code_start_s * fs));
        const auto a1 = s.audio_start_sample - static_cast<std::size_t>(0.5 * fs);
        REQUIRE(a1 > a0 + 4096);
        const spread sp = measure_spread(p, a0, a1, fs);
        MESSAGE(fmt::format("item {}: flatness {:.3f}, bands within 30 dB {}, strongest band share {:.2f}", k + 1, sp.flatness,
                            sp.bands_within_30db, sp.strongest_share));
        CHECK(speech_like(sp));
        // Level: RMS of the announcement and its peak never near full scale (-6 dBFS limit).
        double ss = 0.0, pk = 0.0;
        for (std::size_t i = a0; i < a1; ++i) {
            ss += static_cast<double>(p[i]) * p[i];
            pk = std::max(pk, static_cast<double>(std::fabs(p[i])));
        }
        CHECK(pk <= std::pow(10.0, -6.0 / 20.0) + 1e-6);
        CHECK(20.0 * std::log10(std::sqrt(ss / static_cast<double>(a1 - a0))) > -50.0);
        // Silence between the previous item and this announcement, and right before the programme.
        for (std::size_t i = prev_end; i < a0; ++i) REQUIRE(p[i] == 0.0f);
        CHECK(p[s.audio_start_sample - 1] == 0.0f);
        // The programme starts at the table's sample: the input itself, past any fade (24-bit, twice written).
        double in_rate = 0.0;
        const auto x = read_mono(wavs[k], &in_rate);
        REQUIRE(s.audio_samples == x.size());
        // Independent RMS of the input, and the step to the previous one.
        double xs = 0.0;
        for (float v : x) xs += static_cast<double>(v) * v;
        const double rms_db = 10.0 * std::log10(xs / static_cast<double>(x.size()));
        CHECK(std::fabs(s.rms_dbfs - rms_db) < 0.006); // the table keeps two decimals
        const auto fade_n = static_cast<std::size_t>(std::llround(s.fade_in_s * fs));
        double worst = 0.0;
        for (std::size_t i = fade_n; i < x.size(); ++i) worst = std::max(worst, static_cast<double>(std::fabs(p[s.audio_start_sample + i] - x[i])));
        CHECK(worst < 2.5 / 8388608.0);
        if (k > 0) {
            // Level rule: no neighbour step above 10 dB without a fade.
            const bool big = std::fabs(s.step_db) > 10.0;
            CHECK((s.fade_in_s > 0.0) == big);
            if (big) {
                CHECK(s.fade_in_s == 3.0);
                // Raised-cosine fade: a quarter of the way in the gain is (1 - cos(pi/4)) / 2 = 0.1464.
                const std::size_t q = fade_n / 4;
                // Compare the envelope over one period around q (the item is a sine).
                double pe = 0.0, xe = 0.0;
                for (std::size_t i = q - 80; i < q + 80; ++i) {
                    pe += static_cast<double>(p[s.audio_start_sample + i]) * p[s.audio_start_sample + i];
                    xe += static_cast<double>(x[i]) * x[i];
                }
                CHECK(std::sqrt(pe / xe) == doctest::Approx(0.1464).epsilon(0.01));
                CHECK(s.announcement.find(s.step_db > 0 ? "louder, fading in" : "quieter, fading in") != std::string::npos);
            }
        }
        prev_end = s.audio_start_sample + s.audio_samples;
    }
    CHECK(table[2].fade_in_s == 3.0);
    CHECK(table[4].fade_in_s == 3.0);
    CHECK(table[1].fade_in_s == 0.0);
    CHECK(table[3].fade_in_s == 0.0);
    // Deterministic: the same inputs give the same bytes.
    (void)write_playlist(wavs, names, labels, d / "again.wav", d / "again.csv", wav_format::pcm24);
    CHECK(slurp(d / "again.wav") == slurp(d / "playlist.wav"));
    // The measure can fail: the tone code (880 Hz beeps) is not speech.
    playlist_options beeps;
    beeps.speak = false;
    (void)write_playlist(wavs, names, labels, d / "beeps.wav", d / "beeps.csv", wav_format::pcm24, beeps);
    const auto bt = read_playlist_table(d / "beeps.csv");
    const auto bp = read_mono(d / "beeps.wav");
    const auto b0 = static_cast<std::size_t>(std::llround(bt[4].code_start_s * fs));
    const spread bs = measure_spread(bp, b0, bt[4].audio_start_sample - static_cast<std::size_t>(0.5 * fs), fs);
    MESSAGE(fmt::format("tone code: flatness {:.2e}, bands within 30 dB {}, strongest band share {:.2f}", bs.flatness,
                        bs.bands_within_30db, bs.strongest_share));
    CHECK_FALSE(speech_like(bs));
}

TEST_CASE("no speech program: the tone code announces, with a speech-unavailable warning")
{
    const fs::path d = fresh("fallback");
    const auto wavs = write_items(d, 16000.0, {0.1, 0.1}, 0.5);
    playlist_options o;
    o.speech.program = "galena-test-no-such-speech-program";
    std::vector<warning> w;
    const auto segs = write_playlist(wavs, {"a", "b"}, {"first", "second"}, d / "p.wav", d / "p.csv", wav_format::pcm24, o, &w);
    REQUIRE(w.size() == 1);
    CHECK(w[0].code == warning_code::speech_unavailable);
    CHECK(w[0].message.find("not found on PATH") != std::string::npos);
    CHECK(w[0].message.find("tone code") != std::string::npos);
    const auto t = read_playlist_table(d / "p.csv");
    for (const auto& s : t) {
        CHECK_FALSE(s.spoken);
        CHECK(s.announcement.empty());
    }
    // No scratch files left beside the playlist.
    for (const auto& e : fs::directory_iterator(d)) CHECK(e.path().filename().string().rfind(".announce", 0) == std::string::npos);
}
