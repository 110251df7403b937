/// Digital filters for the audio path: Kaiser FIR design, streaming and decimating FIRs, biquads, and the
/// continuous-to-discrete sampler that turns the solver's piecewise-cubic output into audio-rate samples.
#pragma once

#include <cstddef>
#include <span>
#include <memory>
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

/// Band-limited resampling of a uniform stream onto another uniform time grid, at any rate ratio and offset
/// (the bandlimited-interpolation method: each output is a weighted sum of the inputs around it, with a
/// Kaiser-windowed sinc low-pass as the continuous-time kernel):
///
///   y(tau_j) = sum_i x_i h(tau_j - t_i) / sum_i h(tau_j - t_i),  t_i = t_in0 + i / f_in,  tau_j = t_out0 + j / f_out.
///
/// Normalising by the kernel sum makes DC exact at every output phase. The kernel is tabulated at 1024
/// points per input spacing and interpolated linearly (error below -110 dB). Streaming: push inputs in
/// order; each output appears once the inputs up to tau_j + half_width_s() have arrived. Inputs before
/// the first one pushed are taken equal to it (a signal at rest before it starts).
/// Not for ratios where the kernel spans more than about 10^5 inputs.
class sinc_resampler {
public:
    /// @param input_rate_hz  f_in, Hz; > 0.  @param input_t0_s  time of input 0, s
    /// @param output_rate_hz f_out, Hz; > 0.  @param output_t0_s time of output 0, s
    /// @param pass_hz passband edge, Hz; (0, stop_hz).  @param stop_hz stopband edge, Hz
    /// @param attenuation_db stopband attenuation, dB; [21, 200]
    sinc_resampler(double input_rate_hz, double input_t0_s, double output_rate_hz, double output_t0_s, double pass_hz,
                   double stop_hz, double attenuation_db);
    /// Feeds one input sample; appends the outputs it completes to `out`.
    void push(double x, std::vector<double>& out);
    /// Half the kernel's length, s: output j needs the inputs up to tau_j + this.
    [[nodiscard]] double half_width_s() const noexcept { return m_half_in / m_in_rate; }
    /// Outputs delivered so far.
    [[nodiscard]] std::size_t count() const noexcept { return m_next_out; }
    /// Phases of the polyphase form: Q when f_in / f_out = P / Q exactly in floating point with a small Q (each
    /// output then sums precomputed weights), 0 when the kernel is interpolated for every output.
    [[nodiscard]] std::size_t phases() const noexcept { return m_period_out; }

private:
    [[nodiscard]] double kernel(double d_in) const noexcept; // kernel at d_in input spacings (table + lerp)
    double m_in_rate;
    double m_p0;          // position of output 0 in input-sample units: (t_out0 - t_in0) f_in
    double m_ratio;       // f_in / f_out: input samples per output
    double m_half_in;     // kernel half-width in input samples
    /// Kernel at k / 1024 input spacings, k = 0 .. ceil(half * 1024) + 1; shared by resamplers of the same
    /// design (a render builds one per chain, and the table costs tens of thousands of Bessel evaluations).
    std::shared_ptr<const std::vector<double>> m_table;
    // Polyphase form, when f_in / f_out = P / Q exactly in floating point with a small Q: output m = k Q + r
    // uses phase r's weights (the same kernel values) on the inputs from m_phase_lo[r] + k P on.
    long long m_period_in = 0;             // P (0: no polyphase form)
    std::size_t m_period_out = 0;          // Q
    std::size_t m_stride = 0;              // weights per phase (the longest phase's count)
    std::vector<double> m_phase_w;         // Q x m_stride weights, zero-padded
    std::vector<double> m_phase_wsum;      // their sums
    std::vector<long long> m_phase_lo;     // first input of each phase at k = 0
    std::vector<double> m_buf;   // inputs [m_buf_first, m_buf_first + size)
    long long m_buf_first = 0;
    long long m_pushed = 0;
    double m_first_value = 0.0;
    std::size_t m_next_out = 0;
};

} // namespace galena
