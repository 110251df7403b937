// The workbench server: HTTP in, scenario overrides and render jobs through the library, JSON and WAV out.
#include "galena/workbench.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/characterize.hpp"
#include "galena/components.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/scenario.hpp"
#include "galena/units.hpp"
#include "galena/segmented_render.hpp"
#include "galena/warning.hpp"

#include <httplib.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <condition_variable>
#include <deque>
#include <fmt/format.h>
#include <fstream>
#include <future>
#include <map>
#include <mutex>
#include <nlohmann/json.hpp>
#include <stdlib.h>
#include <sys/socket.h>
#include <unistd.h>
#include <thread>

namespace galena {
namespace fs = std::filesystem;
using clock_type = std::chrono::steady_clock;

namespace {

/// The page, built in: lib/server/workbench_page.html, embedded at build time (cmake/embed_text.cmake).
constexpr std::string_view page_html =
#include "workbench_page.inc"
    ;

/// An answer other than 200: the HTTP status and the one-line message.
struct http_refusal : std::runtime_error {
    int status;
    http_refusal(int code, const std::string& what) : std::runtime_error(detail::one_line(what)), status(code) {}
};

void send_json(httplib::Response& res, int status, const nlohmann::json& body)
{
    res.status = status;
    res.set_header("Cache-Control", "no-store");
    res.set_content(body.dump(), "application/json");
}

void send_error(httplib::Response& res, int status, const std::string& message)
{
    send_json(res, status, {{"error", detail::one_line(message)}});
}

/// Cancellation of one render, the one interface the session manager uses: the render job's own
/// cancel_token (job_options::cancel) with the reason it was asked; the job polls the process-wide flag
/// (Ctrl-C) as well.
class render_control {
public:
    enum class reason : int { none = 0, superseded, timed_out, shutting_down };
    void cancel(reason r) noexcept
    {
        int expected = 0;
        m_reason.compare_exchange_strong(expected, static_cast<int>(r));
        m_token.request();
    }
    [[nodiscard]] bool cancelled() const noexcept { return m_token.requested(); }
    [[nodiscard]] reason why() const noexcept { return static_cast<reason>(m_reason.load()); }
    /// Renders `s` into the existing folder `dir`; stops with cancelled_error once cancelled or past `timeout_s`.
    job_outcome render(const scenario& s, const fs::path& dir, double timeout_s)
    {
        job_options opt;
        opt.cancel = &m_token;
        opt.use_second_core = true;
        const auto deadline = clock_type::now() + std::chrono::duration_cast<clock_type::duration>(std::chrono::duration<double>(timeout_s));
        opt.progress = [this, deadline](double) {
            if (clock_type::now() > deadline) cancel(reason::timed_out);
        };
        return render_job_into(s, dir, opt, 60.0);
    }

private:
    cancel_token m_token;
    std::atomic<int> m_reason{0};
};

/// The render threads: `threads` workers (renders of different sessions in parallel up to the core count)
/// and a queue of at most `queue_limit` waiting jobs. Renders run only here, never on the HTTP threads, so
/// whatever a render leaves per thread (allocator caches) stays on these few threads.
class render_pool {
public:
    render_pool(unsigned threads, std::size_t queue_limit) : m_queue_limit(queue_limit)
    {
        for (unsigned t = 0; t < threads; ++t) m_threads.emplace_back([this] { work(); });
    }
    ~render_pool() { shutdown(); }
    render_pool(const render_pool&) = delete;
    render_pool& operator=(const render_pool&) = delete;

    /// Queues `job` for a render thread. Jobs whose control was cancelled while they waited leave the queue
    /// first (run here: a job's first act is to see its cancel and finish). False when the queue is full.
    bool submit(std::shared_ptr<render_control> control, std::function<void()> job)
    {
        std::vector<std::function<void()>> dropped;
        bool accepted = false;
        {
            std::lock_guard lock(m_mutex);
            for (auto it = m_queue.begin(); it != m_queue.end();) {
                if (it->first->cancelled()) {
                    dropped.push_back(std::move(it->second));
                    it = m_queue.erase(it);
                } else {
                    ++it;
                }
            }
            if (!m_stopping && m_queue.size() < m_queue_limit) {
                m_queue.emplace_back(std::move(control), std::move(job));
                accepted = true;
            }
        }
        for (auto& d : dropped) d();
        if (accepted) m_cv.notify_one();
        return accepted;
    }
    /// Renders running and waiting now.
    std::pair<std::size_t, std::size_t> load()
    {
        std::lock_guard lock(m_mutex);
        return {m_running, m_queue.size()};
    }
    /// Runs what is queued (each job sees its cancel) and joins the threads.
    void shutdown()
    {
        {
            std::lock_guard lock(m_mutex);
            m_stopping = true;
        }
        m_cv.notify_all();
        for (auto& t : m_threads)
            if (t.joinable()) t.join();
    }

private:
    void work()
    {
        for (;;) {
            std::function<void()> job;
            {
                std::unique_lock lock(m_mutex);
                m_cv.wait(lock, [this] { return m_stopping || !m_queue.empty(); });
                if (m_queue.empty()) return; // stopping, nothing left
                job = std::move(m_queue.front().second);
                m_queue.pop_front();
                ++m_running;
            }
            {
                const core_claim held; // a render takes a second core only when no other job holds it
                job();
            }
            std::lock_guard lock(m_mutex);
            --m_running;
        }
    }

