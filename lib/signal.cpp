#include "galena/signal.hpp"

#include "galena/constants.hpp"
#include "galena/dsp.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <samplerate.h>

namespace galena {

using detail::require_above;
using detail::require_range;

tone_modulation::tone_modulation(std::vector<double> f, std::vector<double> w, double duration_s)
    : m_frequencies_hz(std::move(f)), m_duration_s(duration_s)
{
    if (m_frequencies_hz.empty() || m_frequencies_hz.size() != w.size())
        throw config_error("tone: need one weight per frequency and at least one tone");
    require_above("signal.duration_s", duration_s, 0.0, 1e6, "s");
    double sum = 0.0;
    for (std::size_t k = 0; k < w.size(); ++k) {
        require_above("signal.tone_hz", m_frequencies_hz[k], 0.0, 1e6, "Hz");
        require_above("tone weight", w[k], 0.0, 1e12);
        sum += w[k];
    }
    // With incommensurate tones the peak of the sum approaches the sum of amplitudes; normalising by the
    // sum keeps |x| <= 1 for any phase relation.
    for (double v : w) m_amplitudes.push_back(v / sum);
}

double tone_modulation::value(double t) const noexcept
{
    if (t < 0.0 || t >= m_duration_s) return 0.0;
    double x = 0.0;
    for (std::size_t k = 0; k < m_amplitudes.size(); ++k) x += m_amplitudes[k] * std::sin(two_pi * m_frequencies_hz[k] * t);
    return x;
}

double tone_modulation::max_frequency_hz() const noexcept
{
    return *std::max_element(m_frequencies_hz.begin(), m_frequencies_hz.end());
}

stepped_tone_modulation::stepped_tone_modulation(std::vector<double> f, double dwell_s)
    : m_frequencies_hz(std::move(f)), m_dwell_s(dwell_s)
{
    if (m_frequencies_hz.empty()) throw config_error("stepped tones: the frequency list is empty");
    for (double v : m_frequencies_hz) require_above("stepped tone frequency_hz", v, 0.0, 1e6, "Hz");
    require_above("stepped tone dwell_s", dwell_s, 0.01, 1e4, "s");
}

double stepped_tone_modulation::duration_s() const noexcept
{
    return m_dwell_s * static_cast<double>(m_frequencies_hz.size());
}

double stepped_tone_modulation::max_frequency_hz() const noexcept
{
    // The highest tone; the 2 ms raised-cosine crossfades add nothing above a few hundred hertz.
    return *std::max_element(m_frequencies_hz.begin(), m_frequencies_hz.end());
}

double stepped_tone_modulation::value(double t) const noexcept
{
    if (t < 0.0 || t >= duration_s()) return 0.0;
    const auto k = std::min(static_cast<std::size_t>(t / m_dwell_s), m_frequencies_hz.size() - 1);
    const double local = t - static_cast<double>(k) * m_dwell_s;
    constexpr double fade_s = 2e-3;
    double g = 1.0;
    if (local < fade_s) g = 0.5 * (1.0 - std::cos(pi * local / fade_s));
    else if (m_dwell_s - local < fade_s) g = 0.5 * (1.0 - std::cos(pi * (m_dwell_s - local) / fade_s));
    return g * std::sin(two_pi * m_frequencies_hz[k] * local);
}

log_sweep_modulation::log_sweep_modulation(double f1, double f2, double duration_s)
    : m_f1(f1), m_f2(f2), m_duration_s(duration_s)
{
    require_above("sweep start_hz", f1, 0.0, 1e6, "Hz");
    require_above("sweep stop_hz", f2, f1, 1e6, "Hz");
    require_above("sweep duration_s", duration_s, 0.0, 1e6, "s");
    m_k = std::log(f2 / f1) / duration_s;
}

double log_sweep_modulation::value(double t) const noexcept
{
    if (t < 0.0 || t >= m_duration_s) return 0.0;
    return std::sin(two_pi * m_f1 / m_k * (std::exp(m_k * t) - 1.0));
}

double log_sweep_modulation::frequency_at(double t) const noexcept { return m_f1 * std::exp(m_k * t); }

buffer_reader::buffer_reader(std::vector<float> samples, double rate) : m_samples(std::move(samples)), m_rate_hz(rate) {}

std::size_t buffer_reader::read(std::span<float> out)
{
    const std::size_t n = std::min(out.size(), m_samples.size() - m_pos);
    std::copy_n(m_samples.begin() + static_cast<std::ptrdiff_t>(m_pos), n, out.begin());
    m_pos += n;
    return n;
}

// ---------------------------------------------------------------------------------------------------------
// Clip conditioning pipeline: reader -> band-limiting FIR (delay removed) -> libsamplerate -> float samples.
class clip_modulation::pipeline {
public:
    /// input_gain scales the raw samples before any filtering, so that the float stages (FIR output,
    /// libsamplerate) never see values that can overflow; it is 1 / (raw peak).
    pipeline(std::unique_ptr<sample_reader> r, double cutoff_hz, double out_rate_hz, std::size_t max_frames, double input_gain)
        : m_reader(std::move(r)), m_ratio(out_rate_hz / m_reader->sample_rate_hz()), m_max_frames(max_frames),
          m_input_gain(input_gain),
          m_fir(kaiser_lowpass(cutoff_hz / m_reader->sample_rate_hz(), 0.1 * cutoff_hz / m_reader->sample_rate_hz(), 60.0), 1)
    {
        int err = 0;
        m_src = src_new(SRC_SINC_MEDIUM_QUALITY, 1, &err);
        if (m_src == nullptr) throw audio_error(fmt::format("resampler: {}", src_strerror(err)));
        m_delay = static_cast<std::size_t>(m_fir.delay_samples());
    }
    ~pipeline() { src_delete(m_src); }
    pipeline(const pipeline&) = delete;
    pipeline& operator=(const pipeline&) = delete;

