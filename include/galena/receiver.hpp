/// The receiver object: one bench-layout scenario (source, detector, load, earpiece) rendered in blocks,
/// with its own cancel token and progress callback, so that several can run at once and one can stop.
///
/// Lifecycle (create / process(block) / reset): the constructor validates everything and chooses the
/// step count; process(n) simulates whole chunks of carrier cycles until audio is ready and hands out at
/// most n programme-aligned samples; reset() starts again at t = 0. render() (render.hpp) is this object
/// run to the end into a sink, so both give the same samples.
#pragma once

#include "galena/cancel.hpp"
#include "galena/render.hpp"

#include <cstddef>
#include <functional>
#include <memory>

namespace galena {

class receiver {
public:
    /// Validates the settings and the circuit, builds the solver (for the phase-locked method with
    /// steps_per_cycle = 0 this chooses N: 10-30 ms) and stands at t = 0.
    /// @param am carrier and modulation; its preroll/ramp fields are set here from `settings`
    /// @param programme the modulation x(t); must outlive the receiver (non-owning)
    /// Throws config_error (bad settings; see render()).
    receiver(const circuit_params& circuit, const am_params& am, modulation& programme, const render_settings& settings);
    ~receiver();
    receiver(const receiver&) = delete;
    receiver& operator=(const receiver&) = delete;
    receiver(receiver&&) noexcept;
    receiver& operator=(receiver&&) noexcept;

    /// Renders the next block: simulates chunks (settings.chunk_s of simulated time each) until at least
    /// one programme sample is ready, then returns up to `max_samples` of the ready ones (the rest wait for
    /// the next call; with max_samples = SIZE_MAX a call returns exactly one chunk's audio). The block's
    /// spans stay valid until the next call. An empty block means the programme is complete.
    /// Polls the cancel token before each chunk and calls the progress callback after each block.
    /// Throws cancelled_error (token requested; the receiver stays where it stopped), integration_error.
    [[nodiscard]] audio_block process(std::size_t max_samples);

    /// Starts again at t = 0 with the same circuit, settings and step count (no new choice): states,
    /// filters, counters and warnings of the run are cleared; the cancel token is reset. The programme
    /// must replay from its start (tones, sweeps, stepped tones do; a streamed clip does not: use the
    /// overload with a fresh one).
    void reset();
    /// As reset(), with a new programme (non-owning; must outlive the receiver).
    void reset(modulation& programme);

    /// This receiver's cancel token: any thread may request() it; only this receiver stops.
    [[nodiscard]] cancel_token& cancel() noexcept;
    /// Called after each block with the fraction of programme samples delivered, 0..1 (optional).
    void set_progress(std::function<void(double fraction)> progress);

    /// True when every programme sample has been handed out.
    [[nodiscard]] bool finished() const noexcept;
    /// Programme samples that the whole render delivers, at the audio rate.
    [[nodiscard]] std::size_t total_samples() const noexcept;
    /// The render so far (once finished: the whole render's summary; a `samples-missing` warning when fewer
    /// samples came out than the programme holds). wall_s counts the time spent in this object.
    [[nodiscard]] render_result result() const;

private:
    struct impl;
    std::unique_ptr<impl> m_impl;
};

} // namespace galena
