#include "galena/segmented_render.hpp"

#include "galena/audio_chain.hpp"
#include "galena/cancel.hpp"
#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/error.hpp"
#include "galena/receiver.hpp"

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <condition_variable>
#include <deque>
#include <exception>
#include <fmt/format.h>
#include <limits>
#include <mutex>
#include <thread>
#include <type_traits>
#include <vector>

namespace galena {

namespace {

std::atomic<unsigned> cores_held{0};
thread_local int thread_claims = 0;

unsigned core_count() noexcept { return std::max(1u, std::thread::hardware_concurrency()); }

} // namespace

core_claim::core_claim() : m_held(true), m_marks_thread(true)
{
    cores_held.fetch_add(1);
    ++thread_claims;
}

core_claim::core_claim(helper_tag) noexcept : m_held(true) {}

core_claim core_claim::for_helper() noexcept
{
    cores_held.fetch_add(1);
    return core_claim(helper_tag{});
}

std::optional<core_claim> core_claim::try_claim()
{
    unsigned now = cores_held.load();
    while (now < core_count())
        if (cores_held.compare_exchange_weak(now, now + 1)) return std::optional<core_claim>(core_claim(helper_tag{}));
    return std::nullopt;
}

bool core_claim::this_thread_holds() noexcept { return thread_claims > 0; }

unsigned core_claim::held() noexcept { return cores_held.load(); }

core_claim::~core_claim()
{
    if (!m_held) return;
    cores_held.fetch_sub(1);
    if (m_marks_thread) --thread_claims;
}

core_claim::core_claim(core_claim&& o) noexcept : m_held(o.m_held), m_marks_thread(o.m_marks_thread)
{
    o.m_held = false;
    o.m_marks_thread = false;
}

namespace {

using clock_type = std::chrono::steady_clock;

/// Slowest decay time of a state matrix, s: inf when a mode does not decay.
template <class Mat>
double slowest_time_constant_s(const Mat& a)
{
    const Eigen::EigenSolver<Mat> es(a, false);
    if (es.info() != Eigen::Success) return std::numeric_limits<double>::infinity();
    double slowest = 0.0;
    for (Eigen::Index k = 0; k < es.eigenvalues().size(); ++k) {
        const double re = es.eigenvalues()(k).real();
        if (!(re < 0.0)) return std::numeric_limits<double>::infinity();
        slowest = std::max(slowest, -1.0 / re);
    }
    return slowest;
}

/// The network's slowest decay time for any junction conductance, s: the junction's conductance lies
/// between open (A with the series path's -b c^T / R removed) and shorted (A itself, the source through
/// R). Both ends count: a conducting junction damps a capacitor's charge faster, but an inductor's current
/// more slowly (L over a smaller parallel resistance).
template <int Dim>
double slowest_junction_time_constant_s(const one_junction_network<Dim>& oj)
{
    using mat = typename one_junction_network<Dim>::mat;
    const mat a_open = oj.a + oj.b * oj.c.transpose() / oj.series_ohm;
    return std::max(slowest_time_constant_s(a_open), slowest_time_constant_s(oj.a));
}

/// The second thread's results: the state at the seam, then the cycle means chunk by chunk.
struct handoff {
    std::mutex m;
    std::condition_variable cv;
    bool seam_ready = false;
    std::vector<double> seam_state, seam_junction_v, seam_means; // the means of [c_seam - means, c_seam)
    std::deque<std::vector<double>> chunks;                       // cycle means from the seam on, per chunk
    bool done = false;
    bool stopped = false;                                         // stop_requested() ended it
    std::exception_ptr error;
};

/// The second thread stopped on stop_requested(): the process-wide cancel (Ctrl-C) keeps its own message
/// and signal number, as the serial render's sink would throw it.
[[noreturn]] void stopped_by_request()
{
    throw_if_cancelled();
    throw cancelled_error("cancelled: stopped before finishing; no output was written", 0);
}

template <int Dim>
render_result split_render(const one_junction_network<Dim>& oj, const am_params& am, modulation& programme, const render_settings& s,
                           render_result res, const audio_sink& sink, const segment_options& opt, segment_report& rep,
                           std::size_t c_seam, std::size_t c2, core_claim helper_core)
{
    const auto wall0 = clock_type::now();
    const double fs = s.audio_rate_hz;
    const double fc = am.carrier_hz;
    const double period = 1.0 / fc;
    const int n = res.steps_per_cycle;
    cycle_settings cs;
    cs.steps_per_cycle = n;
    cs.newton_tolerance = s.newton_tolerance;
    cs.voltage_scale_v = am.carrier_peak_v * (1.0 + am.modulation_index);

    // As receiver::impl::start.
    const am_source src(am, &programme);
    detail::audio_chain chain(fs, fc, audio_chain_warm_up_s(fs));
    const auto total = static_cast<std::size_t>(std::llround(programme.duration_s() * fs));
    const auto skip = static_cast<std::size_t>(std::llround(am.preroll_s * fs));
    const double t_end = am.preroll_s + static_cast<double>(total) / fs + chain.latency_s() + 4.0 / fs;
    const auto cycles_total = static_cast<std::size_t>(std::ceil(t_end * fc));
    const auto cpc = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.chunk_s * fc)));
    detail::programme_delivery delivery(skip, total, fs, s.dc_block_hz);
    // The overlap's last quarter (its start still carries the second part's start-up), at most a chunk.
    const std::size_t compare_means = std::max<std::size_t>(1, std::min<std::size_t>(cpc, (c_seam - c2) / 4));

    handoff h;
    std::atomic<bool> abandon{false};
    cycle_stats second_stats;
    std::jthread second([&, helper = std::move(helper_core)] {
        try {
            std::unique_ptr<modulation> prog = opt.second_programme();
            const am_source src2(am, prog.get());
            cycle_integrator<Dim> ig(oj, fc, cs);
            phase_locked_source sampler(src2, n);
            std::vector<double> u(static_cast<std::size_t>(n));
            ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), src2.voltage(static_cast<double>(c2) * period));
            std::vector<double> means, before;
            for (std::size_t c0 = c2; c0 < cycles_total;) {
                if (abandon.load() || (opt.stop_requested && opt.stop_requested())) {
                    std::lock_guard lk(h.m);
                    h.stopped = !abandon.load();
                    break;
                }
                // The chunk grid of the serial render (multiples of cpc), the first chunk cut at c2.
                const std::size_t c1 = std::min(cycles_total, (c0 / cpc + 1) * cpc);
                const double tb = static_cast<double>(c1) * period;
                prog->prepare(static_cast<double>(c0) * period - am.preroll_s - 2.0 * period, tb - am.preroll_s + 3.0 * period);
                means.clear();
                for (std::size_t c = c0; c < c1; ++c) {
                    if (c == c_seam) {
                        std::lock_guard lk(h.m);
                        h.seam_state.assign(ig.state().data(), ig.state().data() + ig.state().size());
                        h.seam_junction_v.assign(ig.junction_v().begin(), ig.junction_v().end());
                        h.seam_means.assign(before.end() - static_cast<std::ptrdiff_t>(compare_means), before.end());
                        h.seam_ready = true;
                        h.cv.notify_all();
                    }
                    sampler.cycle(c, u);
                    ig.advance(u);
                    if (c < c_seam) {
                        before.push_back(ig.output_mean_v());
                        if (before.size() > 2 * cpc) before.erase(before.begin(), before.end() - static_cast<std::ptrdiff_t>(cpc));
                    } else {
                        means.push_back(ig.output_mean_v());
                    }
                }
                if (c1 > c_seam) {
                    std::lock_guard lk(h.m);
                    h.chunks.push_back(means);
                    h.cv.notify_all();
                }
                c0 = c1;
            }
            second_stats = ig.stats();
        } catch (...) {
            std::lock_guard lk(h.m);
            h.error = std::current_exception();
        }
        std::lock_guard lk(h.m);
        h.done = true;
        h.cv.notify_all();
    });
    // Stops and joins the second thread on every way out.
    struct stopper {
        std::atomic<bool>& a;
        std::jthread& t;
        ~stopper()
        {
            a.store(true);
            if (t.joinable()) t.join();
        }
    } stop_second{abandon, second};

    // The first part, exactly as the receiver runs it.
    cycle_integrator<Dim> ig(oj, fc, cs);
    phase_locked_source sampler(src, n);
    std::vector<double> u(static_cast<std::size_t>(n));
    ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), src.voltage(0.0));
    std::vector<double> raw, block_e, block_a, last_means;
    std::size_t next = 0;
    auto run_chunk = [&](std::size_t c0, std::size_t c1) {
        const double tb = static_cast<double>(c1) * period;
        programme.prepare(static_cast<double>(c0) * period - am.preroll_s - 2.0 * period, tb - am.preroll_s + 3.0 * period);
        for (std::size_t c = c0; c < c1; ++c) {
            sampler.cycle(c, u);
            ig.advance(u);
            chain.add_cycle_mean(ig.output_mean_v(), raw);
            if (c + compare_means >= c_seam && c < c_seam) last_means.push_back(ig.output_mean_v());
        }
    };
    auto deliver = [&](double tb) {
        block_e.clear();
        block_a.clear();
        const std::size_t first = delivery.delivered();
        delivery.deliver(raw, tb, block_e, block_a);
        if (!block_e.empty()) sink(audio_block{first, block_e, block_a});
    };
    while (next < c_seam && !delivery.complete()) {
        const std::size_t c1 = std::min(c_seam, next + cpc);
        run_chunk(next, c1);
        deliver(static_cast<double>(c1) * period);
        next = c1;
    }

    // The seam: the second thread's state there against ours.
    bool use_second = false;
    {
        std::unique_lock lk(h.m);
        h.cv.wait(lk, [&] { return h.seam_ready || h.done; });
        if (h.stopped) stopped_by_request();
        if (h.seam_ready && !h.error && next == c_seam) {
            double ds = 0.0;
            const auto& y = ig.state();
            for (Eigen::Index k = 0; k < y.size(); ++k) {
                const double a = y(k), b = h.seam_state[static_cast<std::size_t>(k)];
                const double size = std::max(std::fabs(a), std::fabs(b));
                if (a != b) ds = std::max(ds, size > 0.0 ? std::fabs(a - b) / size : std::numeric_limits<double>::infinity());
            }
            const auto jv = ig.junction_v();
            for (std::size_t k = 0; k < jv.size(); ++k) {
                const double a = jv[k], b = h.seam_junction_v[k];
                if (a != b) ds = std::max(ds, std::fabs(a - b) / std::max({std::fabs(a), std::fabs(b), 1e-3 * cs.voltage_scale_v}));
            }
            double dm = 0.0;
            for (std::size_t k = 0; k < last_means.size() && k < h.seam_means.size(); ++k)
                dm = std::max(dm, std::fabs(last_means[k] - h.seam_means[k]) / cs.voltage_scale_v);
            if (last_means.size() != h.seam_means.size()) dm = std::numeric_limits<double>::infinity();
            rep.state_difference = ds;
            rep.mean_difference = dm;
            use_second = std::isfinite(ds) && ds <= opt.seam_tolerance && dm <= opt.seam_tolerance;
            if (!use_second) rep.why_serial = fmt::format("the seam did not match (state {:.3g}, cycle means {:.3g})", ds, dm);
        } else if (!delivery.complete()) {
            rep.why_serial = "the second part failed before the seam";
        }
    }
    rep.split = use_second;
    std::size_t end_cycle = next;
    if (use_second) {
        // The second part's cycle means through our audio chain, chunk by chunk as they come.
        while (next < cycles_total && !delivery.complete()) {
            std::vector<double> means;
            {
                std::unique_lock lk(h.m);
                h.cv.wait(lk, [&] { return !h.chunks.empty() || h.done; });
                if (h.chunks.empty()) {
                    if (h.stopped) stopped_by_request();
                    if (h.error) std::rethrow_exception(h.error);
                    break;
                }
                means = std::move(h.chunks.front());
                h.chunks.pop_front();
            }
            for (double m : means) chain.add_cycle_mean(m, raw);
            next += means.size();
            deliver(static_cast<double>(next) * period);
        }
        end_cycle = next;
    } else {
        abandon.store(true);
        while (next < cycles_total && !delivery.complete()) {
            const std::size_t c1 = std::min(cycles_total, next + cpc);
            run_chunk(next, c1);
            deliver(static_cast<double>(c1) * period);
            next = c1;
        }
        end_cycle = next;
    }
    abandon.store(true);
    if (second.joinable()) second.join();

    cycle_stats st = ig.stats();
    if (use_second) {
        st.cycles += second_stats.cycles;
        st.batched_passes += second_stats.batched_passes;
        st.scalar_cycles += second_stats.scalar_cycles;
        st.scalar_newton_iterations += second_stats.scalar_newton_iterations;
    }
    const auto nn = static_cast<std::size_t>(n);
    res.cycles = st;
    res.stats.accepted = st.cycles * nn;
    res.stats.newton_iterations = st.batched_passes * nn + st.scalar_newton_iterations;
    res.simulated_s = static_cast<double>(end_cycle) * period;
    res.samples = delivery.delivered();
    res.wall_s += std::chrono::duration<double>(clock_type::now() - wall0).count();
    if (!delivery.complete())
        res.warnings.push_back({warning_code::samples_missing, fmt::format("only {} of {} samples were produced", delivery.delivered(), total)});
    return res;
}

} // namespace

