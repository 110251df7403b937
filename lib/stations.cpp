#include "galena/stations.hpp"

#include "galena/constants.hpp"
#include "galena/validate.hpp"

#include <cmath>

namespace galena {

namespace {
constexpr int kernel_half_taps = 32;      // L: samples each side of the windowed sinc
constexpr double kernel_beta = 8.0;       // Kaiser window's beta (stop band about -80 dB)
constexpr int kernel_table_per_unit = 512; // table points per sample interval (linear interpolation: 5e-6 error)
constexpr long long cache_samples = 4096;  // samples generated at once per channel

std::uint64_t mix64(std::uint64_t z) noexcept
{
    // The splitmix64 finaliser (Steele, Lea & Flood 2014): a bijection with full avalanche.
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
}

std::shared_ptr<const std::vector<double>> make_kernel()
{
    const int n = 2 * kernel_half_taps * kernel_table_per_unit + 2;
    auto k = std::make_shared<std::vector<double>>(static_cast<std::size_t>(n), 0.0);
    const double i0b = std::cyl_bessel_i(0.0, kernel_beta);
    for (int i = 0; i < n; ++i) {
        const double x = static_cast<double>(i) / kernel_table_per_unit - kernel_half_taps;
        const double u = x / kernel_half_taps;
        if (std::fabs(u) >= 1.0) continue;
        const double sinc = x == 0.0 ? 1.0 : std::sin(pi * x) / (pi * x);
        (*k)[static_cast<std::size_t>(i)] = sinc * std::cyl_bessel_i(0.0, kernel_beta * std::sqrt(1.0 - u * u)) / i0b;
    }
    return k;
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
    static const std::shared_ptr<const std::vector<double>> kernel = make_kernel();
    m_kernel = kernel;
    // White samples of variance 1 at rate r through a unit-DC-gain interpolator k: two-sided density 1/r in
    // the pass band, variance int k^2 (in sample units; 1 for the ideal sinc). The rate is chosen so that the
    // noise-equivalent width r int k^2 is B: variance D^2 B exactly, pass-band density D^2.
    static const double energy = [] {
        double e = 0.0;
        for (double v : *kernel) e += v * v;
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
    // The integrator asks for each cycle boundary four times (cycles c-1 .. c+2 of cycle c): keep the last few.
    for (const auto& [tm, v] : m_recent)
        if (tm == t) return v;
    const std::complex<double> v = evaluate(t);
    m_recent[m_next] = {t, v};
    m_next = (m_next + 1) % m_recent.size();
    return v;
}

std::complex<double> band_noise::evaluate(double t) const noexcept
{
    const double x = t * m_rate;
    const double fl = std::floor(x);
    const auto n0 = static_cast<long long>(fl);
    const double frac = x - fl;
    const long long lo = n0 - kernel_half_taps + 1, hi = n0 + kernel_half_taps; // taps lo..hi
    if (m_cache.empty() || lo < m_first || hi >= m_first + cache_samples) {
        m_first = lo;
        m_cache.resize(2 * static_cast<std::size_t>(cache_samples));
        for (long long i = 0; i < cache_samples; ++i) {
            m_cache[2 * static_cast<std::size_t>(i)] = gaussian(m_seed, lo + i, 0);
            m_cache[2 * static_cast<std::size_t>(i) + 1] = gaussian(m_seed, lo + i, 1);
        }
    }
    // Tap n sits at x - n = frac + (n0 - n) in [frac - L + 1 - 1, frac + L - 1]; table index (x - n + L) R.
    const double pos = frac * kernel_table_per_unit;
    const double pf = std::floor(pos);
    const double w = pos - pf;
    const auto base = static_cast<std::size_t>(pf);
    const std::vector<double>& k = *m_kernel;
    double si = 0.0, sq = 0.0;
    for (long long n = lo; n <= hi; ++n) {
        const auto d = static_cast<std::size_t>(n0 - n + kernel_half_taps); // 0 .. 2L - 1
        const std::size_t at = base + d * kernel_table_per_unit;
        const double kv = k[at] + w * (k[at + 1] - k[at]);
        const auto c = 2 * static_cast<std::size_t>(n - m_first);
        si += kv * m_cache[c];
        sq += kv * m_cache[c + 1];
    }
    return {m_scale * si, m_scale * sq};
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
