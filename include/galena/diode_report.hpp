/// Measured diodes at the report layer: the outputs of a diode fit (diode.toml, fit.json, the plot of the
/// points against the fitted curve) and the ranking of several fitted diodes in one scenario, with the
/// fit's uncertainty carried through to the detected level.
#pragma once

#include "galena/diode_fit.hpp"
#include "galena/report.hpp"

#include <filesystem>
#include <optional>
#include <string>
#include <vector>

namespace galena {

/// Options of a fit job.
struct fit_diode_options {
    std::optional<double> temperature_c; ///< measurement temperature, deg C (command line); else the file's, else 25
    bool overwrite = false;              ///< replace existing output files
    diode_fit_options fit;
};

/// What a fit job wrote.
struct fit_diode_outcome {
    diode_fit_result fit;
    std::filesystem::path diode_toml;  ///< OUT/diode.toml
    std::filesystem::path fit_json;    ///< OUT/fit.json
    std::filesystem::path plot_svg;    ///< OUT/fit.svg (empty when gnuplot failed; see warnings)
    std::vector<std::string> warnings;
};

/// Default measurement temperature when neither the command line nor the file gives one, deg C (the
/// diode model's default temperature).
inline constexpr double default_measurement_temperature_c = 25.0;

/// Reads `points_csv`, fits it (fit_diode) and writes OUT/diode.toml, OUT/fit.json, OUT/fit-points.dat,
/// OUT/fit-curve.dat and the plot OUT/fit.svg + fit.png (log |I| against V with the fitted curve, residuals
/// below), staged and published as one unit. A gnuplot failure costs the plot (a warning), not the fit.
/// The points file is never replaced. Throws config_error (bad file, fit failure), audio_error (output).
fit_diode_outcome run_fit_diode(const std::filesystem::path& points_csv, const std::filesystem::path& out_dir,
                                const fit_diode_options& opt);

/// Draws fit.svg and fit.png into `dir` from the fit (writes the two .dat files first). Throws audio_error
/// when gnuplot fails.
void draw_fit_plot(const diode_fit_result& r, const std::filesystem::path& dir);

/// A few lines for people: the parameters with their intervals, the derived figures, the flags.
[[nodiscard]] std::string fit_summary_text(const diode_fit_result& r);

/// Options of a ranking.
struct rank_options {
    pack_options pack;                 ///< the pack of the nominal renders (threads, overwrite, tone measurement, ...)
    /// Two diodes are called indistinguishable when their level difference is below this many standard
    /// deviations of the difference (2: about 95 % two-sided for a normal difference).
    double distinguishable_sigmas = 2.0;
};

/// One diode's place in the ranking.
struct ranked_diode {
    std::string letter;                ///< A, B, C ... in the order the diodes were given
    std::string name;                  ///< the variant name (letter and folder name)
    std::filesystem::path diode_file;
    std::string level_key;             ///< the metric ranked: fundamental_v (a tone) or audio_rms_v (a clip)
    double level_dbv = 0.0;            ///< 20 log10(level / 1 V)
    double level_sigma_db = 0.0;       ///< standard deviation from the fit's covariance; NaN when unknown
    double thd_percent = 0.0;          ///< NaN when the programme gives none
    double thd_sigma_percent = 0.0;    ///< NaN when unknown
    int sigma_renders = 0;             ///< renders at +-1 sigma along the covariance's principal axes
    std::vector<std::string> left_out; ///< parameters not identifiable in the fit: not in the uncertainty
    std::string note;                  ///< why the uncertainty is unknown or partial
};

/// A ranking and the pack it wrote.
struct rank_outcome {
    std::vector<ranked_diode> ranking; ///< loudest first
    std::vector<std::string> verdicts; ///< one sentence per neighbouring pair, loudest first
    std::string advice;                ///< the one-line answer ("solder B: ...")
    pack_outcome pack;
    std::filesystem::path csv;         ///< OUT/ranking.csv
    std::filesystem::path markdown;    ///< OUT/ranking.md
};

/// Renders the scenario once per diode file (`diode.file` set to it; the diodes are lettered A, B, ... in
/// the order given) as a comparison pack (make_pack: WAVs, playlist, plots, page), ranks them by the
/// detected level (the tone's fundamental_v; audio_rms_v for a clip measured without a tone) and the
/// distortion, and propagates each fit's uncertainty to the level: with fit.json beside the diode file,
/// the covariance of the fitted log-parameters is split along its principal axes and the measurement
/// scenario is rendered at +-1 sigma along each (2 renders per fitted parameter);
/// sigma_L^2 = sum_k ((L+_k - L-_k) / 2)^2 (first-order propagation). Neighbours whose level difference
/// is below opt.distinguishable_sigmas standard deviations of the difference are called
/// indistinguishable. Writes OUT/ranking.csv and OUT/ranking.md into the pack and the ranking onto its page.
/// Throws config_error (fewer than 2 diodes, bad files), audio_error, integration_error, cancelled_error.
rank_outcome rank_diodes(const std::filesystem::path& scenario_file, const std::vector<std::string>& base_overrides,
                         const std::vector<std::filesystem::path>& diode_files, const std::filesystem::path& out_dir,
                         const rank_options& opt);

/// The ranking as a Markdown table plus the verdicts.
[[nodiscard]] std::string ranking_markdown(const rank_outcome& r);
/// The ranking as CSV (header row; empty cell for unknown).
[[nodiscard]] std::string ranking_csv(const rank_outcome& r);

} // namespace galena
