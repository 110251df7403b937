#include "galena/report_playlist.hpp"

#include "galena/audio_io.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/report_detail.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <string>

namespace galena {

namespace fs = std::filesystem;

std::vector<double> tone_code(int k, const playlist_options& o)
{
    if (k < 1) throw config_error(fmt::format("tone code: variant number {}: must be >= 1", k));
    std::vector<double> beeps(static_cast<std::size_t>(k / 5), o.long_s);
    beeps.insert(beeps.end(), static_cast<std::size_t>(k % 5), o.short_s);
    return beeps;
}

std::vector<playlist_segment> write_playlist(const std::vector<fs::path>& wavs, const std::vector<std::string>& names,
                                             const std::vector<std::string>& labels, const fs::path& out_wav,
                                             const fs::path& out_csv, wav_format format, const playlist_options& o)
{
    if (wavs.empty() || wavs.size() != names.size() || labels.size() != names.size())
        throw config_error("playlist: needs one name and label per WAV, and at least one WAV");
    std::vector<double> out;
    std::vector<playlist_segment> segs;
    double fs_hz = 0.0;
    auto silence = [&](double s) { out.insert(out.end(), static_cast<std::size_t>(std::llround(s * fs_hz)), 0.0); };
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        double rate = 0.0;
        const std::vector<float> x = read_mono(wavs[i], &rate);
        if (i == 0) {
            fs_hz = rate;
            if (!(o.beep_hz > 50.0 && o.beep_hz < 0.5 * fs_hz))
                throw config_error(fmt::format("playlist: beep_hz = {}: must be in (50, {}) Hz", o.beep_hz, 0.5 * fs_hz));
            silence(o.lead_in_s);
        } else if (rate != fs_hz) {
            throw audio_error(fmt::format("{}: sample rate {} Hz differs from the playlist's {} Hz", wavs[i].string(), rate, fs_hz));
        }
        playlist_segment s;
        s.number = static_cast<int>(i + 1);
        s.name = names[i];
        s.label = labels[i];
        s.code_start_s = static_cast<double>(out.size()) / fs_hz;
        const auto beeps = tone_code(s.number, o);
        for (std::size_t b = 0; b < beeps.size(); ++b) {
            const auto n = static_cast<std::size_t>(std::llround(beeps[b] * fs_hz));
            for (std::size_t k = 0; k < n; ++k) {
                const double t = static_cast<double>(k) / fs_hz;
                const double edge = std::min(t, static_cast<double>(n - 1 - k) / fs_hz);
                const double g = edge >= o.beep_fade_s ? 1.0 : 0.5 * (1.0 - std::cos(pi * edge / o.beep_fade_s));
                out.push_back(o.beep_peak * g * std::sin(2.0 * pi * o.beep_hz * t));
            }
            if (b + 1 < beeps.size()) silence(o.beep_gap_s);
        }
        silence(o.after_code_s);
        s.audio_start_sample = out.size();
        s.audio_samples = x.size();
        s.audio_start_s = static_cast<double>(s.audio_start_sample) / fs_hz;
        s.audio_end_s = static_cast<double>(s.audio_start_sample + s.audio_samples) / fs_hz;
        out.insert(out.end(), x.begin(), x.end());
        silence(o.after_audio_s);
        segs.push_back(s);
    }
    write_wav(out_wav, out, fs_hz, format, 1.0, true);
    std::string csv = csv_row({"number", "name", "label", "code_start_s", "audio_start_s", "audio_end_s", "audio_start_sample",
                               "audio_samples", "sample_rate_hz"});
    for (const auto& s : segs)
        csv += csv_row({std::to_string(s.number), s.name, s.label, fmt::format("{:.6f}", s.code_start_s),
                        fmt::format("{:.6f}", s.audio_start_s), fmt::format("{:.6f}", s.audio_end_s),
                        std::to_string(s.audio_start_sample), std::to_string(s.audio_samples), fmt::format("{}", fs_hz)});
    write_text_atomic(out_csv, csv);
    return segs;
}

std::vector<playlist_segment> read_playlist_table(const fs::path& csv)
{
    const auto rows = parse_csv(detail::read_report_text(csv), csv);
    std::vector<playlist_segment> segs;
    for (std::size_t r = 1; r < rows.size(); ++r) {
        const auto& f = rows[r];
        if (f.size() == 1 && f[0].empty()) continue;
        if (f.size() != 9) throw audio_error(fmt::format("{}: record {}: {} fields: must be 9", csv.string(), r + 1, f.size()));
        playlist_segment s;
        try {
            s.number = std::stoi(f[0]);
            s.name = f[1];
            s.label = f[2];
            s.code_start_s = std::stod(f[3]);
            s.audio_start_s = std::stod(f[4]);
            s.audio_end_s = std::stod(f[5]);
            s.audio_start_sample = static_cast<std::size_t>(std::stoull(f[6]));
            s.audio_samples = static_cast<std::size_t>(std::stoull(f[7]));
        } catch (const std::exception&) {
            throw audio_error(fmt::format("{}: record {}: malformed number", csv.string(), r + 1));
        }
        segs.push_back(s);
    }
    return segs;
}

std::vector<matched_gain> write_loudness_matched(const std::vector<fs::path>& wavs, const std::vector<std::string>& names,
                                                 const fs::path& dir, wav_format format, double target_rms_dbfs)
{
    std::error_code ec;
    fs::create_directories(dir, ec);
    if (ec) throw audio_error(fmt::format("{}: cannot create: {}", dir.string(), ec.message()));
    std::vector<matched_gain> out;
    std::string csv = csv_row({"variant", "file", "rms_dbfs", "gain_db", "peak_limited"});
    const double peak_limit = std::pow(10.0, -1.0 / 20.0);
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        double rate = 0.0;
        const std::vector<float> x = read_mono(wavs[i], &rate);
        double ss = 0.0, peak = 0.0;
        for (float v : x) {
            ss += static_cast<double>(v) * v;
            peak = std::max(peak, std::fabs(static_cast<double>(v)));
        }
        const double rms = std::sqrt(ss / static_cast<double>(std::max<std::size_t>(1, x.size())));
        matched_gain g;
        g.name = names[i];
        g.wav = dir / (names[i] + ".wav");
        g.rms_dbfs = rms > 0.0 ? 20.0 * std::log10(rms) : -std::numeric_limits<double>::infinity();
        double gain = 1.0;
        if (rms > 1e-7) {
            gain = std::pow(10.0, (target_rms_dbfs - g.rms_dbfs) / 20.0);
            if (peak * gain > peak_limit) {
                gain = peak_limit / peak;
                g.peak_limited = true;
            }
        }
        g.gain_db = 20.0 * std::log10(gain);
        std::vector<double> y(x.begin(), x.end());
        for (double& v : y) v *= gain;
        write_wav(g.wav, y, rate, format, 1.0, true);
        csv += csv_row({g.name, g.wav.filename().string(), fmt::format("{:.2f}", g.rms_dbfs), fmt::format("{:.2f}", g.gain_db),
                        g.peak_limited ? "yes" : "no"});
        out.push_back(g);
    }
    write_text_atomic(dir / "gains.csv", csv);
    return out;
}

} // namespace galena
