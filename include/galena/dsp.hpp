/// Digital filters for the audio path: Kaiser FIR design, streaming and decimating FIRs, biquads, and the
/// continuous-to-discrete sampler that turns the solver's piecewise-cubic output into audio-rate samples.
#pragma once

#include <cstddef>
#include <span>
#include <vector>

namespace galena {

/// Kaiser window beta for a stopband attenuation in dB (Kaiser's empirical formula, as given in
/// Oppenheim & Schafer, Discrete-Time Signal Processing, sec. 7.5).
[[nodiscard]] double kaiser_beta(double attenuation_db);

/// Linear-phase low-pass FIR by the Kaiser window method, normalised to unit DC gain.
/// @param cutoff     -6 dB edge, cycles per sample; (0, 0.5)
/// @param transition full transition width, cycles per sample; (0, 0.5)
/// @param attenuation_db stopband attenuation, dB; [21, 200]
/// @return an odd number of taps; delay (size-1)/2 samples. Throws config_error on bad ranges.
[[nodiscard]] std::vector<double> kaiser_lowpass(double cutoff, double transition, double attenuation_db);

/// Coefficients of a B-spline (boxcar convolved `order` times) of the given box length, unit DC gain.
/// Its response is sinc^order with nulls at multiples of 1/length cycles per sample.
[[nodiscard]] std::vector<double> bspline_kernel(std::size_t box_length, int order);

/// Streaming FIR with optional integer decimation. Create, then push blocks; outputs appear once every
/// `decimation` inputs. reset() clears the history. Not for filters longer than about 10^5 taps.
class fir_decimator {
public:
    /// @param taps       impulse response (non-empty)
    /// @param decimation output one sample per this many inputs; >= 1
    fir_decimator(std::vector<double> taps, std::size_t decimation);

    /// Feeds one input sample; returns true and sets `out` when an output sample is due.
    bool push(double x, double& out) noexcept;
    /// Feeds a block and appends the outputs to `out`.
    void process(std::span<const double> in, std::vector<double>& out);
    void reset() noexcept;
    [[nodiscard]] std::size_t size() const noexcept { return m_taps.size(); }
    [[nodiscard]] std::size_t decimation() const noexcept { return m_decimation; }
    /// Group delay in input samples, (taps - 1) / 2 for a symmetric design.
    [[nodiscard]] double delay_samples() const noexcept { return 0.5 * static_cast<double>(m_taps.size() - 1); }

private:
    std::vector<double> m_taps;   // reversed, so the dot product runs forward over the history
    std::vector<double> m_history; // ring of 2*size, written twice so a contiguous window always exists
    std::size_t m_decimation;
    std::size_t m_pos = 0;
    std::size_t m_phase = 0;
};

/// Direct-form-II-transposed biquad section.
class biquad {
public:
    biquad(double b0, double b1, double b2, double a1, double a2) noexcept
        : m_b0(b0), m_b1(b1), m_b2(b2), m_a1(a1), m_a2(a2) {}
    /// Second-order Butterworth high-pass (bilinear transform with pre-warping).
    /// @param corner_hz -3 dB corner, Hz; (0, sample_rate_hz / 2)
    [[nodiscard]] static biquad butterworth_highpass(double corner_hz, double sample_rate_hz);
    /// Second-order Butterworth low-pass (bilinear transform with pre-warping).
    [[nodiscard]] static biquad butterworth_lowpass(double corner_hz, double sample_rate_hz);
    double process(double x) noexcept
    {
        const double y = m_b0 * x + m_z1;
        m_z1 = m_b1 * x - m_a1 * y + m_z2;
        m_z2 = m_b2 * x - m_a2 * y;
        return y;
    }
    /// Sets the state as if the input had been constant at x forever (no start-up transient).
    void settle_to(double x) noexcept;

private:
    double m_b0, m_b1, m_b2, m_a1, m_a2;
    double m_z1 = 0.0;
    double m_z2 = 0.0;
};

/// Box-integrates a piecewise-cubic signal into uniform samples: sample k is the mean of the signal over
/// [t_origin + k T, t_origin + (k+1) T). The signal arrives as consecutive Hermite segments (the dense
/// output of a one-step solver): values and slopes at both ends. The averaging is exact for cubics, and
/// acts as a continuous-time sinc prefilter with nulls at multiples of 1/T, so carrier components do not
/// alias into the audio band by point sampling.
class box_sampler {
public:
    /// @param period_s  T, s; > 0
    /// @param origin_s  time of the first sample boundary, s
    box_sampler(double period_s, double origin_s) noexcept
        : m_period_s(period_s), m_origin_s(origin_s) {}
    /// Adds the segment [t0, t1] with values p0, p1 and derivatives d0, d1 (units/s). Segments must be
    /// contiguous and increasing. Completed samples are appended to `out`.
    void add_segment(double t0, double t1, double p0, double p1, double d0, double d1, std::vector<double>& out);
    /// Number of samples completed so far.
    [[nodiscard]] std::size_t count() const noexcept { return m_count; }

private:
    double m_period_s;
    double m_origin_s;
    std::size_t m_count = 0;
    double m_accum = 0.0; // integral over the current bin so far, units*s
};

} // namespace galena
