/// Reports of a comparison: the announced playlist and its segment table, a loudness-matched set,
/// gnuplot plots (SVG and PNG) and a self-contained offline HTML page.
#pragma once

#include "galena/sweep.hpp"

#include <filesystem>
#include <functional>
#include <string>
#include <vector>

namespace galena {

/// Announcement tone code: variant number k is played as floor(k / 5) long beeps then k mod 5 short
/// beeps (so 7 = one long, two short), all at one pitch, then a pause before the variant's audio.
struct playlist_options {
    double beep_hz = 880.0;         ///< Hz; (50, fs/2)
    double short_s = 0.08;          ///< short beep length, s
    double long_s = 0.30;           ///< long beep length, s
    double beep_gap_s = 0.12;       ///< silence between beeps, s
    double beep_peak = 0.1;         ///< beep peak, fraction of digital full scale (-20 dBFS): never startling
    double beep_fade_s = 0.005;     ///< raised-cosine edges of each beep, s
    double lead_in_s = 0.5;         ///< silence at the very start, s
    double after_code_s = 0.5;      ///< silence between the code and the audio, s
    double after_audio_s = 1.0;     ///< silence after each variant, s
};

/// Beep lengths of the code for variant number k >= 1, s.
[[nodiscard]] std::vector<double> tone_code(int k, const playlist_options& o = {});

/// Where one variant lies in the playlist, s from the start of the playlist file.
struct playlist_segment {
    int number = 0;                 ///< 1-based variant number (the tone code)
    std::string name;
    std::string label;
    double code_start_s = 0.0;      ///< first beep starts
    double audio_start_s = 0.0;     ///< first sample of the variant's WAV
    double audio_end_s = 0.0;       ///< one past its last sample
    std::size_t audio_start_sample = 0;
    std::size_t audio_samples = 0;
};

/// Builds the playlist from WAV files (all at one sample rate; their digital samples copied unchanged, so
/// their relative levels stay as they are) and writes it atomically as `out_wav` (format of the inputs'
/// choice: `format`), plus the segment table as CSV `out_csv`. Segment starts are whole samples.
/// Throws audio_error for unreadable inputs or mismatched rates.
std::vector<playlist_segment> write_playlist(const std::vector<std::filesystem::path>& wavs, const std::vector<std::string>& names,
                                             const std::vector<std::string>& labels, const std::filesystem::path& out_wav,
                                             const std::filesystem::path& out_csv, wav_format format,
                                             const playlist_options& o = {});

/// Reads a segment table written by write_playlist. Throws audio_error on a malformed file.
[[nodiscard]] std::vector<playlist_segment> read_playlist_table(const std::filesystem::path& csv);

/// One entry of the loudness-matched set.
struct matched_gain {
    std::string name;
    std::filesystem::path wav;      ///< the matched copy
    double rms_dbfs = 0.0;          ///< RMS of the level-consistent file, dBFS (sine peak 0 dBFS = -3.01 dBFS)
    double gain_db = 0.0;           ///< gain applied
    bool peak_limited = false;      ///< the gain was reduced to keep the peak at -1 dBFS
};

/// Writes copies of `wavs` into `dir` scaled to a common RMS of target_rms_dbfs (peaks held at -1 dBFS,
/// silent files left at 0 dB), and `dir/gains.csv`. Throws audio_error.
std::vector<matched_gain> write_loudness_matched(const std::vector<std::filesystem::path>& wavs,
                                                 const std::vector<std::string>& names, const std::filesystem::path& dir,
                                                 wav_format format, double target_rms_dbfs = -26.0);

/// Text escaped for HTML element content and attribute values (& < > ").
[[nodiscard]] std::string html_escape(const std::string& s);

/// Runs gnuplot on `script` (text) with `work_dir` as its current directory (posix_spawn, not system()).
/// While it runs the cancel flag is polled; on a cancel gnuplot is sent SIGTERM and cancelled_error thrown.
/// Throws audio_error naming the script file, gnuplot's exit code or signal and the last line of its
/// stderr (kept in work_dir/STEM.log) when it fails or is missing; resource_error when it cannot be started
/// for a process, memory or file limit, or was killed by a resource signal (SIGKILL, SIGXCPU, SIGSEGV, ...).
void run_gnuplot(const std::string& script, const std::filesystem::path& work_dir, const std::string& stem);

/// Draws the pack's plots into `dir` as NAME.svg and NAME.png: zoom (carrier band, envelope and earpiece
/// waveform), spectrum, response, transfer, thd (bars), level (bars). Response and transfer curves are
/// simulated per variant with the characterize module (cheaper 200 kHz carrier; the laws are frequency
/// independent while R C >> 1/fc). Bar charts with no finite value (e.g. THD of clips measured without a
/// tone) are left out. Returns the stems drawn.
std::vector<std::string> draw_pack_plots(const sweep_result& sweep, const std::filesystem::path& dir, bool curves = true);

/// Draws zoom and spectrum plots for a single render (the `render` command).
std::vector<std::string> draw_render_plots(const scenario& s, const job_outcome& job, const std::filesystem::path& dir);

/// Everything a pack page shows.
struct pack_page {
    std::string title;
    std::filesystem::path dir;                  ///< the pack directory; links are relative to it
    const sweep_result* sweep = nullptr;
    std::vector<playlist_segment> playlist;
    std::filesystem::path playlist_wav;
    std::vector<matched_gain> matched;
    std::vector<std::string> plot_stems;        ///< SVGs in dir/plots, inlined
    std::string note;                           ///< free text under the title
    std::string extra_html;                     ///< HTML placed under the note (e.g. a ranking); trusted
};

/// The page as HTML: inline SVG plots, <audio> players with relative links, the metrics, gains and
/// playlist tables; no external resources.
[[nodiscard]] std::string render_page(const pack_page& p);

/// Options of a whole pack.
struct pack_options {
    sweep_options sweep;
    bool loudness_matched = true;
    bool curves = true;                         ///< simulate response and transfer curves
    std::string title = "galena comparison";
    std::string note;
    std::vector<std::filesystem::path> protect; ///< more files never to be replaced (the pack file)
    /// Optional: called after the variants are rendered with the sweep and the staging folder, before the
    /// page is written; what it writes there is published with the pack, the HTML it returns goes on the
    /// page under the note. `extra_outputs` (relative names) are checked for clashes before rendering.
    std::function<std::string(sweep_result&, const std::filesystem::path& staged_dir)> extras;
    std::vector<std::string> extra_outputs;
};

/// Everything a pack wrote.
struct pack_outcome {
    sweep_result sweep;
    std::filesystem::path page;                 ///< OUT/index.html
    std::filesystem::path playlist_wav;
    std::filesystem::path playlist_csv;
    std::vector<playlist_segment> playlist;
    std::vector<matched_gain> matched;
};

/// The comparison pack: the sweep, the playlist, the matched set, the plots and the page, in `out_dir`,
/// staged and published as one unit (no partial pack on a failure or Ctrl-C). Limits and refusals as
/// run_sweep. Throws config_error, audio_error, integration_error, cancelled_error.
pack_outcome make_pack(const std::filesystem::path& base_file, const std::vector<std::string>& base_overrides,
                       const std::vector<variant_spec>& variants, const std::filesystem::path& out_dir, const pack_options& opt);

} // namespace galena
