/// The audio chain from carrier-cycle means to the audio rate, shared by the receiver (bench layout) and
/// render_receiver (whole receiver). Internal: never installed.
#pragma once

#include "galena/dsp.hpp"
#include "galena/error.hpp"

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <fmt/format.h>
#include <vector>

namespace galena::detail {

/// Stage C of the audio chain (below): pass 0.42 fs, stop 0.5 fs at 4 fs, 90 dB. One definition for the
/// chain and for its start-up time (audio_chain_warm_up_s).
inline std::vector<double> stage_c_taps() { return kaiser_lowpass(0.115, 0.02, 90.0); }

/// From carrier-cycle means to the audio rate (DEVELOPERS.md, "Audio path"):
///   A. the mean of the earpiece voltage over each carrier cycle [kT, (k+1)T] (computed by the solver):
///      a box filter of length T, with nulls at every carrier harmonic, sampled at fc and centred at (k+1/2)T;
///   B. a Kaiser-windowed sinc resampler to 4 fs (pass 0.45 fs, stop min(3.5 fs, fc - 0.5 fs), 90 dB): nothing
///      that could fold into [0, 0.5 fs] at 4 fs survives;
///   C. a 90 dB Kaiser FIR (pass 0.42 fs, stop 0.5 fs) decimating 4 fs -> fs.
/// Stage B's grid is offset by stage C's delay, so chain output n is centred exactly at simulated time n / fs.
class audio_chain {
public:
    /// @param fs audio rate, Hz; @param fc carrier (cycle-mean rate), Hz; @param warm_up_s audio_chain_warm_up_s(fs)
    audio_chain(double fs, double fc, double warm_up_s)
        : m_stage_c(stage_c_taps(), 4),
          m_stage_b(fc, 0.5 / fc, 4.0 * fs, stage_b_origin(fs, m_stage_c.size()), 0.45 * fs, std::min(3.5 * fs, fc - 0.5 * fs), 90.0),
          m_latency_s(m_stage_b.half_width_s() + 1.0 / fc + static_cast<double>(m_stage_c.size()) / (4.0 * fs)),
          // Stage C's first input is centred at stage_b_origin; its output at t reads inputs back to
          // t - (L - 1) / 2 / (4 fs), so outputs before origin + (L - 1) / 2 / (4 fs) = (L - 4) / (4 fs) still
          // hold part of the FIR's empty start-up history.
          m_warm_up_s(warm_up_s)
    {
    }
    /// Simulated time the chain needs beyond t before its output at t is complete, s.
    [[nodiscard]] double latency_s() const noexcept { return m_latency_s; }
    /// Outputs centred before this time carry the chain's start-up, s: the preroll must cover it.
    [[nodiscard]] double warm_up_s() const noexcept { return m_warm_up_s; }

    void add_cycle_mean(double mean_v, std::vector<double>& audio_out)
    {
        m_fine.clear();
        m_stage_b.push(mean_v, m_fine);
        double y = 0.0;
        for (double v : m_fine)
            if (m_stage_c.push(v, y)) audio_out.push_back(y);
    }

private:
    /// Stage C emits after inputs 3, 7, 11, ...; output m is centred on input 4m + 3 - (L - 1)/2. Placing
    /// stage B's input j at (j - 3 + (L - 1)/2) / (4 fs) centres output m at m / fs.
    static double stage_b_origin(double fs, std::size_t taps_c)
    {
        return (0.5 * static_cast<double>(taps_c - 1) - 3.0) / (4.0 * fs);
    }

    fir_decimator m_stage_c;
    sinc_resampler m_stage_b;
    double m_latency_s;
    double m_warm_up_s;
    std::vector<double> m_fine;
};

/// The chain's outputs handed to the programme, shared by the receiver and render_receiver: drops the
/// outputs before the programme starts (the preroll), stops at the programme's length, refuses a non-finite
/// value, and removes the DC with a Butterworth high-pass settled on the first delivered value (so the
/// earpiece's bias does not ring through the filter).
class programme_delivery {
public:
    programme_delivery() = default;
    /// @param skip chain outputs before the programme's first sample; @param total programme samples;
    /// @param fs audio rate, Hz; @param dc_block_hz the high-pass corner, Hz
    programme_delivery(std::size_t skip, std::size_t total, double fs, double dc_block_hz)
        : m_dc_block(biquad::butterworth_highpass(dc_block_hz, fs)), m_skip(skip), m_total(total)
    {
    }

    /// Moves the programme's share of `raw` (then cleared) to `out_e` (earpiece voltage, V) and `out_a`
    /// (the same with the DC removed, V). @param t_s simulated time at the end of `raw`, s (for the message)
    void deliver(std::vector<double>& raw, double t_s, std::vector<double>& out_e, std::vector<double>& out_a)
    {
        for (double v : raw) {
            const std::size_t n = m_produced++;
            if (n < m_skip || m_delivered >= m_total) continue;
            if (!std::isfinite(v))
                throw integration_error(fmt::format("the earpiece voltage became non-finite near t = {:.9g} s", t_s), t_s);
            if (!m_dc_settled) {
                m_dc_block.settle_to(v);
                m_dc_settled = true;
            }
            out_e.push_back(v);
            out_a.push_back(m_dc_block.process(v));
            ++m_delivered;
        }
        raw.clear();
    }

    [[nodiscard]] std::size_t delivered() const noexcept { return m_delivered; }
    [[nodiscard]] std::size_t total() const noexcept { return m_total; }
    [[nodiscard]] bool complete() const noexcept { return m_delivered >= m_total; }

private:
    biquad m_dc_block = biquad::butterworth_highpass(10.0, 48000.0);
    bool m_dc_settled = false;
    std::size_t m_skip = 0, m_total = 0, m_produced = 0, m_delivered = 0;
};

} // namespace galena::detail