    std::mutex m_mutex;
    std::condition_variable m_cv;
    std::deque<std::pair<std::shared_ptr<render_control>, std::function<void()>>> m_queue;
    std::size_t m_queue_limit;
    std::size_t m_running = 0;
    bool m_stopping = false;
    std::vector<std::thread> m_threads;
};

/// Runs `work` on the pool and waits for it; rethrows what it threw. False when the queue was full.
template <class R, class F>
bool run_on(render_pool& pool, const std::shared_ptr<render_control>& control, F work, R& result)
{
    std::promise<R> done;
    auto answer = done.get_future();
    const bool queued = pool.submit(control, [&done, &work, control] {
        try {
            if (control->cancelled()) throw cancelled_error("stopped before it started", 0);
            done.set_value(work());
        } catch (...) {
            done.set_exception(std::current_exception());
        }
    });
    if (!queued) return false;
    result = answer.get();
    return true;
}

struct session {
    std::string id;
    fs::path dir;
    std::shared_ptr<render_control> current; ///< the newest render of this session, while it runs
    unsigned next_render = 1;
    std::deque<unsigned> renders;            ///< kept renders, oldest first
    unsigned next_upload = 1;
    unsigned next_diode = 1;
    std::deque<unsigned> uploads;            ///< kept clip uploads, oldest first
    std::deque<unsigned> diode_uploads;      ///< kept diode-file uploads, oldest first
    clock_type::time_point last_used = clock_type::now();
    int busy = 0;                            ///< requests of this session in progress
};

bool valid_session_id(const std::string& id)
{
    if (id.empty() || id.size() > 64) return false;
    return std::all_of(id.begin(), id.end(), [](char c) {
        return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '-' || c == '_';
    });
}

/// A bundled clip's name: letters, digits, '-', '_', '.', ending in .wav, not starting with '.'.
bool valid_clip_name(const std::string& name)
{
    if (name.size() < 5 || name.size() > 100 || name.front() == '.' || !name.ends_with(".wav")) return false;
    return std::all_of(name.begin(), name.end(), [](char c) {
        return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '-' || c == '_' || c == '.';
    });
}

std::string toml_string(const std::string& text)
{
    std::string q = "\"";
    for (const char c : text) {
        if (c == '"' || c == '\\') q += '\\';
        q += c;
    }
    return q + "\"";
}

std::string read_file_bytes(const fs::path& p)
{
    std::ifstream in(p, std::ios::binary);
    if (!in) throw http_refusal(404, "not found");
    return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

double json_number_or_inf(double v) { return v; }

nlohmann::json value_json(double v)
{
    if (std::isinf(v)) return "inf";
    return json_number_or_inf(v);
}

} // namespace

struct workbench::impl {
    workbench_options opt;
    fs::path temp;
    std::map<std::string, fs::path> clips; ///< bundled clip name -> its file
    httplib::Server server;
    std::thread listener;
    int listen_fd = -1; ///< the server's listening socket, seen as cpp-httplib makes it
    int bound_port = 0;
    render_pool pool;
    std::mutex mutex; ///< guards sessions and the counters
    std::map<std::string, std::shared_ptr<session>> sessions;
    std::atomic<unsigned> anonymous{0};
    workbench_stats counters;
    std::atomic<bool> stopping{false};
    std::mutex stop_mutex;
    bool stopped = false;

    explicit impl(workbench_options o)
        : opt(std::move(o)),
          pool(opt.render_threads != 0 ? opt.render_threads : std::max(1u, std::thread::hardware_concurrency()), opt.queue_limit)
    {
    }

    // ---- sessions ----

    /// Holds a session busy for the lifetime of one request.
    struct session_lease {
        impl* owner = nullptr;
        std::shared_ptr<session> s;
        session_lease(impl* o, std::shared_ptr<session> ss) : owner(o), s(std::move(ss)) {}
        session_lease(const session_lease&) = delete;
        session_lease& operator=(const session_lease&) = delete;
        ~session_lease()
        {
            std::lock_guard lock(owner->mutex);
            --s->busy;
            s->last_used = clock_type::now();
        }
    };

    void drop_session_locked(const std::string& id)
    {
        auto it = sessions.find(id);
        if (it == sessions.end()) return;
        std::error_code ec;
        fs::remove_all(it->second->dir, ec);
        sessions.erase(it);
    }