    void rewind()
    {
        m_reader->rewind();
        m_fir.reset();
        src_reset(m_src);
        m_consumed = 0;
        m_discarded = 0;
        m_flushed = 0;
        m_finished = false;
        m_pending.clear();
    }

    /// Appends at least one block of output samples; returns false once everything has been produced.
    bool produce(std::vector<float>& out)
    {
        if (m_finished) return false;
        constexpr std::size_t block = 4096;
        std::vector<float> raw(block);
        std::size_t want = std::min(block, m_max_frames - m_consumed);
        std::size_t got = want > 0 ? m_reader->read(std::span<float>(raw.data(), want)) : 0;
        m_consumed += got;
        const bool input_done = got < want || m_consumed >= m_max_frames;
        m_pending.clear();
        double y;
        for (std::size_t i = 0; i < got; ++i) {
            if (!std::isfinite(raw[i]))
                throw audio_error(fmt::format("audio sample {} is not finite (NaN or Inf)", m_consumed - got + i));
            if (m_fir.push(m_input_gain * static_cast<double>(raw[i]), y)) emit(y);
        }
        if (input_done) {
            // Flush the FIR's delay line so the last input samples come out.
            while (m_flushed < m_delay) {
                ++m_flushed;
                if (m_fir.push(0.0, y)) emit(y);
            }
        }
        run_src(out, input_done);
        if (input_done) m_finished = true;
        return true;
    }

private:
    void emit(double y)
    {
        if (m_discarded < m_delay) { ++m_discarded; return; }
        m_pending.push_back(static_cast<float>(y));
    }
    void run_src(std::vector<float>& out, bool end)
    {
        std::size_t in_pos = 0;
        std::vector<float> buf(static_cast<std::size_t>(std::ceil(m_ratio * 4096.0)) + 64);
        while (true) {
            SRC_DATA d{};
            d.data_in = m_pending.data() + in_pos;
            d.input_frames = static_cast<long>(m_pending.size() - in_pos);
            d.data_out = buf.data();
            d.output_frames = static_cast<long>(buf.size());
            d.src_ratio = m_ratio;
            d.end_of_input = end ? 1 : 0;
            if (int e = src_process(m_src, &d); e != 0) throw audio_error(fmt::format("resampler: {}", src_strerror(e)));
            in_pos += static_cast<std::size_t>(d.input_frames_used);
            out.insert(out.end(), buf.begin(), buf.begin() + d.output_frames_gen);
            if (in_pos >= m_pending.size() && (!end || d.output_frames_gen == 0)) break;
        }
    }

