#include "galena/metrics.hpp"
#include "galena/filter_by_response.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"

#include <Eigen/Dense>
#include <boost/math/tools/minima.hpp>
// FFTW behind Eigen's FFT interface: O(N log N) at every length (kissfft's generic butterfly is O(N p) for a
// large prime factor p of N, and analysis windows have arbitrary lengths). FFTW_ESTIMATE plans are
// deterministic.
#define EIGEN_FFTW_DEFAULT
#include <unsupported/Eigen/FFT>

#include <algorithm>
#include <cstdlib>
#include <cmath>
#include <mutex>
#include <set>
#include <memory>
#include <complex>
#include <functional>
#include <fmt/format.h>
#include <limits>

namespace galena {

namespace {

using cvec = std::vector<std::complex<double>>;

void require(bool ok, const std::string& what)
{
    if (!ok) throw config_error(what);
}

void check_rate(double fs, const char* fn)
{
    require(std::isfinite(fs) && fs > 0.0, fmt::format("{}: sample rate fs_hz = {}: must be finite and > 0", fn, fs));
}

void check_band(double lo, double hi, double fs, const char* fn)
{
    require(lo >= 0.0 && hi > lo && hi <= 0.5 * fs + 1e-9,
            fmt::format("{}: band [{}, {}] Hz: need 0 <= low < high <= fs/2 = {} Hz", fn, lo, hi, 0.5 * fs));
}

/// FFTW's planner is not thread-safe and sweeps measure on several threads: every transform runs under this
/// lock.
std::mutex& fft_mutex()
{
    static std::mutex m;
    return m;
}

/// The transform objects, kept (with the lock held) so that FFTW's plans are made once per length and
/// direction, not on every call: a render's measurements transform the same lengths several times, and the
/// workbench renders the same length over and over. Planning a length costs about as much as transforming
/// it. Renewed after 8 distinct lengths, so a long-running server holds a bounded set.
Eigen::FFT<double>& kept_fft(bool half_spectrum, std::size_t n)
{
    constexpr std::size_t max_kept_lengths = 8;
    struct kept {
        std::unique_ptr<Eigen::FFT<double>> fft;
        std::set<std::size_t> lengths;
    };
    static kept full, half;
    kept& k = half_spectrum ? half : full;
    if (!k.fft || (k.lengths.count(n) == 0 && k.lengths.size() >= max_kept_lengths)) {
        k.fft = std::make_unique<Eigen::FFT<double>>();
        if (half_spectrum) k.fft->SetFlag(Eigen::FFT<double>::HalfSpectrum);
        k.lengths.clear();
    }
    k.lengths.insert(n);
    return *k.fft;
}

/// FFTW aborts the process ("assertion failed: p") when its own allocation fails, so the memory a
/// transform of n points needs (FFTW's buffers, twiddles and plan: well under 4 complex arrays of n) is
/// tried first: throws resource_error naming the transform when it is not there.
void reserve_fft_memory(std::size_t n)
{
    const std::size_t bytes = 4 * n * sizeof(std::complex<double>) + (1u << 20);
    void* p = std::malloc(bytes);
    if (p == nullptr)
        throw resource_error(fmt::format("out of memory: an FFT of {} points needs about {} MB that cannot be allocated "
                                         "(free memory, raise the memory limit, or render a shorter programme)",
                                         n, bytes >> 20));
    std::free(p);
}

cvec forward_fft(std::span<const double> x, std::size_t padded = 0)
{
    const std::size_t n = std::max(padded, x.size());
    reserve_fft_memory(n);
    cvec in(n, {0.0, 0.0});
    for (std::size_t i = 0; i < x.size(); ++i) in[i] = x[i];
    cvec out;
    const std::lock_guard lock(fft_mutex());
    kept_fft(false, n).fwd(out, in);
    return out;
}

cvec inverse_fft(const cvec& x)
{
    reserve_fft_memory(x.size());
    cvec out;
    const std::lock_guard lock(fft_mutex());
    kept_fft(false, x.size()).inv(out, x); // scaled by 1/N by default
    return out;
}

/// Real-input FFT: bins 0 .. n/2 of the n-point transform of x (the rest are their conjugates). Half the
/// memory of forward_fft on a real signal.
cvec forward_rfft(std::span<const double> x)
{
    reserve_fft_memory(x.size());
    const std::vector<double> in(x.begin(), x.end());
    cvec out;
    const std::lock_guard lock(fft_mutex());
    kept_fft(true, in.size()).fwd(out, in);
    return out;
}

/// Inverse of forward_rfft: the real n-point signal whose bins 0 .. n/2 are `half`.
std::vector<double> inverse_rfft(const cvec& half, std::size_t n)
{
    reserve_fft_memory(n);
    std::vector<double> out;
    const std::lock_guard lock(fft_mutex());
    kept_fft(true, n).inv(out, half, static_cast<Eigen::Index>(n)); // scaled by 1/N by default
    return out;
}

/// |frequency| of FFT bin k of an n-point transform, Hz.
double bin_frequency(std::size_t k, std::size_t n, double fs)
{
    const std::size_t kk = std::min(k, n - k);
    return static_cast<double>(kk) * fs / static_cast<double>(n);
}

bool in_band(double f, double lo, double hi) { return f > 0.0 && f >= lo && f <= hi; }

/// Least-squares fit of c0 + sum_j (a_j cos(2 pi f_j t) + b_j sin(2 pi f_j t)) with t = k / fs.
/// Returns [c0, a_1, b_1, a_2, b_2, ...].
Eigen::VectorXd fit_sinusoids(std::span<const double> y, double fs, const std::vector<double>& freqs)
{
    const auto n = static_cast<Eigen::Index>(y.size());
    const auto cols = static_cast<Eigen::Index>(1 + 2 * freqs.size());
    Eigen::MatrixXd a(n, cols);
    Eigen::VectorXd b(n);
    for (Eigen::Index i = 0; i < n; ++i) {
        a(i, 0) = 1.0;
        for (std::size_t j = 0; j < freqs.size(); ++j) {
            // Reduce the phase in cycles before scaling so long spans keep full precision.
            const double cyc = freqs[j] * static_cast<double>(i) / fs;
            const double ph = two_pi * (cyc - std::floor(cyc));
            a(i, static_cast<Eigen::Index>(1 + 2 * j)) = std::cos(ph);
            a(i, static_cast<Eigen::Index>(2 + 2 * j)) = std::sin(ph);
        }
        b(i) = y[static_cast<std::size_t>(i)];
    }
    return a.colPivHouseholderQr().solve(b);
}

double fitted_value(const Eigen::VectorXd& c, const std::vector<double>& freqs, std::size_t upto, double fs, std::size_t i)
{
    double v = c(0);
    for (std::size_t j = 0; j < upto; ++j) {
        const double cyc = freqs[j] * static_cast<double>(i) / fs;
        const double ph = two_pi * (cyc - std::floor(cyc));
        v += c(static_cast<Eigen::Index>(1 + 2 * j)) * std::cos(ph) + c(static_cast<Eigen::Index>(2 + 2 * j)) * std::sin(ph);
    }
    return v;
}

double amp(const Eigen::VectorXd& c, std::size_t j)
{
    return std::hypot(c(static_cast<Eigen::Index>(1 + 2 * j)), c(static_cast<Eigen::Index>(2 + 2 * j)));
}

nlohmann::json num(double x) { return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr); }

} // namespace

