#include "galena/dial.hpp"

#include "galena/audio_chain.hpp"

#include "galena/constants.hpp"
#include "galena/dsp.hpp"
#include "galena/error.hpp"
#include "galena/front_end.hpp"
#include "galena/rf_integrator.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <fmt/format.h>
#include <limits>

namespace galena {

double dial_path::duration_s() const noexcept
{
    if (stops_hz.empty()) return glide_s;
    return static_cast<double>(stops_hz.size()) * dwell_s + static_cast<double>(stops_hz.size() - 1) * glide_s;
}

double dial_path::lowest_hz() const noexcept
{
    if (stops_hz.empty()) return std::min(start_hz, end_hz);
    return *std::min_element(stops_hz.begin(), stops_hz.end());
}

double dial_path::highest_hz() const noexcept
{
    if (stops_hz.empty()) return std::max(start_hz, end_hz);
    return *std::max_element(stops_hz.begin(), stops_hz.end());
}

const dial_path& dial_path::validate() const
{
    if (stops_hz.empty()) {
        detail::require_range("dial.start_hz", start_hz, 1e4, 1e8, "Hz");
        detail::require_range("dial.end_hz", end_hz, 1e4, 1e8, "Hz");
        detail::require_above("dial.glide_s", glide_s, 0.0, 3600.0, "s");
    } else {
        for (double f : stops_hz) detail::require_range("dial.stop_hz", f, 1e4, 1e8, "Hz");
        detail::require_range("dial.dwell_s", dwell_s, 0.0, 3600.0, "s");
        if (stops_hz.size() > 1) detail::require_above("dial.glide_s", glide_s, 0.0, 3600.0, "s");
        if (!(duration_s() > 0.0)) throw config_error("dial: a single stop needs dwell_s > 0");
    }
    return *this;
}

dial_tuning::dial_tuning(const circuit_params& circuit, const antenna_params& antenna, const tuner_params& tuner, double lo_hz, double hi_hz,
                         int points)
{
    if (tuner.layout != tuner_layout::single_coil && tuner.layout != tuner_layout::coupled)
        throw config_error(fmt::format("tuner.layout = \"{}\": the dial turns the tuning capacitor of a single-coil or coupled set",
                                       to_string(tuner.layout)));
    if (!(hi_hz > lo_hz) || points < 2) {
        m_f = {lo_hz};
        tuner_params t = tuner;
        t.capacitance_f = 0.0;
        t.tuned_hz = lo_hz;
        m_u = {1.0 / std::sqrt(build_receiver_network(circuit, antenna, t).tuning_capacitance_f)};
        return;
    }
    const double ratio = std::pow(hi_hz / lo_hz, 1.0 / (points - 1));
    for (int k = 0; k < points; ++k) {
        tuner_params t = tuner;
        t.capacitance_f = 0.0;
        t.tuned_hz = k + 1 == points ? hi_hz : lo_hz * std::pow(ratio, k);
        m_f.push_back(t.tuned_hz);
        m_u.push_back(1.0 / std::sqrt(build_receiver_network(circuit, antenna, t).tuning_capacitance_f));
    }
}

double dial_tuning::capacitance_f(double f) const noexcept
{
    if (m_f.size() == 1 || f <= m_f.front()) return 1.0 / (m_u.front() * m_u.front());
    if (f >= m_f.back()) return 1.0 / (m_u.back() * m_u.back());
    const auto it = std::upper_bound(m_f.begin(), m_f.end(), f);
    const auto k = static_cast<std::size_t>(it - m_f.begin());
    const double a = (f - m_f[k - 1]) / (m_f[k] - m_f[k - 1]);
    const double u = m_u[k - 1] + a * (m_u[k] - m_u[k - 1]);
    return 1.0 / (u * u);
}

double dial_tuning::tuned_hz(double c) const noexcept
{
    const double u = 1.0 / std::sqrt(c);
    if (m_f.size() == 1 || u <= m_u.front()) return m_f.front();
    if (u >= m_u.back()) return m_f.back();
    const auto it = std::upper_bound(m_u.begin(), m_u.end(), u);
    const auto k = static_cast<std::size_t>(it - m_u.begin());
    const double a = (u - m_u[k - 1]) / (m_u[k] - m_u[k - 1]);
    return m_f[k - 1] + a * (m_f[k] - m_f[k - 1]);
}

namespace {

/// The dial's tuned frequency at path time t (clamped to the path), Hz.
double dial_frequency(const dial_path& p, const dial_tuning& tun, double t)
{
    auto glide = [&](double f0, double f1, double a) {
        a = std::clamp(a, 0.0, 1.0);
        if (p.law == dial_law::frequency) return f0 + a * (f1 - f0);
        const double c0 = tun.capacitance_f(f0), c1 = tun.capacitance_f(f1);
        return tun.tuned_hz(c0 + a * (c1 - c0));
    };
    if (p.stops_hz.empty()) return glide(p.start_hz, p.end_hz, t / p.glide_s);
    const double leg = p.dwell_s + p.glide_s;
    if (t <= 0.0) return p.stops_hz.front();
    const auto k = static_cast<std::size_t>(std::floor(t / leg));
    if (k + 1 >= p.stops_hz.size()) return p.stops_hz.back();
    const double in = t - static_cast<double>(k) * leg;
    if (in <= p.dwell_s) return p.stops_hz[k];
    return glide(p.stops_hz[k], p.stops_hz[k + 1], (in - p.dwell_s) / p.glide_s);
}

} // namespace

dial_result render_dial(const receiver_spec& spec, const dial_path& path, const dial_settings& s, const audio_sink& sink,
                        const std::function<void(double)>& progress)
{
    using clock = std::chrono::steady_clock;
    const auto wall0 = clock::now();
    path.validate();
    detail::require_range("output.sample_rate_hz", s.audio_rate_hz, 8000.0, 192000.0, "Hz");
    detail::require_range("render.dc_block_hz", s.dc_block_hz, 1e-3, 200.0, "Hz");
    detail::require_above("dial.retune_interval_s", s.retune_interval_s, 0.0, 0.1, "s");
    detail::require_range("dial.level_window_s", s.level_window_s, 1e-4, 1.0, "s");
    if (spec.stations.empty()) throw config_error("band: a dial sweep needs at least one station");
    spec.antenna.validate();
    const double fs = s.audio_rate_hz;
    // The grid's reference: the path's highest frequency (the wanted carrier's cycle is never cut into fewer
    // than N steps anywhere on the dial).
    const double fref = path.highest_hz();
    const dial_tuning tuning(spec.circuit, spec.antenna, spec.tuner, path.lowest_hz(), path.highest_hz());
    tuner_params tuner = spec.tuner;
    auto network_at = [&](double f_hz) {
        tuner.capacitance_f = tuning.capacitance_f(f_hz);
        return build_receiver_network(spec.circuit, spec.antenna, tuner);
    };
    receiver_network rn = network_at(dial_frequency(path, tuning, 0.0));
    state_space ss = rn.net.assemble();

    double preroll = s.preroll_s;
    if (preroll < 0.0) {
        preroll = automatic_preroll_s(detector_network(spec.circuit), fs);
        preroll = std::max(preroll, std::ceil(12.0 * spec.tuner.coil_q / (pi * path.lowest_hz()) * fs) / fs);
    } else {
        preroll = std::ceil(preroll * fs) / fs;
    }
    station_source src;
    dial_result res;
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
        res.names.push_back(st.params.name);
        res.carriers_hz.push_back(st.params.carrier_hz);
    }
    // Background noise: band_noise stations tiled across the dial (each 2 x half_band wide, centres from
    // lowest - half_band, so every dial position has noise within +- half_band of it), seeds seed + k 2^32.
    spec.noise.validate();
    if (spec.noise.field_density > 0.0) {
        const double w = spec.noise.half_band_hz;
        if (!(w <= 0.45 * (path.lowest_hz() - w)))
            throw config_error(fmt::format("antenna.noise_half_band_hz = {}: must be at most 0.45 x the lowest noise tile's centre ({} Hz)",
                                           detail::format_value(w), detail::format_value(path.lowest_hz() - w)));
        const double d = spec.noise.field_density * spec.antenna.effective_height_m;
        std::uint64_t k = 0;
        for (double centre = path.lowest_hz() - w; centre - w < path.highest_hz() + w; centre += 2.0 * w, ++k)
            src.add(fmt::format("noise {}", k + 1), centre, band_noise(d, w, spec.noise.seed + (k << 32)));
    }
    // The grid follows the dial: each retune interval gets the fewest steps per reference cycle that still
    // cut the tuned carrier's cycle (at the interval's higher end) into at least N = s.steps_per_cycle, on a
    // ladder of N / 16 (at least 4: a check against another simulator can sample every cycle at 4 points).
    detail::require_range("dial.steps_per_cycle", s.steps_per_cycle, 8.0, 4096.0);
    if (s.steps_per_cycle % 2 != 0) throw config_error(fmt::format("dial.steps_per_cycle = {}: must be even", s.steps_per_cycle));
    const int rung = std::max(4, s.steps_per_cycle / 16);
    auto grid_steps = [&](double programme_t0, double programme_t1) {
        const double f = std::max(dial_frequency(path, tuning, programme_t0), dial_frequency(path, tuning, programme_t1));
        const auto n = static_cast<int>(std::ceil(s.steps_per_cycle * (f / fref) / rung - 1e-9)) * rung;
        return std::clamp(n, (8 + rung - 1) / rung * rung, s.steps_per_cycle);
    };
    const double period = 1.0 / fref;
    const auto seg = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.retune_interval_s * fref)));
    // Chunk c0 .. c1 (cycles): the programme times of its ends.
    auto chunk_steps = [&](std::size_t c0, std::size_t c1) {
        return grid_steps(static_cast<double>(c0) * period - preroll, static_cast<double>(c1) * period - preroll);
    };
    rf_settings rs;
    rs.steps_per_cycle = chunk_steps(0, seg);
    rf_integrator ig(ss, rn.emf_input, diode_model(spec.circuit.diode).law(), src, fref, rs);
    auto rows = [&](const state_space& m) {
        std::vector<rf_integrator::output_row> r;
        for (node_id n : {rn.output_node, rn.detector_node}) r.push_back({m.node_c(n), m.node_d(n)(rn.emf_input), m.node_dj(n)});
        return r;
    };
    {
        // The earpiece's step values only for the probe (the audio chain takes its cycle means); the
        // detector's carrier phasors for the stations' levels (the AM stations: the noise tiles come after them).
        const auto r0 = rows(ss);
        ig.add_output(r0[0].c, r0[0].d_u, r0[0].d_j, s.output_probe ? output_use::every_step : output_use::cycle_mean);
        ig.add_phasor_output(r0[1].c, r0[1].d_u, r0[1].d_j, spec.stations.size());
    }
    constexpr int out_k = 0, det_k = 1;
    ig.initialize();

    const double duration = path.duration_s();
    const auto total = static_cast<std::size_t>(std::llround(duration * fs));
    const auto preroll_samples = static_cast<std::size_t>(std::llround(preroll * fs));
    detail::audio_chain chain(fs, fref, audio_chain_warm_up_s(fs));
    if (preroll < chain.warm_up_s())
        throw config_error(fmt::format("dial.preroll_s = {}: must be at least the audio chain's start-up, {:.3g} s",
                                       detail::format_value(preroll), chain.warm_up_s()));
    const double t_end = preroll + static_cast<double>(total) / fs + chain.latency_s() + 4.0 / fs;
    const auto cycles_total = static_cast<std::size_t>(std::ceil(t_end * fref));

    // Per-station DFT at the detector's input, Hann-windowed over whole cycles: each cycle's carrier phasors
    // (the integrator's phasor output) weighted by the cycle's Hann weight over its steps (1 / N each), so the
    // window keeps its shape where the grid changes.
    const std::size_t ns = res.names.size();
    std::vector<std::complex<double>> acc(ns);
    const auto window = std::max<std::size_t>(2, static_cast<std::size_t>(std::llround(s.level_window_s * fref)));
    std::size_t w_start = 0;
    double wsum = 0.0;
    std::vector<double> det(s.output_probe ? static_cast<std::size_t>(s.steps_per_cycle) : 0);

    res.audio_rate_hz = fs;
    res.reference_hz = fref;
    res.steps_per_cycle = s.steps_per_cycle;
    res.fewest_steps_per_cycle = ig.steps_per_cycle();
    res.preroll_s = preroll;
    detail::programme_delivery delivery(preroll_samples, total, fs, s.dc_block_hz);
    std::vector<double> raw, block_e, block_a;
    const std::size_t chunk_cycles = seg; // one chunk per retune interval
    for (std::size_t c0 = 0; c0 < cycles_total && !delivery.complete(); c0 += chunk_cycles) {
        const std::size_t c1 = std::min(cycles_total, c0 + chunk_cycles);
        const double f_dial = dial_frequency(path, tuning, 0.5 * static_cast<double>(c0 + c1) * period - preroll);
        const int n_grid = chunk_steps(c0, c1);
        res.fewest_steps_per_cycle = std::min(res.fewest_steps_per_cycle, n_grid);
        // A retune where the capacitor or the grid moves (not while the dial rests on a stop).
        if (c0 > 0 && (tuning.capacitance_f(f_dial) != tuner.capacitance_f || n_grid != ig.steps_per_cycle())) {
            const auto w0 = clock::now();
            receiver_network next = network_at(f_dial);
            state_space ss_next = next.net.assemble();
            const Eigen::VectorXd x = carry_charge(ss, ig.state(), ss_next);
            const auto r = rows(ss_next);
            ig.retune(ss_next, next.emf_input, x, r, n_grid);
            ss = std::move(ss_next);
            rn = std::move(next);
            res.retune_wall_s += std::chrono::duration<double>(clock::now() - w0).count();
            ++res.retunes;
        }
        const double tb = static_cast<double>(c1) * period;
        for (const auto& st : spec.stations)
            st.programme->prepare(static_cast<double>(c0) * period - preroll - 2.0 * period, tb - preroll + 3.0 * period);
        const int n_steps = ig.steps_per_cycle();
        for (std::size_t c = c0; c < c1; ++c) {
            ig.advance_cycle(det);
            if (s.output_probe) s.output_probe(c, std::span<const double>(det.data(), static_cast<std::size_t>(n_steps))); // row out_k
            chain.add_cycle_mean(ig.output_mean(out_k), raw);
            if (c == w_start) {
                std::fill(acc.begin(), acc.end(), std::complex<double>{});
                wsum = 0.0;
            }
            // Hann weight per cycle (constant within one).
            const double w = 0.5 * (1.0 - std::cos(two_pi * (static_cast<double>(c - w_start) + 0.5) / static_cast<double>(window)));
            wsum += w;
            const double wn = w / n_steps;
            for (std::size_t k = 0; k < ns; ++k) acc[k] += wn * ig.output_phasor(det_k, k);
            if (c + 1 == w_start + window) {
                const double t_centre = (static_cast<double>(w_start) + 0.5 * static_cast<double>(window)) * period - preroll;
                if (t_centre >= 0.0 && t_centre <= duration) {
                    dial_point p;
                    p.time_s = t_centre;
                    p.tuned_hz = dial_frequency(path, tuning, t_centre);
                    p.capacitance_f = tuning.capacitance_f(p.tuned_hz);
                    for (std::size_t k = 0; k < ns; ++k) p.level_v.push_back(2.0 * std::abs(acc[k]) / wsum);
                    res.trace.push_back(std::move(p));
                }
                w_start = c + 1;
            }
        }
        static_assert(out_k == 0 && det_k == 1);
        block_e.clear();
        block_a.clear();
        const std::size_t first = delivery.delivered();
        delivery.deliver(raw, tb, block_e, block_a);
        if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
        if (progress) progress(std::clamp(static_cast<double>(c1) / static_cast<double>(cycles_total), 0.0, 1.0));
    }
    res.samples = delivery.delivered();
    res.simulated_s = ig.time_s();
    res.solver = ig.stats();
    res.wall_s = std::chrono::duration<double>(clock::now() - wall0).count();
    return res;
}

std::vector<survey_row> band_survey(const dial_result& r)
{
    std::vector<survey_row> out;
    const std::size_t ns = r.names.size();
    for (std::size_t k = 0; k < ns; ++k) {
        survey_row row;
        row.name = r.names[k];
        row.carrier_hz = r.carriers_hz[k];
        std::size_t at = 0;
        for (std::size_t i = 0; i < r.trace.size(); ++i)
            if (r.trace[i].level_v[k] > row.peak_level_v) row.peak_level_v = r.trace[i].level_v[k], at = i;
        row.separation_db = std::numeric_limits<double>::infinity();
        if (!r.trace.empty()) {
            row.peak_dial_hz = r.trace[at].tuned_hz;
            for (std::size_t j = 0; j < ns; ++j)
                if (j != k && r.trace[at].level_v[j] > row.neighbour_level_v) {
                    row.neighbour_level_v = r.trace[at].level_v[j];
                    row.neighbour = r.names[j];
                }
            if (row.neighbour_level_v > 0.0) row.separation_db = 20.0 * std::log10(row.peak_level_v / row.neighbour_level_v);
        }
        row.separated = row.separation_db >= survey_separation_db;
        out.push_back(std::move(row));
    }
    return out;
}

} // namespace galena
