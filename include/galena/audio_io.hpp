/// WAV input and output through libsndfile: a streaming mono reader for any format libsndfile reads,
/// and an atomic writer (temporary file in the target directory, renamed on commit) with the calibrated
/// full-scale voltage recorded in the file's comment string.
#pragma once

#include "galena/signal.hpp"

#include <cstddef>
#include <filesystem>
#include <memory>
#include <span>
#include <string>
#include <vector>

namespace galena {

/// Sample formats galena writes.
enum class wav_format {
    pcm16,
    pcm24,
    float32,
};
[[nodiscard]] std::string_view to_string(wav_format f) noexcept;
/// Parses "pcm16", "pcm24" or "float"; throws config_error otherwise.
[[nodiscard]] wav_format parse_wav_format(std::string_view s);

/// Facts about an audio file.
struct audio_file_info {
    double sample_rate_hz = 0.0;
    int channels = 0;
    std::size_t frames = 0;
    std::string format; ///< libsndfile's description, e.g. "WAV / Signed 16 bit PCM"
};

/// Streams an audio file as mono (channels averaged). Throws audio_error naming the file when it cannot
/// be opened, is empty, or its sample rate is outside [1 kHz, 768 kHz].
class wav_reader final : public sample_reader {
public:
    explicit wav_reader(const std::filesystem::path& path);
    ~wav_reader() override;
    wav_reader(const wav_reader&) = delete;
    wav_reader& operator=(const wav_reader&) = delete;
    std::size_t read(std::span<float> out) override;
    [[nodiscard]] double sample_rate_hz() const noexcept override { return m_info.sample_rate_hz; }
    [[nodiscard]] std::size_t frames() const noexcept override { return m_info.frames; }
    void rewind() override;
    [[nodiscard]] const audio_file_info& info() const noexcept { return m_info; }

private:
    std::filesystem::path m_path;
    void* m_file = nullptr; // SNDFILE*
    audio_file_info m_info;
    std::vector<float> m_interleaved;
    std::size_t m_position = 0;
};

/// Reads a whole file as mono samples (for tests and small clips).
[[nodiscard]] std::vector<float> read_mono(const std::filesystem::path& path, double* sample_rate_hz = nullptr);

/// Writes mono audio atomically: samples go to a hidden temporary file beside the target, which replaces
/// the target only on commit(). Destroying an uncommitted writer deletes the temporary file.
/// Samples are volts divided by full_scale_v; values beyond +-1 are clipped by the caller's policy
/// (the writer itself clamps and counts them).
class wav_writer {
public:
    /// @param full_scale_v volts that map to digital full scale; recorded in the comment; > 0
    /// @param overwrite    replace an existing target; otherwise an existing file is an audio_error
    wav_writer(const std::filesystem::path& path, double sample_rate_hz, wav_format format, double full_scale_v,
               bool overwrite);
    ~wav_writer();
    wav_writer(const wav_writer&) = delete;
    wav_writer& operator=(const wav_writer&) = delete;
    /// Appends samples in volts. Throws audio_error on a write failure (e.g. disk full).
    void write_volts(std::span<const double> volts);
    /// Finishes the file and renames it onto the target. Throws audio_error on failure.
    void commit();
    /// Samples that exceeded full scale and were clamped.
    [[nodiscard]] std::size_t clipped() const noexcept { return m_clipped; }
    [[nodiscard]] std::size_t frames() const noexcept { return m_frames; }

private:
    std::filesystem::path m_path;
    std::filesystem::path m_temp;
    void* m_file = nullptr;
    double m_inv_full_scale;
    bool m_overwrite;
    std::size_t m_clipped = 0;
    std::size_t m_frames = 0;
    std::vector<float> m_buf;
};

/// Writes a whole buffer of volts in one go (atomic, as wav_writer).
void write_wav(const std::filesystem::path& path, std::span<const double> volts, double sample_rate_hz,
               wav_format format, double full_scale_v, bool overwrite);

/// Writes text to a file atomically (temporary file + rename). Throws audio_error on failure.
void write_text_atomic(const std::filesystem::path& path, const std::string& text);

/// True when both paths name the same existing file.
[[nodiscard]] bool same_file(const std::filesystem::path& a, const std::filesystem::path& b);

} // namespace galena
