/// The audio chain from carrier-cycle means to the audio rate, shared by the receiver (bench layout) and
/// render_receiver (whole receiver). Internal: never installed.
#pragma once

#include "galena/dsp.hpp"

#include <algorithm>
#include <cstddef>
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

} // namespace galena::detail