std::vector<double> make_window(spectrum_window w, std::size_t size)
{
    std::vector<double> out(size, 1.0);
    const double n = static_cast<double>(size);
    auto cosine_sum = [&](std::initializer_list<double> a) {
        for (std::size_t i = 0; i < size; ++i) {
            const double x = two_pi * static_cast<double>(i) / n;
            double v = 0.0, sign = 1.0;
            int k = 0;
            for (double ak : a) {
                v += sign * ak * std::cos(k * x);
                sign = -sign;
                ++k;
            }
            out[i] = v;
        }
    };
    switch (w) {
    case spectrum_window::rectangular: break;
    case spectrum_window::hann: cosine_sum({0.5, 0.5}); break;
    // Harris, "On the use of windows for harmonic analysis with the DFT", Proc. IEEE 66(1), 1978, table I.
    case spectrum_window::blackman_harris4: cosine_sum({0.35875, 0.48829, 0.14128, 0.01168}); break;
    // The widely used 5-term flat-top (the same coefficients as scipy.signal.windows.flattop; common practice).
    case spectrum_window::flat_top: cosine_sum({0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368}); break;
    }
    return out;
}

std::vector<double> detail::filter_by_response(std::span<const double> x, double fs, const std::function<std::complex<double>(double)>& h)
{
    check_rate(fs, "filter_by_response");
    std::vector<double> out(x.size(), 0.0);
    if (x.empty()) return out;
    std::size_t m = 2;
    while (m < 2 * x.size()) m <<= 1;
    cvec spec = forward_fft(x, m);
    for (std::size_t k = 0; k <= m / 2; ++k) {
        const std::complex<double> g = h(static_cast<double>(k) * fs / static_cast<double>(m));
        spec[k] *= (k == m / 2) ? std::complex<double>(g.real(), 0.0) : g;
        if (k > 0 && k < m / 2) spec[m - k] *= std::conj(g);
    }
    const cvec y = inverse_fft(spec);
    for (std::size_t i = 0; i < x.size(); ++i) out[i] = y[i].real();
    return out;
}

