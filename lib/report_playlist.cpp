#include "galena/report_playlist.hpp"

#include "galena/audio_io.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/report_detail.hpp"
#include "galena/text_table.hpp"

#include <algorithm>
#include <cctype>
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

std::string announcement_text(int number, const std::string& label, double step_db, const playlist_options& o)
{
    std::string item = spoken_number(number);
    std::string t = fmt::format("Item {}.", item);
    const std::string said = speakable_label(label);
    if (!said.empty()) {
        std::string first = said;
        first[0] = static_cast<char>(std::toupper(static_cast<unsigned char>(first[0])));
        t += fmt::format(" {}.", first);
    }
    if (std::fabs(step_db) > o.step_limit_db) {
        std::string by = spoken_number(std::round(std::fabs(step_db)));
        by[0] = static_cast<char>(std::toupper(static_cast<unsigned char>(by[0])));
        t += fmt::format(" {} decibels {}, fading in.", by, step_db > 0 ? "louder" : "quieter");
    }
    return t;
}

std::vector<playlist_segment> write_playlist(const std::vector<fs::path>& wavs, const std::vector<std::string>& names,
                                             const std::vector<std::string>& labels, const fs::path& out_wav,
                                             const fs::path& out_csv, wav_format format, const playlist_options& o,
                                             std::vector<warning>* warnings)
{
    if (wavs.empty() || wavs.size() != names.size() || labels.size() != names.size())
        throw config_error("playlist: needs one name and label per WAV, and at least one WAV");
    // Every item first: its level decides the announcements and the fades.
    std::vector<std::vector<float>> items;
    std::vector<double> rms_db;
    double fs_hz = 0.0;
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        double rate = 0.0;
        items.push_back(read_mono(wavs[i], &rate));
        if (i == 0) {
            fs_hz = rate;
            if (!(o.beep_hz > 50.0 && o.beep_hz < 0.5 * fs_hz))
                throw config_error(fmt::format("playlist: beep_hz = {}: must be in (50, {}) Hz", o.beep_hz, 0.5 * fs_hz));
        } else if (rate != fs_hz) {
            throw audio_error(fmt::format("{}: sample rate {} Hz differs from the playlist's {} Hz", wavs[i].string(), rate, fs_hz));
        }
        double ss = 0.0;
        for (float v : items.back()) ss += static_cast<double>(v) * v;
        const double rms = std::sqrt(ss / static_cast<double>(std::max<std::size_t>(1, items.back().size())));
        rms_db.push_back(rms > 0.0 ? 20.0 * std::log10(rms) : -std::numeric_limits<double>::infinity());
    }
    // Announcements at the median item level (clamped): the volume the listener set for the items suits them.
    std::vector<double> finite;
    for (double d : rms_db)
        if (std::isfinite(d)) finite.push_back(d);
    std::sort(finite.begin(), finite.end());
    const double median = finite.empty() ? o.announce_min_dbfs : finite[finite.size() / 2];
    speech_options so = o.speech;
    so.rms_dbfs = std::clamp(median, o.announce_min_dbfs, o.announce_max_dbfs);

    std::vector<playlist_segment> segs;
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        playlist_segment s;
        s.number = static_cast<int>(i + 1);
        s.name = names[i];
        s.label = labels[i];
        s.rms_dbfs = rms_db[i];
        if (i > 0) {
            // A silent neighbour counts as the announcement level's floor, not as -inf.
            const double here = std::isfinite(rms_db[i]) ? rms_db[i] : o.announce_min_dbfs;
            const double before = std::isfinite(rms_db[i - 1]) ? rms_db[i - 1] : o.announce_min_dbfs;
            s.step_db = here - before;
        }
        if (std::fabs(s.step_db) > o.step_limit_db) s.fade_in_s = o.step_fade_s;
        segs.push_back(s);
    }
    // Spoken announcements, or the tone code for all items when speech cannot be made.
    std::vector<std::vector<double>> speech(wavs.size());
    bool spoken = o.speak;
    if (spoken) {
        const fs::path work = out_wav.has_parent_path() ? out_wav.parent_path() : fs::path(".");
        for (std::size_t i = 0; i < wavs.size() && spoken; ++i) {
            segs[i].announcement = announcement_text(segs[i].number, segs[i].label, segs[i].step_db, o);
            std::string why;
            auto y = synthesize_speech(segs[i].announcement, fs_hz, work, so, why);
            if (!y) {
                spoken = false;
                if (warnings != nullptr)
                    warnings->push_back({warning_code::speech_unavailable,
                                         fmt::format("{}: spoken announcements left out ({}); items are announced by the tone code "
                                                     "(long beep = 5, short beep = 1)",
                                                     out_wav.filename().string(), why)});
            } else {
                speech[i] = std::move(*y);
            }
        }
        if (!spoken)
            for (auto& s : segs) s.announcement.clear();
    }

    std::vector<double> out;
    auto silence = [&](double sec) { out.insert(out.end(), static_cast<std::size_t>(std::llround(sec * fs_hz)), 0.0); };
    silence(o.lead_in_s);
    for (std::size_t i = 0; i < wavs.size(); ++i) {
        playlist_segment& s = segs[i];
        const auto& x = items[i];
        s.spoken = spoken;
        s.code_start_s = static_cast<double>(out.size()) / fs_hz;
        if (spoken) {
            out.insert(out.end(), speech[i].begin(), speech[i].end());
        } else {
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
        }
        silence(o.after_code_s);
        s.audio_start_sample = out.size();
        s.audio_samples = x.size();
        s.audio_start_s = static_cast<double>(s.audio_start_sample) / fs_hz;
        s.audio_end_s = static_cast<double>(s.audio_start_sample + s.audio_samples) / fs_hz;
        const auto fade_n = static_cast<std::size_t>(std::llround(s.fade_in_s * fs_hz));
        for (std::size_t k = 0; k < x.size(); ++k) {
            const double g = k < fade_n ? 0.5 * (1.0 - std::cos(pi * static_cast<double>(k) / static_cast<double>(fade_n))) : 1.0;
            out.push_back(g * static_cast<double>(x[k]));
        }
        silence(o.after_audio_s);
    }
    write_wav(out_wav, out, fs_hz, format, 1.0, true);
    std::string csv = csv_row({"number", "name", "label", "code_start_s", "audio_start_s", "audio_end_s", "audio_start_sample",
                               "audio_samples", "sample_rate_hz", "announced_by", "announcement", "rms_dbfs", "step_db", "fade_in_s"});
    for (const auto& s : segs)
        csv += csv_row({std::to_string(s.number), s.name, s.label, fmt::format("{:.6f}", s.code_start_s),
                        fmt::format("{:.6f}", s.audio_start_s), fmt::format("{:.6f}", s.audio_end_s),
                        std::to_string(s.audio_start_sample), std::to_string(s.audio_samples), fmt::format("{}", fs_hz),
                        s.spoken ? "speech" : "tone-code", s.announcement,
                        std::isfinite(s.rms_dbfs) ? fmt::format("{:.2f}", s.rms_dbfs) : std::string("-inf"), fmt::format("{:.2f}", s.step_db),
                        fmt::format("{:.3f}", s.fade_in_s)});
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
        if (f.size() != 9 && f.size() != 14)
            throw audio_error(fmt::format("{}: record {}: {} fields: must be 14 (or 9, the tone-code table of earlier versions)",
                                          csv.string(), r + 1, f.size()));
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
            if (f.size() == 14) {
                s.spoken = f[9] == "speech";
                s.announcement = f[10];
                s.rms_dbfs = f[11] == "-inf" ? -std::numeric_limits<double>::infinity() : std::stod(f[11]);
                s.step_db = std::stod(f[12]);
                s.fade_in_s = std::stod(f[13]);
            }
        } catch (const std::exception&) {
            throw audio_error(fmt::format("{}: record {}: malformed number", csv.string(), r + 1));
        }
        segs.push_back(s);
    }
    return segs;
}

} // namespace galena
