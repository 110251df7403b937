#include "galena/job.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/segmented_render.hpp"
#include "galena/characterize.hpp"
#include "galena/metrics.hpp"
#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/units.hpp"
#include "galena/validate.hpp"

#include <chrono>
#include <cmath>
#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <optional>

namespace galena {

namespace fs = std::filesystem;

namespace {
/// Raised-cosine fade gain for sample i of n at rate fs.
double fade_gain(std::size_t i, std::size_t n, double fs, double fade_s)
{
    const double t_in = static_cast<double>(i) / fs;
    const double t_out = static_cast<double>(n - 1 - i) / fs;
    const double t = std::min(t_in, t_out);
    if (fade_s <= 0.0 || t >= fade_s) return 1.0;
    return 0.5 * (1.0 - std::cos(pi * t / fade_s));
}

/// Copies a float WAV of volts-over-unit-scale into `target` with a gain; streaming.
void transcode(const fs::path& src, const fs::path& target, double fs, wav_format fmt_, double full_scale_v, double gain,
               bool overwrite)
{
    wav_reader r(src);
    wav_writer w(target, fs, fmt_, full_scale_v, overwrite);
    std::vector<float> buf(65536);
    std::vector<double> v;
    while (std::size_t n = r.read(buf)) {
        v.assign(buf.begin(), buf.begin() + static_cast<std::ptrdiff_t>(n));
        for (double& x : v) x *= gain;
        w.write_volts(v);
    }
    w.commit();
}
} // namespace

namespace {
/// Flat metrics and the typed warnings they carry.
struct measured {
    nlohmann::json json;
    std::vector<warning> warnings;
};

measured measure_job(const scenario& s, std::span<const float> earpiece_v, const std::vector<warning>& warnings)
{
    const double fs_hz = s.render.audio_rate_hz;
    metrics_request rq;
    // Audio band: 20 Hz (common practice) to 10 kHz (broadcast AM audio, NRSC-1), clamped to fs/2 by measure_render.
    rq.band_low_hz = 20.0;
    rq.band_high_hz = 10000.0;
    const auto& p = s.programme;
    if (p.kind == programme_kind::tone) rq.tone_hz = p.tone_hz;
    if (p.kind == programme_kind::two_tone) {
        rq.tone_hz = p.tone_hz;
        rq.tone2_hz = p.tone2_hz;
        rq.tone_ratio = p.tone_ratio;
    }
    if (p.kind == programme_kind::clip || p.kind == programme_kind::log_sweep)
        rq.clip_top_hz = std::min(p.kind == programme_kind::clip ? p.audio_cutoff_hz : p.sweep_stop_hz, 0.45 * fs_hz);
    const std::vector<double> v(earpiece_v.begin(), earpiece_v.end());
    const render_metrics m = measure_render(v, fs_hz, s.circuit, s.am, rq);
    nlohmann::json j = m.json;
    // The contract's keys are always present; null when the programme has no single tone.
    for (const char* k : {"tone_hz", "fundamental_v", "h2_ratio", "h3_ratio", "thd_percent", "thd_n_percent", "sinad_db"})
        if (!j.contains(k)) j[k] = nullptr;
    std::vector<warning> w = warnings;
    w.insert(w.end(), m.warnings.begin(), m.warnings.end());
    if (!m.has_tone && p.kind != programme_kind::tone && p.kind != programme_kind::two_tone)
        w.push_back({warning_code::no_distortion_figures, "no distortion figures: the programme is not a single test tone"});
    set_warnings(j, w);
    return {std::move(j), std::move(w)};
}

measured measure_receiver_job(const scenario& s, std::span<const float> earpiece_v, const receiver_figures& fig,
                              const std::vector<warning>& warnings)
{
    const double fs_hz = s.render.audio_rate_hz;
    // Skip the output network's settling, as measure_render does.
    const settling_window sw = choose_settling_window(detector_network(s.circuit));
    auto skip = std::min(earpiece_v.size(), static_cast<std::size_t>(std::ceil(sw.settle_s * fs_hz)));
    // A fast transform length (metrics.hpp), unless that would cut the window below what the analysis needs:
    // 4 periods of the wanted tone and 64 samples (analyze_tone), 8 per fitted coefficient (tones and whistles).
    const auto& first = s.stations.front();
    double need = std::max(64.0, 8.0 * static_cast<double>(4 * s.stations.size() + 1));
    if (first.kind == programme_kind::tone && first.tone_hz > 0.0) need = std::max(need, 4.0 * fs_hz / first.tone_hz);
    skip = fft_friendly_start(earpiece_v.size(), skip, need);
    const std::vector<double> v(earpiece_v.begin() + static_cast<std::ptrdiff_t>(skip), earpiece_v.end());
    nlohmann::json j = to_json(measure_levels(v, fs_hz, 20.0, std::min(10000.0, 0.45 * fs_hz)));
    std::vector<warning> w = warnings;
    const auto& wanted = s.stations.front();
    for (const char* k : {"tone_hz", "fundamental_v", "h2_ratio", "h3_ratio", "thd_percent", "thd_n_percent", "sinad_db"}) j[k] = nullptr;
    if (wanted.kind == programme_kind::tone) {
        const tone_metrics tm = analyze_tone(v, fs_hz, wanted.tone_hz, 20.0, std::min(10000.0, 0.45 * fs_hz));
        const nlohmann::json tj = to_json(tm);
        for (auto it = tj.begin(); it != tj.end(); ++it) j[it.key()] = it.value();
    } else {
        w.push_back({warning_code::no_distortion_figures, "no distortion figures: the wanted station's programme is not a test tone"});
    }
    auto number_or_null = [](double x) { return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr); };
    j["layout"] = std::string(to_string(s.tuner.layout));
    j["tuned_hz"] = number_or_null(fig.tuned_hz);
    j["unloaded_tuned_hz"] = number_or_null(fig.unloaded_tuned_hz);
    j["loaded_q"] = number_or_null(fig.loaded_q);
    j["rf_bandwidth_hz"] = number_or_null(fig.rf_bandwidth_hz);
    j["detector_rf_peak_v"] = fig.detector_rf_peak_v;
    j["detector_rf_resistance_ohm"] = number_or_null(1.0 / fig.detector_admittance_s.real());
    j["wanted_emf_peak_v"] = fig.wanted_emf_peak_v;
    // Every station's tone and every carrier-difference whistle in the audio band, fitted together.
    const double top = 0.45 * fs_hz;
    std::vector<double> freqs;
    auto index_of = [&](double f) -> int {
        for (std::size_t i = 0; i < freqs.size(); ++i)
            if (std::fabs(freqs[i] - f) < 1e-6 * f) return static_cast<int>(i);
        if (!(f >= 20.0 && f < top)) return -1;
        freqs.push_back(f);
        return static_cast<int>(freqs.size()) - 1;
    };
    std::vector<int> tone_idx, whistle_idx;
    std::vector<int> tone_users(s.stations.size(), 0);
    for (const auto& st : s.stations) tone_idx.push_back(st.kind == programme_kind::tone ? index_of(st.tone_hz) : -1);
    for (std::size_t k = 1; k < s.stations.size(); ++k)
        whistle_idx.push_back(index_of(std::fabs(s.stations[k].params.carrier_hz - wanted.params.carrier_hz)));
    std::vector<double> amp(freqs.size(), std::numeric_limits<double>::quiet_NaN());
    if (!freqs.empty() && v.size() >= 8 * (2 * freqs.size() + 1)) amp = fit_amplitudes(v, fs_hz, freqs);
    // A tone frequency shared by two stations, or equal to a whistle, cannot be told apart: null.
    std::vector<int> uses(freqs.size(), 0);
    for (int i : tone_idx)
        if (i >= 0) ++uses[static_cast<std::size_t>(i)];
    for (int i : whistle_idx)
        if (i >= 0) ++uses[static_cast<std::size_t>(i)];
    auto level_at = [&](int i) { return i >= 0 && uses[static_cast<std::size_t>(i)] == 1 ? amp[static_cast<std::size_t>(i)] : std::numeric_limits<double>::quiet_NaN(); };
    const double wanted_v = level_at(tone_idx.front());
    nlohmann::json stations = nlohmann::json::array();
    for (std::size_t k = 0; k < s.stations.size(); ++k) {
        const auto& st = s.stations[k];
        nlohmann::json e;
        e["name"] = st.params.name;
        e["carrier_hz"] = st.params.carrier_hz;
        e["tone_hz"] = st.kind == programme_kind::tone ? nlohmann::json(st.tone_hz) : nlohmann::json(nullptr);
        const double tv = level_at(tone_idx[k]);
        e["tone_v"] = number_or_null(tv);
        e["level_db"] = number_or_null(20.0 * std::log10(tv / wanted_v));
        if (st.kind == programme_kind::tone && !std::isfinite(tv))
            w.push_back({warning_code::station_tone_unmeasured,
                         fmt::format("station \"{}\": its tone ({} Hz) shares a frequency with another tone or whistle, or lies "
                                     "outside the audio band: no level",
                                     st.params.name, detail::format_value(st.tone_hz))});
        stations.push_back(e);
    }
    j["stations"] = stations;
    // The loudest neighbour's tone relative to the wanted one, dB: the selectivity a listener hears.
    double loudest = std::numeric_limits<double>::quiet_NaN();
    for (std::size_t k = 1; k < stations.size(); ++k)
        if (stations[k]["level_db"].is_number()) {
            const double d = stations[k]["level_db"].get<double>();
            if (!(d <= loudest)) loudest = d;
        }
    j["wanted_tone_v"] = stations[0]["tone_v"];
    j["loudest_neighbour_db"] = number_or_null(loudest);
    nlohmann::json whistles = nlohmann::json::array();
    for (std::size_t k = 1; k < s.stations.size(); ++k) {
        nlohmann::json e;
        e["stations"] = {wanted.params.name, s.stations[k].params.name};
        e["frequency_hz"] = std::fabs(s.stations[k].params.carrier_hz - wanted.params.carrier_hz);
        e["level_v"] = number_or_null(level_at(whistle_idx[k - 1]));
        whistles.push_back(e);
    }
    j["whistles"] = whistles;
    j["settle_s"] = sw.settle_s;
    set_warnings(j, w);
    return {std::move(j), std::move(w)};
}
} // namespace

