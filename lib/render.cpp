#include "galena/render.hpp"

#include "galena/constants.hpp"
#include "galena/dsp.hpp"
#include "galena/error.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <type_traits>
#include <chrono>
#include <cmath>
#include <fmt/format.h>
#include <limits>

namespace galena {

std::string_view to_string(solver_method m) noexcept
{
    return m == solver_method::adaptive ? "adaptive" : "phase-locked";
}

solver_method parse_solver_method(std::string_view s)
{
    if (s == "phase-locked") return solver_method::phase_locked;
    if (s == "adaptive") return solver_method::adaptive;
    throw config_error(fmt::format("solver.method = \"{}\": must be phase-locked or adaptive", s));
}

double automatic_preroll_s(const detector_network& net, double rate)
{
    const double tau = net.output_time_constant_s();
    const double pre = std::max(std::clamp(std::isfinite(tau) ? 5.0 * tau : 0.25, 5e-3, 0.25), audio_chain_warm_up_s(rate));
    return std::ceil(pre * rate) / rate;
}

namespace {
/// Stage C of the audio chain (below): pass 0.42 fs, stop 0.5 fs at 4 fs, 90 dB. One definition for the
/// chain and for its start-up time.
std::vector<double> stage_c_taps() { return kaiser_lowpass(0.115, 0.02, 90.0); }
} // namespace

double audio_chain_warm_up_s(double rate)
{
    static const std::size_t taps = stage_c_taps().size();
    return (static_cast<double>(taps) - 4.0) / (4.0 * rate);
}

namespace {

/// From carrier-cycle means to the audio rate (DEVELOPERS.md, "Audio path"):
///   A. the mean of the earpiece voltage over each carrier cycle [kT, (k+1)T] (computed by the solver):
///      a box filter of length T, with nulls at every carrier harmonic, sampled at fc and centred at (k+1/2)T;
///   B. a Kaiser-windowed sinc resampler to 4 fs (pass 0.45 fs, stop min(3.5 fs, fc - 0.5 fs), 90 dB): nothing
///      that could fold into [0, 0.5 fs] at 4 fs survives;
///   C. a 90 dB Kaiser FIR (pass 0.42 fs, stop 0.5 fs) decimating 4 fs -> fs.
/// Stage B's grid is offset by stage C's delay, so chain output n is centred exactly at simulated time n / fs.
class audio_chain {
public:
    audio_chain(double fs, double fc)
        : m_stage_c(stage_c_taps(), 4),
          m_stage_b(fc, 0.5 / fc, 4.0 * fs, stage_b_origin(fs, m_stage_c.size()), 0.45 * fs, std::min(3.5 * fs, fc - 0.5 * fs), 90.0),
          m_latency_s(m_stage_b.half_width_s() + 1.0 / fc + static_cast<double>(m_stage_c.size()) / (4.0 * fs)),
          // Stage C's first input is centred at stage_b_origin; its output at t reads inputs back to
          // t - (L - 1) / 2 / (4 fs), so outputs before origin + (L - 1) / 2 / (4 fs) = (L - 4) / (4 fs) still
          // hold part of the FIR's empty start-up history.
          m_warm_up_s(audio_chain_warm_up_s(fs))
    {
    }
    /// Simulated time the chain needs beyond t before its output at t is complete, s.
    [[nodiscard]] double latency_s() const noexcept { return m_latency_s; }
    /// Outputs centred before this time carry the chain's start-up, s: the preroll must cover it.
    [[nodiscard]] double warm_up_s() const noexcept { return m_warm_up_s; }

    void add_cycle_mean(double mean_v, std::vector<double>& audio_out)
    {
        m_fine.clear();
        m_stage_b.push(mean_v, m_fine);
        double y = 0.0;
        for (double v : m_fine)
            if (m_stage_c.push(v, y)) audio_out.push_back(y);
    }

private:
    /// Stage C emits after inputs 3, 7, 11, ...; output m is centred on input 4m + 3 - (L - 1)/2. Placing
    /// stage B's input j at (j - 3 + (L - 1)/2) / (4 fs) centres output m at m / fs.
    static double stage_b_origin(double fs, std::size_t taps_c)
    {
        return (0.5 * static_cast<double>(taps_c - 1) - 3.0) / (4.0 * fs);
    }

