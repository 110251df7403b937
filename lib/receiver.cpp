#include "galena/receiver.hpp"

#include "galena/audio_chain.hpp"
#include "galena/circuit.hpp"
#include "galena/cycle_integrator.hpp"
#include "galena/dsp.hpp"
#include "galena/error.hpp"
#include "galena/integrator.hpp"
#include "galena/step_count.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <fmt/format.h>
#include <limits>
#include <optional>
#include <type_traits>

namespace galena {

namespace {

using clock_type = std::chrono::steady_clock;

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

/// One solver behind the receiver: simulates carrier cycles [c0, c1) and feeds their means to the chain.
class engine {
public:
    virtual ~engine() = default;
    virtual void advance(std::size_t c0, std::size_t c1, detail::audio_chain& chain, std::vector<double>& raw) = 0;
    /// Writes the work counters and the simulated time into `res`.
    virtual void report(render_result& res) const = 0;
};

/// The phase-locked path: cycle_integrator on the carrier-locked grid.
template <int Dim>
class phase_locked_engine final : public engine {
public:
    phase_locked_engine(const one_junction_network<Dim>& oj, double fc, const cycle_settings& cs, const am_source& src)
        : m_ig(oj, fc, cs), m_sampler(src, cs.steps_per_cycle), m_u(static_cast<std::size_t>(cs.steps_per_cycle)),
          m_n(cs.steps_per_cycle)
    {
        m_ig.initialize(0.0, cycle_integrator<Dim>::vec::Zero(), src.voltage(0.0));
    }
    void advance(std::size_t c0, std::size_t c1, detail::audio_chain& chain, std::vector<double>& raw) override
    {
        for (std::size_t c = c0; c < c1; ++c) {
            m_sampler.cycle(c, m_u);
            m_ig.advance(m_u);
            chain.add_cycle_mean(m_ig.output_mean_v(), raw);
        }
    }
    void report(render_result& res) const override
    {
        const auto n = static_cast<std::size_t>(m_n);
        res.cycles = m_ig.stats();
        res.stats.accepted = res.cycles.cycles * n;
        res.stats.newton_iterations = res.cycles.batched_passes * n + res.cycles.scalar_newton_iterations;
        res.simulated_s = m_ig.time_s();
    }

private:
    cycle_integrator<Dim> m_ig;
    phase_locked_source m_sampler;
    std::vector<double> m_u;
    int m_n;
};

/// The adaptive path: TR-BDF2 on the detector's equations, its dense output box-integrated over each
/// carrier cycle (stage A of the audio chain).
template <class Eq>
class adaptive_engine final : public engine {
public:
    adaptive_engine(const Eq& eq, const step_settings& st, double period_s)
        : m_eq(eq), m_stepper(m_eq, st), m_cycle_means(period_s, 0.0), m_period_s(period_s)
    {
        m_stepper.initialize(Eq::vec::Zero(), 0.0);
    }
    void advance(std::size_t, std::size_t c1, detail::audio_chain& chain, std::vector<double>& raw) override
    {
        constexpr int out = Eq::output_index;
        auto obs = [&](double t0, const auto& x0s, const auto& f0, double t1, const auto& x1, const auto& f1) {
            m_cycle_means.add_segment(t0, t1, x0s[out], x1[out], f0[out], f1[out], m_means);
        };
        m_means.clear();
        m_stepper.advance_to(static_cast<double>(c1) * m_period_s, obs);
        for (double m : m_means) chain.add_cycle_mean(m, raw);
    }
    void report(render_result& res) const override
    {
        res.stats = m_stepper.stats();
        res.simulated_s = m_stepper.time();
    }

private:
    Eq m_eq; // before m_stepper, which keeps its address
    tr_bdf2<Eq> m_stepper;
    box_sampler m_cycle_means;
    std::vector<double> m_means;
    double m_period_s;
};

} // namespace

struct receiver::impl {
    impl(const circuit_params& c, const am_params& a, modulation& p, const render_settings& st)
        : circuit(c), s(st), am(a), programme(&p), net(c)
    {
    }

    circuit_params circuit;
    render_settings s;
    am_params am;
    modulation* programme;
    detector_network net;
    bool phase_locked = false;
    int steps_per_cycle = 0;          // phase-locked: N, chosen once at creation
    render_result setup;              // what creation found: method, N, its warnings and timing
    std::optional<am_source> src;
    std::optional<detail::audio_chain> chain;
    std::unique_ptr<engine> eng;
    detail::programme_delivery delivery;
    std::size_t total = 0, cycles_total = 0, cycles_per_chunk = 1;
    std::size_t next_cycle = 0;
    std::vector<double> raw;
    std::vector<double> ready_e, ready_a; // delivered to the queue, not yet handed out
    std::size_t ready_pos = 0;             // first queued sample not yet handed out
    std::size_t handed_out = 0;            // programme samples handed out
    std::vector<double> block_e, block_a;
    double wall_s = 0.0;
    cancel_token token;
    std::function<void(double)> progress;