nlohmann::json job_metrics(const scenario& s, std::span<const float> earpiece_v, const std::vector<warning>& warnings)
{
    return measure_job(s, earpiece_v, warnings).json;
}

nlohmann::json receiver_job_metrics(const scenario& s, std::span<const float> earpiece_v, const receiver_figures& fig,
                                    const std::vector<warning>& warnings)
{
    return measure_receiver_job(s, earpiece_v, fig, warnings).json;
}

const std::vector<std::string>& job_file_names()
{
    static const std::vector<std::string> n = {"recovered.wav", "recovered.json", "metrics.json", "recovered-normalised.wav"};
    return n;
}

std::vector<fs::path> scenario_inputs(const scenario& s)
{
    std::vector<fs::path> in;
    if (!s.file.empty()) in.push_back(s.file);
    if (s.programme.kind == programme_kind::clip) in.push_back(s.programme.audio);
    if (!s.diode_file.empty()) in.push_back(s.diode_file);
    for (const auto& st : s.stations)
        if (st.kind == programme_kind::clip) in.push_back(st.audio);
    return in;
}

void relocate(job_outcome& o, const staged_output& staged)
{
    for (fs::path* p : {&o.wav, &o.normalised_wav, &o.sidecar, &o.metrics_file})
        if (!p->empty()) *p = staged.published(*p);
}

