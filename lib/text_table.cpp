#include "galena/text_table.hpp"

#include "galena/cancel.hpp"
#include "galena/error.hpp"

#include <cerrno>
#include <cstdio>
#include <cstring>
#include <fcntl.h>
#include <fmt/format.h>
#include <unistd.h>

namespace galena {

namespace fs = std::filesystem;

std::string csv_field(std::string_view text)
{
    const bool edge_space = !text.empty() && (text.front() == ' ' || text.back() == ' ');
    if (text.find_first_of(",\"\r\n") == std::string_view::npos && !edge_space) return std::string(text);
    std::string o = "\"";
    for (char c : text) {
        if (c == '"') o += '"';
        o += c;
    }
    return o + "\"";
}

std::string csv_row(const std::vector<std::string>& fields)
{
    std::string o;
    for (std::size_t i = 0; i < fields.size(); ++i) {
        if (i > 0) o += ',';
        o += csv_field(fields[i]);
    }
    return o + "\n";
}

std::vector<std::vector<std::string>> parse_csv(std::string_view text, const fs::path& file)
{
    std::vector<std::vector<std::string>> rows;
    std::vector<std::string> row;
    std::string field;
    std::size_t line = 1, row_line = 1;
    std::size_t i = 0;
    bool any = false; // the current record has started
    auto end_field = [&] {
        row.push_back(std::move(field));
        field.clear();
    };
    auto end_row = [&] {
        end_field();
        rows.push_back(std::move(row));
        row.clear();
        any = false;
    };
    while (i < text.size()) {
        const char c = text[i];
        if (!any) row_line = line;
        any = true;
        if (c == '"' && field.empty()) {
            // Quoted field: up to the closing quote; "" is one quote.
            ++i;
            for (;;) {
                if (i >= text.size())
                    throw audio_error(fmt::format("{}:{}: unterminated quoted field (RFC 4180)", file.string(), row_line));
                if (text[i] == '"') {
                    if (i + 1 < text.size() && text[i + 1] == '"') {
                        field += '"';
                        i += 2;
                        continue;
                    }
                    ++i;
                    break;
                }
                if (text[i] == '\n') ++line;
                field += text[i++];
            }
            if (i < text.size() && text[i] != ',' && text[i] != '\n' && text[i] != '\r')
                throw audio_error(fmt::format("{}:{}: text after a closing quote (RFC 4180)", file.string(), line));
            continue;
        }
        if (c == ',') {
            end_field();
            ++i;
        } else if (c == '\r' && i + 1 < text.size() && text[i + 1] == '\n') {
            end_row();
            i += 2;
            ++line;
        } else if (c == '\n') {
            end_row();
            ++i;
            ++line;
        } else {
            field += c;
            ++i;
        }
    }
    if (any) end_row();
    return rows;
}

std::string markdown_cell(std::string_view text)
{
    std::string o;
    for (std::size_t i = 0; i < text.size(); ++i) {
        const char c = text[i];
        switch (c) {
        case '|': o += "\\|"; break;
        case '\\': o += "\\\\"; break;
        case '<': o += "&lt;"; break;
        case '>': o += "&gt;"; break;
        case '&': o += "&amp;"; break;
        case '\r':
            if (i + 1 < text.size() && text[i + 1] == '\n') ++i;
            o += "<br>";
            break;
        case '\n': o += "<br>"; break;
        default: o += c;
        }
    }
    return o;
}

std::string read_text_input(const fs::path& file, std::string_view what, std::size_t limit)
{
    std::error_code ec;
    if (fs::is_directory(file, ec)) throw config_error(fmt::format("{}: is a directory, not a {}", file.string(), what));
    int fd = -1;
    do {
        fd = ::open(file.c_str(), O_RDONLY | O_CLOEXEC);
        if (fd < 0 && errno == EINTR) throw_if_cancelled(); // Ctrl-C during a blocking open (a FIFO)
    } while (fd < 0 && errno == EINTR);
    if (fd < 0) {
        const int err = errno;
        throw config_error(fmt::format("{}: cannot open the {}: {}", file.string(), what, std::strerror(err)));
    }
    std::string text;
    char buf[65536];
    for (;;) {
        const ssize_t n = ::read(fd, buf, sizeof buf);
        if (n < 0) {
            const int err = errno;
            if (err == EINTR) {
                if (cancel_requested()) ::close(fd);
                throw_if_cancelled();
                continue;
            }
            ::close(fd);
            throw config_error(fmt::format("{}: cannot read the {}: {}", file.string(), what, std::strerror(err)));
        }
        if (n == 0) break;
        if (text.size() + static_cast<std::size_t>(n) > limit) {
            ::close(fd);
            throw config_error(fmt::format("{}: the {} is larger than the {} kB limit (a scenario or pack is a small text file)",
                                           file.string(), what, limit / 1024));
        }
        text.append(buf, static_cast<std::size_t>(n));
    }
    ::close(fd);
    return text;
}

} // namespace galena