render_result render_segmented(const circuit_params& circuit, am_params am, modulation& programme, const render_settings& settings,
                               const audio_sink& sink, const segment_options& opt, segment_report* report)
{
    const auto wall0 = clock_type::now();
    segment_report local;
    segment_report& rep = report != nullptr ? *report : local;
    rep = segment_report{};
    std::optional<core_claim> own;
    if (!core_claim::this_thread_holds()) own.emplace();
    // Validation, the method, the preroll and the step count, as render() chooses them.
    receiver r(circuit, am, programme, settings);
    const render_result setup = r.result();
    auto serial = [&](std::string why) {
        rep.why_serial = std::move(why);
        for (audio_block b = r.process(std::numeric_limits<std::size_t>::max()); !b.earpiece_v.empty();
             b = r.process(std::numeric_limits<std::size_t>::max()))
            sink(b);
        render_result res = r.result();
        res.wall_s = std::chrono::duration<double>(clock_type::now() - wall0).count();
        return res;
    };
    if (!opt.second_programme) return serial("no second programme");
    if (setup.method != solver_method::phase_locked) return serial("the adaptive method");
    const detector_network net(circuit);
    const double tau = with_one_junction_network(net, [](const auto& oj) { return slowest_junction_time_constant_s(oj); });
    rep.slowest_time_constant_s = tau;
    if (!std::isfinite(tau)) return serial("no decaying path (no bleeder, no leakage: the charge dams up)");
    am.preroll_s = setup.preroll_s;
    am.ramp_s = std::min(2e-3, 0.5 * am.preroll_s);
    const double fc = am.carrier_hz;
    const double t_total = am.preroll_s + programme.duration_s();
    const auto cpc = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(settings.chunk_s * fc)));
    const double w = std::max(opt.warm_up_time_constants * tau, 4.0 / fc);
    const auto w_cycles = static_cast<std::size_t>(std::ceil(w * fc)) + 2;
    const auto cycles = static_cast<std::size_t>(std::ceil(t_total * fc));
    // The second thread simulates the warm-up too: the seam balances first_share of (cycles + warm-up).
    const std::size_t c_seam =
        cpc * static_cast<std::size_t>(std::llround(opt.first_share * static_cast<double>(cycles + w_cycles) / static_cast<double>(cpc)));
    rep.warm_up_s = static_cast<double>(w_cycles) / fc;
    rep.seam_s = static_cast<double>(c_seam) / fc;
    if (c_seam <= w_cycles + cpc || c_seam + cpc >= cycles) return serial("the programme is too short to split");
    if (static_cast<double>(w_cycles) > opt.max_warm_up_share * static_cast<double>(cycles))
        return serial(fmt::format("the warm-up ({:.3g} s, {} x tau) is too long for the programme", rep.warm_up_s, opt.warm_up_time_constants));
    std::optional<core_claim> helper = core_claim::try_claim();
    if (!helper && opt.require_free_core) return serial("no free core");
    if (!helper) helper.emplace(core_claim::for_helper());
    render_result res = setup;
    res.wall_s = std::chrono::duration<double>(clock_type::now() - wall0).count();
    return with_one_junction_network(net, [&](const auto& oj) {
        return split_render(oj, am, programme, settings, res, sink, opt, rep, c_seam, c_seam - w_cycles,
                            std::move(*helper));
    });
}

} // namespace galena
