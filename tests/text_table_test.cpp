// RFC 4180 CSV fields and records (written and read back), Markdown table cells, capped text input.
#include "galena/error.hpp"
#include "galena/text_table.hpp"

#include <doctest/doctest.h>

#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

TEST_CASE("CSV fields per RFC 4180 section 2: quoted only when needed, quotes doubled")
{
    // Rules 5-7 of RFC 4180 section 2 (the examples there): fields with commas, quotes or line breaks are
    // enclosed in double quotes, and a double quote inside is escaped by another double quote.
    CHECK(csv_field("aaa") == "aaa");
    CHECK(csv_field("") == "");
    CHECK(csv_field("b,bb") == "\"b,bb\"");
    CHECK(csv_field("b\"bb") == "\"b\"\"bb\"");
    CHECK(csv_field("b\nbb") == "\"b\nbb\"");
    CHECK(csv_field("b\rbb") == "\"b\rbb\"");
    CHECK(csv_field(" pad") == "\" pad\"");
    CHECK(csv_row({"aaa", "b,bb", "ccc"}) == "aaa,\"b,bb\",ccc\n");
}

TEST_CASE("CSV reader: every field written comes back; CRLF and LF both end a record; bad quoting is named")
{
    const std::vector<std::vector<std::string>> rows = {
        {"name", "label", "x"}, {"a", "say \"hi\", then\nnext", "1"}, {"b", "", "2"}, {"", "\"", ","}};
    std::string text;
    for (const auto& r : rows) text += csv_row(r);
    CHECK(parse_csv(text, "t.csv") == rows);
    CHECK(parse_csv("a,b\r\nc,\"d\r\ne\"\r\n", "t.csv") == std::vector<std::vector<std::string>>{{"a", "b"}, {"c", "d\r\ne"}});
    CHECK_THROWS_WITH_AS(parse_csv("a,\"b\nc\n", "t.csv"), doctest::Contains("t.csv:1: unterminated quoted field"), audio_error);
    CHECK_THROWS_WITH_AS(parse_csv("x\na,\"b\"c\n", "t.csv"), doctest::Contains("t.csv:2: text after a closing quote"), audio_error);
}

TEST_CASE("Markdown cells: pipes and backslashes escaped, line breaks as <br>, HTML characters as entities")
{
    CHECK(markdown_cell("plain") == "plain");
    CHECK(markdown_cell("a|b") == "a\\|b");
    CHECK(markdown_cell("a\\b") == "a\\\\b");
    CHECK(markdown_cell("one\ntwo\r\nthree") == "one<br>two<br>three");
    CHECK(markdown_cell("<b>&") == "&lt;b&gt;&amp;");
}

TEST_CASE("text inputs: read whole below the cap; above it, a directory or a missing file: config_error naming the file")
{
    const fs::path d = fs::path(GALENA_TEST_TMP) / "text_table";
    fs::create_directories(d);
    {
        std::ofstream(d / "small.toml") << "x = 1\n";
        std::ofstream(d / "big.toml") << std::string(5000, 'x');
    }
    CHECK(read_text_input(d / "small.toml", "scenario file") == "x = 1\n");
    CHECK(read_text_input(d / "big.toml", "scenario file", 5000).size() == 5000);
    CHECK_THROWS_WITH_AS((void)read_text_input(d / "big.toml", "scenario file", 4999),
                         doctest::Contains("big.toml: the scenario file is larger than the 4 kB limit"), config_error);
    CHECK_THROWS_WITH_AS((void)read_text_input(d, "pack file"), doctest::Contains("is a directory, not a pack file"), config_error);
    CHECK_THROWS_WITH_AS((void)read_text_input(d / "none.toml", "pack file"),
                         doctest::Contains("none.toml: cannot open the pack file: No such file or directory"), config_error);
}