    fir_decimator m_stage_c;
    sinc_resampler m_stage_b;
    double m_latency_s;
    double m_warm_up_s;
    std::vector<double> m_fine;
};

/// Steps per cycle when the automatic choice fails (measured: relRMS 8e-7 on the benchmark circuit).
constexpr int fallback_steps_per_cycle = 64;

/// Carrier levels at which the step count is checked: the envelope's crest, mean and trough.
std::vector<double> envelope_levels(const am_params& am)
{
    const double a = am.carrier_peak_v;
    const double m = am.modulation_index;
    std::vector<double> levels{a * (1.0 + m), a};
    const double trough = a * std::fabs(1.0 - m);
    if (trough > 0.05 * a) levels.push_back(trough);
    return levels;
}

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
    if (s.steps_per_cycle != 0) detail::require_range("solver.steps_per_cycle", s.steps_per_cycle, 8.0, 4096.0);
    detail::require_above("solver.dc_tolerance", s.dc_tolerance, 0.0, 0.1);
    detail::require_above("solver.newton_tolerance", s.newton_tolerance, 0.0, 1e-3);
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
    const double fc = am.carrier_hz;
    const double period = 1.0 / fc;

    render_result res;
    res.audio_rate_hz = fs;
    res.preroll_s = am.preroll_s;
    res.sample_rate_fine_hz = fc;
    const bool phase_locked = s.method == solver_method::phase_locked && net.series_ohm() > 0.0;
    res.method = phase_locked ? solver_method::phase_locked : solver_method::adaptive;
    if (s.method == solver_method::phase_locked && !phase_locked)
        res.warnings.push_back({warning_code::adaptive_fallback,
                                "the source and diode series resistances are both 0 ohm: the phase-locked solver needs a series "
                                "resistance, so the adaptive solver was used"});
    if (!phase_locked && s.carrier_steps_floor < 30.0)
        res.warnings.push_back({warning_code::coarse_step_floor,
                                fmt::format("solver.carrier_steps_floor = {}: below 30 steps per carrier cycle the error accumulates "
                                            "over the cycles (measured 1.5e-3 relRMS at 20 against 7e-6 at 40); keep 40 for comparisons",
                                            detail::format_value(s.carrier_steps_floor))});
    const auto total = static_cast<std::size_t>(std::llround(programme.duration_s() * fs));
    const auto preroll_samples = static_cast<std::size_t>(std::llround(am.preroll_s * fs));

