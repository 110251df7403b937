#include "galena/stations.hpp"

#include "galena/constants.hpp"
#include "galena/validate.hpp"

#include <cmath>

namespace galena {

namespace {
constexpr int kernel_half_taps = 32;      // L: samples each side of the windowed sinc
constexpr double kernel_beta = 8.0;       // Kaiser window's beta (stop band about -80 dB)
constexpr int kernel_table_per_unit = 512; // table points per sample interval (the energy integral's step; the fine grid's phases fall on them)
constexpr long long cache_samples = 4096;  // samples generated at once per channel
/// The envelope is the interpolator's output on a grid this many times finer than the samples (each point an
/// exact kernel sum: the grid's phases fall on table points), and a 6-point Lagrange quintic between grid
/// points. At 8 the envelope is within 1e-5 of the RMS of the direct sum (a cubic: 1.4e-4; band_noise_test),
/// and a dial with 16 noise tiles ran 1.7x faster than with the kernel summed at every evaluation (the integrator
/// asks once per carrier cycle and station).
constexpr int fine_per_sample = 8;
constexpr long long fine_block = 2048;     // fine points generated at once per channel
static_assert(kernel_table_per_unit % fine_per_sample == 0);

long long floor_div(long long a, long long b) noexcept { return a >= 0 ? a / b : -((-a + b - 1) / b); }

std::uint64_t mix64(std::uint64_t z) noexcept
{
    // The splitmix64 finaliser (Steele, Lea & Flood 2014): a bijection with full avalanche.
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

/// The windowed sinc at x = i / R - L, i = 0 .. 2 L R + 1.
const std::vector<double>& kernel_table()
{
    static const std::vector<double> table = [] {
        const int n = 2 * kernel_half_taps * kernel_table_per_unit + 2;
        std::vector<double> k(static_cast<std::size_t>(n), 0.0);
        const double i0b = std::cyl_bessel_i(0.0, kernel_beta);
        for (int i = 0; i < n; ++i) {
            const double x = static_cast<double>(i) / kernel_table_per_unit - kernel_half_taps;
            const double u = x / kernel_half_taps;
            if (std::fabs(u) >= 1.0) continue;
            const double sinc = x == 0.0 ? 1.0 : std::sin(pi * x) / (pi * x);
            k[static_cast<std::size_t>(i)] = sinc * std::cyl_bessel_i(0.0, kernel_beta * std::sqrt(1.0 - u * u)) / i0b;
        }
        return k;
    }();
    return table;
}
} // namespace

const station_params& station_params::validate() const
{
    detail::require_range("station.carrier_hz", carrier_hz, 1e4, 1e8, "Hz");
    detail::require_above("station.field_v_per_m", field_v_per_m, 0.0, 100.0, "V/m");
    detail::require_range("station.modulation_index", modulation_index, 0.0, 1.0);
    return *this;
}

const antenna_noise_params& antenna_noise_params::validate() const
{
    detail::require_range("antenna.noise_field_density", field_density, 0.0, 1e-3, "V/m per sqrt(Hz)");
    detail::require_range("antenna.noise_half_band_hz", half_band_hz, 1e3, 1e6, "Hz");
    return *this;
}

double quiet_rural_noise_field_density() noexcept
{
    // ITU-R P.372 (from memory): quiet rural man-made noise Fa = c - d log10(f_MHz), c = 53.6, d = 28.6; the
    // field in a bandwidth b: E_n = Fa + 20 log10(f_MHz) + 10 log10(b) - 95.5 dB(uV/m). At f = 1 MHz, b = 1 Hz.
    constexpr double fa_db = 53.6;
    constexpr double en_db_uv_per_m = fa_db - 95.5;
    return 1e-6 * std::pow(10.0, en_db_uv_per_m / 20.0);
}

band_noise::band_noise(double density, double half_band_hz, std::uint64_t seed)
    : m_density(density), m_half_band(half_band_hz), m_seed(seed)
{
    detail::require_range("noise density", density, 0.0, 1e3, "V per sqrt(Hz)");
    detail::require_above("noise half band", half_band_hz, 0.0, 1e9, "Hz");
    // White samples of variance 1 at rate r through a unit-DC-gain interpolator k: two-sided density 1/r in
    // the pass band, variance int k^2 (in sample units; 1 for the ideal sinc). The rate is chosen so that the
    // noise-equivalent width r int k^2 is B: variance D^2 B exactly, pass-band density D^2.
    static const double energy = [] {
        double e = 0.0;
        for (double v : kernel_table()) e += v * v;
        return e / kernel_table_per_unit;
    }();
    m_rate = 2.0 * half_band_hz / energy;
    m_scale = density * std::sqrt(m_rate);
}

double band_noise::gaussian(std::uint64_t seed, long long n, int channel) noexcept
{
    const std::uint64_t key = mix64(seed * 0x9e3779b97f4a7c15ULL + static_cast<std::uint64_t>(channel)) ^ static_cast<std::uint64_t>(n);
    const std::uint64_t a = mix64(key), b = mix64(a ^ 0xd1b54a32d192ed03ULL);
    const double u1 = (static_cast<double>(a >> 11) + 1.0) * 0x1.0p-53; // (0, 1]
    const double u2 = static_cast<double>(b >> 11) * 0x1.0p-53;         // [0, 1)
    return std::sqrt(-2.0 * std::log(u1)) * std::cos(two_pi * u2);     // Box & Muller (1958)
}

std::complex<double> band_noise::envelope(double t) const noexcept
{
    if (m_density == 0.0) return {};
    // The fine grid point j sits at j / (M r); the quintic through points j0 - 2 .. j0 + 3 at u = y - j0
    // (6-point Lagrange: weight k is prod_{m != k} (u - m) / (k - m)).
    const double y = t * m_rate * fine_per_sample;
    const double fl = std::floor(y);
    const auto j0 = static_cast<long long>(fl);
    const double u = y - fl;
    if (m_fine.empty() || j0 - 2 < m_fine_first || j0 + 3 >= m_fine_first + fine_block) fill_fine(j0 - 2 * fine_per_sample);
    const double* f = &m_fine[2 * static_cast<std::size_t>(j0 - 2 - m_fine_first)];
    const double a = u + 2.0, b = u + 1.0, c = u, d = u - 1.0, e = u - 2.0, g = u - 3.0;
    const double ab = a * b, de = d * e, cd = c * d, bc = b * c, eg = e * g;
    const double w[6] = {-bc * de * g / 120.0, a * cd * eg / 24.0, -ab * de * g / 12.0, ab * c * eg / 12.0, -ab * cd * g / 24.0, ab * cd * e / 120.0};
    double si = 0.0, sq = 0.0;
    for (int k = 0; k < 6; ++k) {
        si += w[k] * f[2 * k];
        sq += w[k] * f[2 * k + 1];
    }
    return {m_scale * si, m_scale * sq};
}

void band_noise::fill_fine(long long first) const
{
    // Whole groups of M points: group n0 holds points j = n0 M + p, p = 0..M-1, x = n0 + p / M. Tap n (n0 - L + 1
    // .. n0 + L, i = n - n0 + L - 1) sits at x - n = p / M + L - 1 - i: table index (p / M + 2L - 1 - i) R, a
    // table point. The weights are held tap-major (i, then p), so each group is one small matrix-vector product
    // that runs across p.
    static const std::vector<double> weights = [] {
        const std::vector<double>& k = kernel_table();
        std::vector<double> w(2 * kernel_half_taps * fine_per_sample);
        for (int i = 0; i < 2 * kernel_half_taps; ++i)
            for (int p = 0; p < fine_per_sample; ++p)
                w[static_cast<std::size_t>(i * fine_per_sample + p)] =
                    k[static_cast<std::size_t>(p * (kernel_table_per_unit / fine_per_sample) + (2 * kernel_half_taps - 1 - i) * kernel_table_per_unit)];
        return w;
    }();
    const long long g_first = floor_div(first, fine_per_sample);
    constexpr long long groups = fine_block / fine_per_sample;
    const long long raw_lo = g_first - kernel_half_taps + 1;
    const long long raw_hi = g_first + groups - 1 + kernel_half_taps;
    if (m_raw_i.empty() || raw_lo < m_first || raw_hi >= m_first + cache_samples) {
        m_first = raw_lo;
        m_raw_i.resize(static_cast<std::size_t>(cache_samples));
        m_raw_q.resize(static_cast<std::size_t>(cache_samples));
        for (long long i = 0; i < cache_samples; ++i) {
            m_raw_i[static_cast<std::size_t>(i)] = gaussian(m_seed, raw_lo + i, 0);
            m_raw_q[static_cast<std::size_t>(i)] = gaussian(m_seed, raw_lo + i, 1);
        }
    }
    m_fine_first = g_first * fine_per_sample;
    m_fine.resize(2 * static_cast<std::size_t>(fine_block));
    for (long long g = 0; g < groups; ++g) {
        const auto at = static_cast<std::size_t>(g_first + g - kernel_half_taps + 1 - m_first);
        const double* __restrict ri = &m_raw_i[at];
        const double* __restrict rq = &m_raw_q[at];
        double si[fine_per_sample] = {}, sq[fine_per_sample] = {};
        for (int i = 0; i < 2 * kernel_half_taps; ++i) {
            const double* __restrict w = &weights[static_cast<std::size_t>(i * fine_per_sample)];
            for (int p = 0; p < fine_per_sample; ++p) {
                si[p] += w[p] * ri[i];
                sq[p] += w[p] * rq[i];
            }
        }
        double* out = &m_fine[2 * static_cast<std::size_t>(g * fine_per_sample)];
        for (int p = 0; p < fine_per_sample; ++p) {
            out[2 * p] = si[p];
            out[2 * p + 1] = sq[p];
        }
    }
}

double station_source::carrier_hz(std::size_t k) const noexcept
{
    const auto& s = m_sources[k];
    if (const auto* am = std::get_if<am_source>(&s)) return am->params().carrier_hz;
    return std::get_if<noise_station>(&s)->carrier_hz;
}

std::complex<double> station_source::envelope(std::size_t k, double t_s) const noexcept
{
    const auto& s = m_sources[k];
    if (const auto* am = std::get_if<am_source>(&s)) return am->envelope(t_s);
    return std::get_if<noise_station>(&s)->noise.envelope(t_s);
}

double station_source::voltage(double t_s) const noexcept
{
    double u = 0.0;
    for (std::size_t k = 0; k < m_sources.size(); ++k) {
        if (const auto* am = std::get_if<am_source>(&m_sources[k])) {
            u += am->voltage(t_s);
            continue;
        }
        const double cycles = carrier_hz(k) * t_s;
        const std::complex<double> e = envelope(k, t_s) * std::polar(1.0, two_pi * (cycles - std::floor(cycles)));
        u += e.real();
    }
    return u;
}

} // namespace galena