namespace {
/// The figures that usually explain a solver failure, for its message.
std::string likely_cause(const scenario& s)
{
    const auto& d = s.circuit.diode;
    const double nvt = d.emission_coefficient * thermal_voltage_v(kelvin_from_celsius(d.temperature_c));
    const double r = s.circuit.source.resistance_ohm + d.series_resistance_ohm;
    return fmt::format("scenario figures: diode.saturation_current_a = {}, diode.emission_coefficient = {}, source + series "
                       "resistance = {} ohm, signal.carrier_peak_v = {} V = {:.3g} x n Vt",
                       detail::format_value(d.saturation_current_a), detail::format_value(d.emission_coefficient),
                       detail::format_value(r), detail::format_value(s.am.carrier_peak_v), s.am.carrier_peak_v / nvt);
}

std::string wall_text(double s)
{
    if (s < 90.0) return fmt::format("{:.0f} s", s);
    if (s < 5400.0) return fmt::format("{:.0f} min", s / 60.0);
    return fmt::format("{:.1f} h", s / 3600.0);
}
} // namespace

namespace {
/// The pilot render: 10 ms of settled carrier and a 20 ms tone (shorter at a high carrier), with this
/// scenario's circuit, carrier and solver. Returns wall seconds per simulated second and the steps per carrier cycle it used.
std::pair<double, double> pilot_render(const scenario& s)
{
    render_settings rs = s.render;
    // At least 10 ms + 20 ms, but no more than about 5e4 carrier cycles at a high carrier: a faster output
    // rate (up to 192 kHz, below 0.8 fc) shortens the chain's start-up that the preroll must cover.
    const double fc = s.am.carrier_hz;
    rs.audio_rate_hz = std::max(rs.audio_rate_hz, std::min(192000.0, std::floor(0.8 * fc)));
    rs.preroll_s = std::max(std::min(0.01, 2e4 / fc), audio_chain_warm_up_s(rs.audio_rate_hz));
    tone_modulation tone({std::min(1000.0, 0.2 * rs.audio_rate_hz)}, {1.0}, std::max(std::min(0.02, 3e4 / fc), 64.0 / rs.audio_rate_hz));
    const auto t0 = std::chrono::steady_clock::now();
    const render_result r = render(s.circuit, s.am, tone, rs, [](const audio_block&) { throw_if_cancelled(); });
    const double wall = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    const double cycles = std::max(r.simulated_s * s.am.carrier_hz, 1.0);
    const double steps = r.steps_per_cycle > 0 ? static_cast<double>(r.steps_per_cycle) : static_cast<double>(r.stats.accepted) / cycles;
    return {wall / std::max(r.simulated_s, 1e-6), steps};
}

double work_seconds(const scenario& s, double programme_s, std::size_t renders)
{
    return programme_s + static_cast<double>(renders) * automatic_preroll_s(detector_network(s.circuit), s.render.audio_rate_hz);
}
} // namespace