    audio_chain chain(fs, fc);
    if (am.preroll_s < chain.warm_up_s())
        throw config_error(fmt::format("solver.preroll_s = {}: must be at least the audio chain's start-up, {:.3g} s",
                                       detail::format_value(am.preroll_s), chain.warm_up_s()));
    // Chain output n is simulated time n / fs; programme sample m is simulated time preroll + m / fs.
    const std::size_t skip = preroll_samples;
    const double t_end = am.preroll_s + static_cast<double>(total) / fs + chain.latency_s() + 4.0 / fs;
    const auto cycles_total = static_cast<std::size_t>(std::ceil(t_end * fc));
    const auto cycles_per_chunk = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.chunk_s * fc)));

    biquad dc_block = biquad::butterworth_highpass(s.dc_block_hz, fs);
    bool dc_settled = false;
    std::vector<double> raw;
    std::vector<double> block_e;
    std::vector<double> block_a;
    std::size_t produced = 0;  // chain outputs so far
    std::size_t delivered = 0; // programme samples delivered
    // Hands the chain's new outputs to the sink, programme-aligned, with the DC removed.
    auto deliver = [&](double t_now) {
        block_e.clear();
        block_a.clear();
        const std::size_t first = delivered;
        for (double v : raw) {
            const std::size_t n = produced++;
            if (n < skip || delivered >= total) continue;
            if (!std::isfinite(v))
                throw integration_error(fmt::format("the earpiece voltage became non-finite near t = {:.9g} s", t_now), t_now);
            if (!dc_settled) {
                dc_block.settle_to(v);
                dc_settled = true;
            }
            block_e.push_back(v);
            block_a.push_back(dc_block.process(v));
            ++delivered;
        }
        raw.clear();
        if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
    };
    // Runs the simulation in chunks of whole carrier cycles until the programme is delivered: prepares the
    // programme for the chunk (with a margin of cycles on both sides for the envelope's interpolation),
    // lets advance(c0, c1) simulate cycles [c0, c1) and feed the chain, then delivers.
    auto for_each_chunk = [&](auto&& advance) {
        for (std::size_t c0 = 0; c0 < cycles_total && delivered < total; c0 += cycles_per_chunk) {
            const std::size_t c1 = std::min(cycles_total, c0 + cycles_per_chunk);
            const double tb = static_cast<double>(c1) * period;
            programme.prepare(static_cast<double>(c0) * period - am.preroll_s - 2.0 * period, tb - am.preroll_s + 3.0 * period);
            advance(c0, c1);
            deliver(tb);
        }
    };

    if (phase_locked) {
        with_one_junction_network(net, [&](const auto& oj) {
            constexpr int dim = std::remove_cvref_t<decltype(oj)>::vec::RowsAtCompileTime;
            int n = s.steps_per_cycle;
            if (n == 0) {
                const auto t0 = clock::now();
                const auto levels = envelope_levels(am);
                step_choice ch;
                try {
                    ch = choose_steps_per_cycle(oj, fc, levels, s.dc_tolerance, 4096);
                } catch (const integration_error& e) {
                    ch = {fallback_steps_per_cycle, std::numeric_limits<double>::quiet_NaN(), false};
                    res.warnings.push_back({warning_code::step_count_fallback,
                                            fmt::format("the step count could not be chosen ({}); {} steps per carrier cycle were used",
                                                        e.what(), fallback_steps_per_cycle)});
                }
                n = ch.steps_per_cycle;
                res.estimated_dc_error = ch.estimated_error;
                res.step_choice_s = std::chrono::duration<double>(clock::now() - t0).count();
                if (!ch.met && std::isfinite(ch.estimated_error))
                    res.warnings.push_back({warning_code::dc_tolerance_not_met,
                                            fmt::format("solver.dc_tolerance = {}: not reached with up to 4096 steps per carrier cycle "
                                                        "(estimated error {:.2g}); the detected level may be less accurate than asked",
                                                        detail::format_value(s.dc_tolerance), ch.estimated_error)});
            }
            res.steps_per_cycle = n;
            cycle_settings cs;
            cs.steps_per_cycle = n;
            cs.newton_tolerance = s.newton_tolerance;
            cs.voltage_scale_v = am.carrier_peak_v * (1.0 + am.modulation_index);
            cycle_integrator<dim> ig(oj, fc, cs);
            ig.initialize(0.0, cycle_integrator<dim>::vec::Zero(), src.voltage(0.0));

            phase_locked_source sampler(src, n);
            std::vector<double> u(static_cast<std::size_t>(n));
            for_each_chunk([&](std::size_t c0, std::size_t c1) {
                for (std::size_t c = c0; c < c1; ++c) {
                    sampler.cycle(c, u);
                    ig.advance(u);
                    chain.add_cycle_mean(ig.output_mean_v(), raw);
                }
            });
            res.cycles = ig.stats();
            res.stats.accepted = res.cycles.cycles * static_cast<std::size_t>(n);
            res.stats.newton_iterations = res.cycles.batched_passes * static_cast<std::size_t>(n) + res.cycles.scalar_newton_iterations;
            res.simulated_s = ig.time_s();
        });
    } else {
        step_settings st = s.stepper;
        st.max_step_s = std::min(st.max_step_s, 1.0 / (fc * s.carrier_steps_floor));
        st.initial_step_s = std::min(st.initial_step_s, 0.01 / fc);
        // Stage A for the adaptive solver: box integration of its dense output over each carrier cycle.
        box_sampler cycle_means(period, 0.0);
        std::vector<double> means;
        with_equations(net, src, [&](auto eq) {
            using eq_t = decltype(eq);
            tr_bdf2<eq_t> stepper(eq, st);
            stepper.initialize(eq_t::vec::Zero(), 0.0);
            constexpr int out = eq_t::output_index;
            auto obs = [&](double t0, const auto& x0s, const auto& f0, double t1, const auto& x1, const auto& f1) {
                cycle_means.add_segment(t0, t1, x0s[out], x1[out], f0[out], f1[out], means);
            };
            for_each_chunk([&](std::size_t, std::size_t c1) {
                means.clear();
                stepper.advance_to(static_cast<double>(c1) * period, obs);
                for (double m : means) chain.add_cycle_mean(m, raw);
            });
            res.stats = stepper.stats();
            res.simulated_s = stepper.time();
        });
    }
    res.samples = delivered;
    res.wall_s = std::chrono::duration<double>(clock::now() - wall0).count();
    if (delivered < total)
        res.warnings.push_back({warning_code::samples_missing, fmt::format("only {} of {} samples were produced", delivered, total)});
    return res;
}

