#include "galena/synthetic_programme.hpp"

#include "galena/constants.hpp"
#include "galena/dsp.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cmath>
#include <random>

namespace galena {

namespace {

/// Standard normal deviates from a 64-bit Mersenne Twister by the Box-Muller transform (std::normal_distribution
/// differs between standard libraries; this does not).
class gaussian {
public:
    explicit gaussian(std::uint64_t seed) : m_gen(seed) {}
    double operator()()
    {
        if (m_has) {
            m_has = false;
            return m_spare;
        }
        const double u1 = (static_cast<double>(m_gen() >> 11) + 0.5) * 0x1.0p-53; // (0, 1)
        const double u2 = static_cast<double>(m_gen() >> 11) * 0x1.0p-53;
        const double r = std::sqrt(-2.0 * std::log(u1));
        m_spare = r * std::sin(two_pi * u2);
        m_has = true;
        return r * std::cos(two_pi * u2);
    }

private:
    std::mt19937_64 m_gen;
    double m_spare = 0.0;
    bool m_has = false;
};

} // namespace

speech_noise_modulation::speech_noise_modulation(double duration_s, std::uint64_t seed) : m_duration_s(duration_s)
{
    detail::require_above("programme duration", duration_s, 0.0, 3600.0, "s");
    const double fs = sample_rate_hz;
    const auto n = static_cast<std::size_t>(std::ceil(duration_s * fs)) + 2;
    gaussian carrier_noise(seed), rhythm_noise(seed ^ 0x9e3779b97f4a7c15ULL);
    biquad hp = biquad::butterworth_highpass(300.0, fs);
    biquad lp1 = biquad::butterworth_lowpass(2500.0, fs), lp2 = biquad::butterworth_lowpass(2500.0, fs);
    biquad syl1 = biquad::butterworth_lowpass(4.0, fs), syl2 = biquad::butterworth_lowpass(4.0, fs);
    // Run the filters in for 0.5 s before the first kept sample, so the programme starts in its steady state.
    const auto run_in = static_cast<std::size_t>(0.5 * fs);
    std::vector<double> x(n), env(n);
    for (std::size_t i = 0; i < run_in + n; ++i) {
        const double v = lp2.process(lp1.process(hp.process(carrier_noise())));
        const double e = syl2.process(syl1.process(rhythm_noise()));
        if (i >= run_in) x[i - run_in] = v, env[i - run_in] = e * e;
    }
    const double emax = *std::max_element(env.begin(), env.end());
    double peak = 0.0;
    for (std::size_t i = 0; i < n; ++i) {
        x[i] *= 0.05 + 0.95 * (emax > 0.0 ? env[i] / emax : 1.0);
        peak = std::max(peak, std::fabs(x[i]));
    }
    m_x.resize(n);
    for (std::size_t i = 0; i < n; ++i) m_x[i] = static_cast<float>(peak > 0.0 ? 0.95 * x[i] / peak : 0.0);
}

double speech_noise_modulation::value(double t) const noexcept
{
    if (!(t >= 0.0) || t >= m_duration_s) return 0.0;
    const double p = t * sample_rate_hz;
    const auto i = static_cast<std::size_t>(p);
    if (i + 1 >= m_x.size()) return 0.0;
    const double a = p - static_cast<double>(i);
    return (1.0 - a) * m_x[i] + a * m_x[i + 1];
}

} // namespace galena