double estimate_render_wall_s(const scenario& s, double programme_s, std::size_t renders, unsigned threads)
{
    const double per_s = pilot_render(s).first;
    return per_s * work_seconds(s, programme_s, renders) /
           static_cast<double>(std::max<std::size_t>(1, std::min<std::size_t>(threads, renders)));
}

void check_render_length(const scenario& s, const std::string& where, double programme_s, std::size_t renders, unsigned threads,
                         bool allow_long)
{
    if (allow_long) return;
    const double cycles = work_seconds(s, programme_s, renders) * s.am.carrier_hz;
    const auto refuse = [&](const std::string& what, const std::string& limit, double wall) {
        throw config_error(fmt::format("{}: {}: more than the {} limit for one command; estimated wall time about {} on this "
                                       "machine; pass --allow-long to render it (Ctrl-C stops it cleanly), or set "
                                       "signal.duration_s to render part of it",
                                       where, what, limit, wall_text(wall)));
    };
    const std::string in_renders = renders > 1 ? fmt::format(" in {} renders", renders) : std::string();
    if (programme_s > long_render_limit_s) {
        const double est = estimate_render_wall_s(s, programme_s, renders, threads);
        refuse(fmt::format("{} s of programme to render{}", detail::format_value(programme_s), in_renders),
               fmt::format("{} s", detail::format_value(long_render_limit_s)), est);
    }
    // Work, not programme seconds: carrier cycles x steps per cycle. Below the smallest possible N nothing
    // needs a pilot; otherwise the pilot render tells the N (or the adaptive path's steps) this circuit takes.
    if (cycles * 4096.0 <= long_render_limit_steps) return;
    const auto [per_s, steps_per_cycle] = pilot_render(s);
    const double steps = cycles * steps_per_cycle;
    if (steps > long_render_limit_steps) {
        const double wall = per_s * work_seconds(s, programme_s, renders) /
                            static_cast<double>(std::max<std::size_t>(1, std::min<std::size_t>(threads, renders)));
        refuse(fmt::format("{:.3g} carrier cycles x {:.3g} steps per cycle = {:.3g} solver steps{} ({} s of programme at "
                           "signal.carrier_hz = {})",
                           cycles, steps_per_cycle, steps, in_renders, detail::format_value(programme_s),
                           detail::format_value(s.am.carrier_hz)),
               fmt::format("{:.3g}-step", long_render_limit_steps), wall);
    }
}

