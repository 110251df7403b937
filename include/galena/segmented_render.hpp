/// One bench-layout render on two cores (issue 17's latency): the programme's carrier cycles are split at a
/// seam; the calling thread simulates the first part exactly as render() does, and a second thread
/// simulates the rest, starting a warm-up W before the seam from the state render() starts from at t = 0
/// (zero). The cycle means of the second part then go through the calling thread's one audio chain and DC
/// block, so only the solver runs twice over the warm-up and the audio path is the serial one.
///
/// Why it matches. Any two solutions of the detector differ by a deviation that decays with the network's
/// modes, whose rates lie between those with the junction open and shorted (the source through R): W is
/// `warm_up_time_constants` of the slower of the two slowest time constants, tau, so the second part's
/// state at the seam equals the first's to rounding (an estimate for a time-varying conductance). The seam is verified, not assumed: both
/// threads hold the state at the seam cycle (the network states, the junction voltages of its last cycle)
/// and the cycle means over the overlap's last quarter (at most a chunk); beyond `seam_tolerance` the second thread is dropped
/// and the first simply continues (the serial render). There is no split either for the adaptive method,
/// an infinite or long tau (no bleeder, no leakage: charge dams up), a programme too short, or when no
/// core is free (core_claim).
#pragma once

#include "galena/render.hpp"

#include <functional>
#include <memory>
#include <optional>
#include <string>

namespace galena {

/// A process-wide count of the cores render threads hold, so a render takes a second thread only when a
/// core is free (hardware_concurrency()). A claim lasts as long as the object.
class core_claim {
public:
    /// Claims one core for the calling thread, free or not (a thread that renders holds its core); marks the
    /// thread as holding one while the object lives.
    core_claim();
    /// One core only when fewer than hardware_concurrency() are held now (for a helper thread).
    [[nodiscard]] static std::optional<core_claim> try_claim();
    /// One core for a helper thread, free or not (tests).
    [[nodiscard]] static core_claim for_helper() noexcept;
    /// True while the calling thread holds a claim made by the default constructor.
    [[nodiscard]] static bool this_thread_holds() noexcept;
    /// Cores held now, process-wide.
    [[nodiscard]] static unsigned held() noexcept;
    ~core_claim();
    core_claim(core_claim&& o) noexcept;
    core_claim& operator=(core_claim&&) = delete;
    core_claim(const core_claim&) = delete;
    core_claim& operator=(const core_claim&) = delete;

private:
    struct helper_tag {};
    explicit core_claim(helper_tag) noexcept;
    bool m_held = false;
    bool m_marks_thread = false;
};

/// How render_segmented may split a render.
struct segment_options {
    /// Makes an independent copy of the programme for the second thread (it is prepared from the seam's
    /// warm-up on); empty: never split.
    std::function<std::unique_ptr<modulation>()> second_programme;
    /// Polled by the second thread between chunks; true stops it (the first thread's sink stops the render).
    std::function<bool()> stop_requested;
    /// Warm-up before the seam in slowest open-junction time constants; e^-40 = 4e-18.
    double warm_up_time_constants = 40.0;
    /// Largest relative difference accepted at the seam: each network state and junction voltage against
    /// its own size, the cycle means against the carrier crest (measured on bench scenarios: at most 2.2e-14
    /// and 4e-16; segmented_render_test).
    double seam_tolerance = 1e-12;
    /// The seam sits at this share of (carrier cycles + warm-up cycles), rounded to a chunk: the second
    /// thread also simulates the warm-up, the first also runs the audio chain (its polyphase resampler and
    /// FIR), so the first takes a little less. Measured on the 3 s bench render (bench_workbench, idle): at
    /// 0.45 the calling thread spends 0.69 of 1.34 CPU s, API median 0.76 s; 0.48 gave 0.73 s, within noise.
    double first_share = 0.45;
    /// Take the second thread only when core_claim finds a core free (false: always, for tests).
    bool require_free_core = true;
    /// The warm-up may be at most this share of the render's cycles (else no split: it would gain little).
    double max_warm_up_share = 0.5;
};

/// What render_segmented did.
struct segment_report {
    bool split = false;                  ///< the second thread's part was used
    std::string why_serial;              ///< when not split: the reason
    double slowest_time_constant_s = 0.0; ///< tau, junction open or shorted, s (inf without a DC path)
    double warm_up_s = 0.0;              ///< W, s
    double seam_s = 0.0;                 ///< simulated time of the seam (a chunk boundary), s
    double state_difference = 0.0;       ///< largest relative state / junction-voltage difference at the seam
    double mean_difference = 0.0;        ///< largest cycle-mean difference over the overlap's last quarter / carrier crest
};

/// render() (same arguments, same samples up to the seam's verified rounding-level difference, same result
/// fields; the work counters include the warm-up), split over two threads as described above.
/// Throws what render() throws; cancelled_error when stop_requested() stopped the second thread first.
render_result render_segmented(const circuit_params& circuit, am_params am, modulation& programme, const render_settings& settings,
                               const audio_sink& sink, const segment_options& options, segment_report* report = nullptr);

} // namespace galena
