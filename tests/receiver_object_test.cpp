// The receiver object (create / process(block) / reset) and its own cancel token: the block size does not
// change a sample, reset replays the render, and two receivers on two threads are independent (cancelling
// one leaves the other identical to a solo render, and the process-wide cancel flag untouched).
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/receiver.hpp"

#include <doctest/doctest.h>

#include <atomic>
#include <cmath>
#include <exception>
#include <thread>
#include <vector>

using namespace galena;

namespace {

/// The benchmark-like circuit (germanium-like diode with junction charge, R C load, piezo earpiece).
circuit_params detector()
{
    circuit_params c;
    c.source.resistance_ohm = 20e3;
    c.load.bleeder_ohm = 68e3;
    c.load.filter_capacitance_f = 1e-9;
    c.earpiece.kind = earpiece_kind::piezo;
    c.earpiece.capacitance_f = 10e-9;
    return c;
}

am_params carrier()
{
    am_params am;
    am.carrier_hz = 200e3;
    am.carrier_peak_v = 0.5;
    am.modulation_index = 0.5;
    return am;
}

struct samples {
    std::vector<double> earpiece_v, audio_v;
    std::vector<std::size_t> firsts;
};

/// Runs a receiver to the end in blocks of `block` samples.
samples drain(receiver& r, std::size_t block)
{
    samples out;
    for (audio_block b = r.process(block); !b.earpiece_v.empty(); b = r.process(block)) {
        out.firsts.push_back(b.first_sample);
        CHECK(b.first_sample == out.earpiece_v.size()); // contiguous, programme-aligned
        out.earpiece_v.insert(out.earpiece_v.end(), b.earpiece_v.begin(), b.earpiece_v.end());
        out.audio_v.insert(out.audio_v.end(), b.audio_v.begin(), b.audio_v.end());
    }
    return out;
}

} // namespace

TEST_CASE("render() and the receiver in any block size give the same samples, bit for bit")
{
    for (solver_method method : {solver_method::phase_locked, solver_method::adaptive}) {
        INFO(to_string(method));
        render_settings rs;
        rs.method = method;
        tone_modulation t1({1000.0}, {1.0}, 0.03);
        const rendered_audio ref = render_to_memory(detector(), carrier(), t1, rs);
        REQUIRE(ref.earpiece_v.size() == 1440);
        for (std::size_t block : {std::size_t{1}, std::size_t{97}, std::size_t{480}, std::size_t{100000}}) {
            tone_modulation t2({1000.0}, {1.0}, 0.03);
            receiver r(detector(), carrier(), t2, rs);
            CHECK(r.total_samples() == 1440);
            const samples s = drain(r, block);
            CHECK(r.finished());
            CHECK(s.earpiece_v == ref.earpiece_v);
            CHECK(s.audio_v == ref.audio_v);
            const render_result res = r.result();
            CHECK(res.samples == 1440);
            CHECK(res.simulated_s == ref.result.simulated_s);
            CHECK(res.steps_per_cycle == ref.result.steps_per_cycle);
            CHECK(res.warnings == ref.result.warnings);
        }
    }
}

TEST_CASE("reset replays the render; a cancelled receiver can be reset and run again")
{
    tone_modulation t1({1000.0}, {1.0}, 0.02);
    receiver solo_r(detector(), carrier(), t1, render_settings{});
    const samples solo = drain(solo_r, 256);
    tone_modulation t2({1000.0}, {1.0}, 0.02);
    receiver r(detector(), carrier(), t2, render_settings{});
    (void)r.process(300);
    r.cancel().request();
    CHECK_THROWS_AS((void)r.process(300), cancelled_error);
    CHECK_FALSE(cancel_requested()); // the token is not the process-wide flag
    r.reset();
    CHECK_FALSE(r.cancel().requested());
    const samples again = drain(r, 256);
    CHECK(again.earpiece_v == solo.earpiece_v);
    CHECK(again.audio_v == solo.audio_v);
    // A fresh programme object through reset(modulation&).
    tone_modulation t3({1000.0}, {1.0}, 0.02);
    r.reset(t3);
    CHECK(drain(r, 1000).earpiece_v == solo.earpiece_v);
}

TEST_CASE("two receivers on two threads: cancelling one leaves the other identical to a solo render")
{
    const double duration_s = 0.1;
    tone_modulation ts({1000.0}, {1.0}, duration_s);
    receiver solo_r(detector(), carrier(), ts, render_settings{});
    const samples solo = drain(solo_r, 480);
    REQUIRE(solo.earpiece_v.size() == 4800);

    tone_modulation ta({1000.0}, {1.0}, duration_s);
    tone_modulation tb({1000.0}, {1.0}, duration_s);
    am_params am_b = carrier();
    am_b.carrier_peak_v = 0.8; // a different scene on the other thread
    receiver a(detector(), carrier(), ta, render_settings{});
    receiver b(detector(), am_b, tb, render_settings{});
    // b pauses inside its progress callback once a fifth is rendered, until the cancel has been requested
    // from a third thread: the cancel lands mid-render whatever the scheduling.
    std::atomic<bool> b_reached{false};
    b.set_progress([&](double f) {
        if (f < 0.2 || b_reached.load()) return;
        b_reached.store(true);
        while (!b.cancel().requested()) std::this_thread::yield();
    });
    samples a_out;
    std::exception_ptr a_error, b_error;
    bool b_cancelled = false;
    std::size_t b_samples = 0;
    std::thread tha([&] {
        try {
            a_out = drain(a, 480);
        } catch (...) {
            a_error = std::current_exception();
        }
    });
    std::thread thb([&] {
        try {
            for (audio_block blk = b.process(480); !blk.earpiece_v.empty(); blk = b.process(480)) b_samples += blk.earpiece_v.size();
        } catch (const cancelled_error& e) {
            b_cancelled = true;
            CHECK(e.signal_number() == 0);
        } catch (...) {
            b_error = std::current_exception();
        }
    });
    while (!b_reached.load()) std::this_thread::yield();
    b.cancel().request();
    tha.join();
    thb.join();
    REQUIRE_FALSE(a_error);
    REQUIRE_FALSE(b_error);
    CHECK(b_cancelled);
    CHECK(b_samples < 4800);
    CHECK_FALSE(b.finished());
    CHECK_FALSE(a.cancel().requested());
    CHECK_FALSE(cancel_requested());
    CHECK(a.finished());
    CHECK(a_out.earpiece_v == solo.earpiece_v);
    CHECK(a_out.audio_v == solo.audio_v);
}
