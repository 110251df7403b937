/// Programme material and the AM source: test tones, sampled audio conditioned onto the simulation time
/// base, and full-carrier double-sideband AM with a gentle carrier ramp-up before the programme starts.
#pragma once

#include <cstddef>
#include <memory>
#include <span>
#include <vector>

namespace galena {

/// A modulating waveform x(t) with |x| <= 1, defined on [0, duration_s()) and 0 outside.
/// value() may be called for any t inside the window last passed to prepare().
class modulation {
public:
    virtual ~modulation() = default;
    /// x at programme time t_s, s.
    [[nodiscard]] virtual double value(double t_s) const noexcept = 0;
    /// Programme length, s.
    [[nodiscard]] virtual double duration_s() const noexcept = 0;
    /// Ensures value() is valid for t in [t0_s, t1_s]; t0_s never decreases between calls.
    virtual void prepare(double /*t0_s*/, double /*t1_s*/) {}
    /// Highest frequency the waveform carries with significant amplitude, Hz (the solver samples the
    /// envelope finely enough for it). The default assumes a full audio band.
    [[nodiscard]] virtual double max_frequency_hz() const noexcept { return 20000.0; }
};

/// A sum of sinusoids sum_k a_k sin(2 pi f_k t), scaled so the peak is exactly `peak` (<= 1).
/// One tone is the classic receiver test; two tones are the IMD pair.
class tone_modulation final : public modulation {
public:
    /// @param frequencies_hz tone frequencies, Hz; each in (0, 1e6]
    /// @param weights        relative amplitudes, > 0 (e.g. {4, 1} for a 4:1 pair)
    /// @param duration_s     programme length, s; > 0
    tone_modulation(std::vector<double> frequencies_hz, std::vector<double> weights, double duration_s);
    [[nodiscard]] double value(double t_s) const noexcept override;
    [[nodiscard]] double duration_s() const noexcept override { return m_duration_s; }
    /// Amplitude of tone k in x (peak-normalised), dimensionless.
    [[nodiscard]] double amplitude(std::size_t k) const { return m_amplitudes.at(k); }
    [[nodiscard]] const std::vector<double>& frequencies_hz() const noexcept { return m_frequencies_hz; }
    [[nodiscard]] double max_frequency_hz() const noexcept override;

private:
    std::vector<double> m_frequencies_hz;
    std::vector<double> m_amplitudes;
    double m_duration_s;
};

/// Stepped tones: each frequency in turn for `dwell_s`, unit amplitude, with short raised-cosine
/// crossfades (2 ms) so each step starts without a click. Used for frequency-response measurements.
class stepped_tone_modulation final : public modulation {
public:
    stepped_tone_modulation(std::vector<double> frequencies_hz, double dwell_s);
    [[nodiscard]] double value(double t_s) const noexcept override;
    [[nodiscard]] double duration_s() const noexcept override;
    [[nodiscard]] double dwell_s() const noexcept { return m_dwell_s; }
    [[nodiscard]] const std::vector<double>& frequencies_hz() const noexcept { return m_frequencies_hz; }
    [[nodiscard]] double max_frequency_hz() const noexcept override;

private:
    std::vector<double> m_frequencies_hz;
    double m_dwell_s;
};

/// Exponential (log) sine sweep x = sin(2 pi f1 T/ln(f2/f1) (exp(t ln(f2/f1)/T) - 1)) from f1 to f2 over T.
class log_sweep_modulation final : public modulation {
public:
    log_sweep_modulation(double f_start_hz, double f_stop_hz, double duration_s);
    [[nodiscard]] double value(double t_s) const noexcept override;
    [[nodiscard]] double duration_s() const noexcept override { return m_duration_s; }
    /// Instantaneous frequency at time t, Hz.
    [[nodiscard]] double frequency_at(double t_s) const noexcept;
    [[nodiscard]] double max_frequency_hz() const noexcept override { return m_f2; }

private:
    double m_f1, m_f2, m_duration_s, m_k;
};

/// A source of mono samples at a fixed rate, read sequentially (a WAV file, a buffer).
class sample_reader {
public:
    virtual ~sample_reader() = default;
    /// Reads up to out.size() samples; returns how many were read (0 at the end).
    virtual std::size_t read(std::span<float> out) = 0;
    [[nodiscard]] virtual double sample_rate_hz() const noexcept = 0;
    /// Total number of samples.
    [[nodiscard]] virtual std::size_t frames() const noexcept = 0;
    /// Restarts at the first sample.
    virtual void rewind() = 0;
};

/// A sample_reader over a buffer in memory.
class buffer_reader final : public sample_reader {
public:
    buffer_reader(std::vector<float> samples, double sample_rate_hz);
    std::size_t read(std::span<float> out) override;
    [[nodiscard]] double sample_rate_hz() const noexcept override { return m_rate_hz; }
    [[nodiscard]] std::size_t frames() const noexcept override { return m_samples.size(); }
    void rewind() override { m_pos = 0; }

private:
    std::vector<float> m_samples;
    double m_rate_hz;
    std::size_t m_pos = 0;
};

/// Settings for conditioning a clip into a modulating signal.
struct conditioning_settings {
    double cutoff_hz = 5000.0;       ///< band limit, Hz; [100, 0.45 * input rate]
    double max_duration_s = 0.0;     ///< 0 = whole clip; else truncate to this, s
    double internal_rate_hz = 0.0;   ///< 0 = automatic: >= 16 x cutoff and >= 192 kHz
};

/// Audio clip conditioned for AM: band-limited by a linear-phase Kaiser FIR (60 dB, 10 % transition)
/// with its delay removed, resampled by libsamplerate (best sinc) to an internal rate, peak-normalised
/// to 1, and streamed through a bounded buffer with 4-point cubic interpolation.
/// Memory is bounded by the prepare() window, not the clip length. Two passes over the reader: one for
/// the peak, one to play.
class clip_modulation final : public modulation {
public:
    /// Throws audio_error when the clip is silent or holds non-finite samples, config_error on bad settings.
    clip_modulation(std::unique_ptr<sample_reader> reader, const conditioning_settings& settings);
    ~clip_modulation() override;
    [[nodiscard]] double value(double t_s) const noexcept override;
    [[nodiscard]] double duration_s() const noexcept override { return m_duration_s; }
    void prepare(double t0_s, double t1_s) override;
    /// Gain applied to reach peak 1 (input full scale -> x), dimensionless.
    /// The overall gain from the clip's raw samples to the normalised programme (peak 1).
    [[nodiscard]] double normalisation_gain() const noexcept { return m_input_gain * m_gain; }
    [[nodiscard]] double internal_rate_hz() const noexcept { return m_rate_hz; }
    /// The band limit plus its FIR's transition band, Hz.
    [[nodiscard]] double max_frequency_hz() const noexcept override { return 1.1 * m_cutoff_hz; }

private:
    class pipeline;
    std::unique_ptr<pipeline> m_pipe;
    double m_duration_s = 0.0;
    double m_rate_hz = 0.0;
    double m_input_gain = 1.0; ///< 1 / raw peak, applied before filtering
    double m_gain = 1.0;       ///< 1 / conditioned peak (of the input-scaled signal)
    double m_cutoff_hz = 5000.0;
    std::vector<float> m_buf;   // samples [m_buf_first, m_buf_first + m_buf.size())
    std::size_t m_buf_first = 0;
    bool m_exhausted = false;
};

/// Parameters of the AM wave s(t) = A r(t) (1 + m x(t - t_pre)) cos(2 pi fc t), where r ramps the carrier
/// from 0 to 1 with a raised cosine over `ramp_s` and x starts after `preroll_s`.
struct am_params {
    double carrier_hz = 1.0e6;        ///< fc, Hz; [1e4, 1e8]
    double carrier_peak_v = 0.3;      ///< A, open-circuit peak of the unmodulated carrier, V; (0, 1e3]
    double modulation_index = 0.3;    ///< m; [0, 1], or (1, 2] with allow_overmodulation
    bool allow_overmodulation = false;
    double preroll_s = 0.0;           ///< unmodulated carrier before the programme, s; >= 0
    double ramp_s = 0.0;              ///< carrier ramp-up, s; [0, preroll_s]

