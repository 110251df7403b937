/// Programmes that galena makes itself, so that a band of stations needs no recordings: speech-like noise
/// (seeded, a stated spectrum and syllabic rhythm).
#pragma once

#include "galena/signal.hpp"

#include <cstdint>
#include <vector>

namespace galena {

/// Speech-like noise. Gaussian white noise (64-bit Mersenne Twister seeded with `seed`, Box-Muller: the same
/// samples on every platform) shaped by a 2nd-order Butterworth high-pass at 300 Hz and two cascaded
/// 2nd-order Butterworth low-passes at 2.5 kHz (the telephone band where the long-term speech spectrum
/// carries most of its energy; falling 24 dB per octave above 2.5 kHz), times a syllabic envelope: a second
/// seeded noise low-passed at 4 Hz (the syllable rate of running speech, common practice), squared and scaled
/// to [0.05, 1]. Generated at 16 kHz over the whole duration (a float a sample: 3.8 MB for 60 s), peak
/// normalised to 0.95, read by linear interpolation. Not speech: no formants, no pitch.
class speech_noise_modulation final : public modulation {
public:
    /// @param duration_s programme length, s; (0, 3600]. @param seed any value. Throws config_error.
    speech_noise_modulation(double duration_s, std::uint64_t seed);
    [[nodiscard]] double value(double t_s) const noexcept override;
    [[nodiscard]] double duration_s() const noexcept override { return m_duration_s; }
    [[nodiscard]] double max_frequency_hz() const noexcept override { return 5000.0; }
    /// The generated samples at sample_rate_hz (for tests).
    [[nodiscard]] const std::vector<float>& samples() const noexcept { return m_x; }
    static constexpr double sample_rate_hz = 16000.0;

private:
    std::vector<float> m_x;
    double m_duration_s;
};

} // namespace galena
