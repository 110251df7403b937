/// Measurements on sampled audio: levels, A-weighting, spectra, tone distortion, two-tone IMD and clip
/// fidelity; spans of samples plus a sample rate in, plain structs out, with no knowledge of the circuit.
///
/// Conventions (every function):
/// - Voltages in volts; "amplitude" is the peak amplitude of a sinusoid, "rms" the root-mean-square.
/// - Ratios are plain ratios (0.01 = 1 %); percentages carry `_percent`, levels in dB carry `_db`.
/// - Spectra use the Eigen FFT module (unsupported/Eigen/FFT, kissfft back-end) with a stated window.
/// - Tone and harmonic amplitudes come from a linear least-squares fit of DC plus sinusoids at the
///   stated frequencies (the multi-harmonic extension of the IEEE Std 1057 sine fit). It is exact for
///   any window length, needs no window, and does not scallop; the FFT supplies the band-limited
///   residual (THD+N), the band-limited RMS and the A-weighted level.
/// - Band limits are applied in the frequency domain on the whole analysed span (a brick-wall band
///   [low, high] Hz; DC excluded).
/// Errors: config_error names the parameter, its value and the rule.
#pragma once

#include "galena/warning.hpp"

#include <nlohmann/json.hpp>

#include <cstddef>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// Spectral window of an amplitude spectrum.
enum class spectrum_window {
    rectangular,      ///< no window: exact for whole-cycle (coherent) records
    hann,             ///< Hann (raised cosine), coherent gain 0.5
    blackman_harris4, ///< 4-term Blackman-Harris (-92 dB side lobes; Harris, Proc. IEEE 66(1), 1978)
    flat_top,         ///< 5-term flat-top (0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368), ~0.01 dB scalloping
};

/// Window samples w[n], n = 0..size-1 (periodic form, period = size), unnormalised.
[[nodiscard]] std::vector<double> make_window(spectrum_window w, std::size_t size);

/// Single-sided amplitude spectrum.
struct amplitude_spectrum {
    double bin_hz = 0.0;                ///< frequency spacing, Hz (fs / N)
    spectrum_window window = spectrum_window::rectangular;
    std::vector<double> frequency_hz;   ///< bin k -> k fs / N, k = 0..N/2
    /// Peak amplitude, V, of a sinusoid centred on bin k (bins 1..N/2-1 scaled by 2 / sum(w);
    /// DC and Nyquist by 1 / sum(w)), so a tone on a bin reads its own amplitude.
    std::vector<double> amplitude_v;
};

/// Amplitude spectrum of `samples` (N = samples.size() >= 2) through the Eigen FFT, window applied.
/// The DC mean is not removed. Throws config_error when fs <= 0 or fewer than 2 samples are given.
[[nodiscard]] amplitude_spectrum compute_spectrum(std::span<const double> samples, double fs_hz,
                                                  spectrum_window window = spectrum_window::blackman_harris4);

/// The largest length <= n whose only prime factors are 2, 3, 5 and 7 (n itself when it has none other), for
/// n >= 1. Analysis windows are trimmed to it: FFTW transforms such a length several times faster, and plans
/// it in a few ms instead of 0.1 s or more for a length with a large prime factor (71943 = 3 x 23981 took
/// 0.10 s to plan and 6 ms to run; 71680 = 2^11 x 5 x 7 0.02 s and 0.6 ms). Within 1 % of n above 2000.
[[nodiscard]] std::size_t fft_friendly_length(std::size_t n) noexcept;

/// The start of an analysis window over samples [skip, total) moved later so that its length is
/// fft_friendly_length(total - skip), unless that would leave fewer than `min_samples` (what the analysis
/// needs): then `skip` itself. skip <= total.
[[nodiscard]] std::size_t fft_friendly_start(std::size_t total, std::size_t skip, double min_samples) noexcept;

/// RMS, V, of the part of `samples` inside [low_hz, high_hz] (DC excluded even when low_hz = 0), by
/// Parseval's theorem on the rectangular-window FFT of the whole span. For stationary signals whose span is
/// not a whole number of cycles the leakage moves a little energy across the band edges.
[[nodiscard]] double band_rms_v(std::span<const double> samples, double fs_hz, double low_hz, double high_hz);

/// The span filtered to [low_hz, high_hz] (zero-phase, brick-wall in the FFT domain; DC removed).
[[nodiscard]] std::vector<double> band_limit(std::span<const double> samples, double fs_hz, double low_hz, double high_hz);

/// IEC 61672-1:2013 A-weighting, dB, at f_hz > 0, from the analog pole formula of its Annex E (pole frequencies to the precision of its equations E.1-E.5):
///   R_A(f) = 12194^2 f^4 / ((f^2 + 20.6^2) sqrt((f^2 + 107.7^2)(f^2 + 737.9^2)) (f^2 + 12194^2)),
///   A(f) = 20 log10 R_A(f) + 2.00 dB (the offset normalises A(1 kHz) to 0 dB).
[[nodiscard]] double a_weighting_db(double f_hz);