    const am_params& validate() const;
};

/// The AM source voltage. Holds a non-owning pointer to the modulation (which must outlive it).
class am_source {
public:
    am_source(const am_params& p, const modulation* x);
    /// Open-circuit source voltage at simulation time t_s, V.
    [[nodiscard]] double voltage(double t_s) const noexcept;
    /// Envelope A r(t)(1 + m x), V (>= 0 unless overmodulated).
    [[nodiscard]] double envelope(double t_s) const noexcept;
    [[nodiscard]] const am_params& params() const noexcept { return m_p; }
    /// Simulation time at which the programme ends, s.
    [[nodiscard]] double end_s() const noexcept;
    /// The modulation's highest significant frequency, Hz (0 without a modulation).
    [[nodiscard]] double modulation_max_frequency_hz() const noexcept;

private:
    am_params m_p;
    const modulation* m_x;
};

/// The AM source sampled on a carrier-phase-locked grid: cycle c, step k (1..N) is time (c + k/N) / fc,
/// where the carrier is exactly cos(2 pi k / N). The envelope is evaluated K times per cycle (K chosen
/// from the programme's highest frequency so that 2 pi f_max T / K <= 0.05) and interpolated to the steps
/// by 4-point Lagrange (error below 2e-7 of the modulation: the bound 9/16 (w h)^4 / 24). Cheaper than
/// evaluating the source at every step by a factor of about N / K in envelope evaluations.
class phase_locked_source {
public:
    /// @param steps_per_cycle N; >= 2. The source (and its modulation) must outlive this object.
    phase_locked_source(const am_source& source, int steps_per_cycle);
    /// Source voltage at the N step ends of cycle c (phases 1/N .. N/N), V. Sequential calls (c, c + 1,
    /// ...) evaluate K new envelope samples each; any other order re-evaluates the window.
    void cycle(std::size_t c, std::span<double> u_v);
    /// Envelope samples per carrier cycle, K.
    [[nodiscard]] int envelope_samples_per_cycle() const noexcept { return m_k; }

private:
    [[nodiscard]] double envelope_at(long long j) const noexcept; // envelope at j T / K, continued before 0
    const am_source* m_src;
    int m_n;
    int m_k;
    double m_env_dt;
    std::vector<int> m_sub_first;              // first step (0-based) of each envelope interval; [K] = N
    std::vector<double> m_w0, m_w1, m_w2, m_w3; // Lagrange weights times the carrier, per step
    std::vector<double> m_env;                 // envelope at j = c K - 1 .. c K + K + 1
    std::size_t m_cycle = 0;                   // cycle the window holds
    bool m_valid = false;
};

} // namespace galena
