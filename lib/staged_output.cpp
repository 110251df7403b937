#include "galena/staged_output.hpp"

#include "galena/audio_io.hpp"
#include "galena/error.hpp"

#include <cerrno>
#include <csignal>
#include <fmt/format.h>
#include <mutex>
#include <random>
#include <unistd.h>

namespace galena {

namespace fs = std::filesystem;

namespace {
std::mutex g_notice_mutex;
std::vector<std::string> g_notices;

void add_notice(std::string n)
{
    std::lock_guard<std::mutex> lk(g_notice_mutex);
    g_notices.push_back(std::move(n));
}

/// True when `p` exists as anything (a dangling link counts: renaming onto it would replace it).
bool present(const fs::path& p)
{
    std::error_code ec;
    return fs::symlink_status(p, ec).type() != fs::file_type::not_found && !ec;
}

/// Removes stale staging folders beside `target` whose process no longer runs; reports those it cannot
/// remove and those of an unknown process (old name format).
void sweep_stale_stages(const fs::path& parent, const fs::path& target)
{
    const std::string prefix = staged_output::staging_prefix(target);
    std::error_code ec;
    for (auto it = fs::directory_iterator(parent, ec); !ec && it != fs::directory_iterator(); it.increment(ec)) {
        const std::string name = it->path().filename().string();
        if (name.rfind(prefix, 0) != 0) continue;
        const std::string rest = name.substr(prefix.size());
        const auto dash = rest.find('-');
        long pid = 0;
        try {
            pid = dash == std::string::npos ? 0 : std::stol(rest.substr(0, dash));
        } catch (const std::exception&) {
            pid = 0;
        }
        if (pid <= 0) {
            add_notice(fmt::format("{}: a staging folder left by an earlier run (its process is unknown); remove it by hand "
                                   "if no galena is writing {}",
                                   it->path().string(), target.string()));
            continue;
        }
        if (pid == static_cast<long>(::getpid()) || ::kill(static_cast<pid_t>(pid), 0) == 0 || errno != ESRCH) continue;
        std::error_code rec;
        fs::remove_all(it->path(), rec);
        if (rec)
            add_notice(fmt::format("{}: cannot remove the staging folder left by process {} (no longer running): {}",
                                   it->path().string(), pid, rec.message()));
        else
            add_notice(fmt::format("{}: removed the staging folder left by process {}, which no longer runs", it->path().string(), pid));
    }
}
} // namespace

std::vector<std::string> take_staging_notices()
{
    std::lock_guard<std::mutex> lk(g_notice_mutex);
    std::vector<std::string> out;
    out.swap(g_notices);
    return out;
}

namespace detail {
int publish_fault_after_moves = -1;
} // namespace detail

std::string staged_output::staging_prefix(const fs::path& target)
{
    return fmt::format(".{}.partial-", target.filename().string());
}

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
            const std::string why = ec.message();
            m_created_parent.clear();
            throw audio_error(fmt::format("{}: cannot create the output directory: {}", parent.string(), why));
        }
    } else if (!fs::is_directory(parent, ec)) {
        throw audio_error(fmt::format("{}: cannot create the output directory: {} is not a directory", m_target.string(),
                                      parent.string()));
    } else {
        sweep_stale_stages(parent, m_target);
    }
    std::random_device rd;
    for (int attempt = 0; attempt < 16; ++attempt) {
        const fs::path p = parent / fmt::format("{}{}-{:08x}", staging_prefix(m_target), ::getpid(), rd());
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
    if (!m_published && !m_staging.empty()) {
        fs::remove_all(m_staging, ec);
        if (ec)
            add_notice(fmt::format("{}: cannot remove the staging folder: {}; a later run into {} removes it",
                                   m_staging.string(), ec.message(), m_target.string()));
    }
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
    // Every parent inside the target must be a folder (or not exist yet).
    fs::path q = m_target;
    for (auto it = relative.begin(); it != relative.end(); ++it) {
        if (std::next(it) == relative.end()) break;
        q /= *it;
        if (present(q) && !fs::is_directory(q, ec))
            throw audio_error(fmt::format("{}: is a file where the output needs a folder (for {})", q.string(), p.string()));
    }
    if (fs::is_directory(p, ec)) throw audio_error(fmt::format("{}: is a directory, not a file", p.string()));
    if (!m_overwrite && present(p))
        throw audio_error(fmt::format("{}: already exists (pass --overwrite to replace it)", p.string()));
}

