#include "galena/characterize.hpp"
#include "galena/detector_analysis.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/filter_by_response.hpp"
#include "galena/integrator.hpp"
#include "galena/signal.hpp"
#include "galena/transducer.hpp"

#include <algorithm>
#include <cmath>
#include <complex>
#include <fmt/format.h>
#include <limits>

namespace galena {

namespace {

constexpr double nan_v = std::numeric_limits<double>::quiet_NaN();

nlohmann::json num(double x) { return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr); }

/// Least-squares line y = a + b x; returns {a, b}.
std::pair<double, double> fit_line(const std::vector<double>& x, const std::vector<double>& y)
{
    const double n = static_cast<double>(x.size());
    double sx = 0, sy = 0, sxx = 0, sxy = 0;
    for (std::size_t i = 0; i < x.size(); ++i) {
        sx += x[i];
        sy += y[i];
        sxx += x[i] * x[i];
        sxy += x[i] * y[i];
    }
    const double b = (n * sxy - sx * sy) / (n * sxx - sx * sx);
    return {(sy - b * sx) / n, b};
}

/// Order-of-magnitude DC output, V, for a carrier peak V: square law V^2 / (4 n Vt) below n Vt, V above,
/// times the divider R_dc / (R_dc + R_v + R) (small-signal limit of the I0 law, Torrey & Whitmer 1948). Used only to scale the solver tolerance.
double estimated_output_v(const detector_network& net, double v)
{
    const double nvt = net.diode().emission_voltage_v();
    const double rv = nvt / net.diode().saturation_current_a();
    const double rdc = net.dc_load_ohm();
    const double div = std::isfinite(rdc) ? rdc / (rdc + rv + net.series_ohm()) : 1.0;
    return std::min(v, v * v / (4.0 * nvt)) * div;
}

render_settings scaled_settings(const detector_network& net, double carrier_v, const render_settings& base)
{
    render_settings rs = base;
    // Tolerances are absolute in volts: a 1 mV carrier gives micro- to nanovolt outputs, so the absolute
    // tolerance follows the expected output level (1e-5 of it), never looser than the caller's.
    const double est = estimated_output_v(net, carrier_v);
    rs.stepper.absolute_tolerance_v = std::min(base.stepper.absolute_tolerance_v, std::max(1e-15, 1e-5 * est));
    return rs;
}

void check_settings(const characterize_settings& s)
{
    if (!(s.tone_hz > 0.0 && s.tone_hz < 0.45 * s.render.audio_rate_hz))
        throw config_error(fmt::format("characterize: tone_hz = {}: must be in (0, 0.45 x audio rate)", s.tone_hz));
    if (!(s.modulation_index > 0.0 && s.modulation_index <= 1.0))
        throw config_error(fmt::format("characterize: modulation_index = {}: must be in (0, 1]", s.modulation_index));
    if (!(s.analysis_s > 0.0))
        throw config_error(fmt::format("characterize: analysis_s = {}: must be > 0", s.analysis_s));
}

} // namespace

std::vector<double> log_spaced(double lo, double hi, int count)
{
    if (!(lo > 0.0 && hi > lo && count >= 2))
        throw config_error(fmt::format("log_spaced: lo = {}, hi = {}, count = {}: need 0 < lo < hi and count >= 2", lo, hi, count));
    std::vector<double> v(static_cast<std::size_t>(count));
    for (int i = 0; i < count; ++i) v[static_cast<std::size_t>(i)] = lo * std::pow(hi / lo, static_cast<double>(i) / (count - 1));
    return v;
}