    /// The session named by ?session=ID (made on first use), or a new anonymous one. Refuses a malformed id
    /// (400) and a full table whose sessions are all busy (503).
    std::unique_ptr<session_lease> lease(const httplib::Request& req)
    {
        std::string id;
        if (req.has_param("session")) {
            id = req.get_param_value("session");
            if (!valid_session_id(id))
                throw http_refusal(400, "session: must be 1 to 64 letters, digits, '-' or '_'");
        } else {
            id = fmt::format("anonymous-{}", ++anonymous);
        }
        std::lock_guard lock(mutex);
        if (stopping) throw http_refusal(503, "the workbench is shutting down");
        auto it = sessions.find(id);
        if (it == sessions.end()) {
            const auto now = clock_type::now();
            // Idle sessions past their time go first; at the limit, the least recently used idle one.
            for (auto j = sessions.begin(); j != sessions.end();) {
                const bool expired = j->second->busy == 0 &&
                                     std::chrono::duration<double>(now - j->second->last_used).count() > opt.session_idle_s;
                auto next = std::next(j);
                if (expired) drop_session_locked(j->first);
                j = next;
            }
            if (sessions.size() >= opt.max_sessions) {
                std::shared_ptr<session> oldest;
                for (const auto& [k, v] : sessions)
                    if (v->busy == 0 && (!oldest || v->last_used < oldest->last_used)) oldest = v;
                if (!oldest)
                    throw http_refusal(503, fmt::format("busy: {} sessions are rendering, the limit; try again shortly", sessions.size()));
                drop_session_locked(oldest->id);
            }
            auto s = std::make_shared<session>();
            s->id = id;
            s->dir = temp / ("s-" + id);
            std::error_code ec;
            fs::create_directory(s->dir, ec);
            if (ec) throw http_refusal(500, fmt::format("cannot make the session folder: {}", ec.message()));
            it = sessions.emplace(id, std::move(s)).first;
        }
        ++it->second->busy;
        it->second->last_used = clock_type::now();
        counters.sessions = sessions.size();
        return std::make_unique<session_lease>(this, it->second);
    }

    // ---- requests to overrides ----

    /// The request body as --set texts. signal.audio names a bundled clip or an upload of this session;
    /// other path keys are refused.
    std::vector<std::string> overrides_of(const std::string& body, session* sess)
    {
        if (body.size() > opt.max_body_bytes)
            throw http_refusal(413, fmt::format("request body: {} bytes, more than the {}-byte limit", body.size(), opt.max_body_bytes));
        nlohmann::json j;
        try {
            j = nlohmann::json::parse(body);
        } catch (const nlohmann::json::parse_error& e) {
            throw http_refusal(400, fmt::format("request body: malformed JSON: {}", e.what()));
        }
        if (!j.is_object())
            throw http_refusal(400, fmt::format("request body: must be a JSON object of \"section.key\": value, not {}", j.type_name()));
        if (j.size() > 200) throw http_refusal(413, fmt::format("request body: {} keys, more than the 200-key limit", j.size()));
        std::vector<std::string> sets;
        for (const auto& [key, v] : j.items()) {
            if (key.empty() || key.size() > 100 || key.find('=') != std::string::npos ||
                std::any_of(key.begin(), key.end(), [](char c) { return static_cast<unsigned char>(c) < 0x20; }))
                throw http_refusal(400, fmt::format("\"{}\": a key must look like section.key (at most 100 characters, no '=')", key));
            std::string text;
            if (v.is_number()) text = v.dump();
            else if (v.is_boolean()) text = v.get<bool>() ? "true" : "false";
            else if (v.is_string()) {
                text = v.get<std::string>();
                if (text.size() > 200 || std::any_of(text.begin(), text.end(), [](char c) { return static_cast<unsigned char>(c) < 0x20; }))
                    throw http_refusal(400, fmt::format("{}: the value must be one line of at most 200 characters", key));
            } else {
                throw http_refusal(400, fmt::format("{}: must be a number, a string (\"47k\") or true/false, not {}", key, v.type_name()));
            }
            if (key == "signal.audio" || key == "station.audio") {
                // The programme of the bench generator, or of the one station of a receiver layout.
                if (!v.is_string()) throw http_refusal(400, fmt::format("{}: must be a clip name (GET /api/clips) or an upload (upload:N)", key));
                text = toml_string(clip_path(text, sess, key).string());
            } else if (key == "diode.file" && v.is_string() && text.starts_with("upload:d") && sess != nullptr) {
                text = toml_string(diode_path(text, *sess).string());
            } else if (key == "diode.file" || key.ends_with(".audio") || key.ends_with(".file")) {
                throw http_refusal(400, fmt::format("{}: the workbench takes no file paths; give diode.preset or the diode.* values", key));
            }
            sets.push_back(key + "=" + text);
        }
        return sets;
    }