void check_measurable(const scenario& s, const std::string& where)
{
    const double settle_s = choose_settling_window(detector_network(s.circuit)).settle_s;
    const double need_s = settle_s + 64.0 / s.render.audio_rate_hz;
    const double have_s = programme_duration_s(s);
    if (have_s < need_s)
        throw config_error(fmt::format("{}: signal.duration_s: the programme lasts {:.4g} s: too short to measure; the analysis "
                                       "skips {:.4g} s of settling (5 x the slowest time constant) and needs 64 samples "
                                       "after it, so at least {:.4g} s",
                                       where, have_s, settle_s, need_s));
}

job_outcome run_render_job(const scenario& s, const fs::path& out_dir, const job_options& opt, double analysis_limit_s)
{
    // Refuse up front (before the out folder is touched): an overlong programme.
    check_render_length(s, s.file.string(), programme_duration_s(s), 1, 1, opt.allow_long);
    check_measurable(s, s.file.string());
    staged_output staged(out_dir, opt.overwrite, scenario_inputs(s));
    for (const auto& n : job_file_names()) {
        staged.check(n);
        staged.owns(n);
    }
    staged.owns("plots");
    staged.check(fs::path("plots") / "zoom.svg"); // a file named plots refuses the render before it starts
    job_outcome o;
    with_described_errors(staged, [&] {
        o = render_job_into(s, staged.dir(), opt, analysis_limit_s);
        if (opt.extras)
            for (auto& w : opt.extras(o, staged.dir())) o.warnings.push_back(std::move(w));
        throw_if_cancelled();
        staged.publish();
    });
    relocate(o, staged);
    for (auto& w : o.warnings) w.message = staged.describe(w.message);
    return o;
}

double choose_full_scale_v(double peak_v)
{
    if (!(peak_v > 0.0) || !std::isfinite(peak_v)) return 1.0;
    const double need = peak_v * std::pow(10.0, auto_headroom_db / 20.0);
    // Rounded up to two significant digits, so the calibration reads as a short number (0.14 V, 2.7 mV).
    const double unit = std::pow(10.0, std::floor(std::log10(need)) - 1.0);
    const double v = std::ceil(need / unit * (1.0 - 1e-12)) * unit;
    return std::clamp(std::stod(fmt::format("{:.2g}", v)), 1e-9, 1e4);
}