transfer_curve measure_transfer_curve(const circuit_params& circuit, const std::vector<double>& levels,
                                      const characterize_settings& s)
{
    check_settings(s);
    if (levels.size() < 6) throw config_error(fmt::format("transfer curve: {} carrier levels: need at least 6", levels.size()));
    for (std::size_t i = 0; i < levels.size(); ++i)
        if (!(levels[i] > 0.0) || (i > 0 && !(levels[i] > levels[i - 1])))
            throw config_error(fmt::format("transfer curve: carrier level {} = {} V: levels must be > 0 and ascending", i, levels[i]));
    const detector_network net(circuit);
    const double fs = s.render.audio_rate_hz;
    const settling_window sw = choose_settling_window(net);
    const double analysis = std::max(s.analysis_s, 4.0 / s.tone_hz);
    const auto skip = static_cast<std::size_t>(std::ceil(sw.settle_s * fs));
    transfer_curve c;
    c.tone_hz = s.tone_hz;
    c.modulation_index = s.modulation_index;
    for (double v : levels) {
        tone_modulation tone({s.tone_hz}, {1.0}, sw.settle_s + analysis + 2.0 / fs);
        am_params am;
        am.carrier_hz = s.carrier_hz;
        am.carrier_peak_v = v;
        am.modulation_index = s.modulation_index;
        const auto out = render_to_memory(circuit, am, tone, scaled_settings(net, v, s.render));
        const std::span<const double> win(out.earpiece_v.data() + skip, out.earpiece_v.size() - skip);
        const auto tm = analyze_tone(win, fs, s.tone_hz, std::min(s.band_low_hz, 0.5 * s.tone_hz), std::min(s.band_high_hz, 0.5 * fs));
        transfer_point p;
        p.carrier_peak_v = v;
        double sum = 0.0;
        for (double x : win) sum += x;
        p.dc_v = sum / static_cast<double>(win.size());
        p.audio_v = tm.fundamental_v;
        p.h2_ratio = tm.harmonics_fitted >= 2 ? tm.harmonic_ratio[2] : nan_v;
        p.thd_percent = tm.thd_percent;
        p.efficiency = tm.fundamental_v / (s.modulation_index * v);
        c.points.push_back(p);
        for (const auto& w : out.result.warnings) c.warnings.push_back(with_context(fmt::format("carrier {} V: ", v), w));
    }
    auto region = [&](bool low, bool dc) {
        std::vector<double> x, y;
        const std::size_t n = c.points.size();
        for (std::size_t k = 0; k < 3; ++k) {
            const auto& p = c.points[low ? k : n - 3 + k];
            x.push_back(20.0 * std::log10(p.carrier_peak_v));
            y.push_back(20.0 * std::log10(std::fabs(dc ? p.dc_v : p.audio_v)));
        }
        return fit_line(x, y);
    };
    const auto [al, bl] = region(true, false);
    const auto [ah, bh] = region(false, false);
    c.low_slope_db_per_db = bl;
    c.high_slope_db_per_db = bh;
    c.low_dc_slope_db_per_db = region(true, true).second;
    c.high_dc_slope_db_per_db = region(false, true).second;
    if (bl - bh > 0.2) {
        c.transition_v = std::pow(10.0, (ah - al) / (bl - bh) / 20.0);
    } else {
        c.transition_v = nan_v;
        c.warnings.push_back({warning_code::transfer_one_region,
                              fmt::format("transfer curve: slopes {:.3f} and {:.3f} dB/dB do not show two regions; "
                                          "widen the level range",
                                          bl, bh)});
    }
    return c;
}

