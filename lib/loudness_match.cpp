#include "galena/loudness_match.hpp"

#include "galena/audio_io.hpp"
#include "galena/error.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>

namespace galena {

namespace fs = std::filesystem;

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
