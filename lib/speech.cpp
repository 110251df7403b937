#include "galena/speech.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/dsp.hpp"
#include "galena/error.hpp"

#include <algorithm>
#include <array>
#include <atomic>
#include <cctype>
#include <cerrno>
#include <cmath>
#include <csignal>
#include <cstdlib>
#include <cstring>
#include <fcntl.h>
#include <fmt/format.h>
#include <spawn.h>
#include <sys/wait.h>
#include <time.h>
#include <unistd.h>

extern char** environ;

namespace galena {

namespace fs = std::filesystem;

namespace {

constexpr std::array<std::string_view, 20> ones{"zero",    "one",     "two",       "three",    "four",     "five",    "six",
                                                "seven",   "eight",   "nine",      "ten",      "eleven",   "twelve",  "thirteen",
                                                "fourteen", "fifteen", "sixteen",  "seventeen", "eighteen", "nineteen"};
constexpr std::array<std::string_view, 10> tens{"", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety"};

/// Words for 0 <= n < 1000.
std::string below_thousand(unsigned n)
{
    std::string t;
    if (n >= 100) {
        t = fmt::format("{} hundred", ones[n / 100]);
        n %= 100;
        if (n == 0) return t;
        t += " ";
    }
    if (n < 20) return t + std::string(ones[n]);
    t += tens[n / 10];
    if (n % 10 != 0) t += fmt::format("-{}", ones[n % 10]);
    return t;
}

/// Words for a whole number 0 <= n < 1e12.
std::string whole_words(unsigned long long n)
{
    if (n == 0) return "zero";
    static constexpr std::array<std::pair<unsigned long long, std::string_view>, 3> groups{
        {{1'000'000'000ULL, "billion"}, {1'000'000ULL, "million"}, {1'000ULL, "thousand"}}};
    std::string t;
    for (const auto& [size, name] : groups) {
        if (n >= size) {
            t += fmt::format("{}{} {}", t.empty() ? "" : " ", below_thousand(static_cast<unsigned>(n / size)), name);
            n %= size;
        }
    }
    if (n > 0) {
        if (!t.empty()) t += ' ';
        t += below_thousand(static_cast<unsigned>(n));
    }
    return t;
}

/// Unit words for the unit symbols a value may carry ("47kΩ", "10nF", "1MHz").
std::string_view unit_word_of(std::string_view sym)
{
    static constexpr std::array<std::pair<std::string_view, std::string_view>, 14> table{{
        {"\xCE\xA9", "ohm"}, {"ohm", "ohm"}, {"ohms", "ohm"}, {"F", "farad"}, {"Hz", "hertz"}, {"hz", "hertz"}, {"V", "volt"},
        {"A", "amp"}, {"H", "henry"}, {"s", "second"}, {"dB", "decibel"}, {"dBFS", "decibel"}, {"%", "percent"}, {"W", "watt"},
    }};
    for (const auto& [s, w] : table)
        if (s == sym) return w;
    return {};
}

/// Unit words for the unit suffix of a key name ("bleeder_ohm" -> "ohm").
std::string_view key_unit_word(std::string_view suffix)
{
    static constexpr std::array<std::pair<std::string_view, std::string_view>, 10> table{{
        {"ohm", "ohm"}, {"hz", "hertz"}, {"f", "farad"}, {"v", "volt"}, {"s", "second"}, {"a", "amp"}, {"h", "henry"},
        {"db", "decibel"}, {"c", "degrees celsius"}, {"percent", "percent"},
    }};
    for (const auto& [s, w] : table)
        if (s == suffix) return w;
    return {};
}

/// SI prefix factor of one prefix letter (engineering text), 0 when it is none.
double prefix_factor(std::string_view p)
{
    if (p == "p") return 1e-12;
    if (p == "n") return 1e-9;
    if (p == "u" || p == "\xC2\xB5" || p == "\xCE\xBC") return 1e-6;
    if (p == "m") return 1e-3;
    if (p == "k") return 1e3;
    if (p == "M") return 1e6;
    if (p == "G") return 1e9;
    return 0.0;
}

bool is_word_byte(char c) { return std::isalnum(static_cast<unsigned char>(c)) != 0 || (static_cast<unsigned char>(c) & 0x80) != 0 || c == '%'; }

} // namespace

std::string spoken_number(double value)
{
    if (std::isnan(value)) return "not a number";
    if (std::isinf(value)) return value > 0 ? "infinity" : "minus infinity";
    std::string sign = value < 0 ? "minus " : "";
    const double a = std::fabs(value);
    if (a == 0.0) return "zero";
    if (a < 1e-6 || a >= 1e12) {
        const int e = static_cast<int>(std::floor(std::log10(a)));
        const double mant = a / std::pow(10.0, e);
        return fmt::format("{}{} times ten to the {}", sign, spoken_number(std::stod(fmt::format("{:.6g}", mant))), spoken_number(e));
    }
    // Six significant digits, fixed notation, trailing zeros removed.
    const int e = static_cast<int>(std::floor(std::log10(a)));
    const int decimals = std::max(0, 5 - e);
    std::string text = fmt::format("{:.{}f}", a, decimals);
    if (text.find('.') != std::string::npos) {
        while (text.back() == '0') text.pop_back();
        if (text.back() == '.') text.pop_back();
    }
    const auto dot = text.find('.');
    const std::string whole = text.substr(0, dot);
    std::string t = sign + whole_words(std::stoull(whole));
    if (dot != std::string::npos) {
        t += " point";
        for (std::size_t i = dot + 1; i < text.size(); ++i) t += fmt::format(" {}", ones[static_cast<std::size_t>(text[i] - '0')]);
    }
    return t;
}

std::string spoken_quantity(double value, std::string_view unit_word)
{
    const std::string unit = unit_word.empty() ? std::string() : fmt::format(" {}", unit_word);
    if (std::isinf(value)) return "none";
    if (std::isnan(value)) return "not a number";
    if (value == 0.0) return "zero" + unit;
    // A plain number below a thousand is read as a number ("zero point three"), not with a prefix.
    if (unit_word.empty() && std::fabs(value) < 1000.0) return spoken_number(std::stod(fmt::format("{:.4g}", value)));
    static constexpr std::array<std::string_view, 8> prefixes{"pico", "nano", "micro", "milli", "", "k", "mega", "giga"};
    int e3 = static_cast<int>(std::floor(std::log10(std::fabs(value)) / 3.0)) * 3;
    e3 = std::clamp(e3, -12, 9);
    double mant = std::stod(fmt::format("{:.4g}", value / std::pow(10.0, e3)));
    if (std::fabs(mant) >= 1000.0 && e3 < 9) { // 999.96 rounded up to the next prefix
        e3 += 3;
        mant = std::stod(fmt::format("{:.4g}", value / std::pow(10.0, e3)));
    }
    const std::string_view prefix = prefixes[static_cast<std::size_t>((e3 + 12) / 3)];
    std::string t = spoken_number(mant);
    if (!prefix.empty()) t += fmt::format(" {}", prefix);
    return t + unit;
}

std::string speakable_label(std::string_view label)
{
    std::string out;
    std::string pending_unit; // the unit named by the last key ("bleeder_ohm"), for the value that follows
    auto emit = [&](std::string_view w) {
        if (w.empty()) return;
        if (!out.empty() && out.back() != ' ') out += ' ';
        out += w;
    };
    auto punct = [&](char c) {
        while (!out.empty() && out.back() == ' ') out.pop_back();
        if (out.empty() || out.back() == ',' || out.back() == '.') return;
        out += c;
    };
    std::size_t i = 0;
    const std::size_t n = label.size();
    while (i < n) {
        const char c = label[i];
        const bool starts_number = std::isdigit(static_cast<unsigned char>(c)) != 0 ||
                                   ((c == '.' || c == '-' || c == '+') && i + 1 < n && std::isdigit(static_cast<unsigned char>(label[i + 1])) != 0 &&
                                    (i == 0 || !is_word_byte(label[i - 1])));
        if (starts_number) {
            // The number: digits, one '.', an exponent.
            std::size_t j = i;
            if (label[j] == '-' || label[j] == '+') ++j;
            while (j < n && (std::isdigit(static_cast<unsigned char>(label[j])) != 0 || label[j] == '.')) ++j;
            if (j + 1 < n && (label[j] == 'e' || label[j] == 'E') &&
                (std::isdigit(static_cast<unsigned char>(label[j + 1])) != 0 ||
                 ((label[j + 1] == '-' || label[j + 1] == '+') && j + 2 < n && std::isdigit(static_cast<unsigned char>(label[j + 2])) != 0))) {
                j += 2;
                while (j < n && std::isdigit(static_cast<unsigned char>(label[j])) != 0) ++j;
            }
            const double v = std::strtod(std::string(label.substr(i, j - i)).c_str(), nullptr);
            // A fraction of small whole numbers ("tap 1/2"): "one half", "one quarter", "two over three".
            if (j + 1 < n && label[j] == '/' && std::isdigit(static_cast<unsigned char>(label[j + 1])) != 0 && v == std::floor(v)) {
                std::size_t q = j + 1;
                while (q < n && std::isdigit(static_cast<unsigned char>(label[q])) != 0) ++q;
                const double den = std::strtod(std::string(label.substr(j + 1, q - j - 1)).c_str(), nullptr);
                const bool plural = v != 1.0;
                std::string t;
                if (den == 2.0) t = fmt::format("{} half{}", spoken_number(v), plural ? "s" : "");
                else if (den == 4.0) t = fmt::format("{} quarter{}", spoken_number(v), plural ? "s" : "");
                else t = fmt::format("{} over {}", spoken_number(v), spoken_number(den));
                emit(t);
                i = q;
                continue;
            }
            // What is attached: prefix + unit, unit, or prefix.
            std::size_t k = j;
            while (k < n && is_word_byte(label[k])) ++k;
            std::string_view suffix = label.substr(j, k - j);
            // A unit after one space ("105.2 pF", "47 kΩ") belongs to the number too.
            if (suffix.empty() && j + 1 < n && label[j] == ' ') {
                std::size_t e = j + 1;
                while (e < n && is_word_byte(label[e])) ++e;
                const std::string_view next = label.substr(j + 1, e - j - 1);
                bool is_unit = !unit_word_of(next).empty();
                for (std::size_t plen : {std::size_t{1}, std::size_t{2}})
                    if (!is_unit && next.size() > plen && prefix_factor(next.substr(0, plen)) != 0.0 && !unit_word_of(next.substr(plen)).empty())
                        is_unit = true;
                if (is_unit) {
                    suffix = next;
                    k = e;
                }
            }
            double factor = 1.0;
            std::string unit = pending_unit;
            bool understood = suffix.empty();
            if (!suffix.empty()) {
                if (const auto w = unit_word_of(suffix); !w.empty()) {
                    unit = w;
                    understood = true;
                } else {
                    // A prefix of one letter (two bytes for micro) then an optional unit.
                    for (std::size_t plen : {std::size_t{1}, std::size_t{2}}) {
                        if (suffix.size() < plen) break;
                        const double f = prefix_factor(suffix.substr(0, plen));
                        if (f == 0.0) continue;
                        const std::string_view rest = suffix.substr(plen);
                        if (rest.empty()) {
                            factor = f;
                            understood = true;
                        } else if (const auto w = unit_word_of(rest); !w.empty()) {
                            factor = f;
                            unit = w;
                            understood = true;
                        }
                        if (understood) break;
                    }
                }
            }
            if (understood) {
                emit(spoken_quantity(v * factor, unit));
                pending_unit.clear();
                i = k;
            } else {
                emit(spoken_number(v));
                i = j;
            }
            continue;
        }
        if (is_word_byte(c) || c == '_') {
            std::size_t k = i;
            while (k < n && (is_word_byte(label[k]) || label[k] == '_')) ++k;
            std::string word(label.substr(i, k - i));
            i = k;
            if (word == "inf" || word == "none") {
                emit("none");
                pending_unit.clear();
                continue;
            }
            // A key name: the unit suffix waits for the value; the words keep their order.
            std::vector<std::string> parts;
            std::size_t from = 0;
            for (std::size_t p = 0; p <= word.size(); ++p)
                if (p == word.size() || word[p] == '_') {
                    if (p > from) parts.push_back(word.substr(from, p - from));
                    from = p + 1;
                }
            if (parts.size() > 1) {
                std::string lower = parts.back();
                for (char& ch : lower) ch = static_cast<char>(std::tolower(static_cast<unsigned char>(ch)));
                if (const auto w = key_unit_word(lower); !w.empty()) {
                    pending_unit = w;
                    parts.pop_back();
                }
            }
            for (const auto& p : parts) {
                // Bytes a speech program would read out one by one are dropped; words stay.
                std::string clean;
                for (char ch : p)
                    if (std::isalnum(static_cast<unsigned char>(ch)) != 0 || (static_cast<unsigned char>(ch) & 0x80) != 0) clean += ch;
                if (clean == "\xCE\xA9") clean = "ohm";
                emit(clean);
            }
            continue;
        }
        // A dot between two words joins a section and a key ("load.bleeder_ohm"): a space.
        const bool joining_dot = c == '.' && i > 0 && i + 1 < n && is_word_byte(label[i - 1]) &&
                                 std::isalpha(static_cast<unsigned char>(label[i + 1])) != 0;
        if (joining_dot) {
            if (!out.empty() && out.back() != ' ') out += ' ';
        } else if (c == ',' || c == ';' || c == '=' || c == ':' || c == '(' || c == ')' || c == '/') punct(',');
        else if (c == '.' || c == '!' || c == '?') punct('.');
        else if (c == '-' || c == ' ' || c == '\t' || c == '+' || c == '.') {
            if (!out.empty() && out.back() != ' ') out += ' ';
        }
        ++i;
    }
    while (!out.empty() && (out.back() == ' ' || out.back() == ',')) out.pop_back();
    return out;
}

namespace {

/// Runs `argv` (argv[0] looked up on PATH) in `dir` with stdin, stdout and stderr on /dev/null; polls for a
/// cancel every 10 ms and stops the child with SIGTERM on one. Returns the wait status, or -1 with
/// `why` set when the program cannot be started (ENOENT: not installed).
int run_quiet_child(std::vector<std::string> args, const fs::path& dir, std::string& why)
{
    posix_spawn_file_actions_t fa;
    posix_spawnattr_t attr;
    posix_spawn_file_actions_init(&fa);
    posix_spawnattr_init(&attr);
    sigset_t def;
    sigemptyset(&def);
    for (int sig : {SIGINT, SIGTERM, SIGHUP, SIGPIPE, SIGXFSZ}) sigaddset(&def, sig);
    posix_spawnattr_setsigdefault(&attr, &def);
    sigset_t none;
    sigemptyset(&none);
    posix_spawnattr_setsigmask(&attr, &none);
    posix_spawnattr_setflags(&attr, POSIX_SPAWN_SETSIGDEF | POSIX_SPAWN_SETSIGMASK);
    posix_spawn_file_actions_addchdir_np(&fa, dir.c_str());
    posix_spawn_file_actions_addopen(&fa, 0, "/dev/null", O_RDONLY, 0);
    posix_spawn_file_actions_addopen(&fa, 1, "/dev/null", O_WRONLY, 0);
    posix_spawn_file_actions_addopen(&fa, 2, "/dev/null", O_WRONLY, 0);
    std::vector<char*> argv;
    for (auto& a : args) argv.push_back(a.data());
    argv.push_back(nullptr);
    pid_t pid = -1;
    const int rc = posix_spawnp(&pid, args[0].c_str(), &fa, &attr, argv.data(), environ);
    posix_spawn_file_actions_destroy(&fa);
    posix_spawnattr_destroy(&attr);
    if (rc == EAGAIN || rc == ENOMEM || rc == EMFILE || rc == ENFILE)
        throw resource_error(fmt::format("cannot start {}: {} (a process, memory or file limit was reached)", args[0], std::strerror(rc)));
    if (rc == ENOENT) {
        why = fmt::format("{} not found on PATH (install the Debian package espeak-ng)", args[0]);
        return -1;
    }
    if (rc != 0) {
        why = fmt::format("cannot start {}: {}", args[0], std::strerror(rc));
        return -1;
    }
    int status = 0;
    bool stopped = false;
    for (;;) {
        const pid_t w = ::waitpid(pid, &status, WNOHANG);
        if (w == pid) break;
        if (w < 0 && errno != EINTR) {
            why = fmt::format("waiting for {} failed: {}", args[0], std::strerror(errno));
            return -1;
        }
        if (cancel_requested() && !stopped) {
            ::kill(pid, SIGTERM);
            stopped = true;
        }
        const timespec nap{0, 10'000'000}; // 10 ms
        nanosleep(&nap, nullptr);
    }
    throw_if_cancelled();
    if (WIFSIGNALED(status) && (WTERMSIG(status) == SIGINT || WTERMSIG(status) == SIGTERM || WTERMSIG(status) == SIGHUP)) {
        request_cancel(WTERMSIG(status));
        throw_if_cancelled();
    }
    return status;
}

} // namespace

std::optional<std::vector<double>> synthesize_speech(const std::string& text, double rate_hz, const fs::path& work_dir,
                                                     const speech_options& o, std::string& why)
{
    static std::atomic<unsigned> serial{0};
    const std::string stem = fmt::format(".announce-{}-{}", static_cast<long>(::getpid()), serial.fetch_add(1));
    const fs::path txt = work_dir / (stem + ".txt");
    const fs::path wav = work_dir / (stem + ".wav");
    struct remover {
        fs::path a, b;
        ~remover()
        {
            std::error_code e;
            fs::remove(a, e);
            fs::remove(b, e);
        }
    } cleanup{txt, wav};
    write_text_atomic(txt, text + "\n");
    const int status = run_quiet_child({o.program, "-v", o.voice, "-s", std::to_string(o.words_per_minute), "-p", std::to_string(o.pitch),
                                        "-a", "100", "-b", "1", "-w", wav.filename().string(), "-f", txt.filename().string()},
                                       work_dir, why);
    if (status == -1) return std::nullopt;
    if (!WIFEXITED(status) || WEXITSTATUS(status) != 0) {
        why = WIFEXITED(status) ? fmt::format("{} failed with exit code {}", o.program, WEXITSTATUS(status))
                                : fmt::format("{} was killed by signal {}", o.program, WTERMSIG(status));
        return std::nullopt;
    }
    double in_rate = 0.0;
    std::vector<float> raw;
    try {
        raw = read_mono(wav, &in_rate);
    } catch (const audio_error& e) {
        why = fmt::format("{} wrote no readable WAV: {}", o.program, e.what());
        return std::nullopt;
    }
    double peak = 0.0;
    for (float v : raw) peak = std::max(peak, std::fabs(static_cast<double>(v)));
    if (!(peak > 0.0)) {
        why = fmt::format("{} produced silence", o.program);
        return std::nullopt;
    }
    // Trim the silence around the words (below 1 % of the peak), keeping 20 ms either side.
    std::size_t first = 0, last = raw.size();
    while (first < raw.size() && std::fabs(raw[first]) < 0.01 * peak) ++first;
    while (last > first && std::fabs(raw[last - 1]) < 0.01 * peak) --last;
    const auto margin = static_cast<std::size_t>(0.02 * in_rate);
    first = first > margin ? first - margin : 0;
    last = std::min(raw.size(), last + margin);
    // Band-limited resampling to the playlist's rate: passband to 40 % of the lower rate, stop at its half.
    const double low = std::min(in_rate, rate_hz);
    std::vector<double> y;
    if (in_rate == rate_hz) {
        y.assign(raw.begin() + static_cast<std::ptrdiff_t>(first), raw.begin() + static_cast<std::ptrdiff_t>(last));
    } else {
        sinc_resampler rs(in_rate, 0.0, rate_hz, 0.0, 0.4 * low, 0.5 * low, 80.0);
        for (std::size_t i = first; i < last; ++i) rs.push(raw[i], y);
        const auto want = static_cast<std::size_t>(std::floor(static_cast<double>(last - first) * rate_hz / in_rate));
        const auto tail = static_cast<std::size_t>(std::ceil(rs.half_width_s() * in_rate)) + 2;
        for (std::size_t i = 0; i < tail && y.size() < want; ++i) rs.push(0.0, y);
        y.resize(want, 0.0);
    }
    double ss = 0.0, pk = 0.0;
    for (double v : y) {
        ss += v * v;
        pk = std::max(pk, std::fabs(v));
    }
    const double rms = std::sqrt(ss / static_cast<double>(std::max<std::size_t>(1, y.size())));
    if (!(rms > 0.0)) {
        why = fmt::format("{} produced silence", o.program);
        return std::nullopt;
    }
    double gain = std::pow(10.0, o.rms_dbfs / 20.0) / rms;
    gain = std::min(gain, std::pow(10.0, o.peak_limit_dbfs / 20.0) / pk);
    for (double& v : y) v *= gain;
    return y;
}

} // namespace galena