frequency_response measure_frequency_response(const circuit_params& circuit, double carrier_v, const std::vector<double>& freqs,
                                              const characterize_settings& s)
{
    check_settings(s);
    if (freqs.size() < 2) throw config_error("frequency response: need at least 2 frequencies");
    for (std::size_t i = 0; i < freqs.size(); ++i)
        if (!(freqs[i] > 0.0 && freqs[i] < 0.45 * s.render.audio_rate_hz) || (i > 0 && !(freqs[i] > freqs[i - 1])))
            throw config_error(fmt::format("frequency response: frequency {} = {} Hz: must be ascending in (0, 0.45 x audio rate)", i,
                                           freqs[i]));
    const detector_network net(circuit);
    const double fs = s.render.audio_rate_hz;
    const settling_window sw = choose_settling_window(net);
    constexpr double fade_s = 2e-3; // stepped_tone_modulation's crossfade
    const double analysis = std::max(s.analysis_s, 4.0 / freqs.front());
    // Two spare samples: the window edges below are rounded inward (ceil / floor).
    const double dwell = (std::ceil((sw.settle_s + analysis + 2.0 * fade_s) * fs) + 2.0) / fs;
    stepped_tone_modulation prog(freqs, std::max(dwell, 0.01));
    am_params am;
    am.carrier_hz = s.carrier_hz;
    am.carrier_peak_v = carrier_v;
    am.modulation_index = s.modulation_index;
    const auto out = render_to_memory(circuit, am, prog, scaled_settings(net, carrier_v, s.render));
    frequency_response r;
    r.carrier_peak_v = carrier_v;
    r.modulation_index = s.modulation_index;
    r.settle_s = sw.settle_s;
    const double d = prog.dwell_s();
    for (std::size_t j = 0; j < freqs.size(); ++j) {
        const auto i0 = static_cast<std::size_t>(std::ceil((static_cast<double>(j) * d + fade_s + sw.settle_s) * fs));
        const auto i1 = std::min(out.earpiece_v.size(), static_cast<std::size_t>(std::floor((static_cast<double>(j + 1) * d - fade_s) * fs)));
        const std::span<const double> win(out.earpiece_v.data() + i0, i1 - i0);
        const double f = freqs[j];
        const auto tm = analyze_tone(win, fs, f, std::min(s.band_low_hz, 0.5 * f), 0.5 * fs);
        response_point p;
        p.frequency_hz = f;
        p.amplitude_v = tm.fundamental_v;
        p.gain_db = 20.0 * std::log10(tm.fundamental_v / (s.modulation_index * carrier_v));
        r.points.push_back(p);
    }
    std::size_t ip = 0;
    for (std::size_t j = 1; j < r.points.size(); ++j)
        if (r.points[j].gain_db > r.points[ip].gain_db) ip = j;
    r.peak_gain_db = r.points[ip].gain_db;
    for (auto& p : r.points) p.relative_db = p.gain_db - r.peak_gain_db;
    // -3 dB crossings either side of the peak, interpolated linearly in dB against log frequency.
    auto crossing = [&](std::size_t a, std::size_t b) {
        const double ya = r.points[a].relative_db + 3.0, yb = r.points[b].relative_db + 3.0;
        const double la = std::log(r.points[a].frequency_hz), lb = std::log(r.points[b].frequency_hz);
        return std::exp(la + (lb - la) * ya / (ya - yb));
    };
    r.low_corner_hz = nan_v;
    r.high_corner_hz = nan_v;
    for (std::size_t j = ip; j > 0; --j)
        if (r.points[j - 1].relative_db < -3.0) {
            r.low_corner_hz = crossing(j, j - 1);
            break;
        }
    for (std::size_t j = ip; j + 1 < r.points.size(); ++j)
        if (r.points[j + 1].relative_db < -3.0) {
            r.high_corner_hz = crossing(j, j + 1);
            break;
        }
    return r;
}

