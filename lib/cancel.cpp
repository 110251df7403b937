#include "galena/cancel.hpp"

#include "galena/error.hpp"

#include <atomic>
#include <csignal>
#include <fmt/format.h>

namespace galena {

namespace {
// 0: no cancel; -1: programmatic; otherwise the signal number. Lock-free, so safe in a handler.
std::atomic<int> g_cancel{0};
static_assert(std::atomic<int>::is_always_lock_free);

extern "C" void on_stop_signal(int sig)
{
    request_cancel(sig);
}

const char* signal_name(int sig)
{
    switch (sig) {
    case SIGINT: return "SIGINT (Ctrl-C)";
    case SIGTERM: return "SIGTERM";
    case SIGHUP: return "SIGHUP (the terminal closed)";
    default: return "a signal";
    }
}
} // namespace

void request_cancel(int signal_number) noexcept
{
    int expected = 0;
    g_cancel.compare_exchange_strong(expected, signal_number != 0 ? signal_number : -1);
}

bool cancel_requested() noexcept { return g_cancel.load(std::memory_order_relaxed) != 0; }

void reset_cancel() noexcept { g_cancel.store(0); }

void throw_if_cancelled()
{
    const int c = g_cancel.load();
    if (c == 0) return;
    if (c < 0) throw cancelled_error("cancelled: stopped before finishing; no output was written", 0);
    throw cancelled_error(fmt::format("interrupted by {}: stopped before finishing; no output was written", signal_name(c)), c);
}

void cancel_token::throw_if_requested() const
{
    if (requested()) throw cancelled_error("cancelled: stopped before finishing; no output was written", 0);
}

void install_signal_handlers()
{
    struct sigaction sa{};
    sa.sa_handler = on_stop_signal;
    sigemptyset(&sa.sa_mask);
    sa.sa_flags = SA_RESETHAND; // the second signal takes the default action
    sigaction(SIGINT, &sa, nullptr);
    sigaction(SIGTERM, &sa, nullptr);
    sigaction(SIGHUP, &sa, nullptr); // a closed terminal stops the work like SIGTERM: cleanly, stage removed
    struct sigaction ign{};
    ign.sa_handler = SIG_IGN;
    sigemptyset(&ign.sa_mask);
    sigaction(SIGXFSZ, &ign, nullptr);
    // A closed pipe (progress piped into `head`) is an EPIPE error on that write, not death by SIGPIPE: the
    // CLI stops printing and the work goes on (or stops cleanly) with the stage removed.
    sigaction(SIGPIPE, &ign, nullptr);
}

} // namespace galena
