#include "galena/dsp.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cassert>
#include <array>
#include <cmath>
#include <map>
#include <memory>
#include <mutex>
#include <fmt/format.h>

namespace galena {

double kaiser_beta(double a)
{
    if (a > 50.0) return 0.1102 * (a - 8.7);
    if (a >= 21.0) return 0.5842 * std::pow(a - 21.0, 0.4) + 0.07886 * (a - 21.0);
    return 0.0;
}

std::vector<double> kaiser_lowpass(double cutoff, double transition, double attenuation_db)
{
    detail::require_above("fir cutoff (cycles/sample)", cutoff, 0.0, 0.5);
    detail::require_above("fir transition (cycles/sample)", transition, 0.0, 0.5);
    detail::require_range("fir attenuation_db", attenuation_db, 21.0, 200.0, "dB");
    // Kaiser's length estimate N = (A - 8) / (2.285 * delta_omega).
    const double dw = two_pi * transition;
    auto n = static_cast<std::size_t>(std::ceil((attenuation_db - 8.0) / (2.285 * dw)));
    n += (n % 2 == 0) ? 1 : 0;
    n = std::max<std::size_t>(n, 3);
    const double beta = kaiser_beta(attenuation_db);
    const double i0b = std::cyl_bessel_i(0.0, beta);
    const double mid = 0.5 * static_cast<double>(n - 1);
    std::vector<double> h(n);
    double sum = 0.0;
    for (std::size_t i = 0; i < n; ++i) {
        const double k = static_cast<double>(i) - mid;
        const double x = two_pi * cutoff * k;
        const double ideal = (k == 0.0) ? 2.0 * cutoff : std::sin(x) / (pi * k);
        const double r = k / mid;
        const double w = std::cyl_bessel_i(0.0, beta * std::sqrt(std::max(0.0, 1.0 - r * r))) / i0b;
        h[i] = ideal * w;
        sum += h[i];
    }
    for (double& v : h) v /= sum;
    return h;
}

std::vector<double> bspline_kernel(std::size_t box_length, int order)
{
    assert(box_length >= 1 && order >= 1);
    std::vector<double> k{1.0};
    for (int o = 0; o < order; ++o) {
        std::vector<double> next(k.size() + box_length - 1, 0.0);
        for (std::size_t i = 0; i < k.size(); ++i)
            for (std::size_t j = 0; j < box_length; ++j) next[i + j] += k[i] / static_cast<double>(box_length);
        k.swap(next);
    }
    return k;
}

fir_decimator::fir_decimator(std::vector<double> taps, std::size_t decimation)
    : m_taps(std::move(taps)), m_history(2 * m_taps.size(), 0.0), m_decimation(decimation)
{
    assert(!m_taps.empty() && decimation >= 1);
    std::reverse(m_taps.begin(), m_taps.end());
}

bool fir_decimator::push(double x, double& out) noexcept
{
    const std::size_t n = m_taps.size();
    m_history[m_pos] = x;
    m_history[m_pos + n] = x;
    m_pos = (m_pos + 1 == n) ? 0 : m_pos + 1;
    if (++m_phase < m_decimation) return false;
    m_phase = 0;
    // The window of the last n inputs, oldest first, is history[m_pos .. m_pos + n).
    const double* h = m_history.data() + m_pos;
    double acc = 0.0;
    for (std::size_t i = 0; i < n; ++i) acc += m_taps[i] * h[i];
    out = acc;
    return true;
}

void fir_decimator::process(std::span<const double> in, std::vector<double>& out)
{
    double y;
    for (double x : in)
        if (push(x, y)) out.push_back(y);
}

void fir_decimator::reset() noexcept
{
    std::fill(m_history.begin(), m_history.end(), 0.0);
    m_pos = 0;
    m_phase = 0;
}

biquad biquad::butterworth_highpass(double corner_hz, double fs)
{
    detail::require_above("high-pass corner_hz", corner_hz, 0.0, 0.5 * fs, "Hz");
    const double k = std::tan(pi * corner_hz / fs);
    const double q = 1.0 / std::sqrt(2.0);
    const double norm = 1.0 / (1.0 + k / q + k * k);
    return {norm, -2.0 * norm, norm, 2.0 * (k * k - 1.0) * norm, (1.0 - k / q + k * k) * norm};
}

biquad biquad::butterworth_lowpass(double corner_hz, double fs)
{
    detail::require_above("low-pass corner_hz", corner_hz, 0.0, 0.5 * fs, "Hz");
    const double k = std::tan(pi * corner_hz / fs);
    const double q = 1.0 / std::sqrt(2.0);
    const double norm = 1.0 / (1.0 + k / q + k * k);
    const double b0 = k * k * norm;
    return {b0, 2.0 * b0, b0, 2.0 * (k * k - 1.0) * norm, (1.0 - k / q + k * k) * norm};
}

void biquad::settle_to(double x) noexcept
{
    // Steady state for constant input x: y = G x with G = (b0+b1+b2)/(1+a1+a2).
    const double y = x * (m_b0 + m_b1 + m_b2) / (1.0 + m_a1 + m_a2);
    m_z2 = m_b2 * x - m_a2 * y;
    m_z1 = y - m_b0 * x;
}

namespace {
/// Antiderivative of the cubic Hermite interpolant on [0,1] with slopes pre-scaled by h, at s.
inline double hermite_integral(double s, double p0, double p1, double m0, double m1) noexcept
{
    const double s2 = s * s;
    const double s3 = s2 * s;
    const double s4 = s3 * s;
    return p0 * (0.5 * s4 - s3 + s) + m0 * (0.25 * s4 - (2.0 / 3.0) * s3 + 0.5 * s2) + p1 * (s3 - 0.5 * s4) +
           m1 * (0.25 * s4 - s3 / 3.0);
}
} // namespace

void box_sampler::add_segment(double t0, double t1, double p0, double p1, double d0, double d1,
                              std::vector<double>& out)
{
    const double h = t1 - t0;
    if (!(h > 0.0)) return;
    const double m0 = d0 * h;
    const double m1 = d1 * h;
    double a = t0;
    while (true) {
        // End of the current bin, derived from the bin index (never accumulated).
        const double bin_end = m_origin_s + static_cast<double>(m_count + 1) * m_period_s;
        if (bin_end > t1) {
            if (t1 > m_origin_s) {
                const double lo = std::max(a, m_origin_s);
                const double s_lo = (lo - t0) / h;
                m_accum += h * (hermite_integral(1.0, p0, p1, m0, m1) - hermite_integral(s_lo, p0, p1, m0, m1));
            }
            return;
        }
        const double lo = std::max(a, m_origin_s);
        if (bin_end > lo) {
            const double s_lo = (lo - t0) / h;
            const double s_hi = (bin_end - t0) / h;
            m_accum += h * (hermite_integral(s_hi, p0, p1, m0, m1) - hermite_integral(s_lo, p0, p1, m0, m1));
        }
        out.push_back(m_accum / m_period_s);
        m_accum = 0.0;
        ++m_count;
        a = bin_end;
    }
}

namespace {
constexpr double table_per_input = 1024.0;
/// The polyphase form's limits: at most this many phases, and this many weights in all (2 MB).
constexpr std::size_t max_phases = 4096;
constexpr std::size_t max_phase_weights = std::size_t{1} << 18;

/// The Kaiser-windowed sinc at k / table_per_input input spacings, built once per design and shared.
std::shared_ptr<const std::vector<double>> kernel_table(double in_rate, double cutoff_hz, double attenuation_db, double half_in)
{
    static std::mutex mutex;
    static std::map<std::array<double, 4>, std::shared_ptr<const std::vector<double>>> cache;
    const std::array<double, 4> key{in_rate, cutoff_hz, attenuation_db, half_in};
    {
        const std::lock_guard lock(mutex);
        const auto it = cache.find(key);
        if (it != cache.end()) return it->second;
    }
    const double beta = kaiser_beta(attenuation_db);
    const double i0b = std::cyl_bessel_i(0.0, beta);
    const auto size = static_cast<std::size_t>(std::ceil(half_in * table_per_input)) + 2;
    auto table = std::make_shared<std::vector<double>>(size);
    for (std::size_t k = 0; k < size; ++k) {
        const double d = static_cast<double>(k) / table_per_input; // input spacings
        const double t = d / in_rate;                             // s
        const double r = d / half_in;
        const double w = r < 1.0 ? std::cyl_bessel_i(0.0, beta * std::sqrt(1.0 - r * r)) / i0b : 0.0;
        const double x = two_pi * cutoff_hz * t;
        (*table)[k] = (k == 0 ? 1.0 : std::sin(x) / x) * w;
    }
    const std::lock_guard lock(mutex);
    if (cache.size() >= 32) cache.clear(); // bounded: a long-running server sees many designs
    cache.emplace(key, table);
    return table;
}
} // namespace

sinc_resampler::sinc_resampler(double in_rate, double in_t0, double out_rate, double out_t0, double pass_hz, double stop_hz,
                               double attenuation_db)
    : m_in_rate(in_rate), m_p0((out_t0 - in_t0) * in_rate), m_ratio(in_rate / out_rate)
{
    detail::require_above("resampler input_rate_hz", in_rate, 0.0, 1e12, "Hz");
    detail::require_above("resampler output_rate_hz", out_rate, 0.0, 1e12, "Hz");
    detail::require_above("resampler pass_hz", pass_hz, 0.0, stop_hz, "Hz");
    detail::require_range("resampler attenuation_db", attenuation_db, 21.0, 200.0, "dB");
    // Kaiser's length estimate in seconds, L = (A - 8) / (2.285 * 2 pi * transition).
    const double length_s = (attenuation_db - 8.0) / (2.285 * two_pi * (stop_hz - pass_hz));
    m_half_in = 0.5 * length_s * in_rate;
    if (m_half_in > 1e5)
        throw config_error(fmt::format("resampler: the kernel would span {:.3g} inputs; the transition band is too narrow "
                                       "for the input rate",
                                       2.0 * m_half_in));
    const double cutoff_hz = 0.5 * (pass_hz + stop_hz);
    m_table = kernel_table(in_rate, cutoff_hz, attenuation_db, m_half_in);
    // The polyphase form when the rate ratio is P / Q exactly (as doubles) with few phases.
    for (std::size_t q = 1; q <= max_phases; ++q) {
        const double pq = std::round(m_ratio * static_cast<double>(q));
        if (pq < 1.0 || pq > 1e12 || pq / static_cast<double>(q) != m_ratio) continue;
        const auto taps = static_cast<std::size_t>(std::floor(2.0 * m_half_in)) + 2;
        if (q * taps > max_phase_weights) break;
        m_period_in = static_cast<long long>(pq);
        m_period_out = q;
        m_stride = taps;
        m_phase_w.assign(q * taps, 0.0);
        m_phase_wsum.assign(q, 0.0);
        m_phase_lo.assign(q, 0);
        for (std::size_t r = 0; r < q; ++r) {
            const double p = m_p0 + static_cast<double>(r) * m_ratio;
            const auto lo = static_cast<long long>(std::ceil(p - m_half_in));
            const auto hi = static_cast<long long>(std::floor(p + m_half_in));
            m_phase_lo[r] = lo;
            double wsum = 0.0;
            for (long long i = lo; i <= hi && static_cast<std::size_t>(i - lo) < taps; ++i) {
                const double w = kernel(p - static_cast<double>(i));
                m_phase_w[r * taps + static_cast<std::size_t>(i - lo)] = w;
                wsum += w;
            }
            m_phase_wsum[r] = wsum;
        }
        break;
    }
}

double sinc_resampler::kernel(double d_in) const noexcept
{
    const double pos = std::fabs(d_in) * table_per_input;
    const auto k = static_cast<std::size_t>(pos);
    const std::vector<double>& t = *m_table;
    if (k + 1 >= t.size()) return 0.0;
    const double f = pos - static_cast<double>(k);
    return t[k] + f * (t[k + 1] - t[k]);
}

void sinc_resampler::push(double x, std::vector<double>& out)
{
    if (m_pushed == 0) m_first_value = x;
    m_buf.push_back(x);
    ++m_pushed;
    const double newest = static_cast<double>(m_pushed - 1);
    while (true) {
        // Position of output m_next_out in input-sample units (derived from its index, never accumulated).
        const double p = m_p0 + static_cast<double>(m_next_out) * m_ratio;
        if (p + m_half_in > newest) break;
        if (m_period_in > 0) {
            // Polyphase: phase r's weights from input lo on; past its last tap (<= newest) they are zero.
            const std::size_t r = m_next_out % m_period_out;
            const auto lo = m_phase_lo[r] + static_cast<long long>(m_next_out / m_period_out) * m_period_in;
            const double* w = &m_phase_w[r * m_stride];
            double acc = 0.0;
            if (lo >= m_buf_first) {
                const double* x = &m_buf[static_cast<std::size_t>(lo - m_buf_first)];
                const auto avail = static_cast<std::size_t>(static_cast<long long>(m_buf.size()) - (lo - m_buf_first));
                const std::size_t n = std::min(m_stride, avail); // weights past the phase's last tap are zero
                // Four partial sums: the adds overlap instead of waiting on one another.
                double a0 = 0.0, a1 = 0.0, a2 = 0.0, a3 = 0.0;
                std::size_t j = 0;
                for (; j + 4 <= n; j += 4) {
                    a0 += w[j] * x[j];
                    a1 += w[j + 1] * x[j + 1];
                    a2 += w[j + 2] * x[j + 2];
                    a3 += w[j + 3] * x[j + 3];
                }
                for (; j < n; ++j) a0 += w[j] * x[j];
                acc = (a0 + a1) + (a2 + a3);
            } else {
                for (std::size_t j = 0; j < m_stride; ++j) {
                    const long long i = lo + static_cast<long long>(j);
                    if (i > newest) break;
                    acc += w[j] * (i < m_buf_first ? m_first_value : m_buf[static_cast<std::size_t>(i - m_buf_first)]);
                }
            }
            out.push_back(acc / m_phase_wsum[r]);
        } else {
            const auto lo = static_cast<long long>(std::ceil(p - m_half_in));
            const auto hi = static_cast<long long>(std::floor(p + m_half_in));
            double acc = 0.0;
            double wsum = 0.0;
            for (long long i = lo; i <= hi; ++i) {
                const double w = kernel(p - static_cast<double>(i));
                const double xi = i < m_buf_first ? m_first_value : m_buf[static_cast<std::size_t>(i - m_buf_first)];
                acc += w * xi;
                wsum += w;
            }
            out.push_back(acc / wsum);
        }
        ++m_next_out;
        // Drop inputs no later output can reach (keep the buffer bounded).
        const auto keep_from = static_cast<long long>(std::floor(m_p0 + static_cast<double>(m_next_out) * m_ratio - m_half_in)) - 1;
        if (keep_from - m_buf_first > 4096) {
            const auto drop = static_cast<std::size_t>(keep_from - m_buf_first);
            m_buf.erase(m_buf.begin(), m_buf.begin() + static_cast<std::ptrdiff_t>(drop));
            m_buf_first = keep_from;
        }
    }
}

} // namespace galena