    /// The file a signal.audio (or station.audio) value names: a bundled clip (a regular file, not a link) or an upload.
    fs::path clip_path(const std::string& value, session* sess, const std::string& key = "signal.audio")
    {
        const auto refuse = [&] {
            return http_refusal(400, fmt::format("{} = \"{}\": not a bundled clip or an upload of this session; the "
                                                 "workbench takes a name from GET /api/clips or upload:N, never a path",
                                                 key, value));
        };
        if (value.starts_with("upload:")) {
            const std::string n = value.substr(7);
            if (n.empty() || n.size() > 9 || !std::all_of(n.begin(), n.end(), [](char c) { return c >= '0' && c <= '9'; }) || sess == nullptr)
                throw refuse();
            const unsigned k = static_cast<unsigned>(std::stoul(n));
            std::lock_guard lock(mutex);
            if (std::find(sess->uploads.begin(), sess->uploads.end(), k) == sess->uploads.end()) throw refuse();
            return sess->dir / "uploads" / fmt::format("u{}.wav", k);
        }
        const auto it = clips.find(value);
        if (!valid_clip_name(value) || it == clips.end()) throw refuse();
        std::error_code ec;
        if (fs::symlink_status(it->second, ec).type() != fs::file_type::regular) throw refuse(); // replaced since start-up
        return it->second;
    }

    /// The file a diode.file value "upload:dN" names: a diode file this session uploaded.
    fs::path diode_path(const std::string& value, session& sess)
    {
        const std::string n = value.substr(8);
        std::lock_guard lock(mutex);
        if (n.empty() || n.size() > 9 || !std::all_of(n.begin(), n.end(), [](char c) { return c >= '0' && c <= '9'; }) ||
            std::find(sess.diode_uploads.begin(), sess.diode_uploads.end(), static_cast<unsigned>(std::stoul(n))) == sess.diode_uploads.end())
            throw http_refusal(400, fmt::format("diode.file = \"{}\": not a diode file uploaded in this session (upload:dN); the "
                                                "workbench takes no file paths",
                                                value));
        return sess.dir / "uploads" / fmt::format("d{}.toml", n);
    }

    scenario scenario_of(const std::vector<std::string>& sets)
    {
        try {
            scenario s = load_scenario(opt.base_scenario, sets);
            const double have_s = programme_duration_s(s);
            if (!(have_s <= opt.max_excerpt_s))
                throw http_refusal(400, fmt::format("signal.duration_s: the programme lasts {:.4g} s; the workbench renders at most "
                                                    "{:.4g} s (set signal.duration_s to {:.4g} or less)",
                                                    have_s, opt.max_excerpt_s, opt.max_excerpt_s));
            check_measurable(s, s.file.string());
            return s;
        } catch (const config_error& e) {
            throw http_refusal(400, e.what());
        } catch (const audio_error& e) {
            throw http_refusal(400, e.what());
        }
    }

    // ---- handlers ----

    void render_handler(const httplib::Request& req, httplib::Response& res)
    {
        const auto t0 = clock_type::now();
        const auto held = lease(req);
        session& sess = *held->s;
        const scenario s = scenario_of(overrides_of(req.body, &sess));
        auto control = std::make_shared<render_control>();
        unsigned n = 0;
        {
            std::lock_guard lock(mutex);
            if (sess.current) sess.current->cancel(render_control::reason::superseded);
            sess.current = control;
            n = sess.next_render++;
        }
        const auto finish = [&] {
            std::lock_guard lock(mutex);
            if (sess.current == control) sess.current.reset();
        };
        const auto stopped = [&]() -> http_refusal {
            finish();
            std::lock_guard lock(mutex);
            switch (control->why()) {
            case render_control::reason::superseded:
                ++counters.renders_cancelled;
                return {409, "stopped: a newer change of this session replaced this render"};
            case render_control::reason::timed_out:
                return {503, fmt::format("stopped: the render ran longer than the {:.3g} s limit", opt.render_timeout_s)};
            default: return {503, "stopped: the workbench is shutting down"};
            }
        };
        const fs::path dir = sess.dir / fmt::format("r{}", n);
        job_outcome o;
        try {
            const bool queued = run_on(pool, control, [&] {
                if (stopping) control->cancel(render_control::reason::shutting_down);
                std::error_code e;
                fs::create_directory(dir, e);
                if (e) throw resource_error(fmt::format("cannot make the render folder: {}", e.message()));
                return control->render(s, dir, opt.render_timeout_s);
            }, o);
            if (!queued) {
                finish();
                throw http_refusal(503, fmt::format("busy: {} renders are waiting, the limit; try again shortly", opt.queue_limit));
            }
        } catch (const http_refusal&) {
            throw;
        } catch (...) {
            std::error_code ec;
            fs::remove_all(dir, ec);
            try {
                throw;
            } catch (const cancelled_error&) {
                throw stopped();
            } catch (const config_error& e) {
                finish();
                throw http_refusal(400, e.what());
            } catch (const audio_error& e) {
                finish();
                throw http_refusal(400, e.what());
            } catch (const integration_error& e) {
                finish();
                throw http_refusal(422, e.what());
            } catch (...) {
                finish();
                throw;
            }
        }
        finish();
        {
            std::error_code ec;
            std::lock_guard lock(mutex);
            sess.renders.push_back(n);
            while (sess.renders.size() > std::max<std::size_t>(opt.kept_renders, 1)) {
                fs::remove_all(sess.dir / fmt::format("r{}", sess.renders.front()), ec);
                sess.renders.pop_front();
            }
            ++counters.renders_done;
        }
        nlohmann::json out;
        out["metrics"] = o.metrics;
        out["warnings"] = warning_messages(o.warnings);
        out["warning_codes"] = warning_code_names(o.warnings);
        out["session"] = sess.id;
        out["render_id"] = n;
        out["audio_url"] = fmt::format("/audio/{}/{}.wav", sess.id, n);
        out["wall_s"] = std::chrono::duration<double>(clock_type::now() - t0).count();
        send_json(res, 200, out);
    }

