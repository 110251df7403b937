/// The error hierarchy: one root type and one subtype per failure channel.
#pragma once

#include <stdexcept>
#include <string>

namespace galena {

/// Root of every error galena throws. The message names the file or field, the value and the rule.
class error : public std::runtime_error {
public:
    using std::runtime_error::runtime_error;
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