amplitude_spectrum compute_spectrum(std::span<const double> samples, double fs, spectrum_window window)
{
    check_rate(fs, "compute_spectrum");
    require(samples.size() >= 2, fmt::format("compute_spectrum: {} samples: need at least 2", samples.size()));
    const std::size_t n = samples.size();
    const auto w = make_window(window, n);
    std::vector<double> xw(n);
    double sum_w = 0.0;
    for (std::size_t i = 0; i < n; ++i) {
        xw[i] = samples[i] * w[i];
        sum_w += w[i];
    }
    const cvec x = forward_fft(xw);
    amplitude_spectrum s;
    s.window = window;
    s.bin_hz = fs / static_cast<double>(n);
    const std::size_t half = n / 2;
    s.frequency_hz.resize(half + 1);
    s.amplitude_v.resize(half + 1);
    for (std::size_t k = 0; k <= half; ++k) {
        s.frequency_hz[k] = static_cast<double>(k) * s.bin_hz;
        const bool edge = k == 0 || (n % 2 == 0 && k == half);
        s.amplitude_v[k] = (edge ? 1.0 : 2.0) * std::abs(x[k]) / sum_w;
    }
    return s;
}

std::size_t fft_friendly_start(std::size_t total, std::size_t skip, double min_samples) noexcept
{
    if (skip >= total) return skip;
    const std::size_t trimmed = fft_friendly_length(total - skip);
    return static_cast<double>(trimmed) >= min_samples ? total - trimmed : skip;
}

std::size_t fft_friendly_length(std::size_t n) noexcept
{
    auto smooth = [](std::size_t m) {
        for (const std::size_t p : {2u, 3u, 5u, 7u})
            while (m % p == 0) m /= p;
        return m == 1;
    };
    while (n > 1 && !smooth(n)) --n;
    return n;
}

