#include "galena/render.hpp"

#include "galena/audio_chain.hpp"
#include "galena/receiver.hpp"

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

double audio_chain_warm_up_s(double rate)
{
    static const std::size_t taps = detail::stage_c_taps().size();
    return (static_cast<double>(taps) - 4.0) / (4.0 * rate);
}

render_result render(const circuit_params& circuit, am_params am, modulation& programme, const render_settings& settings,
                     const audio_sink& sink)
{
    using clock = std::chrono::steady_clock;
    const auto wall0 = clock::now();
    receiver r(circuit, am, programme, settings);
    // One block per chunk of simulated time, as the receiver produces them.
    for (audio_block b = r.process(std::numeric_limits<std::size_t>::max()); !b.earpiece_v.empty();
         b = r.process(std::numeric_limits<std::size_t>::max()))
        sink(b);
    render_result res = r.result();
    res.wall_s = std::chrono::duration<double>(clock::now() - wall0).count();
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
    spec.noise.validate();
    if (spec.noise.field_density > 0.0) {
        if (!(spec.noise.half_band_hz <= 0.45 * fc))
            throw config_error(fmt::format("antenna.noise_half_band_hz = {}: must be at most 0.45 x the wanted carrier ({} Hz)",
                                           detail::format_value(spec.noise.half_band_hz), detail::format_value(0.45 * fc)));
        // The EMF density from the field density as the stations' EMF from their field (RMS field x height).
        src.add("noise", fc, band_noise(spec.noise.field_density * spec.antenna.effective_height_m, spec.noise.half_band_hz, spec.noise.seed));
    }

    render_result res;
    res.audio_rate_hz = fs;
    res.preroll_s = preroll;
    res.sample_rate_fine_hz = fc;
    res.method = solver_method::phase_locked;
    rf_settings rs;
    rs.steps_per_cycle = s.steps_per_cycle == 0 ? 32 : s.steps_per_cycle;
    res.steps_per_cycle = rs.steps_per_cycle;
    rf_integrator ig(ss, rn.emf_input, diode_model(spec.circuit.diode).law(), src, fc, rs);
    const int out_k = ig.add_output(ss.node_c(rn.output_node), ss.node_d(rn.output_node)(rn.emf_input), ss.node_dj(rn.output_node),
                                    output_use::cycle_mean); // the audio chain takes its cycle means only
    const int det_k = ig.add_output(ss.node_c(rn.detector_node), ss.node_d(rn.detector_node)(rn.emf_input), ss.node_dj(rn.detector_node));
    ig.initialize();

    const auto total = static_cast<std::size_t>(std::llround(duration * fs));
    const auto preroll_samples = static_cast<std::size_t>(std::llround(preroll * fs));
    detail::audio_chain chain(fs, fc, audio_chain_warm_up_s(fs));
    if (preroll < chain.warm_up_s())
        throw config_error(fmt::format("solver.preroll_s = {}: must be at least the audio chain's start-up, {:.3g} s",
                                       detail::format_value(preroll), chain.warm_up_s()));
    const double t_end = preroll + static_cast<double>(total) / fs + chain.latency_s() + 4.0 / fs;
    const auto cycles_total = static_cast<std::size_t>(std::ceil(t_end * fc));
    const auto cycles_per_chunk = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.chunk_s * fc)));
    const auto preroll_cycles = static_cast<std::size_t>(std::ceil(preroll * fc));

    detail::programme_delivery delivery(preroll_samples, total, fs, s.dc_block_hz);
    std::vector<double> raw, block_e, block_a;
    for (std::size_t c0 = 0; c0 < cycles_total && !delivery.complete(); c0 += cycles_per_chunk) {
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
        const std::size_t first = delivery.delivered();
        delivery.deliver(raw, tb, block_e, block_a);
        if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
    }
    const rf_stats& st = ig.stats();
    res.stats.accepted = st.steps;
    res.stats.newton_iterations = st.newton_iterations;
    res.simulated_s = ig.time_s();
    const std::size_t delivered = delivery.delivered();
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
