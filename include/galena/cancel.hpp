/// Cooperative cancellation: per-work tokens (cancel_token: one render, job or sweep stops, the others run
/// on) and one process-wide flag that a signal handler may set (async-signal-safe). Long-running work polls
/// between blocks, so a cancel stops it cleanly: the work unwinds, its staged outputs are removed, and the
/// caller sees a cancelled_error.
#pragma once

#include <atomic>

namespace galena {

/// A cancel request for one piece of work (a receiver, a job, a sweep). Any thread may call request();
/// the work polls requested() between blocks and throws cancelled_error. Independent of the process-wide
/// flag below: cancelling one token stops only the work that polls it. Not copyable (the work and the
/// canceller share one object); it must outlive the work that polls it.
class cancel_token {
public:
    cancel_token() = default;
    cancel_token(const cancel_token&) = delete;
    cancel_token& operator=(const cancel_token&) = delete;

    /// Asks the work to stop. Thread-safe and lock-free (async-signal-safe as well).
    void request() noexcept { m_requested.store(true); }
    /// True once request() has been called (and until reset()).
    [[nodiscard]] bool requested() const noexcept { return m_requested.load(std::memory_order_relaxed); }
    /// Throws cancelled_error ("cancelled: ...", signal 0) when requested; otherwise nothing.
    void throw_if_requested() const;
    /// Clears the request (before the work is run again).
    void reset() noexcept { m_requested.store(false); }

private:
    std::atomic<bool> m_requested{false};
};

/// Asks every running render, sweep and pack to stop. Async-signal-safe (a lock-free atomic store).
/// @param signal_number the signal that asked (SIGINT, SIGTERM), or 0 for a programmatic cancel
void request_cancel(int signal_number = 0) noexcept;
/// True once request_cancel() has been called (and until reset_cancel()).
[[nodiscard]] bool cancel_requested() noexcept;
/// Throws cancelled_error ("interrupted by SIGINT: ...") when a cancel was requested; otherwise nothing.
void throw_if_cancelled();
/// Clears the flag (for tests and for programs that run several jobs).
void reset_cancel() noexcept;

/// Installs the command-line tool's handlers: SIGINT, SIGTERM and SIGHUP call request_cancel() once and
/// then fall back to their default action (a second Ctrl-C ends the process at once); SIGXFSZ is ignored,
/// so a write beyond the file-size limit fails with EFBIG and is reported instead of killing the process;
/// SIGPIPE is ignored, so a closed pipe is an EPIPE write error that the caller handles.
void install_signal_handlers();

} // namespace galena