job_outcome render_job_unscaled(const scenario& s, const fs::path& out_dir, const job_options& opt, double analysis_limit_s)
{
    std::error_code ec;
    job_outcome o;
    o.wav = out_dir / "recovered.wav";
    o.sidecar = out_dir / "recovered.json";
    o.metrics_file = out_dir / "metrics.json";
    o.full_scale_v = s.output.full_scale_v;
    const fs::path norm_path = out_dir / "recovered-normalised.wav";
    for (const auto& p : {o.wav, o.sidecar, norm_path, o.metrics_file}) {
        for (const auto& in : scenario_inputs(s))
            if (same_file(p, in))
                throw audio_error(fmt::format("{}: is an input of this scenario; refusing to overwrite an input", p.string()));
        if (fs::exists(p, ec) && !opt.overwrite)
            throw audio_error(fmt::format("{}: already exists (pass --overwrite to replace it)", p.string()));
    }
    if (s.programme.kind == programme_kind::clip) {
        const wav_reader header(s.programme.audio);
        if (header.info().channels > 1)
            o.warnings.push_back({warning_code::channels_mixed, fmt::format("{}: {} channels mixed to mono (their average) before modulation",
                                                                            s.programme.audio.string(), header.info().channels)});
        const double whole_s = static_cast<double>(header.frames()) / header.sample_rate_hz();
        if (s.programme.duration_s > 0.0 && s.programme.duration_s < whole_s)
            o.warnings.push_back({warning_code::clip_shortened,
                                  fmt::format("signal.duration_s = {} s: only the first {} s of {} ({:.3g} s long) is rendered; "
                                              "set signal.duration_s = 0 for the whole clip",
                                              detail::format_value(s.programme.duration_s), detail::format_value(s.programme.duration_s),
                                              s.programme.audio.filename().string(), whole_s)});
    }
    const bool receiver = s.tuner.layout != tuner_layout::bench;
    std::vector<std::unique_ptr<modulation>> programmes;
    if (receiver) programmes = make_station_programmes(s);
    else programmes.push_back(make_programme(s));
    modulation* programme = programmes.front().get();
    const double fs_hz = s.render.audio_rate_hz;
    const auto total = static_cast<std::size_t>(std::llround(programme->duration_s() * fs_hz));
    const auto keep = static_cast<std::size_t>(analysis_limit_s * fs_hz);

    // Unclipped float intermediate (unit scale = 1 V), hidden in the output directory; removed on exit.
    const fs::path raw_path = out_dir / ".recovered.unclipped.wav";
    // Removed here on a failure; on success finish_job removes it after writing the WAVs.
    struct remover {
        fs::path p;
        bool keep = false;
        ~remover()
        {
            if (keep) return;
            std::error_code e;
            fs::remove(p, e);
        }
    } cleanup{raw_path};
    double sum_sq = 0.0;
    try {
        wav_writer raw(raw_path, fs_hz, wav_format::float32, 1.0e3, true);
        std::vector<double> faded;
        const audio_sink sink = [&](const audio_block& b) {
            throw_if_cancelled();
            if (opt.cancel != nullptr) opt.cancel->throw_if_requested();
            if (opt.stop != nullptr && opt.stop->load())
                throw cancelled_error("stopped: another render of this command failed first", 0);
            faded.assign(b.audio_v.begin(), b.audio_v.end());
            for (std::size_t i = 0; i < faded.size(); ++i) {
                // The peak of what the WAV holds (after the fade), so the normalised copy peaks where it says.
                faded[i] *= fade_gain(b.first_sample + i, total, fs_hz, opt.fade_s);
                o.peak_audio_v = std::max(o.peak_audio_v, std::fabs(faded[i]));
                sum_sq += faded[i] * faded[i];
            }
            raw.write_volts(faded);
            for (std::size_t i = 0; i < b.earpiece_v.size() && o.analysis_v.size() < keep; ++i)
                o.analysis_v.push_back(static_cast<float>(b.earpiece_v[i]));
            if (opt.progress && total > 0) opt.progress(static_cast<double>(b.first_sample + b.earpiece_v.size()) / static_cast<double>(total));
        };
        if (receiver) {
            receiver_spec spec;
            spec.circuit = s.circuit;
            spec.antenna = s.antenna;
            spec.tuner = s.tuner;
            spec.noise = s.noise;
            for (std::size_t k = 0; k < s.stations.size(); ++k) spec.stations.push_back({s.stations[k].params, programmes[k].get()});
            o.render = render_receiver(spec, s.render, sink, o.receiver);
        } else if (opt.use_second_core) {
            segment_options so;
            so.second_programme = [&s] { return make_programme(s); };
            so.stop_requested = [&opt] {
                return cancel_requested() || (opt.cancel != nullptr && opt.cancel->requested()) || (opt.stop != nullptr && opt.stop->load());
            };
            o.render = render_segmented(s.circuit, s.am, *programme, s.render, sink, so);
        } else {
            o.render = render(s.circuit, s.am, *programme, s.render, sink);
        }
        raw.commit();
    } catch (const integration_error& e) {
        throw integration_error(fmt::format("{}: {}; {}", s.file.string(), e.what(), likely_cause(s)), e.time_s());
    }
    // Measured before any output file exists, so a span too short to measure leaves nothing behind.
    measured analysis;
    try {
        analysis = receiver ? measure_receiver_job(s, o.analysis_v, o.receiver, o.render.warnings)
                            : measure_job(s, o.analysis_v, o.render.warnings);
        o.metrics = std::move(analysis.json);
    } catch (const config_error& e) {
        throw config_error(fmt::format("{}: {}", s.file.string(), e.what()));
    }
    o.metrics["peak_audio_v"] = o.peak_audio_v;
    o.audio_rms_v = total > 0 ? std::sqrt(sum_sq / static_cast<double>(total)) : 0.0;
    o.unscaled = raw_path;
    o.pending_warnings = std::move(analysis.warnings);
    cleanup.keep = true;
    return o;
}

