#include "galena/staged_output.hpp"

#include "galena/audio_io.hpp"
#include "galena/error.hpp"

#include <fmt/format.h>
#include <random>

namespace galena {

namespace fs = std::filesystem;

staged_output::staged_output(const fs::path& target, bool overwrite, std::vector<fs::path> inputs)
    : m_target(target), m_overwrite(overwrite), m_inputs(std::move(inputs))
{
    if (m_target.empty()) throw audio_error("--out: the output directory name is empty");
    // "out/" names the folder "out": drop a trailing separator so the staging folder lands beside it.
    if (!m_target.has_filename()) m_target = m_target.parent_path();
    std::error_code ec;
    if (fs::exists(m_target, ec) && !fs::is_directory(m_target, ec))
        throw audio_error(fmt::format("{}: --out exists and is not a directory", m_target.string()));
    for (const auto& in : m_inputs)
        if (same_file(m_target, in))
            throw audio_error(fmt::format("{}: --out names an input; refusing to overwrite an input", m_target.string()));
    fs::path parent = m_target.parent_path();
    if (parent.empty()) parent = ".";
    if (!fs::exists(parent, ec)) {
        for (fs::path p = parent; !p.empty() && !fs::exists(p, ec); p = p.parent_path()) {
            m_created_parent = p;
            if (p == p.parent_path()) break;
        }
        fs::create_directories(parent, ec);
        if (ec) {
            m_created_parent.clear();
            throw audio_error(fmt::format("{}: cannot create the output directory: {}", parent.string(), ec.message()));
        }
    } else if (!fs::is_directory(parent, ec)) {
        throw audio_error(fmt::format("{}: cannot create the output directory: {} is not a directory", m_target.string(),
                                      parent.string()));
    }
    std::random_device rd;
    for (int attempt = 0; attempt < 16; ++attempt) {
        const fs::path p = parent / fmt::format(".{}.partial-{:08x}", m_target.filename().string(), rd());
        if (fs::create_directory(p, ec)) {
            m_staging = p;
            return;
        }
        if (ec) break;
    }
    const std::string why = ec ? ec.message() : std::string("name clash");
    if (!m_created_parent.empty()) fs::remove_all(m_created_parent, ec);
    throw audio_error(fmt::format("{}: cannot create the output directory: {}", m_target.string(), why));
}

staged_output::~staged_output()
{
    std::error_code ec;
    if (!m_published && !m_staging.empty()) fs::remove_all(m_staging, ec);
    if (!m_published && !m_created_parent.empty()) {
        // Only folders this object made, and only while they are empty.
        for (fs::path p = m_target.parent_path(); !p.empty(); p = p.parent_path()) {
            if (!fs::remove(p, ec) || p == m_created_parent) break;
        }
    }
}

fs::path staged_output::published(const fs::path& staged) const
{
    const fs::path rel = staged.lexically_relative(m_staging);
    if (rel.empty() || *rel.begin() == "..") return staged;
    return rel == "." ? m_target : m_target / rel;
}

std::string staged_output::describe(const std::string& message) const
{
    std::string out = message;
    const std::string from = m_staging.string();
    const std::string to = m_target.string();
    if (from.empty()) return out;
    for (std::size_t at = out.find(from); at != std::string::npos; at = out.find(from, at + to.size())) out.replace(at, from.size(), to);
    return out;
}

void staged_output::check(const fs::path& relative) const
{
    const fs::path p = m_target / relative;
    for (const auto& in : m_inputs)
        if (same_file(p, in))
            throw audio_error(fmt::format("{}: is an input of this run; refusing to overwrite an input", p.string()));
    std::error_code ec;
    if (!m_overwrite && fs::exists(p, ec))
        throw audio_error(fmt::format("{}: already exists (pass --overwrite to replace it)", p.string()));
    if (fs::is_directory(p, ec)) throw audio_error(fmt::format("{}: is a directory, not a file", p.string()));
}

void staged_output::publish()
{
    std::error_code ec;
    std::vector<fs::path> files;
    for (auto it = fs::recursive_directory_iterator(m_staging, ec); !ec && it != fs::recursive_directory_iterator(); it.increment(ec))
        if (!it->is_directory(ec)) files.push_back(it->path().lexically_relative(m_staging));
    if (ec) throw audio_error(fmt::format("{}: cannot list the staged output: {}", m_staging.string(), ec.message()));
    for (const auto& rel : files) check(rel);
    if (!fs::exists(m_target, ec)) {
        fs::rename(m_staging, m_target, ec);
        if (ec)
            throw audio_error(fmt::format("{}: cannot move the finished output into place: {}", m_target.string(), ec.message()));
        m_published = true;
        return;
    }
    for (const auto& rel : files) {
        const fs::path to = m_target / rel;
        fs::create_directories(to.parent_path(), ec);
        if (!ec) fs::rename(m_staging / rel, to, ec);
        if (ec) throw audio_error(fmt::format("{}: cannot move the finished file into place: {}", to.string(), ec.message()));
    }
    fs::remove_all(m_staging, ec);
    m_published = true;
}

} // namespace galena