carrier_ripple measure_carrier_ripple(const circuit_params& circuit, double fc, double a, int cycles, const step_settings& st0)
{
    if (cycles < 10) throw config_error(fmt::format("carrier ripple: cycles = {}: must be >= 10", cycles));
    const detector_network net(circuit);
    const settling_window sw = choose_settling_window(net);
    carrier_ripple r;
    r.carrier_hz = fc;
    r.carrier_peak_v = a;
    // Settle on whole carrier periods, then sample the window at 64 points per period.
    const double period = 1.0 / fc;
    const double t0 = std::ceil(sw.settle_s / period) * period;
    r.settle_s = t0;
    const double t1 = t0 + cycles * period;
    tone_modulation silent({1000.0}, {1.0}, 1.0);
    am_params am;
    am.carrier_hz = fc;
    am.carrier_peak_v = a;
    am.modulation_index = 0.0;
    am.preroll_s = t1 + 1.0; // the programme (silent anyway with m = 0) never starts
    am.ramp_s = std::min(2e-3, 0.5 * t0);
    am.validate();
    const am_source src(am, &silent);
    step_settings st = st0;
    st.max_step_s = std::min(st.max_step_s, period / 40.0);
    st.initial_step_s = std::min(st.initial_step_s, 0.01 * period);
    st.absolute_tolerance_v = std::min(st.absolute_tolerance_v, std::max(1e-15, 1e-5 * estimated_output_v(net, a)));
    constexpr int per = 64;
    const auto n = static_cast<std::size_t>(cycles) * per;
    std::vector<double> v(n, 0.0);
    with_equations(net, src, [&](auto eq) {
        using eq_t = decltype(eq);
        tr_bdf2<eq_t> stepper(eq, st);
        stepper.initialize(eq_t::vec::Zero(), 0.0);
        constexpr int o = eq_t::output_index;
        stepper.advance_to(t0, [](double, const auto&, const auto&, double, const auto&, const auto&) {});
        std::size_t next = 0;
        auto obs = [&](double ta, const auto& xa, const auto& fa, double tb, const auto& xb, const auto& fb) {
            const double h = tb - ta;
            // Cubic Hermite through the step's end values and slopes (the stepper's dense output).
            while (next < n) {
                const double t = t0 + static_cast<double>(next) * period / per;
                if (t > tb) break;
                const double u = (t - ta) / h;
                const double h00 = (1 + 2 * u) * (1 - u) * (1 - u), h10 = u * (1 - u) * (1 - u), h01 = u * u * (3 - 2 * u),
                             h11 = u * u * (u - 1);
                v[next++] = h00 * xa[o] + h10 * h * fa[o] + h01 * xb[o] + h11 * h * fb[o];
            }
        };
        stepper.advance_to(t1 + 0.5 * period / per, obs);
    });
    const double fs = fc * per;
    double sum = 0.0;
    for (double x : v) sum += x;
    r.dc_v = sum / static_cast<double>(n);
    double ss = 0.0;
    for (double x : v) ss += (x - r.dc_v) * (x - r.dc_v);
    r.ripple_rms_v = std::sqrt(ss / static_cast<double>(n));
    const auto tm = analyze_tone(v, fs, fc, 0.5 * fc, 0.5 * fs);
    r.harmonic_rms_v = {tm.fundamental_v / std::sqrt(2.0), tm.harmonic_v[2] / std::sqrt(2.0), tm.harmonic_v[3] / std::sqrt(2.0)};
    return r;
}

std::vector<double> diaphragm_drive_n(const earpiece_params& e, std::span<const double> v, double fs)
{
    if (!(fs > 0.0) || !std::isfinite(fs)) throw config_error(fmt::format("diaphragm drive: fs = {} Hz: must be > 0", fs));
    if (!has_diaphragm_drive(e)) return std::vector<double>(v.size(), 0.0);
    return detail::filter_by_response(v, fs, [&](double f) { return diaphragm_drive_per_volt(e, f); });
}