double band_rms_v(std::span<const double> samples, double fs, double lo, double hi)
{
    check_rate(fs, "band_rms_v");
    check_band(lo, hi, fs, "band_rms_v");
    require(samples.size() >= 2, "band_rms_v: need at least 2 samples");
    const cvec x = forward_fft(samples);
    const std::size_t n = x.size();
    double e = 0.0;
    for (std::size_t k = 1; k < n; ++k)
        if (in_band(bin_frequency(k, n, fs), lo, hi)) e += std::norm(x[k]);
    // Parseval: sum |x_i|^2 = (1/N) sum |X_k|^2, so mean square = sum |X_k|^2 / N^2.
    return std::sqrt(e) / static_cast<double>(n);
}

std::vector<double> band_limit(std::span<const double> samples, double fs, double lo, double hi)
{
    check_rate(fs, "band_limit");
    check_band(lo, hi, fs, "band_limit");
    require(samples.size() >= 2, "band_limit: need at least 2 samples");
    cvec x = forward_fft(samples);
    const std::size_t n = x.size();
    for (std::size_t k = 0; k < n; ++k)
        if (!in_band(bin_frequency(k, n, fs), lo, hi)) x[k] = 0.0;
    const cvec y = inverse_fft(x);
    std::vector<double> out(n);
    for (std::size_t i = 0; i < n; ++i) out[i] = y[i].real();
    return out;
}

double a_weighting_db(double f)
{
    require(f > 0.0 && std::isfinite(f), fmt::format("a_weighting_db: f_hz = {}: must be finite and > 0", f));
    // IEC 61672-1:2013, Annex E (E.6): pole frequencies 20.6, 107.7, 737.9 and 12194 Hz; A_1000 = -2.000 dB.
    const double f2 = f * f;
    const double p1 = 20.598997 * 20.598997, p2 = 107.65265 * 107.65265, p3 = 737.86223 * 737.86223,
                 p4 = 12194.217 * 12194.217;
    const double ra = p4 * f2 * f2 / ((f2 + p1) * std::sqrt((f2 + p2) * (f2 + p3)) * (f2 + p4));
    return 20.0 * std::log10(ra) + 2.0;
}

level_metrics measure_levels(std::span<const double> v, double fs, double lo, double hi)
{
    check_rate(fs, "measure_levels");
    check_band(lo, hi, fs, "measure_levels");
    require(v.size() >= 16, fmt::format("measure_levels: {} samples: need at least 16", v.size()));
    level_metrics m;
    m.band_low_hz = lo;
    m.band_high_hz = hi;
    double s = 0.0;
    for (double x : v) s += x;
    m.dc_v = s / static_cast<double>(v.size());
    // Real-input transform (half the memory of a complex one: long analysis windows stay bounded): bins
    // 1 .. n/2 - 1 stand for themselves and their conjugate twins, so their energy counts twice; bin 0 and,
    // for even n, bin n/2 count once.
    const std::size_t n = v.size();
    cvec x = forward_rfft(v);
    double e = 0.0, ea = 0.0;
    for (std::size_t k = 0; k < x.size(); ++k) {
        const double f = bin_frequency(k, n, fs);
        if (!in_band(f, lo, hi)) {
            x[k] = 0.0;
            continue;
        }
        const double twins = (k == 0 || 2 * k == n) ? 1.0 : 2.0;
        e += twins * std::norm(x[k]);
        ea += twins * std::norm(x[k]) * std::pow(10.0, a_weighting_db(f) / 10.0);
    }
    m.audio_rms_v = std::sqrt(e) / static_cast<double>(n);
    m.a_weighted_rms_v = std::sqrt(ea) / static_cast<double>(n);
    m.a_weighted_dbv = m.a_weighted_rms_v > 0.0 ? 20.0 * std::log10(m.a_weighted_rms_v) : -std::numeric_limits<double>::infinity();
    const std::vector<double> y = inverse_rfft(x, n);
    for (double c : y) m.audio_peak_v = std::max(m.audio_peak_v, std::fabs(c));
    return m;
}