    /// Validation, the method and the step-count choice (once).
    void create();
    /// Builds the solver, the source and the chain at t = 0.
    void start();
    /// Simulates one chunk and queues its programme samples.
    void run_chunk();
};

void receiver::impl::create()
{
    detail::require_range("output.sample_rate_hz", s.audio_rate_hz, 8000.0, 192000.0, "Hz");
    detail::require_range("render.dc_block_hz", s.dc_block_hz, 1e-3, 200.0, "Hz");
    detail::require_range("render.chunk_s", s.chunk_s, 1e-4, 1.0, "s");
    detail::require_range("solver.relative_tolerance", s.stepper.relative_tolerance, 1e-10, 1e-1);
    detail::require_above("solver.absolute_tolerance_v", s.stepper.absolute_tolerance_v, 0.0, 1.0, "V");
    detail::require_range("solver.carrier_steps_floor", s.carrier_steps_floor, 4.0, 1000.0);
    if (s.steps_per_cycle != 0) detail::require_range("solver.steps_per_cycle", s.steps_per_cycle, 8.0, 4096.0);
    detail::require_above("solver.dc_tolerance", s.dc_tolerance, 0.0, 0.1);
    detail::require_above("solver.newton_tolerance", s.newton_tolerance, 0.0, 1e-3);
    const double fs = s.audio_rate_hz;
    am.preroll_s = s.preroll_s >= 0.0 ? std::ceil(s.preroll_s * fs) / fs : automatic_preroll_s(net, fs);
    am.ramp_s = std::min(2e-3, 0.5 * am.preroll_s);
    am.validate();
    if (am.carrier_hz < 2.5 * 0.5 * fs)
        throw config_error(fmt::format("signal.carrier_hz = {}: must be at least 2.5 x the audio Nyquist frequency ({} Hz) "
                                       "so the carrier and its sidebands stay clear of the audio band",
                                       detail::format_value(am.carrier_hz), 0.5 * fs));
    const double fc = am.carrier_hz;
    setup.audio_rate_hz = fs;
    setup.preroll_s = am.preroll_s;
    setup.sample_rate_fine_hz = fc;
    phase_locked = s.method == solver_method::phase_locked && net.series_ohm() > 0.0;
    setup.method = phase_locked ? solver_method::phase_locked : solver_method::adaptive;
    if (s.method == solver_method::phase_locked && !phase_locked)
        setup.warnings.push_back({warning_code::adaptive_fallback,
                                  "the source and diode series resistances are both 0 ohm: the phase-locked solver needs a series "
                                  "resistance, so the adaptive solver was used"});
    if (!phase_locked && s.carrier_steps_floor < 30.0)
        setup.warnings.push_back({warning_code::coarse_step_floor,
                                  fmt::format("solver.carrier_steps_floor = {}: below 30 steps per carrier cycle the error accumulates "
                                              "over the cycles (measured 1.5e-3 relRMS at 20 against 7e-6 at 40); keep 40 for comparisons",
                                              detail::format_value(s.carrier_steps_floor))});
    if (am.preroll_s < audio_chain_warm_up_s(fs))
        throw config_error(fmt::format("solver.preroll_s = {}: must be at least the audio chain's start-up, {:.3g} s",
                                       detail::format_value(am.preroll_s), audio_chain_warm_up_s(fs)));
    if (phase_locked) {
        int n = s.steps_per_cycle;
        if (n == 0) {
            const auto t0 = clock_type::now();
            const auto levels = envelope_levels(am);
            step_choice ch;
            try {
                ch = with_one_junction_network(net, [&](const auto& oj) { return choose_steps_per_cycle(oj, fc, levels, s.dc_tolerance, 4096); });
            } catch (const integration_error& e) {
                ch = {fallback_steps_per_cycle, std::numeric_limits<double>::quiet_NaN(), false};
                setup.warnings.push_back({warning_code::step_count_fallback,
                                          fmt::format("the step count could not be chosen ({}); {} steps per carrier cycle were used",
                                                      e.what(), fallback_steps_per_cycle)});
            }
            n = ch.steps_per_cycle;
            setup.estimated_dc_error = ch.estimated_error;
            setup.step_choice_s = std::chrono::duration<double>(clock_type::now() - t0).count();
            if (!ch.met && std::isfinite(ch.estimated_error))
                setup.warnings.push_back({warning_code::dc_tolerance_not_met,
                                          fmt::format("solver.dc_tolerance = {}: not reached with up to 4096 steps per carrier cycle "
                                                      "(estimated error {:.2g}); the detected level may be less accurate than asked",
                                                      detail::format_value(s.dc_tolerance), ch.estimated_error)});
        }
        steps_per_cycle = n;
        setup.steps_per_cycle = n;
    }
}

void receiver::impl::start()
{
    const double fs = s.audio_rate_hz;
    const double fc = am.carrier_hz;
    const double period = 1.0 / fc;
    eng.reset();
    src.emplace(am, programme);
    chain.emplace(fs, fc, audio_chain_warm_up_s(fs));
    total = static_cast<std::size_t>(std::llround(programme->duration_s() * fs));
    // Chain output n is simulated time n / fs; programme sample m is simulated time preroll + m / fs.
    const auto skip = static_cast<std::size_t>(std::llround(am.preroll_s * fs));
    const double t_end = am.preroll_s + static_cast<double>(total) / fs + chain->latency_s() + 4.0 / fs;
    cycles_total = static_cast<std::size_t>(std::ceil(t_end * fc));
    cycles_per_chunk = std::max<std::size_t>(1, static_cast<std::size_t>(std::llround(s.chunk_s * fc)));
    delivery = detail::programme_delivery(skip, total, fs, s.dc_block_hz);
    next_cycle = handed_out = ready_pos = 0;
    raw.clear();
    ready_e.clear();
    ready_a.clear();
    if (phase_locked) {
        with_one_junction_network(net, [&](const auto& oj) {
            constexpr int dim = std::remove_cvref_t<decltype(oj)>::vec::RowsAtCompileTime;
            cycle_settings cs;
            cs.steps_per_cycle = steps_per_cycle;
            cs.newton_tolerance = s.newton_tolerance;
            cs.voltage_scale_v = am.carrier_peak_v * (1.0 + am.modulation_index);
            eng = std::make_unique<phase_locked_engine<dim>>(oj, fc, cs, *src);
        });
    } else {
        step_settings st = s.stepper;
        st.max_step_s = std::min(st.max_step_s, 1.0 / (fc * s.carrier_steps_floor));
        st.initial_step_s = std::min(st.initial_step_s, 0.01 / fc);
        with_equations(net, *src, [&](auto eq) { eng = std::make_unique<adaptive_engine<decltype(eq)>>(eq, st, period); });
    }
}

void receiver::impl::run_chunk()
{
    const double period = 1.0 / am.carrier_hz;
    const std::size_t c0 = next_cycle;
    const std::size_t c1 = std::min(cycles_total, c0 + cycles_per_chunk);
    const double tb = static_cast<double>(c1) * period;
    // The programme for the chunk, with a margin of cycles on both sides for the envelope's interpolation.
    programme->prepare(static_cast<double>(c0) * period - am.preroll_s - 2.0 * period, tb - am.preroll_s + 3.0 * period);
    eng->advance(c0, c1, *chain, raw);
    next_cycle = c1;
    // The chain's new outputs, programme-aligned, with the DC removed.
    delivery.deliver(raw, tb, ready_e, ready_a);
}

receiver::receiver(const circuit_params& circuit, const am_params& am, modulation& programme, const render_settings& settings)
{
    const auto t0 = clock_type::now();
    m_impl = std::make_unique<impl>(circuit, am, programme, settings);
    m_impl->create();
    m_impl->start();
    m_impl->wall_s = std::chrono::duration<double>(clock_type::now() - t0).count();
}

receiver::~receiver() = default;
receiver::receiver(receiver&&) noexcept = default;
receiver& receiver::operator=(receiver&&) noexcept = default;

audio_block receiver::process(std::size_t max_samples)
{
    impl& m = *m_impl;
    const auto t0 = clock_type::now();
    if (m.ready_pos == m.ready_e.size()) {
        m.ready_e.clear();
        m.ready_a.clear();
        m.ready_pos = 0;
        while (m.ready_e.empty() && m.next_cycle < m.cycles_total && !m.delivery.complete()) {
            m.token.throw_if_requested();
            m.run_chunk();
        }
    }
    const std::size_t n = std::min(max_samples, m.ready_e.size() - m.ready_pos);
    const auto first = static_cast<std::ptrdiff_t>(m.ready_pos);
    m.block_e.assign(m.ready_e.begin() + first, m.ready_e.begin() + first + static_cast<std::ptrdiff_t>(n));
    m.block_a.assign(m.ready_a.begin() + first, m.ready_a.begin() + first + static_cast<std::ptrdiff_t>(n));
    m.ready_pos += n;
    const audio_block b{m.handed_out, m.block_e, m.block_a};
    m.handed_out += n;
    m.wall_s += std::chrono::duration<double>(clock_type::now() - t0).count();
    if (m.progress && n > 0 && m.total > 0) m.progress(static_cast<double>(m.handed_out) / static_cast<double>(m.total));
    return b;
}

void receiver::reset()
{
    m_impl->token.reset();
    m_impl->start();
}

void receiver::reset(modulation& programme)
{
    m_impl->programme = &programme;
    reset();
}

cancel_token& receiver::cancel() noexcept { return m_impl->token; }

void receiver::set_progress(std::function<void(double)> progress) { m_impl->progress = std::move(progress); }

bool receiver::finished() const noexcept
{
    const impl& m = *m_impl;
    return m.ready_pos == m.ready_e.size() && (m.delivery.complete() || m.next_cycle >= m.cycles_total);
}

std::size_t receiver::total_samples() const noexcept { return m_impl->total; }

render_result receiver::result() const
{
    const impl& m = *m_impl;
    render_result res = m.setup;
    m.eng->report(res);
    res.samples = m.handed_out;
    res.wall_s = m.wall_s;
    if (finished() && !m.delivery.complete())
        res.warnings.push_back({warning_code::samples_missing, fmt::format("only {} of {} samples were produced", m.delivery.delivered(), m.total)});
    return res;
}

} // namespace galena
