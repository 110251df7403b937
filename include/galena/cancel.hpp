/// Cooperative cancellation: one process-wide flag that a signal handler may set (async-signal-safe) and
/// that long-running work polls between blocks, so Ctrl-C stops a render or sweep cleanly: the work
/// unwinds, its staged outputs are removed, and the caller sees a cancelled_error.
#pragma once

namespace galena {

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
