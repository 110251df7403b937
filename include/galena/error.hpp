/// The error hierarchy: one root type and one subtype per failure channel.
#pragma once

#include <cstdio>
#include <stdexcept>
#include <string>
#include <string_view>

namespace galena {

namespace detail {
/// Text safe inside a one-line message: newlines and other control characters become escapes
/// (\n, \r, \t, \xHH), so user text quoted in a message (a key, a value, a path) cannot break the line.
[[nodiscard]] inline std::string one_line(std::string_view text)
{
    std::string out;
    out.reserve(text.size());
    for (const char c : text) {
        const auto u = static_cast<unsigned char>(c);
        if (c == '\n') out += "\\n";
        else if (c == '\r') out += "\\r";
        else if (c == '\t') out += "\\t";
        else if (u < 0x20 || u == 0x7f) {
            char hex[8];
            std::snprintf(hex, sizeof hex, "\\x%02x", u);
            out += hex;
        } else out += c;
    }
    return out;
}
} // namespace detail

/// Root of every error galena throws. The message names the file or field, the value and the rule, and is
/// always one line (control characters in it are escaped).
class error : public std::runtime_error {
public:
    explicit error(const std::string& what) : std::runtime_error(detail::one_line(what)) {}
    explicit error(const char* what) : error(std::string(what)) {}
};

/// A parameter, scenario key or command-line value breaks a documented rule.
class config_error : public error {
public:
    using error::error;
};

/// An audio file cannot be read or written, or holds unusable samples.
class audio_error : public error {
public:
    using error::error;
};

/// The time-domain solver could not advance: Newton failure or step-size floor.
/// The message names the simulated time at which it happened.
class integration_error : public error {
public:
    integration_error(const std::string& what, double time_s) : error(what), m_time_s(time_s) {}
    /// Simulated time, s, at which the solver gave up.
    [[nodiscard]] double time_s() const noexcept { return m_time_s; }

private:
    double m_time_s;
};

/// A resource ran out: memory, file descriptors, processes, or FFTW could not make a plan. The message
/// names what ran out and where; it is not a bug in the input or in galena (README "Exit codes": 5).
class resource_error : public error {
public:
    using error::error;
};

/// The work was stopped on request (Ctrl-C / SIGINT, SIGTERM, or a caller's cancel) before it finished.
/// Every output it had started is removed before this reaches the caller.
class cancelled_error : public error {
public:
    cancelled_error(const std::string& what, int signal_number) : error(what), m_signal(signal_number) {}
    /// The signal that asked for the stop (SIGINT, SIGTERM), or 0 for a programmatic cancel.
    [[nodiscard]] int signal_number() const noexcept { return m_signal; }

private:
    int m_signal;
};

} // namespace galena