tone_metrics analyze_tone(std::span<const double> y, double fs, double f0, double lo, double hi)
{
    check_rate(fs, "analyze_tone");
    check_band(lo, hi, fs, "analyze_tone");
    require(f0 > 0.0 && f0 < 0.45 * fs, fmt::format("analyze_tone: f0_hz = {}: must be in (0, 0.45 fs = {})", f0, 0.45 * fs));
    require(f0 > lo && f0 < hi, fmt::format("analyze_tone: f0_hz = {}: must lie inside the band [{}, {}] Hz", f0, lo, hi));
    require(y.size() >= 64 && static_cast<double>(y.size()) >= 4.0 * fs / f0,
            fmt::format("analyze_tone: {} samples: need at least 64 and 4 periods of f0 ({:.0f} samples)", y.size(), 4.0 * fs / f0));
    tone_metrics m;
    m.f0_hz = f0;
    m.band_low_hz = lo;
    m.band_high_hz = hi;
    std::vector<double> freqs{f0};
    for (int k = 2; k <= 9; ++k) {
        const double fk = k * f0;
        if (fk >= std::min(hi, 0.49 * fs)) break;
        freqs.push_back(fk);
    }
    m.harmonics_fitted = static_cast<int>(freqs.size());
    const Eigen::VectorXd c = fit_sinusoids(y, fs, freqs);
    m.dc_v = c(0);
    m.fundamental_v = amp(c, 0);
    m.fundamental_phase_rad = std::atan2(-c(2), c(1));
    m.harmonic_v.assign(10, 0.0);
    m.harmonic_ratio.assign(10, 0.0);
    double hsum = 0.0;
    for (std::size_t j = 1; j < freqs.size(); ++j) {
        const double a = amp(c, j);
        m.harmonic_v[j + 1] = a;
        m.harmonic_ratio[j + 1] = m.fundamental_v > 0.0 ? a / m.fundamental_v : std::numeric_limits<double>::quiet_NaN();
        hsum += a * a;
    }
    m.thd_percent = m.fundamental_v > 0.0 ? 100.0 * std::sqrt(hsum) / m.fundamental_v : std::numeric_limits<double>::quiet_NaN();
    // AES17-style THD+N: remove the fitted DC and fundamental only; everything else in the band is residual.
    std::vector<double> residual(y.size());
    for (std::size_t i = 0; i < y.size(); ++i) residual[i] = y[i] - fitted_value(c, freqs, 1, fs, i);
    const double total = band_rms_v(y, fs, lo, hi);
    const double rest = band_rms_v(residual, fs, lo, hi);
    const double ratio = total > 0.0 ? rest / total : std::numeric_limits<double>::quiet_NaN();
    m.thd_n_percent = 100.0 * ratio;
    m.sinad_db = -20.0 * std::log10(ratio);
    return m;
}

imd_metrics analyze_two_tone(std::span<const double> y, double fs, double f1, double f2, double ratio, int orders)
{
    check_rate(fs, "analyze_two_tone");
    require(orders >= 1 && orders <= 9, fmt::format("analyze_two_tone: orders = {}: must be in [1, 9]", orders));
    require(f1 > 0.0 && f2 > f1 && f2 + orders * f1 < 0.49 * fs && f2 - orders * f1 > 0.0,
            fmt::format("analyze_two_tone: f1 = {} Hz, f2 = {} Hz, orders = {}: need 0 < f1 < f2, f2 - orders f1 > 0 and "
                        "f2 + orders f1 < 0.49 fs",
                        f1, f2, orders));
    require(static_cast<double>(y.size()) >= 4.0 * fs / f1 && y.size() >= 64,
            fmt::format("analyze_two_tone: {} samples: need at least 4 periods of f1", y.size()));
    std::vector<double> freqs{f1, f2};
    for (int n = 1; n <= orders; ++n) {
        freqs.push_back(f2 - n * f1);
        freqs.push_back(f2 + n * f1);
    }
    for (int k = 2; k <= 3; ++k)
        if (k * f1 < 0.49 * fs) freqs.push_back(k * f1);
    // Distinct frequencies, else the least-squares problem is singular.
    auto sorted = freqs;
    std::sort(sorted.begin(), sorted.end());
    for (std::size_t i = 1; i < sorted.size(); ++i)
        require(sorted[i] - sorted[i - 1] > 1e-9 * f2,
                fmt::format("analyze_two_tone: f1 = {} Hz, f2 = {} Hz: the fitted frequencies coincide at {} Hz", f1, f2, sorted[i]));
    const Eigen::VectorXd c = fit_sinusoids(y, fs, freqs);
    imd_metrics m;
    m.f1_hz = f1;
    m.f2_hz = f2;
    m.stimulus_ratio = ratio;
    m.orders = orders;
    m.f1_v = amp(c, 0);
    m.f2_v = amp(c, 1);
    double s = 0.0;
    for (int j = 0; j < 2 * orders; ++j) {
        const double a = amp(c, static_cast<std::size_t>(2 + j));
        m.sideband_v.push_back(a);
        s += a * a;
    }
    m.imd_percent = m.f2_v > 0.0 ? 100.0 * std::sqrt(s) / m.f2_v : std::numeric_limits<double>::quiet_NaN();
    return m;
}