    /// The detector's transfer curve for the request's circuit: DC and recovered tone against carrier level
    /// (measure_transfer_curve, nine levels from 10 mV to 3 V at the scenario's carrier, tone and
    /// modulation), plus the operating point, the scenario's carrier level. Runs on the render threads.
    void transfer_handler(const httplib::Request& req, httplib::Response& res)
    {
        const auto held = req.has_param("session") ? lease(req) : nullptr; // for its uploads
        const scenario s = scenario_of(overrides_of(req.body, held ? held->s.get() : nullptr));
        if (s.tuner.layout != tuner_layout::bench) throw http_refusal(400, "transfer curve: only for tuner.layout = bench");
        characterize_settings cs;
        cs.carrier_hz = s.am.carrier_hz;
        cs.render.audio_rate_hz = s.render.audio_rate_hz;
        cs.band_high_hz = std::min(10000.0, 0.5 * s.render.audio_rate_hz);
        cs.tone_hz = s.programme.kind == programme_kind::tone ? s.programme.tone_hz : 1000.0;
        cs.modulation_index = s.am.modulation_index > 0.0 ? std::min(s.am.modulation_index, 1.0) : 0.3;
        auto control = std::make_shared<render_control>();
        try {
            transfer_curve tc;
            if (!run_on(pool, control, [&] { return measure_transfer_curve(s.circuit, log_spaced(0.01, 3.0, 9), cs); }, tc))
                throw http_refusal(503, "busy: try again shortly");
            nlohmann::json out = to_json(tc);
            out["operating_carrier_peak_v"] = s.am.carrier_peak_v;
            send_json(res, 200, out);
        } catch (const config_error& e) {
            throw http_refusal(400, e.what());
        } catch (const integration_error& e) {
            throw http_refusal(422, e.what());
        }
    }

    /// Stores an upload's bytes as `<prefix><n>.<ext>` in the session's uploads folder, checks it with
    /// `check(file)` (which throws http_refusal 400 with its reason; the file is then removed), and keeps
    /// the last opt.max_uploads of its kind (`next` numbers them, `kept` lists them). Returns n.
    template <typename Check>
    unsigned store_upload(session& sess, const std::string& body, unsigned session::*next, std::deque<unsigned> session::*kept,
                          const char* prefix, const char* ext, Check&& check)
    {
        unsigned n = 0;
        {
            std::lock_guard lock(mutex);
            n = (sess.*next)++;
        }
        const fs::path folder = sess.dir / "uploads";
        const auto name = [&](unsigned k) { return folder / fmt::format("{}{}.{}", prefix, k, ext); };
        std::error_code ec;
        fs::create_directories(folder, ec);
        const fs::path file = name(n);
        {
            std::ofstream out(file, std::ios::binary | std::ios::trunc);
            out.write(body.data(), static_cast<std::streamsize>(body.size()));
            if (!out) {
                fs::remove(file, ec);
                throw http_refusal(500, "upload: cannot store the file");
            }
        }
        try {
            check(file);
        } catch (...) {
            fs::remove(file, ec);
            throw;
        }
        std::lock_guard lock(mutex);
        std::deque<unsigned>& list = sess.*kept;
        list.push_back(n);
        while (list.size() > std::max<std::size_t>(opt.max_uploads, 1)) {
            fs::remove(name(list.front()), ec);
            list.pop_front();
        }
        return n;
    }

