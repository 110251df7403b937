#include "galena/render.hpp"

#include "galena/dsp.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <chrono>
#include <cmath>
#include <fmt/format.h>

namespace galena {

double automatic_preroll_s(const detector_network& net, double rate)
{
    const double tau = net.output_time_constant_s();
    const double pre = std::clamp(std::isfinite(tau) ? 5.0 * tau : 0.25, 5e-3, 0.25);
    return std::ceil(pre * rate) / rate;
}

namespace {

/// The three-stage decimation chain from the solver's dense output to the audio rate.
class decimation_chain {
public:
    decimation_chain(double audio_rate, double carrier_hz)
        : m_r1(static_cast<std::size_t>(std::ceil(8.0 * carrier_hz / (4.0 * audio_rate)))),
          m_fine_period(1.0 / (audio_rate * 4.0 * static_cast<double>(m_r1))),
          m_stage1(bspline_kernel(m_r1, 3), m_r1),
          // Passband to 0.42 fs, stopband from 0.5 fs (in cycles per sample at 4 fs: 0.105 and 0.125).
          m_stage2(kaiser_lowpass(0.115, 0.02, 90.0), 4),
          m_box(m_fine_period, 0.0)
    {
        // Time of audio sample n before any origin shift: a + n / fs (see DEVELOPERS.md, "Decimation").
        const double t0 = m_fine_period;
        const double l1 = static_cast<double>(m_stage1.size());
        const double l2 = static_cast<double>(m_stage2.size());
        const double period1 = static_cast<double>(m_r1) * t0;
        const double a = (4.0 - 1.0 - 0.5 * (l2 - 1.0)) * period1 + (static_cast<double>(m_r1) - 0.5 - 0.5 * (l1 - 1.0)) * t0;
        // Sample n of the chain is centred at origin + a + n / fs. With the box origin at -a (the chain's
        // total delay, a < 0) it is centred exactly at n / fs: programme-aligned, no fractional offset.
        m_delay_s = -a;
        m_box = box_sampler(m_fine_period, m_delay_s);
    }
    /// How far the chain's output lags the simulation, s.
    [[nodiscard]] double delay_s() const noexcept { return m_delay_s; }
    [[nodiscard]] double fine_rate_hz() const noexcept { return 1.0 / m_fine_period; }