render_result render_receiver(const receiver_spec& spec, const render_settings& s, const audio_sink& sink, receiver_figures& fig)
{
    using clock = std::chrono::steady_clock;
    const auto wall0 = clock::now();
    detail::require_range("output.sample_rate_hz", s.audio_rate_hz, 8000.0, 192000.0, "Hz");
    detail::require_range("render.dc_block_hz", s.dc_block_hz, 1e-3, 200.0, "Hz");
    detail::require_range("render.chunk_s", s.chunk_s, 1e-4, 1.0, "s");
    if (spec.stations.empty()) throw config_error("station: a receiver needs at least one [[station]]");
    if (spec.tuner.layout == tuner_layout::bench)
        throw config_error("tuner.layout = \"bench\": the bench layout renders [signal] through render(), not stations");
    spec.antenna.validate();
    const receiver_network rn = build_receiver_network(spec.circuit, spec.antenna, spec.tuner);
    const state_space ss = rn.net.assemble();
    const double fs = s.audio_rate_hz;
    const double fc = spec.stations.front().params.carrier_hz;
    const double period = 1.0 / fc;
    // Preroll: the output network's settling (as render()) and the tuned circuit's (amplitude time constant
    // 2 Q / w0 = Q / (pi f0); 12 of them leave e^-12).
    double preroll = s.preroll_s;
    if (preroll < 0.0) {
        preroll = automatic_preroll_s(detector_network(spec.circuit), fs);
        if (rn.design_hz > 0.0) preroll = std::max(preroll, std::ceil(12.0 * spec.tuner.coil_q / (pi * rn.design_hz) * fs) / fs);
    } else {
        preroll = std::ceil(preroll * fs) / fs;
    }
    station_source src;
    double duration = 0.0;
    for (const auto& st : spec.stations) {
        st.params.validate();
        if (st.programme == nullptr) throw config_error(fmt::format("station \"{}\": no programme", st.params.name));
        if (st.params.carrier_hz < 2.5 * 0.5 * fs)
            throw config_error(fmt::format("station.carrier_hz = {}: must be at least 2.5 x the audio Nyquist frequency ({} Hz)",
                                           detail::format_value(st.params.carrier_hz), 0.5 * fs));
        am_params am;
        am.carrier_hz = st.params.carrier_hz;
        am.carrier_peak_v = std::sqrt(2.0) * st.params.field_v_per_m * spec.antenna.effective_height_m;
        am.modulation_index = st.params.modulation_index;
        am.preroll_s = preroll;
        am.ramp_s = std::min(2e-3, 0.5 * preroll);
        am.validate();
        src.add(st.params.name, am_source(am, st.programme));
        if (src.size() == 1) duration = st.programme->duration_s();
    }
    fig.wanted_emf_peak_v = src.station(0).params().carrier_peak_v;

    render_result res;
    res.audio_rate_hz = fs;
    res.preroll_s = preroll;
    res.sample_rate_fine_hz = fc;
    res.method = solver_method::phase_locked;
    rf_settings rs;
    rs.steps_per_cycle = s.steps_per_cycle == 0 ? 32 : s.steps_per_cycle;
    res.steps_per_cycle = rs.steps_per_cycle;
    rf_integrator ig(ss, rn.emf_input, diode_model(spec.circuit.diode).law(), src, fc, rs);
    const int out_k = ig.add_output(ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node));
    const int det_k = ig.add_output(ss.node_c(rn.detector_node), ss.node_d(rn.detector_node)(rn.emf_input), ss.node_dj(rn.detector_node));
    ig.initialize();

    const auto total = static_cast<std::size_t>(std::llround(duration * fs));
    const auto preroll_samples = static_cast<std::size_t>(std::llround(preroll * fs));
    audio_chain chain(fs, fc);
    if (preroll < chain.warm_up_s())
        throw config_error(fmt::format("solver.preroll_s = {}: must be at least the audio chain's start-up, {:.3g} s",
                                       detail::format_value(preroll), chain.warm_up_s()));
    const double t_end = preroll + static_cast<double>(total) / fs + chain.latency_s() + 4.0 / fs;
    const auto cycles_total = static_cast<std::size_t>(std::ceil(t_end * fc));
    const auto cycles_per_chunk = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.chunk_s * fc)));
    const auto preroll_cycles = static_cast<std::size_t>(std::ceil(preroll * fc));

    biquad dc_block = biquad::butterworth_highpass(s.dc_block_hz, fs);
    bool dc_settled = false;
    std::vector<double> raw, block_e, block_a;
    std::size_t produced = 0, delivered = 0;
    for (std::size_t c0 = 0; c0 < cycles_total && delivered < total; c0 += cycles_per_chunk) {
        const std::size_t c1 = std::min(cycles_total, c0 + cycles_per_chunk);
        const double tb = static_cast<double>(c1) * period;
        for (const auto& st : spec.stations)
            st.programme->prepare(static_cast<double>(c0) * period - preroll - 2.0 * period, tb - preroll + 3.0 * period);
        for (std::size_t c = c0; c < c1; ++c) {
            if (c == preroll_cycles) {
                ig.reset_peaks();
                ig.start_phasors();
            }
            ig.advance_cycle();
            chain.add_cycle_mean(ig.output_mean(out_k), raw);
        }
        block_e.clear();
        block_a.clear();
        const std::size_t first = delivered;
        for (double v : raw) {
            const std::size_t n = produced++;
            if (n < preroll_samples || delivered >= total) continue;
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
        raw.clear();
        if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
    }
    const rf_stats& st = ig.stats();
    res.stats.accepted = st.steps;
    res.stats.newton_iterations = st.newton_iterations;
    res.simulated_s = ig.time_s();
    res.samples = delivered;
    // Front-end figures with the detector's measured loading at the wanted carrier.
    fig.detector_rf_peak_v = ig.output_peak(det_k);
    const std::complex<double> vp = ig.port_voltage_phasor();
    fig.detector_admittance_s = std::abs(vp) > 0.0 ? ig.junction_current_phasor() / vp : std::complex<double>(0.0);
    const double around = rn.design_hz > 0.0 ? rn.design_hz : fc;
    const rf_tuning loaded = analyse_tuning(rn, fig.detector_admittance_s, around);
    const rf_tuning unloaded = analyse_tuning(rn, 0.0, around);
    fig.tuned_hz = loaded.tuned_hz;
    fig.loaded_q = loaded.loaded_q;
    fig.rf_bandwidth_hz = loaded.bandwidth_hz;
    fig.unloaded_tuned_hz = unloaded.tuned_hz;
    res.wall_s = std::chrono::duration<double>(clock::now() - wall0).count();
    if (delivered < total)
        res.warnings.push_back({warning_code::samples_missing, fmt::format("only {} of {} samples were produced", delivered, total)});
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