    void upload_handler(const httplib::Request& req, httplib::Response& res)
    {
        if (req.body.size() > opt.max_upload_bytes)
            throw http_refusal(413, fmt::format("upload: {} bytes, more than the {}-byte limit", req.body.size(), opt.max_upload_bytes));
        if (req.body.empty()) throw http_refusal(400, "upload: the body is empty; send the WAV file's bytes");
        const auto held = lease(req);
        session& sess = *held->s;
        double seconds = 0.0;
        const unsigned n = store_upload(sess, req.body, &session::next_upload, &session::uploads, "u", "wav", [&](const fs::path& file) {
            try {
                const wav_reader r(file);
                seconds = static_cast<double>(r.frames()) / r.sample_rate_hz();
            } catch (const std::exception& e) {
                throw http_refusal(400, fmt::format("upload: not an audio file that can be read: {}", e.what()));
            }
        });
        send_json(res, 200, {{"clip", fmt::format("upload:{}", n)}, {"seconds", seconds}, {"session", sess.id}});
    }

    /// A diode file (diode.toml, as `galena fit-diode` writes it): kept in the session's folder once it loads.
    void diode_upload_handler(const httplib::Request& req, httplib::Response& res)
    {
        if (req.body.size() > opt.max_body_bytes)
            throw http_refusal(413, fmt::format("diode file: {} bytes, more than the {}-byte limit", req.body.size(), opt.max_body_bytes));
        const auto held = lease(req);
        session& sess = *held->s;
        std::string name;
        const unsigned n = store_upload(sess, req.body, &session::next_diode, &session::diode_uploads, "d", "toml", [&](const fs::path& file) {
            try {
                name = load_scenario(opt.base_scenario, {"diode.file=" + toml_string(file.string())}).circuit.diode.name;
            } catch (const config_error& e) {
                throw http_refusal(400, fmt::format("diode file: {}", e.what()));
            }
        });
        send_json(res, 200, {{"diode", fmt::format("upload:d{}", n)}, {"name", name}, {"session", sess.id}});
    }

    void audio_handler(const httplib::Request& req, httplib::Response& res)
    {
        const std::string id = req.matches[1];
        const std::string num = req.matches[2];
        if (!valid_session_id(id) || num.empty() || num.size() > 9) throw http_refusal(404, "no such render");
        const unsigned n = static_cast<unsigned>(std::stoul(num));
        fs::path file;
        {
            std::lock_guard lock(mutex);
            const auto it = sessions.find(id);
            if (it == sessions.end() || std::find(it->second->renders.begin(), it->second->renders.end(), n) == it->second->renders.end())
                throw http_refusal(404, fmt::format("no render {} in session {} (only the last {} are kept)", n, id, opt.kept_renders));
            file = it->second->dir / fmt::format("r{}", n) / "recovered.wav";
        }
        res.status = 200;
        res.set_header("Cache-Control", "no-store");
        res.set_content(read_file_bytes(file), "audio/wav");
    }

    void scenario_handler(const httplib::Request& req, httplib::Response& res)
    {
        const auto held = req.has_param("session") ? lease(req) : nullptr; // for its uploads
        const scenario s = scenario_of(overrides_of(req.body, held ? held->s.get() : nullptr));
        res.status = 200;
        res.set_header("Content-Disposition", "attachment; filename=\"workbench-setup.toml\"");
        res.set_content("# Made by the galena workbench: its base scenario with the page's values.\n" + to_toml(s), "application/toml");
    }

    nlohmann::json defaults_json()
    {
        const scenario s = load_scenario(opt.base_scenario);
        const auto& c = s.circuit;
        nlohmann::json v;
        v["signal.carrier_hz"] = s.am.carrier_hz;
        v["signal.carrier_peak_v"] = s.am.carrier_peak_v;
        v["signal.modulation_index"] = s.am.modulation_index;
        v["signal.tone_hz"] = s.programme.tone_hz;
        v["signal.duration_s"] = s.programme.duration_s;
        v["source.resistance_ohm"] = value_json(c.source.resistance_ohm);
        v["diode.preset"] = c.diode.name;
        v["load.bleeder_ohm"] = value_json(c.load.bleeder_ohm);
        v["load.filter_capacitance_f"] = value_json(c.load.filter_capacitance_f);
        v["earpiece.kind"] = std::string(to_string(c.earpiece.kind));
        v["earpiece.capacitance_f"] = value_json(c.earpiece.capacitance_f);
        v["earpiece.resistance_ohm"] = value_json(c.earpiece.resistance_ohm);
        v["earpiece.inductance_h"] = value_json(c.earpiece.inductance_h);
        // The front end (receiver layouts): the base scenario's tuner and antenna, and its first station's field
        // (a bench base has none: the scenario contract's example field, 10 mV/m).
        v["tuner.layout"] = std::string(to_string(s.tuner.layout));
        v["tuner.coil_h"] = s.tuner.coil_h;
        v["tuner.coil_q"] = s.tuner.coil_q;
        // A base whose dial is a tuning capacitance leaves "tuned to" blank (the page then sends none and the
        // capacitance stays); a frequency typed there replaces it (the scenario's rule).
        if (s.tuner.capacitance_f == 0.0) v["tuner.tuned_hz"] = s.tuner.tuned_hz;
        v["tuner.detector_tap"] = s.tuner.detector_tap;
        v["tuner.antenna_tap"] = s.tuner.antenna_tap;
        v["tuner.coupling"] = s.tuner.coupling;
        v["antenna.effective_height_m"] = s.antenna.effective_height_m;
        v["station.field_v_per_m"] = s.stations.empty() ? 10e-3 : s.stations.front().params.field_v_per_m;
        return {{"values", v},
                {"scenario", s.file.filename().string()},
                {"max_excerpt_s", opt.max_excerpt_s},
                {"max_upload_bytes", opt.max_upload_bytes}};
    }

