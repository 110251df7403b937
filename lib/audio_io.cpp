#include "galena/audio_io.hpp"

#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <algorithm>
#include <cerrno>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <cstdio>
#include <fmt/format.h>
#include <fstream>
#include <random>
#include <sndfile.h>

namespace galena {

namespace fs = std::filesystem;

std::string_view to_string(wav_format f) noexcept
{
    switch (f) {
    case wav_format::pcm16: return "pcm16";
    case wav_format::pcm24: return "pcm24";
    case wav_format::float32: return "float";
    }
    return "?";
}

wav_format parse_wav_format(std::string_view s)
{
    if (s == "pcm16") return wav_format::pcm16;
    if (s == "pcm24") return wav_format::pcm24;
    if (s == "float") return wav_format::float32;
    throw config_error(fmt::format("output.format = \"{}\": must be one of pcm16, pcm24, float", s));
}

namespace {
/// errno values that mean a resource ran out rather than a bad file.
bool out_of_resources(int err) { return err == EMFILE || err == ENFILE || err == ENOMEM; }

/// The frames a container's header declares and the frames its data really holds, read from the chunks
/// themselves (libsndfile quietly clamps a short data chunk to what is there). Covers RIFF/WAVE (PCM, float,
/// A-law, mu-law, IMA/MS ADPCM, WAVE_FORMAT_EXTENSIBLE with any channel count: frames from the data chunk's
/// size and the fmt chunk's block alignment and samples per block) and AIFF/AIFC (COMM's frame count
/// against the SSND chunk). Returns false for other containers and for sizes a streaming writer leaves
/// unset (0 or 0xFFFFFFFF).
bool container_frames(const fs::path& path, std::size_t& declared, std::size_t& present)
{
    std::ifstream in(path, std::ios::binary);
    unsigned char head[12];
    if (!in.read(reinterpret_cast<char*>(head), 12)) return false;
    const bool riff = std::memcmp(head, "RIFF", 4) == 0 && std::memcmp(head + 8, "WAVE", 4) == 0;
    const bool form = std::memcmp(head, "FORM", 4) == 0 && (std::memcmp(head + 8, "AIFF", 4) == 0 || std::memcmp(head + 8, "AIFC", 4) == 0);
    if (!riff && !form) return false;
    std::error_code ec;
    const auto file_size = static_cast<std::uint64_t>(fs::file_size(path, ec));
    if (ec) return false;
    auto u16 = [&](const unsigned char* p) -> std::uint32_t { return riff ? (p[0] | p[1] << 8) : (p[0] << 8 | p[1]); };
    auto u32 = [&](const unsigned char* p) -> std::uint32_t {
        return riff ? (std::uint32_t(p[0]) | std::uint32_t(p[1]) << 8 | std::uint32_t(p[2]) << 16 | std::uint32_t(p[3]) << 24)
                    : (std::uint32_t(p[0]) << 24 | std::uint32_t(p[1]) << 16 | std::uint32_t(p[2]) << 8 | std::uint32_t(p[3]));
    };
    std::uint32_t block_align = 0, samples_per_block = 0, channels = 0, bits = 0, comm_frames = 0, fact_frames = 0;
    bool have_fmt = false, have_comm = false;
    std::uint64_t at = 12;
    for (int chunk = 0; chunk < 4096 && at + 8 <= file_size; ++chunk) {
        unsigned char h[8];
        in.seekg(static_cast<std::streamoff>(at));
        if (!in.read(reinterpret_cast<char*>(h), 8)) return false;
        const std::uint32_t size = u32(h + 4);
        const std::uint64_t body = at + 8;
        unsigned char f[20] = {};
        const std::size_t want = std::min<std::uint64_t>(std::min<std::uint64_t>(size, sizeof f), file_size - body);
        in.read(reinterpret_cast<char*>(f), static_cast<std::streamsize>(want));
        in.clear();
        if (riff && std::memcmp(h, "fmt ", 4) == 0 && want >= 16) {
            const std::uint32_t tag = u16(f);
            channels = u16(f + 2);
            block_align = u16(f + 12);
            bits = u16(f + 14);
            // IMA (0x11) and MS (0x02) ADPCM: whole blocks of wSamplesPerBlock frames.
            if ((tag == 0x11 || tag == 0x02) && want >= 20) samples_per_block = u16(f + 18);
            have_fmt = true;
        } else if (riff && std::memcmp(h, "fact", 4) == 0 && want >= 4) {
            fact_frames = u32(f); // compressed formats: the exact frame count
        } else if (form && std::memcmp(h, "COMM", 4) == 0 && want >= 8) {
            channels = u16(f);
            comm_frames = u32(f + 2);
            bits = u16(f + 6);
            have_comm = true;
        } else if (riff && have_fmt && std::memcmp(h, "data", 4) == 0) {
            if (size == 0 || size == 0xFFFFFFFFu || block_align == 0) return false;
            const std::uint64_t held = std::min<std::uint64_t>(size, file_size - body);
            if (held >= size) return false; // whole
            const std::uint64_t per = samples_per_block != 0 ? samples_per_block : 1;
            declared = static_cast<std::size_t>(samples_per_block != 0 && fact_frames != 0 ? fact_frames : size / block_align * per);
            present = std::min(declared, static_cast<std::size_t>(held / block_align * per));
            return present < declared;
        } else if (form && have_comm && std::memcmp(h, "SSND", 4) == 0) {
            const std::uint64_t frame_bytes = static_cast<std::uint64_t>(channels) * ((bits + 7) / 8);
            if (size < 8 || frame_bytes == 0) return false;
            const std::uint64_t held = std::min<std::uint64_t>(size, file_size - body);
            const std::uint64_t data = held > 8 ? held - 8 : 0;
            declared = comm_frames;
            present = static_cast<std::size_t>(std::min<std::uint64_t>(data / frame_bytes, comm_frames));
            return held < size && present < declared;
        }
        at = body + static_cast<std::uint64_t>(size) + (size & 1u);
    }
    return false;
}
} // namespace

wav_reader::wav_reader(const fs::path& path) : m_path(path)
{
    std::error_code ec;
    if (fs::is_directory(path, ec)) throw audio_error(fmt::format("{}: is a directory, not an audio file", path.string()));
    if (!fs::exists(path, ec)) throw audio_error(fmt::format("{}: no such file", path.string()));
    SF_INFO info{};
    SNDFILE* f = sf_open(path.c_str(), SFM_READ, &info);
    if (f == nullptr) {
        const int err = errno;
        const std::string why = sf_strerror(nullptr); // before anything else can change it
        throw_if_cancelled(); // a blocking open (a FIFO) interrupted by Ctrl-C is an interruption, not a bad file
        if (out_of_resources(err))
            throw resource_error(fmt::format("{}: cannot open: {} (a file-descriptor or memory limit was reached)", path.string(),
                                             std::strerror(err)));
        throw audio_error(fmt::format("{}: cannot read as audio: {}", path.string(), why));
    }
    m_file = f;
    m_info.sample_rate_hz = info.samplerate;
    m_info.channels = info.channels;
    m_info.frames = info.frames > 0 ? static_cast<std::size_t>(info.frames) : 0;
    SF_FORMAT_INFO fi{};
    fi.format = info.format & SF_FORMAT_TYPEMASK;
    sf_command(nullptr, SFC_GET_FORMAT_INFO, &fi, sizeof(fi));
    SF_FORMAT_INFO si{};
    si.format = info.format & SF_FORMAT_SUBMASK;
    sf_command(nullptr, SFC_GET_FORMAT_INFO, &si, sizeof(si));
    m_info.format = fmt::format("{} / {}", fi.name ? fi.name : "?", si.name ? si.name : "?");
    // Normalise integer formats to [-1, 1) and keep float data as stored.
    sf_command(f, SFC_SET_NORM_FLOAT, nullptr, SF_TRUE);
    if (m_info.frames == 0) {
        sf_close(f);
        m_file = nullptr;
        throw audio_error(fmt::format("{}: the audio file holds no samples", path.string()));
    }
    if (!(m_info.sample_rate_hz >= 1000.0 && m_info.sample_rate_hz <= 768000.0)) {
        sf_close(f);
        m_file = nullptr;
        throw audio_error(fmt::format("{}: sample rate {} Hz: must be in [1000, 768000] Hz", path.string(),
                                      m_info.sample_rate_hz));
    }
    // A header that promises more than the file holds (an interrupted copy or download): libsndfile quietly
    // reads what is there, which would render a shortened clip as if it were whole.
    std::size_t declared = 0, present = 0;
    if (container_frames(path, declared, present)) {
        sf_close(f);
        m_file = nullptr;
        throw audio_error(fmt::format("{}: truncated: the header declares {} frames but the file holds {} ({})", path.string(),
                                      declared, present, m_info.format));
    }
}

wav_reader::~wav_reader()
{
    if (m_file != nullptr) sf_close(static_cast<SNDFILE*>(m_file));
}

std::size_t wav_reader::read(std::span<float> out)
{
    throw_if_cancelled(); // a long clip's conditioning pass reads it all before the render starts
    const auto ch = static_cast<std::size_t>(m_info.channels);
    m_interleaved.resize(out.size() * ch);
    const sf_count_t got = sf_readf_float(static_cast<SNDFILE*>(m_file), m_interleaved.data(),
                                          static_cast<sf_count_t>(out.size()));
    const auto n = static_cast<std::size_t>(std::max<sf_count_t>(got, 0));
    for (std::size_t i = 0; i < n; ++i) {
        double acc = 0.0;
        for (std::size_t c = 0; c < ch; ++c) acc += m_interleaved[i * ch + c];
        out[i] = static_cast<float>(acc / static_cast<double>(ch));
        if (!std::isfinite(out[i]))
            throw audio_error(fmt::format("{}: sample {} is not finite (NaN or Inf)", m_path.string(), m_position + i));
    }
    m_position += n;
    if (n < out.size() && m_position < m_info.frames)
        throw audio_error(fmt::format("{}: truncated: read {} of {} frames", m_path.string(), m_position, m_info.frames));
    return n;
}

void wav_reader::rewind()
{
    if (sf_seek(static_cast<SNDFILE*>(m_file), 0, SEEK_SET) < 0)
        throw audio_error(fmt::format("{}: cannot seek to the start", m_path.string()));
    m_position = 0;
}

std::vector<float> read_mono(const fs::path& path, double* rate)
{
    wav_reader r(path);
    std::vector<float> out(r.frames());
    const std::size_t n = r.read(out);
    out.resize(n);
    if (rate != nullptr) *rate = r.sample_rate_hz();
    return out;
}

namespace {
fs::path temp_beside(const fs::path& target)
{
    std::random_device rd;
    const auto tag = fmt::format("{:08x}", rd());
    return target.parent_path() / fmt::format(".{}.partial-{}", target.filename().string(), tag);
}
} // namespace

wav_writer::wav_writer(const fs::path& path, double rate, wav_format format, double full_scale_v, bool overwrite)
    : m_path(path), m_inv_full_scale(1.0 / full_scale_v), m_overwrite(overwrite)
{
    detail::require_above("output.full_scale_v", full_scale_v, 0.0, 1e6, "V");
    std::error_code ec;
    if (fs::exists(path, ec) && !overwrite)
        throw audio_error(fmt::format("{}: already exists (pass --overwrite to replace it)", path.string()));
    if (fs::is_directory(path, ec)) throw audio_error(fmt::format("{}: is a directory", path.string()));
    const fs::path dir = path.parent_path().empty() ? fs::path(".") : path.parent_path();
    if (!fs::is_directory(dir, ec)) throw audio_error(fmt::format("{}: no such directory", dir.string()));
    m_temp = temp_beside(path.parent_path().empty() ? fs::path(".") / path : path);
    SF_INFO info{};
    info.samplerate = static_cast<int>(std::lround(rate));
    info.channels = 1;
    const int sub = format == wav_format::pcm16 ? SF_FORMAT_PCM_16
                    : format == wav_format::pcm24 ? SF_FORMAT_PCM_24
                                                  : SF_FORMAT_FLOAT;
    info.format = SF_FORMAT_WAV | sub;
    SNDFILE* f = sf_open(m_temp.c_str(), SFM_WRITE, &info);
    if (f == nullptr) {
        const int err = errno;
        if (out_of_resources(err))
            throw resource_error(fmt::format("{}: cannot create: {} (a file-descriptor or memory limit was reached)", path.string(),
                                             std::strerror(err)));
        throw audio_error(fmt::format("{}: cannot write: {}", path.string(), sf_strerror(nullptr)));
    }
    m_file = f;
    const auto comment = fmt::format("galena calibrated output: full scale = {:.6g} V peak", full_scale_v);
    sf_set_string(f, SF_STR_COMMENT, comment.c_str());
    sf_set_string(f, SF_STR_SOFTWARE, "galena");
    // Clip in our own code (counted) rather than letting libsndfile wrap or clip silently.
    sf_command(f, SFC_SET_CLIPPING, nullptr, SF_TRUE);
}

wav_writer::~wav_writer()
{
    if (m_file != nullptr) {
        sf_close(static_cast<SNDFILE*>(m_file));
        std::error_code ec;
        fs::remove(m_temp, ec);
    }
}

void wav_writer::write_volts(std::span<const double> volts)
{
    m_buf.resize(volts.size());
    for (std::size_t i = 0; i < volts.size(); ++i) {
        double v = volts[i] * m_inv_full_scale;
        if (!std::isfinite(v)) throw audio_error(fmt::format("{}: refusing to write a non-finite sample", m_path.string()));
        if (v > 1.0 || v < -1.0) {
            ++m_clipped;
            v = std::clamp(v, -1.0, 1.0);
        }
        m_buf[i] = static_cast<float>(v);
    }
    const auto n = static_cast<sf_count_t>(m_buf.size());
    if (sf_writef_float(static_cast<SNDFILE*>(m_file), m_buf.data(), n) != n)
        throw audio_error(fmt::format("{}: write failed (disk full or file-size limit?): {}", m_path.string(),
                                      sf_strerror(static_cast<SNDFILE*>(m_file))));
    m_frames += m_buf.size();
}

void wav_writer::commit()
{
    auto* f = static_cast<SNDFILE*>(m_file);
    sf_write_sync(f);
    const int rc = sf_close(f);
    m_file = nullptr;
    std::error_code ec;
    if (rc != 0) {
        fs::remove(m_temp, ec);
        throw audio_error(fmt::format("{}: closing failed (disk full?): {}", m_path.string(), sf_error_number(rc)));
    }
    if (fs::exists(m_path, ec) && !m_overwrite) {
        fs::remove(m_temp, ec);
        throw audio_error(fmt::format("{}: appeared while writing; not replaced", m_path.string()));
    }
    fs::rename(m_temp, m_path, ec);
    if (ec) {
        fs::remove(m_temp, ec);
        throw audio_error(fmt::format("{}: cannot move the finished file into place: {}", m_path.string(), ec.message()));
    }
}

void write_wav(const fs::path& path, std::span<const double> volts, double rate, wav_format format, double full_scale_v,
               bool overwrite)
{
    wav_writer w(path, rate, format, full_scale_v, overwrite);
    w.write_volts(volts);
    w.commit();
}

void write_text_atomic(const fs::path& path, const std::string& text)
{
    const fs::path tmp = temp_beside(path.parent_path().empty() ? fs::path(".") / path : path);
    {
        std::ofstream out(tmp, std::ios::binary | std::ios::trunc);
        if (!out) {
            const int err = errno;
            if (out_of_resources(err))
                throw resource_error(fmt::format("{}: cannot create: {} (a file-descriptor or memory limit was reached)",
                                                 path.string(), std::strerror(err)));
            throw audio_error(fmt::format("{}: cannot write: {}", path.string(), std::strerror(err)));
        }
        out << text;
        out.flush();
        const int err = errno;
        out.close();
        if (!out) {
            std::error_code ec;
            fs::remove(tmp, ec);
            throw audio_error(fmt::format("{}: write failed (disk full or file-size limit?): {}", path.string(), std::strerror(err)));
        }
    }
    std::error_code ec;
    fs::rename(tmp, path, ec);
    if (ec) {
        fs::remove(tmp, ec);
        throw audio_error(fmt::format("{}: cannot move the finished file into place: {}", path.string(), ec.message()));
    }
}

bool same_file(const fs::path& a, const fs::path& b)
{
    std::error_code ec;
    return fs::exists(a, ec) && fs::exists(b, ec) && fs::equivalent(a, b, ec);
}

} // namespace galena
