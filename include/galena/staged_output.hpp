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
    /// Moves every staged file into the target. All files are checked first (inputs, existing files
    /// without overwrite); on a clash nothing is moved. A target that does not exist yet is created by one
    /// rename of the staging folder. Throws audio_error.
    void publish();

private:
    std::filesystem::path m_target;
    std::filesystem::path m_staging;
    std::filesystem::path m_created_parent; ///< the highest parent folder this object created, if any
    bool m_overwrite;
    std::vector<std::filesystem::path> m_inputs;
    bool m_published = false;
};

/// Runs `work` and rethrows its audio_error or config_error with staged.describe() applied, so messages
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
    }
}

} // namespace galena