    static nlohmann::json presets_json()
    {
        nlohmann::json out = nlohmann::json::array();
        for (const auto& p : diode_presets()) {
            const auto& d = p.params;
            out.push_back({{"name", std::string(p.name)},
                           {"description", std::string(p.description)},
                           {"parameters",
                            {{"diode.saturation_current_a", d.saturation_current_a},
                             {"diode.emission_coefficient", d.emission_coefficient},
                             {"diode.series_resistance_ohm", d.series_resistance_ohm},
                             {"diode.leakage_resistance_ohm", value_json(d.leakage_resistance_ohm)},
                             {"diode.junction_capacitance_f", d.junction_capacitance_f}}}});
        }
        return out;
    }

    nlohmann::json clips_json() const
    {
        nlohmann::json out = nlohmann::json::array();
        for (const auto& [name, path] : clips) {
            double seconds = 0.0;
            try {
                const wav_reader r(path);
                seconds = static_cast<double>(r.frames()) / r.sample_rate_hz();
            } catch (const std::exception&) {
                continue;
            }
            out.push_back({{"name", name}, {"seconds", seconds}});
        }
        return out;
    }

    /// Wraps a handler: refusals and library errors become one-line JSON answers; nothing escapes.
    template <class F>
    httplib::Server::Handler guarded(F f)
    {
        return [this, f](const httplib::Request& req, httplib::Response& res) {
            try {
                (this->*f)(req, res);
            } catch (const http_refusal& e) {
                if (req.path == "/api/render") {
                    std::lock_guard lock(mutex);
                    ++counters.renders_refused;
                }
                send_error(res, e.status, e.what());
            } catch (const config_error& e) {
                send_error(res, 400, e.what());
            } catch (const resource_error& e) {
                send_error(res, 503, e.what());
            } catch (const std::bad_alloc&) {
                send_error(res, 503, "out of memory");
            } catch (const std::exception& e) {
                send_error(res, 500, e.what());
            }
        };
    }

    void routes()
    {
        server.Get("/", [](const httplib::Request&, httplib::Response& res) {
            res.set_header("Cache-Control", "no-store");
            res.set_header("Content-Security-Policy", "default-src 'self'; style-src 'self' 'unsafe-inline'; script-src 'self' 'unsafe-inline'; media-src 'self' blob:; img-src 'self' data:");
            res.set_content(page_html.data(), page_html.size(), "text/html; charset=utf-8");
        });
        server.Get("/api/presets", [](const httplib::Request&, httplib::Response& res) { send_json(res, 200, presets_json()); });
        server.Get("/api/clips", [this](const httplib::Request&, httplib::Response& res) { send_json(res, 200, clips_json()); });
        server.Get("/api/defaults", guarded(&impl::defaults_handler));
        server.Post("/api/render", guarded(&impl::render_handler));
        server.Post("/api/scenario", guarded(&impl::scenario_handler));
        server.Post("/api/transfer", guarded(&impl::transfer_handler));
        server.Post("/api/upload", guarded(&impl::upload_handler));
        server.Post("/api/upload-diode", guarded(&impl::diode_upload_handler));
        server.Get(R"(/audio/([A-Za-z0-9_-]{1,64})/([0-9]{1,9})\.wav)", guarded(&impl::audio_handler));
        server.set_error_handler([](const httplib::Request& req, httplib::Response& res) {
            if (!res.body.empty()) return;
            std::string what = res.status == 404   ? fmt::format("{}: not found", detail::one_line(req.path))
                               : res.status == 413 ? "request body: more than the size limit"
                                                   : fmt::format("HTTP {}", res.status);
            send_error(res, res.status, what);
        });
        server.set_exception_handler([](const httplib::Request&, httplib::Response& res, std::exception_ptr) {
            send_error(res, 500, "internal error");
        });
    }