void finish_job(job_outcome& o, const scenario& s, double full_scale_v, bool automatic, const job_options& opt)
{
    if (o.unscaled.empty()) throw audio_error("finish_job: the render is already finished (programmer error)");
    const fs::path raw_path = o.unscaled;
    struct remover {
        fs::path p;
        ~remover()
        {
            std::error_code e;
            fs::remove(p, e);
        }
    } cleanup{raw_path};
    o.unscaled.clear();
    const double fs_hz = s.render.audio_rate_hz;
    const fs::path norm_path = o.wav.parent_path() / "recovered-normalised.wav";
    o.full_scale_v = full_scale_v;
    o.full_scale_auto = automatic;
    o.headroom_db = o.peak_audio_v > 0.0 ? 20.0 * std::log10(full_scale_v / o.peak_audio_v) : std::numeric_limits<double>::infinity();
    o.rms_dbfs = o.audio_rms_v > 0.0 ? 20.0 * std::log10(o.audio_rms_v / full_scale_v) : -std::numeric_limits<double>::infinity();
    o.clipped_samples = 0;
    if (o.peak_audio_v > full_scale_v) {
        // Exact count: read the unclipped intermediate back (volts / 1000).
        wav_reader r(raw_path);
        std::vector<float> buf(65536);
        while (std::size_t n = r.read(buf))
            for (std::size_t i = 0; i < n; ++i)
                if (std::fabs(1e3 * static_cast<double>(buf[i])) > full_scale_v) ++o.clipped_samples;
    }
    auto number_or_null = [](double x) { return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr); };
    o.metrics["clipped_samples"] = o.clipped_samples;
    o.metrics["full_scale_v"] = o.full_scale_v;
    o.metrics["full_scale_auto"] = o.full_scale_auto;
    o.metrics["headroom_db"] = number_or_null(o.headroom_db);
    o.metrics["rms_dbfs"] = number_or_null(o.rms_dbfs);
    // The intermediate holds volts / 1000; scale back while transcoding.
    transcode(raw_path, o.wav, fs_hz, s.output.format, full_scale_v, 1e3, opt.overwrite);
    if (o.peak_audio_v > full_scale_v) {
        // A normalised copy peaking at -1 dBFS.
        const double target = full_scale_v * std::pow(10.0, -1.0 / 20.0);
        const double gain = target / o.peak_audio_v;
        o.normalised_gain_db = 20.0 * std::log10(gain);
        o.normalised_wav = norm_path;
        transcode(raw_path, norm_path, fs_hz, s.output.format, full_scale_v, 1e3 * gain, opt.overwrite);
        o.warnings.push_back({warning_code::output_clipped,
                              fmt::format("the earpiece audio peaks at {:.3g} V, above the {:.3g} V full scale: {} clips; "
                                          "{} is a copy with {:.1f} dB gain",
                                          o.peak_audio_v, full_scale_v, o.wav.filename().string(),
                                          norm_path.filename().string(), o.normalised_gain_db)});
    }
    if (o.rms_dbfs < quiet_output_dbfs)
        o.warnings.push_back({warning_code::quiet_output,
                              fmt::format("{} sits at {:.1f} dBFS RMS, below {:.0f} dBFS: nearly silent at a normal volume; "
                                          "{}",
                                          o.wav.filename().string(), o.rms_dbfs, quiet_output_dbfs,
                                          automatic ? "another render of this command is much louder (one full scale for all)"
                                                    : fmt::format("output.full_scale_v = {} V was chosen explicitly; lower it, or "
                                                                  "leave it out for the automatic choice",
                                                                  detail::format_value(full_scale_v)))});
    o.warnings.insert(o.warnings.end(), o.pending_warnings.begin(), o.pending_warnings.end());
    o.pending_warnings.clear();
    set_warnings(o.metrics, o.warnings);
    nlohmann::ordered_json j;
    j["wav"] = o.wav.filename().string();
    j["full_scale_v"] = o.full_scale_v;
    j["full_scale_auto"] = o.full_scale_auto;
    j["headroom_db"] = number_or_null(o.headroom_db);
    j["rms_dbfs"] = number_or_null(o.rms_dbfs);
    j["sample_rate_hz"] = fs_hz;
    j["format"] = std::string(to_string(s.output.format));
    j["samples"] = o.render.samples;
    j["preroll_s"] = o.render.preroll_s;
    j["peak_audio_v"] = o.peak_audio_v;
    j["clipped_samples"] = o.clipped_samples;
    j["normalised_wav"] = o.normalised_wav.empty() ? nlohmann::json(nullptr) : nlohmann::json(o.normalised_wav.filename().string());
    j["normalised_gain_db"] = o.normalised_gain_db;
    j["simulated_s"] = o.render.simulated_s;
    j["fine_sample_rate_hz"] = o.render.sample_rate_fine_hz;
    j["steps_accepted"] = o.render.stats.accepted;
    j["steps_rejected"] = o.render.stats.rejected_error + o.render.stats.rejected_newton;
    j["newton_iterations"] = o.render.stats.newton_iterations;
    j["solver_method"] = std::string(to_string(o.render.method));
    j["steps_per_cycle"] = o.render.steps_per_cycle;
    j["estimated_dc_error"] = o.render.estimated_dc_error;
    j["linearised_passes"] = o.render.cycles.batched_passes;
    j["step_by_step_cycles"] = o.render.cycles.scalar_cycles;
    j["warnings"] = warning_messages(o.warnings);
    j["warning_codes"] = warning_code_names(o.warnings);
    write_text_atomic(o.sidecar, j.dump(2) + "\n");
    write_text_atomic(o.metrics_file, o.metrics.dump(2) + "\n");
}