render_metrics measure_render(std::span<const double> ev, double fs, const circuit_params& circuit, const am_params& am,
                              const metrics_request& q)
{
    const detector_network net(circuit);
    render_metrics rm;
    rm.settling = choose_settling_window(net);
    auto skip = static_cast<std::size_t>(std::ceil(rm.settling.settle_s * fs));
    if (ev.size() < skip + 64)
        throw config_error(fmt::format("metrics: {} samples at {} Hz: the settling window of {:.4g} s ({}) leaves fewer than 64",
                                       ev.size(), fs, rm.settling.settle_s, rm.settling.basis));
    // A little more settling for a fast transform length, unless that would cut the window below what the
    // tone analysis needs (4 periods of the lower tone and 64 samples, as analyze_tone and analyze_two_tone).
    skip = fft_friendly_start(ev.size(), skip, q.tone_hz > 0.0 ? std::max(64.0, 4.0 * fs / q.tone_hz) : 64.0);
    const std::span<const double> win = ev.subspan(skip);
    const double hi = std::min(q.band_high_hz, 0.5 * fs);
    const double lo = std::min(q.band_low_hz, 0.5 * hi);
    rm.levels = measure_levels(win, fs, lo, hi);
    std::vector<nlohmann::json> parts{to_json(rm.settling), to_json(rm.levels)};
    double top_hz = q.clip_top_hz;
    // Without modulation there is no tone at the earpiece: a fit would report noise as distortion.
    std::string no_tone_reason;
    if (q.tone_hz > 0.0 && !(am.modulation_index > 0.0)) {
        no_tone_reason = fmt::format("signal.modulation_index = {}: the carrier is unmodulated, so there is no tone to "
                                     "measure; tone and distortion figures are null",
                                     am.modulation_index);
        rm.warnings.push_back({warning_code::unmodulated_tone, no_tone_reason});
    } else if (q.tone_hz > 0.0 && q.tone2_hz > 0.0) {
        rm.has_imd = true;
        rm.imd = analyze_two_tone(win, fs, q.tone_hz, q.tone2_hz, q.tone_ratio, 3);
        parts.push_back(to_json(rm.imd));
        top_hz = q.tone2_hz;
    } else if (q.tone_hz > 0.0) {
        rm.has_tone = true;
        rm.tone = analyze_tone(win, fs, q.tone_hz, std::min(lo, 0.5 * q.tone_hz), hi);
        parts.push_back(to_json(rm.tone));
        rm.detection_efficiency = am.modulation_index > 0.0 ? rm.tone.fundamental_v / (am.modulation_index * am.carrier_peak_v) : nan_v;
        top_hz = q.tone_hz;
    }
    if (!q.reference.empty()) {
        if (q.reference.size() != ev.size())
            throw config_error(fmt::format("metrics: reference has {} samples, earpiece {}: must match", q.reference.size(), ev.size()));
        rm.has_fidelity = true;
        rm.fidelity = compare_to_reference(win, q.reference.subspan(skip), fs, 0.05, lo, hi);
        parts.push_back(to_json(rm.fidelity));
    }
    if (top_hz > 0.0) {
        rm.has_clipping = true;
        rm.clipping = diagnose_clipping(net, top_hz, am.modulation_index);
        observe_failure_to_follow(rm.clipping, net, win, fs);
        parts.push_back(to_json(rm.clipping));
        for (auto& w : clipping_warnings(rm.clipping)) rm.warnings.push_back(std::move(w));
    }
    nlohmann::json extra;
    // The diaphragm drive (transducer.hpp): what the ear follows, comparable across earpiece kinds.
    if (has_diaphragm_drive(circuit.earpiece)) {
        const std::vector<double> drive = diaphragm_drive_n(circuit.earpiece, ev, fs);
        const level_metrics dl = measure_levels(std::span<const double>(drive).subspan(skip), fs, lo, hi);
        rm.diaphragm_drive_rms_n = dl.audio_rms_v;
        extra["diaphragm_drive_rms_n"] = num(dl.audio_rms_v);
        extra["diaphragm_drive_db_re_1mn"] = dl.audio_rms_v > 0.0 ? num(20.0 * std::log10(dl.audio_rms_v / 1e-3)) : nlohmann::json(nullptr);
        extra["diaphragm_drive_quantity"] = std::string(diaphragm_drive_quantity(circuit.earpiece));
    } else {
        rm.diaphragm_drive_rms_n = nan_v;
        extra["diaphragm_drive_rms_n"] = nullptr;
        extra["diaphragm_drive_db_re_1mn"] = nullptr;
        extra["diaphragm_drive_quantity"] = nullptr;
    }
    extra["carrier_hz"] = num(am.carrier_hz);
    extra["carrier_peak_v"] = num(am.carrier_peak_v);
    extra["modulation_index"] = num(am.modulation_index);
    extra["detection_efficiency"] = rm.has_tone ? num(rm.detection_efficiency) : nlohmann::json(nullptr);
    extra["analysed_s"] = num(static_cast<double>(win.size()) / fs);
    extra["tone_not_applicable"] = no_tone_reason.empty() ? nlohmann::json(nullptr) : nlohmann::json(no_tone_reason);
    parts.push_back(extra);
    rm.json = merge_metrics(parts, rm.warnings);
    return rm;
}

nlohmann::json to_json(const settling_window& w)
{
    nlohmann::json j;
    j["settle_s"] = num(w.settle_s);
    j["settle_basis"] = w.basis;
    j["output_tau_s"] = num(w.output_tau_s);
    j["charge_tau_s"] = num(w.charge_tau_s);
    j["earpiece_tau_s"] = num(w.earpiece_tau_s);
    return j;
}