fidelity_metrics compare_to_reference(std::span<const double> rec_in, std::span<const double> ref_in, double fs,
                                      double max_delay_s, double lo, double hi)
{
    check_rate(fs, "compare_to_reference");
    check_band(lo, hi, fs, "compare_to_reference");
    require(rec_in.size() == ref_in.size() && rec_in.size() >= 64,
            fmt::format("compare_to_reference: recovered has {} samples, reference {}: need equal lengths >= 64", rec_in.size(),
                        ref_in.size()));
    require(max_delay_s >= 0.0, fmt::format("compare_to_reference: max_delay_s = {}: must be >= 0", max_delay_s));
    const std::size_t n = rec_in.size();
    const auto rec = band_limit(rec_in, fs, lo, hi);
    const auto ref = band_limit(ref_in, fs, lo, hi);
    double eref = 0.0;
    for (double v : ref) eref += v * v;
    if (!(eref > 0.0)) throw audio_error("compare_to_reference: the reference is silent in the band");

    std::size_t m = 1;
    while (m < 2 * n) m *= 2;
    const cvec a = forward_fft(rec, m);
    const cvec b = forward_fft(ref, m);
    cvec prod(m);
    for (std::size_t k = 0; k < m; ++k) prod[k] = a[k] * std::conj(b[k]);
    const cvec r = inverse_fft(prod); // r[l] = sum_i rec[i + l] ref[i] (lag l >= 0 at l, l < 0 at m + l)
    const auto max_lag = static_cast<long>(std::min<double>(std::floor(max_delay_s * fs), static_cast<double>(n) - 2.0));
    auto at = [&](long l) { return r[static_cast<std::size_t>(l >= 0 ? l : static_cast<long>(m) + l)].real(); };
    long best = 0;
    for (long l = -max_lag; l <= max_lag; ++l)
        if (std::fabs(at(l)) > std::fabs(at(best))) best = l;
    // Shift the reference by d samples: multiply its padded spectrum by exp(-j 2 pi k d / m).
    auto shifted = [&](double d) {
        cvec sh(m);
        for (std::size_t k = 0; k < m; ++k) {
            const double kk = k <= m / 2 ? static_cast<double>(k) : static_cast<double>(k) - static_cast<double>(m);
            const double ph = -two_pi * kk * d / static_cast<double>(m);
            sh[k] = b[k] * std::complex<double>(std::cos(ph), std::sin(ph));
        }
        if (m % 2 == 0) sh[m / 2] = std::complex<double>(sh[m / 2].real(), 0.0);
        return inverse_fft(sh);
    };
    // Compare only where both signals exist, for any delay within one sample of the integer peak.
    const auto i0 = static_cast<std::size_t>(std::max(0L, best + 1));
    const auto i1 = static_cast<std::size_t>(std::min(static_cast<long>(n), static_cast<long>(n) + best - 1));
    require(i1 > i0 + 16, "compare_to_reference: the best delay leaves too little overlap");
    // Sub-sample delay: maximise the explained energy (sum x z)^2 / sum z^2 over d in [best - 1, best + 1]
    // by Brent's method (Boost.Math), each trial shifting the reference in the FFT domain.
    auto cost = [&](double d) {
        const cvec z = shifted(d);
        double xz = 0.0, zz = 0.0;
        for (std::size_t i = i0; i < i1; ++i) {
            xz += rec[i] * z[i].real();
            zz += z[i].real() * z[i].real();
        }
        return zz > 0.0 ? -xz * xz / zz : 0.0;
    };
    std::uintmax_t iters = 40;
    const double d = boost::math::tools::brent_find_minima(cost, static_cast<double>(best) - 1.0, static_cast<double>(best) + 1.0,
                                                           30, iters).first;
    const cvec s = shifted(d);
    double srs = 0.0, sss = 0.0, srr = 0.0, sr = 0.0, ss = 0.0;
    const double cnt = static_cast<double>(i1 - i0);
    for (std::size_t i = i0; i < i1; ++i) {
        const double x = rec[i], z = s[i].real();
        srs += x * z;
        sss += z * z;
        srr += x * x;
        sr += x;
        ss += z;
    }
    fidelity_metrics f;
    f.delay_s = d / fs;
    f.gain = sss > 0.0 ? srs / sss : 0.0;
    double ee = 0.0;
    for (std::size_t i = i0; i < i1; ++i) {
        const double e = rec[i] - f.gain * s[i].real();
        ee += e * e;
    }
    f.residual_db = srr > 0.0 ? 10.0 * std::log10(ee / srr) : std::numeric_limits<double>::quiet_NaN();
    const double cov = srs - sr * ss / cnt, vr = srr - sr * sr / cnt, vs = sss - ss * ss / cnt;
    f.correlation = vr > 0.0 && vs > 0.0 ? cov / std::sqrt(vr * vs) : 0.0;
    return f;
}

