/// The workbench: a local web server that renders short excerpts of a scenario on each change, for the page
/// (built in) and for scripts (an HTTP API). The server only translates: every render goes through the
/// scenario overrides (load_scenario with section.key=value texts) and the render job (render_job_into).
#pragma once

#include <cstddef>
#include <filesystem>
#include <memory>
#include <string>

namespace galena {

/// Settings of a workbench server. The defaults are the limits `galena workbench` uses.
struct workbench_options {
    /// Address to listen on. The loopback address by default; anything else exposes the bench (and the CPU
    /// it renders on) to the network, so the CLI needs an explicit flag for it.
    std::string host = "127.0.0.1";
    int port = 0;                               ///< TCP port; 0 = a free port chosen by the system
    std::filesystem::path base_scenario;        ///< every render is this file plus the request's overrides
    std::filesystem::path clips_dir;            ///< bundled clips (regular *.wav files only; symlinks are ignored)
    std::filesystem::path temp_parent;          ///< the private temporary folder goes here; empty = system temp
    unsigned render_threads = 0;                ///< renders running at once; 0 = the core count
    std::size_t queue_limit = 32;               ///< renders waiting for a thread; more are refused (HTTP 503)
    std::size_t max_sessions = 64;              ///< sessions held at once; idle ones are dropped first
    double session_idle_s = 900.0;              ///< a session unused this long may be dropped, s
    std::size_t max_body_bytes = 64 * 1024;     ///< JSON request body, bytes
    std::size_t max_upload_bytes = 16u << 20u;  ///< an uploaded clip, bytes
    std::size_t max_uploads = 4;                ///< uploads kept per session (the oldest goes first)
    std::size_t kept_renders = 6;               ///< renders kept per session for playback (the oldest goes first)
    double max_excerpt_s = 5.0;                 ///< longest programme one render may have, s
    double render_timeout_s = 60.0;             ///< a render still running after this is stopped, s
};

/// Counters of a running server (for tests and the closing line of the command).
struct workbench_stats {
    std::size_t renders_done = 0;       ///< answered with audio
    std::size_t renders_cancelled = 0;  ///< stopped by a newer change of the same session
    std::size_t renders_refused = 0;    ///< 4xx/5xx answers to /api/render
    std::size_t sessions = 0;           ///< sessions held now
    std::size_t renders_running = 0;    ///< renders on a thread now
    std::size_t renders_waiting = 0;    ///< renders waiting for a thread now
};

/// A workbench server. Construction validates the options, binds the port and creates the private temporary
/// folder; serving runs on its own threads until stop() or destruction, which cancel running renders, join
/// every thread and remove the temporary folder. The library prints nothing: address() is for the caller to
/// show.
///
/// HTTP API (all answers JSON unless noted; errors are {"error": "one line"}):
///  - GET  /                      the page (built in; no outside resources)
///  - GET  /api/presets           the diode presets: [{name, description, parameters{field: value}}]
///  - GET  /api/clips             the bundled clips: [{name, seconds}]
///  - GET  /api/defaults          the base scenario's values: {section.key: value} and "scenario" (TOML)
///  - POST /api/render?session=ID body {section.key: value, ...} (numbers, strings such as "47k", true/false:
///    the value syntax of --set). 200: {metrics (metrics.json's keys), warnings (sentences),
///    warning_codes (their codes), audio_url, render_id, wall_s}.
///    400: a bad value, with the same one-line message `galena render BASE --set ...` prints; 409: stopped
///    by a newer change of the same session; 413: body too large; 422: the solver failed; 503: busy.
///  - POST /api/scenario[?session=ID] same body (the session's uploads may be named); 200: the setup as a scenario file (TOML, attachment)
///  - POST /api/transfer          same body; 200: the detector's transfer curve (to_json(transfer_curve) keys)
///    and operating_carrier_peak_v, the scenario's carrier level
///  - POST /api/upload?session=ID body: a WAV file; 200: {"clip": "upload:N"} for signal.audio
///  - POST /api/upload-diode?session=ID body: a diode file (diode.toml of fit-diode); 200: {"diode": "upload:dN"}
///  - GET  /audio/ID/N.wav        a render of that session (the session's last few only)
/// signal.audio takes a bundled clip name or an upload id, diode.file only a diode upload id; never a path.
class workbench {
public:
    /// Throws config_error for bad options or a base scenario that does not load, resource_error when the
    /// port cannot be bound or the temporary folder cannot be made.
    explicit workbench(workbench_options options);
    ~workbench();
    workbench(const workbench&) = delete;
    workbench& operator=(const workbench&) = delete;

    /// The port it listens on (the chosen one when options.port was 0).
    [[nodiscard]] int port() const noexcept;
    /// "http://HOST:PORT/" for people and browsers.
    [[nodiscard]] std::string address() const;
    /// The private temporary folder (removed by stop()).
    [[nodiscard]] const std::filesystem::path& temp_dir() const noexcept;
    [[nodiscard]] workbench_stats stats() const;

    /// Blocks until cancel_requested() (Ctrl-C in the CLI) or stop() from another thread, then stops.
    void serve_until_cancelled();
    /// Stops serving: refuses new requests, cancels running renders, joins the threads, removes the
    /// temporary folder. Idempotent; thread-safe.
    void stop();

private:
    struct impl;
    std::unique_ptr<impl> m_impl;
};

} // namespace galena