nlohmann::json to_json(const clipping_diagnosis& d)
{
    nlohmann::json j;
    j["clip_dc_load_ohm"] = num(d.dc_load_ohm);
    j["clip_node_capacitance_f"] = num(d.node_capacitance_f);
    j["diagonal_clip_m_max"] = num(d.diagonal_m_max);
    j["ac_coupled_load"] = d.ac_coupled_load;
    j["ac_load_ohm"] = num(d.ac_load_ohm);
    j["negative_peak_m_max"] = num(d.negative_peak_m_max);
    j["combined_clip_m_max"] = num(d.combined_m_max);
    // The formula's limit is information (with its tone frequency); what the render shows is diagonal_clipping.
    j["diagonal_clip_tone_hz"] = num(d.tone_hz);
    j["m_above_diagonal_formula"] = d.exceeds_diagonal;
    j["diagonal_clipping"] = diagonal_clipping_status(d);
    j["clipping_notes"] = clipping_notes(d);
    j["exceeds_negative_peak_clip"] = d.exceeds_negative_peak;
    j["failure_to_follow_fraction"] = d.observation_available ? num(d.free_discharge_fraction) : nlohmann::json(nullptr);
    j["failure_to_follow_observed"] = d.observed_failure_to_follow;
    return j;
}

nlohmann::json to_json(const transfer_curve& c)
{
    nlohmann::json j;
    j["transfer_tone_hz"] = num(c.tone_hz);
    j["transfer_modulation_index"] = num(c.modulation_index);
    j["transfer_low_slope_db_per_db"] = num(c.low_slope_db_per_db);
    j["transfer_high_slope_db_per_db"] = num(c.high_slope_db_per_db);
    j["transfer_transition_v"] = num(c.transition_v);
    auto arr = [&](auto field) {
        nlohmann::json a = nlohmann::json::array();
        for (const auto& p : c.points) a.push_back(num(field(p)));
        return a;
    };
    j["transfer_carrier_peak_v"] = arr([](const transfer_point& p) { return p.carrier_peak_v; });
    j["transfer_audio_v"] = arr([](const transfer_point& p) { return p.audio_v; });
    j["transfer_dc_v"] = arr([](const transfer_point& p) { return p.dc_v; });
    j["transfer_h2_ratio"] = arr([](const transfer_point& p) { return p.h2_ratio; });
    return j;
}

nlohmann::json to_json(const frequency_response& r)
{
    nlohmann::json j;
    j["response_low_corner_hz"] = num(r.low_corner_hz);
    j["response_high_corner_hz"] = num(r.high_corner_hz);
    j["response_peak_gain_db"] = num(r.peak_gain_db);
    nlohmann::json f = nlohmann::json::array(), g = nlohmann::json::array(), rel = nlohmann::json::array();
    for (const auto& p : r.points) {
        f.push_back(num(p.frequency_hz));
        g.push_back(num(p.gain_db));
        rel.push_back(num(p.relative_db));
    }
    j["response_frequency_hz"] = f;
    j["response_gain_db"] = g;
    j["response_relative_db"] = rel;
    return j;
}

nlohmann::json to_json(const carrier_ripple& r)
{
    nlohmann::json j;
    j["ripple_carrier_hz"] = num(r.carrier_hz);
    j["ripple_rms_v"] = num(r.ripple_rms_v);
    j["ripple_fc_rms_v"] = r.harmonic_rms_v.size() > 0 ? num(r.harmonic_rms_v[0]) : nlohmann::json(nullptr);
    j["ripple_2fc_rms_v"] = r.harmonic_rms_v.size() > 1 ? num(r.harmonic_rms_v[1]) : nlohmann::json(nullptr);
    j["ripple_3fc_rms_v"] = r.harmonic_rms_v.size() > 2 ? num(r.harmonic_rms_v[2]) : nlohmann::json(nullptr);
    j["ripple_dc_v"] = num(r.dc_v);
    return j;
}

} // namespace galena
