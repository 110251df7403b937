/// An output directory written as one unit: every file of a command goes into a hidden staging folder
/// beside the target (same file system), and only a successful publish() moves them into place. Any
/// failure, a cancel (Ctrl-C) or an exception before that removes the staging folder, so no partial WAV,
/// JSON or pack is ever left behind.
#pragma once

#include "galena/error.hpp"

#include <filesystem>
#include <string>
#include <vector>

namespace galena {

namespace detail {
/// Tests only: publish() fails the move after this many successful ones (-1, the default: never), so that
/// the roll-back can be exercised.
extern int publish_fault_after_moves;
} // namespace detail

class staged_output {
public:
    /// Creates the staging folder `.NAME.partial-XXXXXXXX` beside `target` (creating the target's missing
    /// parent folders, which are removed again if nothing is published).
    /// @param target    the directory the user named (--out); it may exist already
    /// @param overwrite replace files that already exist in `target`; otherwise any such clash is an error
    /// @param inputs    files that must never be replaced, whatever `overwrite` says (scenario, clip, pack)
    /// Throws audio_error when `target` exists and is not a directory, or the folder cannot be created.
    staged_output(const std::filesystem::path& target, bool overwrite, std::vector<std::filesystem::path> inputs = {});
    /// Removes the staging folder and everything in it unless publish() succeeded.
    ~staged_output();
    staged_output(const staged_output&) = delete;
    staged_output& operator=(const staged_output&) = delete;

    /// Where to write: the staging folder.
    [[nodiscard]] const std::filesystem::path& dir() const noexcept { return m_staging; }
    /// The directory the files are published to.
    [[nodiscard]] const std::filesystem::path& target() const noexcept { return m_target; }
    /// The published place of a path inside dir() (other paths are returned unchanged).
    [[nodiscard]] std::filesystem::path published(const std::filesystem::path& staged) const;
    /// A message with every mention of the staging folder replaced by the target, so errors and warnings
    /// name the place the user asked for.
    [[nodiscard]] std::string describe(const std::string& message) const;
    /// Adds a file that must never be replaced.
    void protect(const std::filesystem::path& input) { m_inputs.push_back(input); }
    /// Early check for one output, relative to the target: throws audio_error when it names an input, or
    /// exists and overwrite is off. Lets a command refuse before it spends time rendering.
    void check(const std::filesystem::path& relative) const;
    /// Declares a file or folder (relative to the target) that belongs to this command's output set. With
    /// overwrite, publish() moves an existing one out of the way even when this run did not make it (e.g.
    /// `recovered-normalised.wav` of an earlier clipped render), so the target holds exactly the new set.
    void owns(const std::filesystem::path& relative) { m_owned.push_back(relative); }
    /// Moves every staged file into the target. Every path is checked first, parents included (inputs,
    /// existing files without overwrite, a file where a folder must go, a folder where a file must go); on
    /// a clash nothing is moved. A target that does not exist yet is created by one rename of the staging
    /// folder. Into an existing target, replaced files and owned leftovers are first moved aside into the
    /// stage, then the new files moved in; a move that fails midway is rolled back (new files out, old ones
    /// back), so the target is either the old set or the new one. Throws audio_error.
    void publish();

    /// Name prefix of staging folders beside `target` (".NAME.partial-").
    [[nodiscard]] static std::string staging_prefix(const std::filesystem::path& target);

private:
    std::filesystem::path m_target;
    std::filesystem::path m_staging;
    std::filesystem::path m_created_parent; ///< the highest parent folder this object created, if any
    bool m_overwrite;
    std::vector<std::filesystem::path> m_inputs;
    std::vector<std::filesystem::path> m_owned;
    bool m_published = false;
};

/// Notices about staging folders (one line each): a stale stage of a process that no longer runs that was
/// removed, or one that could not be removed (with the system's reason). The library never prints;
/// the caller (the CLI) shows these as warnings. Taking them empties the list. Thread-safe.
[[nodiscard]] std::vector<std::string> take_staging_notices();

/// Runs `work` and rethrows its audio_error, config_error or resource_error with staged.describe() applied, so messages
/// name the target rather than the staging folder; other errors pass unchanged.
template <class Work>
void with_described_errors(const staged_output& staged, Work&& work)
{
    try {
        work();
    } catch (const audio_error& e) {
        throw audio_error(staged.describe(e.what()));
    } catch (const config_error& e) {
        throw config_error(staged.describe(e.what()));
    } catch (const resource_error& e) {
        throw resource_error(staged.describe(e.what()));
    }
}

} // namespace galena