    std::unique_ptr<sample_reader> m_reader;
    double m_ratio;
    std::size_t m_max_frames;
    double m_input_gain;
    fir_decimator m_fir;
    SRC_STATE* m_src = nullptr;
    std::size_t m_delay = 0;
    std::size_t m_consumed = 0;
    std::size_t m_discarded = 0;
    std::size_t m_flushed = 0;
    bool m_finished = false;
    std::vector<float> m_pending;
};

clip_modulation::clip_modulation(std::unique_ptr<sample_reader> reader, const conditioning_settings& s)
{
    if (!reader) throw config_error("clip: no reader");
    const double in_rate = reader->sample_rate_hz();
    require_range("signal.audio_cutoff_hz", s.cutoff_hz, 100.0, 0.45 * in_rate, "Hz (at most 0.45 x the clip's sample rate)");
    require_range("signal.duration_s", s.max_duration_s, 0.0, 1e6, "s");
    m_rate_hz = s.internal_rate_hz > 0.0 ? s.internal_rate_hz : std::max(192000.0, 16.0 * s.cutoff_hz);
    m_cutoff_hz = s.cutoff_hz;
    std::size_t frames = reader->frames();
    if (s.max_duration_s > 0.0) frames = std::min(frames, static_cast<std::size_t>(std::llround(s.max_duration_s * in_rate)));
    if (frames == 0) throw audio_error("audio clip has no samples");
    m_duration_s = static_cast<double>(frames) / in_rate;
    // Pass 0: the raw peak. A float clip may hold finite samples near FLT_MAX; filtering them unscaled
    // overflows the float stages to Inf and the normalisation to NaN. Scaling by 1 / (raw peak) first keeps
    // every stage within about [-2, 2] (the FIR's overshoot), whatever the clip's scale.
    const double raw_peak = [&] {
        double pk = 0.0;
        std::vector<float> raw(4096);
        std::size_t done = 0;
        while (done < frames) {
            const std::size_t want = std::min(raw.size(), frames - done);
            const std::size_t got = reader->read(std::span<float>(raw.data(), want));
            for (std::size_t i = 0; i < got; ++i) {
                if (!std::isfinite(raw[i])) throw audio_error(fmt::format("audio sample {} is not finite (NaN or Inf)", done + i));
                pk = std::max(pk, static_cast<double>(std::fabs(raw[i])));
            }
            done += got;
            if (got < want) break;
        }
        reader->rewind();
        return pk;
    }();
    if (!(raw_peak > 0.0)) throw audio_error("audio clip is silent (every sample is zero)");
    m_pipe = std::make_unique<pipeline>(std::move(reader), s.cutoff_hz, m_rate_hz, frames, 1.0 / raw_peak);
    // Pass 1: the peak of the conditioned signal.
    double peak = 0.0;
    std::vector<float> tmp;
    while (m_pipe->produce(tmp)) {
        for (float v : tmp) peak = std::max(peak, static_cast<double>(std::fabs(v)));
        tmp.clear();
    }
    if (!(peak > 1e-9)) throw audio_error("audio clip is silent after band-limiting (peak below 1e-9 of its raw peak)");
    if (!std::isfinite(peak)) throw audio_error("audio clip could not be conditioned (non-finite value after band-limiting)");
    m_input_gain = 1.0 / raw_peak;
    m_gain = 1.0 / peak;
    m_pipe->rewind();
}

clip_modulation::~clip_modulation() = default;

void clip_modulation::prepare(double t0, double t1)
{
    const auto first_needed = static_cast<std::size_t>(std::max(0.0, std::floor(t0 * m_rate_hz) - 2.0));
    // Drop samples that are no longer needed.
    if (first_needed > m_buf_first) {
        const std::size_t drop = std::min(first_needed - m_buf_first, m_buf.size());
        m_buf.erase(m_buf.begin(), m_buf.begin() + static_cast<std::ptrdiff_t>(drop));
        m_buf_first += drop;
    }
    const double last_needed = std::ceil(t1 * m_rate_hz) + 3.0;
    while (!m_exhausted && static_cast<double>(m_buf_first + m_buf.size()) < last_needed) {
        const std::size_t before = m_buf.size();
        if (!m_pipe->produce(m_buf)) m_exhausted = true;
        for (std::size_t i = before; i < m_buf.size(); ++i) m_buf[i] = static_cast<float>(m_buf[i] * m_gain);
        // Samples produced before the window (first call after a jump) are dropped.
        if (first_needed > m_buf_first) {
            const std::size_t drop = std::min(first_needed - m_buf_first, m_buf.size());
            m_buf.erase(m_buf.begin(), m_buf.begin() + static_cast<std::ptrdiff_t>(drop));
            m_buf_first += drop;
        }
    }
}

double clip_modulation::value(double t) const noexcept
{
    if (t < 0.0 || t >= m_duration_s) return 0.0;
    const double pos = t * m_rate_hz;
    const double fl = std::floor(pos);
    const double u = pos - fl;
    const auto i = static_cast<std::ptrdiff_t>(fl);
    auto at = [&](std::ptrdiff_t k) -> double {
        const std::ptrdiff_t j = k - static_cast<std::ptrdiff_t>(m_buf_first);
        if (j < 0 || j >= static_cast<std::ptrdiff_t>(m_buf.size())) return 0.0;
        return m_buf[static_cast<std::size_t>(j)];
    };
    const double y0 = at(i - 1), y1 = at(i), y2 = at(i + 1), y3 = at(i + 2);
    // Catmull-Rom cubic.
    const double c1 = 0.5 * (y2 - y0);
    const double c2 = y0 - 2.5 * y1 + 2.0 * y2 - 0.5 * y3;
    const double c3 = 0.5 * (y3 - y0) + 1.5 * (y1 - y2);
    return std::clamp(((c3 * u + c2) * u + c1) * u + y1, -1.0, 1.0);
}

// ---------------------------------------------------------------------------------------------------------
const am_params& am_params::validate() const
{
    require_range("signal.carrier_hz", carrier_hz, 1e4, 1e8, "Hz");
    require_above("signal.carrier_peak_v", carrier_peak_v, 0.0, 1e3, "V");
    if (allow_overmodulation) require_range("signal.modulation_index", modulation_index, 0.0, 2.0);
    else require_range("signal.modulation_index", modulation_index, 0.0, 1.0, "(set signal.allow_overmodulation = true to go above 1)");
    require_range("signal.preroll_s", preroll_s, 0.0, 1e3, "s");
    require_range("signal.ramp_s", ramp_s, 0.0, preroll_s, "s (at most the preroll)");
    return *this;
}

am_source::am_source(const am_params& p, const modulation* x) : m_p(p), m_x(x)
{
    p.validate();
}

double am_source::envelope(double t) const noexcept
{
    double r = 1.0;
    if (t < m_p.ramp_s) r = t <= 0.0 ? 0.0 : 0.5 * (1.0 - std::cos(pi * t / m_p.ramp_s));
    const double x = m_x != nullptr ? m_x->value(t - m_p.preroll_s) : 0.0;
    return m_p.carrier_peak_v * r * (1.0 + m_p.modulation_index * x);
}

double am_source::voltage(double t) const noexcept
{
    // Reduce the phase in cycles first: cos() of a huge argument (fc t ~ 1e9 rad for a long clip) is slow
    // and loses precision in its own range reduction.
    const double cycles = m_p.carrier_hz * t;
    return envelope(t) * std::cos(two_pi * (cycles - std::floor(cycles)));
}

double am_source::modulation_max_frequency_hz() const noexcept
{
    return m_x != nullptr ? m_x->max_frequency_hz() : 0.0;
}

double am_source::end_s() const noexcept { return m_p.preroll_s + (m_x != nullptr ? m_x->duration_s() : 0.0); }

phase_locked_source::phase_locked_source(const am_source& source, int n) : m_src(&source), m_n(n)
{
    if (n < 2) throw config_error(fmt::format("phase_locked_source: {} steps per cycle; at least 2", n));
    const double fc = source.params().carrier_hz;
    const double f_max = source.modulation_max_frequency_hz();
    m_k = std::clamp(static_cast<int>(std::ceil(two_pi * f_max / fc / 0.05)), 1, 64);
    m_env_dt = 1.0 / (fc * m_k);
    m_sub_first.assign(static_cast<std::size_t>(m_k) + 1, n);
    for (auto* w : {&m_w0, &m_w1, &m_w2, &m_w3}) w->assign(static_cast<std::size_t>(n), 0.0);
    for (int k = n; k >= 1; --k) {
        const double pos = static_cast<double>(k) * m_k / n; // in envelope intervals
        const int sub = std::min(static_cast<int>(pos), m_k - 1);
        const double f = pos - sub;
        const double c = std::cos(two_pi * k / n);
        const auto i = static_cast<std::size_t>(k - 1);
        m_w0[i] = -f * (f - 1.0) * (f - 2.0) / 6.0 * c;
        m_w1[i] = (f + 1.0) * (f - 1.0) * (f - 2.0) / 2.0 * c;
        m_w2[i] = -(f + 1.0) * f * (f - 2.0) / 2.0 * c;
        m_w3[i] = (f + 1.0) * f * (f - 1.0) / 6.0 * c;
        m_sub_first[static_cast<std::size_t>(sub)] = k - 1;
    }
    for (int sub = m_k - 1; sub >= 0; --sub) { // an interval without steps starts where the next one does
        const auto i = static_cast<std::size_t>(sub);
        m_sub_first[i] = std::min(m_sub_first[i], m_sub_first[i + 1]);
    }
    m_env.assign(static_cast<std::size_t>(m_k) + 3, 0.0);
}

double phase_locked_source::envelope_at(long long j) const noexcept
{
    // Before t = 0 the envelope is continued by its value at 0: the simulation starts there, and a source
    // switched on abruptly at t = 0 must not be smeared into the first cycle by the interpolation.
    return m_src->envelope(j > 0 ? static_cast<double>(j) * m_env_dt : 0.0);
}

void phase_locked_source::cycle(std::size_t c, std::span<double> u)
{
    if (static_cast<int>(u.size()) != m_n)
        throw config_error(fmt::format("phase_locked_source::cycle: {} samples requested, {} per cycle", u.size(), m_n));
    const auto k = static_cast<long long>(m_k);
    if (m_valid && c == m_cycle + 1) {
        // Shift by one cycle: keep the last three samples, evaluate K new ones.
        std::copy(m_env.end() - 3, m_env.end(), m_env.begin());
        const long long j_next = static_cast<long long>(c) * k + 2;
        for (long long i = 0; i < k; ++i) m_env[static_cast<std::size_t>(i) + 3] = envelope_at(j_next + i);
    } else if (!(m_valid && c == m_cycle)) {
        const long long j0 = static_cast<long long>(c) * k - 1;
        for (std::size_t i = 0; i < m_env.size(); ++i) m_env[i] = envelope_at(j0 + static_cast<long long>(i));
    }
    m_cycle = c;
    m_valid = true;
    for (int sub = 0; sub < m_k; ++sub) {
        const auto s0 = static_cast<std::size_t>(sub);
        const double e0 = m_env[s0], e1 = m_env[s0 + 1], e2 = m_env[s0 + 2], e3 = m_env[s0 + 3];
        for (auto i = static_cast<std::size_t>(m_sub_first[s0]); i < static_cast<std::size_t>(m_sub_first[s0 + 1]); ++i)
            u[i] = m_w0[i] * e0 + m_w1[i] * e1 + m_w2[i] * e2 + m_w3[i] * e3;
    }
}

} // namespace galena