/// Earpiece level figures of one span.
struct level_metrics {
    double dc_v = 0.0;              ///< mean, V (the detector's DC bias at the earpiece)
    double audio_rms_v = 0.0;       ///< RMS in the audio band, V
    double audio_peak_v = 0.0;      ///< largest |v| of the band-limited signal, V
    double a_weighted_rms_v = 0.0;  ///< RMS after IEC 61672-1 A-weighting (band-limited as above), V
    double a_weighted_dbv = 0.0;    ///< 20 log10(a_weighted_rms_v / 1 V), dBV(A); -inf for silence
    double band_low_hz = 0.0;       ///< audio band used, Hz
    double band_high_hz = 0.0;
};

/// Levels of the earpiece voltage (DC included) over the whole span.
/// @param earpiece_v samples, V; at least 16
/// @param fs_hz      sample rate, Hz; > 0
/// @param band_low_hz, band_high_hz audio band, Hz; 0 <= low < high <= fs/2 (common practice for AM:
///                   20 Hz to 5 kHz or 10 kHz)
/// Throws config_error on bad ranges.
[[nodiscard]] level_metrics measure_levels(std::span<const double> earpiece_v, double fs_hz, double band_low_hz = 20.0,
                                           double band_high_hz = 10000.0);

/// Distortion figures of a single tone.
struct tone_metrics {
    double f0_hz = 0.0;             ///< analysed fundamental, Hz (as given)
    double dc_v = 0.0;              ///< fitted DC, V
    double fundamental_v = 0.0;     ///< fundamental peak amplitude, V
    double fundamental_phase_rad = 0.0; ///< phase of the fundamental: v = A cos(2 pi f0 t + phase), t = k / fs
    /// harmonic_v[k] = peak amplitude of harmonic k, V, for k = 2..9 (indices 0, 1 unused, 0); harmonics at
    /// or above fs/2 or above the band are not fitted and read 0.
    std::vector<double> harmonic_v;
    /// harmonic_ratio[k] = harmonic_v[k] / fundamental_v.
    std::vector<double> harmonic_ratio;
    int harmonics_fitted = 0;       ///< highest harmonic number fitted (<= 9)
    /// THD with the fundamental as reference (THD_F): sqrt(sum_{k=2..9} V_k^2) / V_1, as a percentage.
    double thd_percent = 0.0;
    /// THD+N (AES17 style): RMS of the residual after removing the fitted DC and fundamental, in the band,
    /// over the RMS of the whole signal in the band, as a percentage.
    double thd_n_percent = 0.0;
    double sinad_db = 0.0;          ///< -20 log10(THD+N ratio), dB
    double band_low_hz = 0.0;       ///< band of THD+N, Hz
    double band_high_hz = 0.0;
};

/// Fits DC + the fundamental f0 and its harmonics 2..9 (those below min(band_high_hz, 0.49 fs)) by least
/// squares, and forms THD, THD+N and SINAD.
/// @param samples     at least 4 periods of f0 and 64 samples; the tone should be stationary over the span
/// @param fs_hz       sample rate, Hz; > 0
/// @param f0_hz       fundamental, Hz; (0, 0.45 fs)
/// @param band_low_hz, band_high_hz THD+N band, Hz; 0 <= low < f0 < high <= fs/2
/// Throws config_error on bad ranges. Not for tones whose frequency is unknown.
[[nodiscard]] tone_metrics analyze_tone(std::span<const double> samples, double fs_hz, double f0_hz,
                                        double band_low_hz = 20.0, double band_high_hz = 10000.0);

/// Two-tone intermodulation, SMPTE style: a low tone f1 and a high tone f2 (amplitude ratio 4:1 in the
/// stimulus, low:high). The published anchors are SMPTE RP120 (60 Hz + 7 kHz, 4:1) and DIN (250 Hz + 8 kHz,
/// 4:1); for AM's 5 kHz audio band this project uses 100 Hz + 4 kHz at 4:1 (a scaled pair, stated in the
/// result). IMD = sqrt(sum_{n=1..orders} (V(f2 - n f1)^2 + V(f2 + n f1)^2)) / V(f2): the root-sum-square of
/// the sidebands around f2, relative to the f2 amplitude.
struct imd_metrics {
    double f1_hz = 0.0;            ///< low tone, Hz
    double f2_hz = 0.0;            ///< high tone, Hz
    double stimulus_ratio = 4.0;   ///< amplitude ratio f1 : f2 of the stimulus (as stated by the caller)
    double f1_v = 0.0;             ///< fitted peak amplitudes, V
    double f2_v = 0.0;
    int orders = 0;                ///< sideband orders n used
    std::vector<double> sideband_v; ///< [V(f2 - f1), V(f2 + f1), V(f2 - 2 f1), V(f2 + 2 f1), ...], V
    double imd_percent = 0.0;
};

