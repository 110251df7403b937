/// Text tables at the output edge: RFC 4180 CSV fields and rows (and a reader for them), Markdown table
/// cells, and a capped, checked read of a small text input file.
///
/// Why our own: no package on the project's allowed list writes CSV (Debian's libcsv-dev is a C library
/// outside that list; libfccp-dev only reads), and the writer is a dozen lines; the tests check it against
/// RFC 4180's rules and against Python's csv module.
#pragma once

#include <cstddef>
#include <filesystem>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// One CSV field per RFC 4180 section 2: enclosed in double quotes when it holds a comma, a double quote,
/// CR or LF (or starts or ends with a space, which some readers trim), with each double quote doubled.
[[nodiscard]] std::string csv_field(std::string_view text);
/// One CSV record: the fields, each through csv_field, joined by commas and ended by LF (RFC 4180 names
/// CRLF; LF is what every common reader accepts and what the rest of galena's text files use).
[[nodiscard]] std::string csv_row(const std::vector<std::string>& fields);
/// Parses CSV text per RFC 4180 (quoted fields may hold commas, quotes and line breaks; CRLF or LF ends a
/// record). Throws audio_error naming `file` and the record's line for an unterminated quote or text after
/// a closing quote.
[[nodiscard]] std::vector<std::vector<std::string>> parse_csv(std::string_view text, const std::filesystem::path& file);

/// A Markdown (GitHub-flavoured) table cell: `|` and `\` escaped with a backslash, CR/LF turned into
/// `<br>`, and `<`, `>`, `&` written as HTML entities, so no label can break the table's row.
[[nodiscard]] std::string markdown_cell(std::string_view text);

/// Largest scenario or pack file galena reads, bytes (1 MiB): far above any real scenario (a few kB),
/// small enough that a wrong path such as /dev/zero fails at once.
inline constexpr std::size_t text_input_limit_bytes = 1u << 20;

/// Reads a small text input (scenario, pack) completely, checking every read: throws config_error naming
/// the file and `what` ("scenario file", "pack file") when it cannot be opened, is a directory, a read
/// fails (with the system's reason), or it holds more than `limit` bytes.
[[nodiscard]] std::string read_text_input(const std::filesystem::path& file, std::string_view what,
                                          std::size_t limit = text_input_limit_bytes);

} // namespace galena
