/// The pack's and a render's plots: gnuplot scripts run without a shell, SVG and PNG out.
#pragma once

#include "galena/front_end.hpp"
#include "galena/sweep.hpp"
#include "galena/warning.hpp"

#include <complex>
#include <filesystem>
#include <string>
#include <vector>

namespace galena {

/// Runs gnuplot on `script` (text) with `work_dir` as its current directory (posix_spawn, not system()).
/// While it runs the cancel flag is polled; on a cancel gnuplot is sent SIGTERM and cancelled_error thrown.
/// Throws audio_error naming the script file, gnuplot's exit code or signal and the last line of its
/// stderr (kept in work_dir/STEM.log) when it fails or is missing; resource_error when it cannot be started
/// for a process, memory or file limit, or was killed by a resource signal (SIGKILL, SIGXCPU, SIGSEGV, ...).
void run_gnuplot(const std::string& script, const std::filesystem::path& work_dir, const std::string& stem);

/// The front end's RF selectivity: |v_detector / EMF| across a band, relative to its value at the centre.
struct selectivity_curve {
    double centre_hz = 0.0;            ///< the reference frequency (the tuned frequency), Hz
    std::vector<double> frequency_hz;  ///< Hz, ascending, evenly spaced
    std::vector<double> relative_db;   ///< 20 log10 |H(f) / H(centre)|, dB
};

/// The selectivity curve of a receiver network with the junction replaced by `port_admittance_s` (the
/// detector's effective RF loading, e.g. receiver_figures::detector_admittance_s), from Y(jw) of the one
/// network description (detector_gain). `points` (odd, [3, 100001]) frequencies from centre_hz - span_hz to
/// centre_hz + span_hz, so the centre is one of them. For a plain series-resonant circuit read across its
/// resistance this is the universal resonance curve -10 log10(1 + x^2), x = Q (f/f0 - f0/f).
/// Throws config_error for centre_hz <= span_hz, span_hz <= 0, or an even or out-of-range `points`.
[[nodiscard]] selectivity_curve compute_selectivity(const receiver_network& rn, std::complex<double> port_admittance_s,
                                                    double centre_hz, double span_hz, int points = 161);

/// What draw_pack_plots drew, and what it had to leave out.
struct pack_plots {
    std::vector<std::string> stems;     ///< plot names drawn (NAME.svg and NAME.png in the folder)
    /// One per part left out that the caller should show (code plots_left_out: e.g. the response and
    /// transfer curves when simulating one variant's curve failed); the library prints nothing.
    std::vector<warning> warnings;
};

/// Draws the pack's plots into `dir` as NAME.svg and NAME.png: zoom (carrier band, envelope and earpiece
/// waveform), spectrum, thd (bars), level (bars), and
/// - for a pack of bench-layout variants: response and transfer, simulated per variant with the
///   characterize module (cheaper 200 kHz carrier; the laws are frequency independent while R C >> 1/fc);
///   a failed curve simulation leaves these two out with a warning;
/// - when any variant is a whole receiver (tuner.layout other than bench): selectivity (compute_selectivity
///   of each receiver variant around its measured tuned frequency, with its measured detector loading, the
///   stations marked) and tradeoff (the wanted station's tone level against the RF bandwidth and against
///   the loudest neighbour's level relative to the wanted one: sensitivity versus selectivity).
/// Bar charts with no finite value (e.g. THD of clips measured without a tone) are left out.
pack_plots draw_pack_plots(const sweep_result& sweep, const std::filesystem::path& dir, bool curves = true);

/// Draws zoom and spectrum plots for a single render (the `render` command).
std::vector<std::string> draw_render_plots(const scenario& s, const job_outcome& job, const std::filesystem::path& dir);

} // namespace galena