job_outcome render_job_into(const scenario& s, const fs::path& out_dir, const job_options& opt, double analysis_limit_s)
{
    job_outcome o = render_job_unscaled(s, out_dir, opt, analysis_limit_s);
    const bool automatic = s.output.full_scale_v == 0.0;
    finish_job(o, s, automatic ? choose_full_scale_v(o.peak_audio_v) : s.output.full_scale_v, automatic, opt);
    return o;
}

} // namespace galena

namespace galena {

std::string summary_text(const job_outcome& o, const scenario& s)
{
    auto number = [&](const char* key) -> std::optional<double> {
        if (!o.metrics.contains(key) || !o.metrics[key].is_number()) return std::nullopt;
        return o.metrics[key].get<double>();
    };
    auto volts = [](double v) { return format_quantity(v, unit::volt, 3, true); };
    std::string t = fmt::format("wrote {}: {:.3g} s, {} {}, full scale {} peak{}\n", o.wav.string(),
                                static_cast<double>(o.render.samples) / o.render.audio_rate_hz,
                                format_quantity(o.render.audio_rate_hz, unit::hertz, 4, true), to_string(s.output.format),
                                volts(o.full_scale_v),
                                o.full_scale_auto && std::isfinite(o.headroom_db)
                                    ? fmt::format(" (chosen automatically: {:.1f} dB above the peak; {:.1f} dBFS RMS)", o.headroom_db, o.rms_dbfs)
                                    : std::string());
    if (const auto rms = number("audio_rms_v")) {
        t += fmt::format("level: {} rms", volts(*rms));
        if (const auto a = number("a_weighted_dbv")) t += fmt::format(" ({:.1f} dBV A-weighted)", *a);
        if (const auto pk = number("audio_peak_v")) t += fmt::format(", peak {}", volts(*pk));
        if (const auto dc = number("dc_v")) t += fmt::format("; DC {} at the earpiece", volts(*dc));
        t += "\n";
    }
    if (const auto thd = number("thd_percent")) {
        t += fmt::format("distortion: THD {:.3g} %", *thd);
        if (const auto n = number("thd_n_percent")) t += fmt::format(", THD+N {:.3g} %", *n);
        if (const auto sinad = number("sinad_db")) t += fmt::format(", SINAD {:.1f} dB", *sinad);
        if (const auto f = number("tone_hz")) t += fmt::format(" ({} tone)", format_quantity(*f, unit::hertz, 4, true));
        t += "\n";
    }
    if (!o.normalised_wav.empty())
        t += fmt::format("clipped: {} samples beyond full scale; {} is {:.1f} dB quieter\n", o.clipped_samples,
                         o.normalised_wav.string(), -o.normalised_gain_db);
    return t;
}

} // namespace galena