void staged_output::publish()
{
    std::error_code ec;
    std::vector<fs::path> files;
    for (auto it = fs::recursive_directory_iterator(m_staging, ec); !ec && it != fs::recursive_directory_iterator(); it.increment(ec))
        if (!it->is_directory(ec)) files.push_back(it->path().lexically_relative(m_staging));
    if (ec) {
        const std::string why = ec.message();
        throw audio_error(fmt::format("{}: cannot list the staged output: {}", m_staging.string(), why));
    }
    // Check phase: nothing moves until every path is known to be placeable.
    if (present(m_target) && !fs::is_directory(m_target, ec))
        throw audio_error(fmt::format("{}: --out exists and is not a directory", m_target.string()));
    for (const auto& rel : files) check(rel);
    if (m_overwrite && present(m_target)) {
        for (const auto& o : m_owned) {
            const fs::path p = m_target / o;
            if (!present(p)) continue;
            for (const auto& in : m_inputs) {
                const fs::path ci = fs::weakly_canonical(in, ec);
                const fs::path cp = fs::weakly_canonical(p, ec);
                const fs::path rel = ci.lexically_relative(cp);
                if (same_file(p, in) || (!rel.empty() && *rel.begin() != ".."))
                    throw audio_error(fmt::format("{}: holds an input of this run; refusing to replace it", p.string()));
            }
        }
    }
    if (!present(m_target)) {
        fs::rename(m_staging, m_target, ec);
        if (ec) {
            const std::string why = ec.message(); // before any cleanup can overwrite it
            throw audio_error(fmt::format("{}: cannot move the finished output into place: {}", m_target.string(), why));
        }
        m_published = true;
        return;
    }
    // Move phase, journalled: every rename is recorded so that a failure midway can be undone.
    const fs::path aside = m_staging / ".galena-replaced";
    std::vector<std::pair<fs::path, fs::path>> moves; // (from, to), in order
    std::vector<fs::path> made;                       // folders created inside the target
    int budget = detail::publish_fault_after_moves;
    auto ensure_parent = [&](const fs::path& to, bool journal) {
        std::vector<fs::path> missing;
        for (fs::path d = to.parent_path(); !d.empty() && !present(d); d = d.parent_path()) missing.push_back(d);
        for (auto it = missing.rbegin(); it != missing.rend(); ++it) {
            std::error_code e;
            if (!fs::create_directory(*it, e) && e) {
                const std::string why = e.message();
                throw audio_error(fmt::format("{}: cannot create: {}", it->string(), why));
            }
            if (journal) made.push_back(*it);
        }
    };
    auto move = [&](const fs::path& from, const fs::path& to, bool into_target) {
        ensure_parent(to, into_target);
        std::error_code e;
        if (budget == 0) e = std::make_error_code(std::errc::io_error);
        else fs::rename(from, to, e);
        if (budget > 0) --budget;
        if (e) {
            const std::string why = e.message();
            throw audio_error(fmt::format("{}: cannot move the finished file into place: {}", to.string(), why));
        }
        moves.emplace_back(from, to);
    };
    try {
        if (m_overwrite)
            for (const auto& o : m_owned)
                if (present(m_target / o)) move(m_target / o, aside / o, false);
        for (const auto& rel : files) {
            const fs::path to = m_target / rel;
            if (present(to)) move(to, aside / rel, false);
            move(m_staging / rel, to, true);
        }
    } catch (const audio_error& e) {
        std::string undo_failed;
        for (auto it = moves.rbegin(); it != moves.rend(); ++it) {
            std::error_code u;
            fs::rename(it->second, it->first, u);
            if (u && undo_failed.empty()) undo_failed = fmt::format("{} ({})", it->second.string(), u.message());
        }
        for (auto it = made.rbegin(); it != made.rend(); ++it) {
            std::error_code u;
            fs::remove(*it, u);
        }
        if (undo_failed.empty()) throw audio_error(std::string(e.what()) + "; nothing was changed in " + m_target.string());
        // Keep the earlier files out of reach of the stale-stage cleanup: they are the user's.
        const fs::path kept = m_staging.parent_path() / fmt::format(".{}.kept-{}", m_target.filename().string(), ::getpid());
        std::error_code k;
        fs::rename(m_staging, kept, k);
        m_published = true; // nothing of the stage may be removed now
        throw audio_error(fmt::format("{}; rolling back failed at {}: the earlier files are kept in {}", e.what(), undo_failed,
                                      (k ? aside : kept / ".galena-replaced").string()));
    }
    m_published = true;
    fs::remove_all(m_staging, ec);
    if (ec)
        add_notice(fmt::format("{}: published, but the staging folder cannot be removed: {}; a later run into {} removes it",
                               m_staging.string(), ec.message(), m_target.string()));
}

} // namespace galena