nlohmann::json to_json(const level_metrics& m)
{
    nlohmann::json j;
    j["dc_v"] = num(m.dc_v);
    j["audio_rms_v"] = num(m.audio_rms_v);
    j["audio_peak_v"] = num(m.audio_peak_v);
    j["a_weighted_rms_v"] = num(m.a_weighted_rms_v);
    j["a_weighted_dbv"] = num(m.a_weighted_dbv);
    j["audio_band_low_hz"] = num(m.band_low_hz);
    j["audio_band_high_hz"] = num(m.band_high_hz);
    return j;
}

nlohmann::json to_json(const tone_metrics& m)
{
    nlohmann::json j;
    j["tone_hz"] = num(m.f0_hz);
    j["fundamental_v"] = num(m.fundamental_v);
    j["fundamental_phase_rad"] = num(m.fundamental_phase_rad);
    for (int k = 2; k <= 9; ++k)
        j[fmt::format("h{}_ratio", k)] = k <= m.harmonics_fitted ? num(m.harmonic_ratio[static_cast<std::size_t>(k)]) : nlohmann::json(nullptr);
    j["thd_percent"] = num(m.thd_percent);
    j["thd_reference"] = "fundamental";
    j["thd_n_percent"] = num(m.thd_n_percent);
    j["sinad_db"] = num(m.sinad_db);
    j["thd_n_band_low_hz"] = num(m.band_low_hz);
    j["thd_n_band_high_hz"] = num(m.band_high_hz);
    return j;
}