/// Fits DC, f1 and its harmonics 2..3, f2 and the sidebands f2 +- n f1 (n = 1..orders) by least squares.
/// @param samples at least 64 samples and 4 periods of f1
/// @param f1_hz, f2_hz 0 < f1 < f2, with f2 - orders f1 > 0 and f2 + orders f1 < 0.49 fs; every fitted
///        frequency (f1, 2 f1, 3 f1, f2, f2 +- n f1) must be distinct (throws config_error otherwise)
/// @param stimulus_ratio recorded in the result only
/// @param orders sideband orders n; [1, 9]
[[nodiscard]] imd_metrics analyze_two_tone(std::span<const double> samples, double fs_hz, double f1_hz, double f2_hz,
                                           double stimulus_ratio = 4.0, int orders = 3);

/// How closely a recovered signal matches its reference after the best gain and delay.
struct fidelity_metrics {
    double gain = 0.0;             ///< least-squares gain g (recovered ~ g * reference delayed), V per unit
    double delay_s = 0.0;          ///< delay of the recovered signal behind the reference, s (sub-sample)
    double residual_db = 0.0;      ///< 10 log10(sum e^2 / sum recovered^2), e = recovered - g ref(t - delay), dB
    double correlation = 0.0;      ///< Pearson correlation of recovered and the delayed reference, [-1, 1]
};

/// Finds the integer delay by FFT cross-correlation (zero-padded, linear not circular), refines it to a
/// fraction of a sample by Brent's method (Boost.Math) on the explained energy, applying each trial delay to
/// the reference as a linear phase in the FFT domain, then fits the gain by least squares over the overlap. Both spans are band-limited to [band_low_hz, band_high_hz] first
/// (DC removed), at the same rate fs_hz. The delay is searched within +-max_delay_s.
/// @param recovered, reference same length (>= 64 samples), reference not silent
/// Throws config_error on bad sizes or ranges, audio_error when the reference is silent.
[[nodiscard]] fidelity_metrics compare_to_reference(std::span<const double> recovered, std::span<const double> reference,
                                                    double fs_hz, double max_delay_s = 0.05, double band_low_hz = 20.0,
                                                    double band_high_hz = 10000.0);

/// Flat JSON objects, SI units, keys as documented on each struct (suffix gives the unit):
/// level:   dc_v, audio_rms_v, audio_peak_v, a_weighted_rms_v, a_weighted_dbv, audio_band_low_hz, audio_band_high_hz
/// tone:    tone_hz, fundamental_v, fundamental_phase_rad, h2_ratio .. h9_ratio, thd_percent,
///          thd_reference ("fundamental"), thd_n_percent, sinad_db, thd_n_band_low_hz, thd_n_band_high_hz
/// imd:     imd_f1_hz, imd_f2_hz, imd_ratio, imd_f1_v, imd_f2_v, imd_orders, imd_percent, imd_method
/// fidelity: fidelity_gain, fidelity_delay_s, fidelity_residual_db, fidelity_correlation
/// Non-finite numbers are written as null.
[[nodiscard]] nlohmann::json to_json(const level_metrics& m);
[[nodiscard]] nlohmann::json to_json(const tone_metrics& m);
[[nodiscard]] nlohmann::json to_json(const imd_metrics& m);
[[nodiscard]] nlohmann::json to_json(const fidelity_metrics& m);

/// Merges flat objects into one (later keys win) and adds the warnings as set_warnings does.
[[nodiscard]] nlohmann::json merge_metrics(const std::vector<nlohmann::json>& parts, const std::vector<warning>& warnings);

/// Writes `warnings` into a flat metrics object: `warnings` (the sentences, for people) and `warning_codes`
/// (the stable code names of warning.hpp, same order, for programs). Replaces both keys.
void set_warnings(nlohmann::json& flat, const std::vector<warning>& warnings);

/// One line per key, "key = value unit"-style, for humans; the warnings' sentences last, without their codes.
[[nodiscard]] std::string to_text(const nlohmann::json& flat);

/// Peak amplitudes, V, of sinusoids at the given frequencies (Hz; distinct, in (0, fs/2)) fitted jointly with
/// a DC term by linear least squares (normal equations; the multi-frequency extension of the IEEE Std 1057
/// sine fit). For several stations' tones and their carriers' difference whistles in one earpiece signal.
/// Throws config_error with fewer samples than 4 x the number of unknowns.
[[nodiscard]] std::vector<double> fit_amplitudes(std::span<const double> samples, double fs_hz, std::span<const double> frequencies_hz);

} // namespace galena