    void defaults_handler(const httplib::Request&, httplib::Response& res) { send_json(res, 200, defaults_json()); }
};

workbench::workbench(workbench_options options) : m_impl(std::make_unique<impl>(std::move(options)))
{
    auto& m = *m_impl;
    if (m.opt.port < 0 || m.opt.port > 65535)
        throw config_error(fmt::format("workbench: --port {}: must be in [0, 65535] (0 = a free port)", m.opt.port));
    if (!(m.opt.max_excerpt_s > 0.0) || !(m.opt.render_timeout_s > 0.0) || m.opt.max_sessions == 0)
        throw config_error("workbench: the excerpt limit, render timeout and session limit must be positive");
    (void)load_scenario(m.opt.base_scenario); // a broken base scenario says so now, not on the first request
    std::error_code ec;
    if (!m.opt.clips_dir.empty()) {
        for (const auto& e : fs::directory_iterator(m.opt.clips_dir, ec)) {
            const std::string name = e.path().filename().string();
            if (valid_clip_name(name) && e.symlink_status(ec).type() == fs::file_type::regular) m.clips.emplace(name, fs::absolute(e.path()));
        }
    }
    const fs::path parent = m.opt.temp_parent.empty() ? fs::temp_directory_path(ec) : m.opt.temp_parent;
    std::string pattern = (parent / "galena-workbench-XXXXXX").string();
    if (::mkdtemp(pattern.data()) == nullptr)
        throw resource_error(fmt::format("workbench: cannot make a private temporary folder in {}: {}", parent.string(), std::strerror(errno)));
    m.temp = pattern;
    const std::size_t handler_threads = std::max<std::size_t>(8, m.opt.queue_limit + 2 * std::max(1u, std::thread::hardware_concurrency()) + 4); // waiting renders hold one each
    m.server.new_task_queue = [handler_threads] { return new httplib::ThreadPool(handler_threads); };
    m.server.set_payload_max_length(std::max(m.opt.max_body_bytes, m.opt.max_upload_bytes));
    m.server.set_keep_alive_timeout(5);
    m.server.set_read_timeout(10);
    m.server.set_write_timeout(10);
    // cpp-httplib's packaged library listens with a backlog of 5. When a page and a few clients connect at once
    // while both cores render, the listener thread is not scheduled in time, the kernel's accept queue fills and
    // it answers with SYN cookies whose connections are then reset: the browser sees a dropped request. Keep
    // the socket that cpp-httplib makes (its default options as they are) and widen its backlog after binding.
    m.server.set_socket_options([&m](int fd) {
        httplib::default_socket_options(fd);
        m.listen_fd = fd;
    });
    m.routes();
    m.bound_port = m.opt.port == 0 ? m.server.bind_to_any_port(m.opt.host) : (m.server.bind_to_port(m.opt.host, m.opt.port) ? m.opt.port : -1);
    if (m.bound_port > 0 && (m.listen_fd < 0 || ::listen(m.listen_fd, SOMAXCONN) != 0)) {
        const int err = errno;
        if (m.listen_fd >= 0) ::close(m.listen_fd); // never served: cpp-httplib's server leaves it to us
        fs::remove_all(m.temp, ec);
        throw resource_error(fmt::format("workbench: cannot widen the listening queue on {}:{}: {}", m.opt.host, m.bound_port,
                                         m.listen_fd < 0 ? "the socket was not seen" : std::strerror(err)));
    }
    if (m.bound_port <= 0) {
        fs::remove_all(m.temp, ec);
        throw resource_error(fmt::format("workbench: cannot listen on {}:{} (the port is in use or the address is not this machine's; choose another port, or 0 for a free one)",
                                         m.opt.host, m.opt.port));
    }
    m.listener = std::thread([&m] { m.server.listen_after_bind(); });
}

workbench::~workbench() { stop(); }

int workbench::port() const noexcept { return m_impl->bound_port; }

std::string workbench::address() const
{
    const std::string& h = m_impl->opt.host;
    return fmt::format("http://{}:{}/", h.find(':') != std::string::npos ? "[" + h + "]" : h, m_impl->bound_port);
}

const fs::path& workbench::temp_dir() const noexcept { return m_impl->temp; }

workbench_stats workbench::stats() const
{
    std::lock_guard lock(m_impl->mutex);
    auto s = m_impl->counters;
    s.sessions = m_impl->sessions.size();
    std::tie(s.renders_running, s.renders_waiting) = m_impl->pool.load();
    return s;
}

void workbench::serve_until_cancelled()
{
    while (!cancel_requested() && !m_impl->stopping) std::this_thread::sleep_for(std::chrono::milliseconds(50));
    stop();
}

void workbench::stop()
{
    auto& m = *m_impl;
    std::lock_guard once(m.stop_mutex);
    if (m.stopped) return;
    {
        std::lock_guard lock(m.mutex);
        m.stopping = true;
        for (auto& [id, s] : m.sessions)
            if (s->current) s->current->cancel(render_control::reason::shutting_down);
    }
    m.server.stop();
    if (m.listener.joinable()) m.listener.join(); // every handler has had its answer
    m.pool.shutdown();
    std::error_code ec;
    fs::remove_all(m.temp, ec);
    m.stopped = true;
}

} // namespace galena