nlohmann::json to_json(const imd_metrics& m)
{
    nlohmann::json j;
    j["imd_f1_hz"] = num(m.f1_hz);
    j["imd_f2_hz"] = num(m.f2_hz);
    j["imd_ratio"] = num(m.stimulus_ratio);
    j["imd_f1_v"] = num(m.f1_v);
    j["imd_f2_v"] = num(m.f2_v);
    j["imd_orders"] = m.orders;
    j["imd_percent"] = num(m.imd_percent);
    j["imd_method"] = "smpte-style: rss of sidebands f2 +- n f1 over V(f2)";
    return j;
}

nlohmann::json to_json(const fidelity_metrics& m)
{
    nlohmann::json j;
    j["fidelity_gain"] = num(m.gain);
    j["fidelity_delay_s"] = num(m.delay_s);
    j["fidelity_residual_db"] = num(m.residual_db);
    j["fidelity_correlation"] = num(m.correlation);
    return j;
}

nlohmann::json merge_metrics(const std::vector<nlohmann::json>& parts, const std::vector<warning>& warnings)
{
    nlohmann::json j = nlohmann::json::object();
    for (const auto& p : parts)
        for (const auto& [k, v] : p.items()) j[k] = v;
    set_warnings(j, warnings);
    return j;
}

void set_warnings(nlohmann::json& flat, const std::vector<warning>& warnings)
{
    flat["warnings"] = warning_messages(warnings);
    flat["warning_codes"] = warning_code_names(warnings);
}

std::string to_text(const nlohmann::json& flat)
{
    std::string out;
    for (const auto& [k, v] : flat.items()) {
        if (k == "warnings" || k == "warning_codes") continue;
        if (v.is_number_float()) out += fmt::format("{:<28} {:.6g}\n", k, v.get<double>());
        else out += fmt::format("{:<28} {}\n", k, v.dump());
    }
    if (flat.contains("warnings"))
        for (const auto& w : flat["warnings"]) out += fmt::format("warning: {}\n", w.get<std::string>());
    return out;
}

std::vector<double> fit_amplitudes(std::span<const double> x, double fs_hz, std::span<const double> f_hz)
{
    const auto m = static_cast<Eigen::Index>(f_hz.size());
    const Eigen::Index k = 2 * m + 1;
    if (x.size() < static_cast<std::size_t>(4 * k))
        throw config_error(fmt::format("fit_amplitudes: {} samples: need at least {}", x.size(), 4 * k));
    Eigen::MatrixXd ata = Eigen::MatrixXd::Zero(k, k);
    Eigen::VectorXd atb = Eigen::VectorXd::Zero(k);
    Eigen::VectorXd row(k);
    // Rotating phasors per frequency, re-anchored every 4096 samples so rounding does not accumulate.
    std::vector<std::complex<double>> p(static_cast<std::size_t>(m)), rot(static_cast<std::size_t>(m));
    for (Eigen::Index i = 0; i < m; ++i) rot[static_cast<std::size_t>(i)] = std::polar(1.0, two_pi * f_hz[static_cast<std::size_t>(i)] / fs_hz);
    for (std::size_t n = 0; n < x.size(); ++n) {
        for (Eigen::Index i = 0; i < m; ++i) {
            auto& ph = p[static_cast<std::size_t>(i)];
            if (n % 4096 == 0) ph = std::polar(1.0, two_pi * f_hz[static_cast<std::size_t>(i)] * static_cast<double>(n) / fs_hz);
            row[2 * i] = ph.real();
            row[2 * i + 1] = ph.imag();
            ph *= rot[static_cast<std::size_t>(i)];
        }
        row[2 * m] = 1.0;
        ata.selfadjointView<Eigen::Lower>().rankUpdate(row);
        atb += row * x[n];
    }
    ata = ata.selfadjointView<Eigen::Lower>();
    const Eigen::VectorXd c = ata.ldlt().solve(atb);
    std::vector<double> a;
    for (Eigen::Index i = 0; i < m; ++i) a.push_back(std::hypot(c[2 * i], c[2 * i + 1]));
    return a;
}

} // namespace galena