    void add_segment(double t0, double t1, double p0, double p1, double d0, double d1, std::vector<double>& audio_out)
    {
        m_fine.clear();
        m_box.add_segment(t0, t1, p0, p1, d0, d1, m_fine);
        double y1, y2;
        for (double v : m_fine)
            if (m_stage1.push(v, y1) && m_stage2.push(y1, y2)) audio_out.push_back(y2);
    }

private:
    std::size_t m_r1;
    double m_fine_period;
    fir_decimator m_stage1;
    fir_decimator m_stage2;
    box_sampler m_box;
    double m_delay_s = 0.0;
    std::vector<double> m_fine;
};

} // namespace

render_result render(const circuit_params& circuit, am_params am, modulation& programme, const render_settings& s,
                     const audio_sink& sink)
{
    using clock = std::chrono::steady_clock;
    const auto wall0 = clock::now();
    detail::require_range("output.sample_rate_hz", s.audio_rate_hz, 8000.0, 192000.0, "Hz");
    detail::require_range("render.dc_block_hz", s.dc_block_hz, 1e-3, 200.0, "Hz");
    detail::require_range("render.chunk_s", s.chunk_s, 1e-4, 1.0, "s");
    detail::require_range("solver.relative_tolerance", s.stepper.relative_tolerance, 1e-10, 1e-1);
    detail::require_above("solver.absolute_tolerance_v", s.stepper.absolute_tolerance_v, 0.0, 1.0, "V");
    detail::require_range("solver.carrier_steps_floor", s.carrier_steps_floor, 4.0, 1000.0);
    const detector_network net(circuit);
    const double fs = s.audio_rate_hz;
    am.preroll_s = s.preroll_s >= 0.0 ? std::ceil(s.preroll_s * fs) / fs : automatic_preroll_s(net, fs);
    am.ramp_s = std::min(2e-3, 0.5 * am.preroll_s);
    am.validate();
    if (am.carrier_hz < 2.5 * 0.5 * fs)
        throw config_error(fmt::format("signal.carrier_hz = {}: must be at least 2.5 x the audio Nyquist frequency ({} Hz) "
                                       "so the carrier and its sidebands stay clear of the audio band",
                                       detail::format_value(am.carrier_hz), 0.5 * fs));
    const am_source src(am, &programme);

    render_result res;
    res.audio_rate_hz = fs;
    if (s.carrier_steps_floor < 30.0)
        res.warnings.push_back(fmt::format(
            "solver.carrier_steps_floor = {}: below 30 steps per carrier cycle the error accumulates over the cycles "
            "(measured 1.5e-3 relRMS at 20 against 7e-6 at 40); keep 40 for comparisons",
            detail::format_value(s.carrier_steps_floor)));
    res.preroll_s = am.preroll_s;
    const auto total = static_cast<std::size_t>(std::llround(programme.duration_s() * fs));
    const auto preroll_samples = static_cast<std::size_t>(std::llround(am.preroll_s * fs));

    decimation_chain chain(fs, am.carrier_hz);
    res.sample_rate_fine_hz = chain.fine_rate_hz();
    if (am.preroll_s < chain.delay_s())
        throw config_error(fmt::format("solver.preroll_s = {}: must be at least the decimation delay {:.3g} s",
                                       am.preroll_s, chain.delay_s()));
    // Chain output n is simulated time n / fs; programme sample m is simulated time preroll + m / fs.
    const std::size_t skip = preroll_samples;
    const double t_end = am.preroll_s + static_cast<double>(total) / fs + chain.delay_s() + 4.0 / fs;

    step_settings st = s.stepper;
    st.max_step_s = std::min(st.max_step_s, 1.0 / (am.carrier_hz * s.carrier_steps_floor));
    st.initial_step_s = std::min(st.initial_step_s, 0.01 / am.carrier_hz);

    biquad dc_block = biquad::butterworth_highpass(s.dc_block_hz, fs);
    bool dc_settled = false;
    std::vector<double> raw;
    std::vector<double> block_e;
    std::vector<double> block_a;
    std::size_t produced = 0;  // chain outputs so far
    std::size_t delivered = 0; // programme samples delivered

    with_equations(net, src, [&](auto eq) {
        using eq_t = decltype(eq);
        tr_bdf2<eq_t> stepper(eq, st);
        typename eq_t::vec x0 = eq_t::vec::Zero();
        stepper.initialize(x0, 0.0);
        constexpr int out = eq_t::output_index;
        auto obs = [&](double t0, const auto& x0s, const auto& f0, double t1, const auto& x1, const auto& f1) {
            chain.add_segment(t0, t1, x0s[out], x1[out], f0[out], f1[out], raw);
        };
        const auto chunks = static_cast<std::size_t>(std::ceil(t_end / s.chunk_s));
        for (std::size_t c = 0; c < chunks && delivered < total; ++c) {
            const double ta = static_cast<double>(c) * s.chunk_s;
            const double tb = std::min(t_end, static_cast<double>(c + 1) * s.chunk_s);
            programme.prepare(ta - am.preroll_s, tb - am.preroll_s);
            raw.clear();
            stepper.advance_to(tb, obs);
            block_e.clear();
            block_a.clear();
            std::size_t first = delivered;
            for (double v : raw) {
                const std::size_t n = produced++;
                if (n < skip || delivered >= total) continue;
                if (!std::isfinite(v))
                    throw integration_error(fmt::format("the earpiece voltage became non-finite near t = {:.9g} s", tb), tb);
                if (!dc_settled) {
                    dc_block.settle_to(v);
                    dc_settled = true;
                }
                block_e.push_back(v);
                block_a.push_back(dc_block.process(v));
                ++delivered;
            }
            if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
        }
        res.stats = stepper.stats();
        res.simulated_s = stepper.time();
    });
    res.samples = delivered;
    res.wall_s = std::chrono::duration<double>(clock::now() - wall0).count();
    if (delivered < total) res.warnings.push_back(fmt::format("only {} of {} samples were produced", delivered, total));
    return res;
}

rendered_audio render_to_memory(const circuit_params& circuit, const am_params& am, modulation& programme,
                                const render_settings& settings)
{
    rendered_audio out;
    out.result = render(circuit, am, programme, settings, [&](const audio_block& b) {
        out.earpiece_v.insert(out.earpiece_v.end(), b.earpiece_v.begin(), b.earpiece_v.end());
        out.audio_v.insert(out.audio_v.end(), b.audio_v.begin(), b.audio_v.end());
    });
    return out;
}

} // namespace galena
