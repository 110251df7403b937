// render_segmented: a bench render split over two threads at a verified seam gives the serial render's
// samples and metrics. The reference is render() itself, run serially in the same test (the split is an
// implementation of the same simulation, so the serial render is the outside reference here); the bounds
// are the differences measured on these scenarios (reported in the commit), rounded up to the next power
// of ten. The open-junction time constant is checked against R C (the first-order RC decay, any circuits
// textbook).
#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/job.hpp"
#include "galena/scenario.hpp"
#include "galena/segmented_render.hpp"

#include <doctest/doctest.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <nlohmann/json.hpp>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

scenario bench(std::vector<std::string> sets)
{
    sets.push_back("signal.duration_s=0.3");
    return load_scenario(fs::path(GALENA_SOURCE_DIR) / "scenarios" / "workbench.toml", sets);
}

struct run {
    std::vector<double> e, a;
    render_result res;
};

run serial(const scenario& s)
{
    auto prog = make_programme(s);
    run r;
    r.res = render(s.circuit, s.am, *prog, s.render, [&](const audio_block& b) {
        CHECK(b.first_sample == r.e.size());
        r.e.insert(r.e.end(), b.earpiece_v.begin(), b.earpiece_v.end());
        r.a.insert(r.a.end(), b.audio_v.begin(), b.audio_v.end());
    });
    return r;
}

run split(const scenario& s, segment_report& rep, segment_options opt = {})
{
    auto prog = make_programme(s);
    opt.second_programme = [&s] { return make_programme(s); };
    opt.require_free_core = false;
    run r;
    r.res = render_segmented(s.circuit, s.am, *prog, s.render, [&](const audio_block& b) {
        CHECK(b.first_sample == r.e.size());
        r.e.insert(r.e.end(), b.earpiece_v.begin(), b.earpiece_v.end());
        r.a.insert(r.a.end(), b.audio_v.begin(), b.audio_v.end());
    }, opt, &rep);
    return r;
}

/// Largest |x - y| over the samples, V.
double max_difference(const std::vector<double>& x, const std::vector<double>& y)
{
    REQUIRE(x.size() == y.size());
    double d = 0.0;
    for (std::size_t i = 0; i < x.size(); ++i) d = std::max(d, std::fabs(x[i] - y[i]));
    return d;
}

/// Largest measured differences of a split render from the serial one over the scenarios below (0.3 s,
/// 1 MHz, 24 kHz; seam shares 0.45-0.52): earpiece voltage 2.1e-16 V, DC-removed audio 2.1e-13 V (the DC
/// block's poles near 1 at 10 Hz carry the rounding-level seam along); the bounds are those rounded up to
/// the next power of ten.
constexpr double earpiece_bound_v = 1e-15;
constexpr double audio_bound_v = 1e-12;

void compare(const scenario& s, const char* what, bool expect_split)
{
    INFO(what);
    const run ref = serial(s);
    segment_report rep;
    const run got = split(s, rep);
    INFO("why serial: " << rep.why_serial);
    CHECK(rep.split == expect_split);
    const double de = max_difference(ref.e, got.e);
    const double da = max_difference(ref.a, got.a);
    MESSAGE(what << ": tau " << rep.slowest_time_constant_s << " s, W " << rep.warm_up_s << " s, seam " << rep.seam_s << " s, state "
                 << rep.state_difference << ", means " << rep.mean_difference << "; max |de| " << de << " V, |da| " << da << " V");
    if (expect_split) {
        CHECK(de <= earpiece_bound_v);
        CHECK(da <= audio_bound_v);
    } else {
        CHECK(ref.e == got.e); // the serial path is the receiver itself
        CHECK(ref.a == got.a);
    }
    CHECK(got.res.samples == ref.res.samples);
    CHECK(got.res.simulated_s == ref.res.simulated_s);
    CHECK(got.res.steps_per_cycle == ref.res.steps_per_cycle);
    CHECK(got.res.preroll_s == ref.res.preroll_s);
    CHECK(got.res.warnings.size() == ref.res.warnings.size());
}

} // namespace

TEST_CASE("a split bench render equals the serial one: piezo with bleeder, magnetic phones, BVD piezo")
{
    compare(bench({}), "piezo, 47k bleeder", true);
    compare(bench({"load.bleeder_ohm=220k"}), "piezo, 220k bleeder", true);
    compare(bench({"earpiece.kind=magnetic"}), "magnetic, 47k bleeder", true);
    compare(bench({"earpiece.motional_inductance_h=1.4", "earpiece.motional_capacitance_f=2n", "earpiece.motional_resistance_ohm=5.3k"}),
            "piezo with BVD branch", true);
    // A clip: the second thread's own copy is prepared from the warm-up on (the conditioned clip's jump).
    const std::string clip = (fs::path(GALENA_SOURCE_DIR) / "audio-samples" / "speech-count.wav").string();
    compare(bench({"signal.audio=" + clip}), "speech clip", true);
}

TEST_CASE("no bleeder and no leakage: no decaying path, so the render stays serial")
{
    compare(bench({"load.bleeder_ohm=inf", "earpiece.leakage_ohm=inf"}), "no bleeder, no leakage", false);
    segment_report rep;
    (void)split(bench({"load.bleeder_ohm=inf", "earpiece.leakage_ohm=inf"}), rep);
    CHECK(std::isinf(rep.slowest_time_constant_s));
}

TEST_CASE("the open-junction time constant is R C, and the warm-up 40 of it")
{
    // First-order RC decay: tau = R C, with C the earpiece's 10 nF plus the 10 pF stray of the load.
    segment_report rep;
    (void)split(bench({}), rep);
    const double rc = 47e3 * (10e-9 + 10e-12);
    CHECK(std::fabs(rep.slowest_time_constant_s - rc) <= 1e-9 * rc);
    CHECK(rep.warm_up_s >= 40.0 * rc);
    CHECK(rep.warm_up_s <= 40.0 * rc + 5e-6);
}

TEST_CASE("a seam that does not match is refused, and the render stays serial")
{
    // Too short a warm-up leaves the second part off the first one's state at the seam (after 2 tau the
    // deviation is e^-2 of the start-up's): the check must see it.
    segment_options opt;
    opt.warm_up_time_constants = 2.0;
    segment_report rep;
    const scenario s = bench({});
    const run got = split(s, rep, opt);
    CHECK_FALSE(rep.split);
    CHECK(rep.state_difference > 1e-6);
    const run ref = serial(s);
    CHECK(ref.e == got.e);
    CHECK(ref.a == got.a);
}

TEST_CASE("a stop request ends both threads with cancelled_error")
{
    const scenario s = bench({});
    std::atomic<int> polls{0};
    segment_options opt;
    opt.stop_requested = [&] { return ++polls > 20; };
    segment_report rep;
    CHECK_THROWS_AS((void)split(s, rep, opt), cancelled_error);
    // And the first thread's own stop (the sink throws) ends the second thread too.
    auto prog = make_programme(s);
    opt.stop_requested = {};
    opt.second_programme = [&s] { return make_programme(s); };
    opt.require_free_core = false;
    int blocks = 0;
    CHECK_THROWS_AS((void)render_segmented(s.circuit, s.am, *prog, s.render, [&](const audio_block&) {
        if (++blocks == 3) throw cancelled_error("stopped by the test", 0);
    }, opt, &rep), cancelled_error);
}

TEST_CASE("the second thread is taken only when a core is free")
{
    const scenario s = bench({});
    std::vector<core_claim> all;
    while (auto c = core_claim::try_claim()) all.push_back(std::move(*c));
    auto prog = make_programme(s);
    segment_options opt;
    opt.second_programme = [&s] { return make_programme(s); };
    segment_report rep;
    (void)render_segmented(s.circuit, s.am, *prog, s.render, [](const audio_block&) {}, opt, &rep);
    CHECK_FALSE(rep.split);
    CHECK(rep.why_serial == "no free core");
    all.clear();
    CHECK(core_claim::held() == 0);
}

TEST_CASE("a job with a second core writes the serial job's WAV and metrics")
{
    const fs::path root = fs::path(GALENA_TEST_TMP) / "segmented_render";
    fs::remove_all(root);
    for (const char* name : {"serial", "split"}) fs::create_directories(root / name);
    const scenario s = bench({});
    job_options one;
    const job_outcome a = render_job_into(s, root / "serial", one);
    job_options two;
    two.use_second_core = true;
    const job_outcome b = render_job_into(s, root / "split", two);
    const std::vector<float> xa = read_mono(a.wav), xb = read_mono(b.wav);
    REQUIRE(xa.size() == xb.size());
    std::size_t differ = 0;
    for (std::size_t i = 0; i < xa.size(); ++i) differ += xa[i] != xb[i] ? 1 : 0;
    CHECK(differ == 0); // 16-bit samples: rounding-level volts never move a code here
    for (const auto& [key, value] : a.metrics.items()) {
        INFO(key);
        REQUIRE(b.metrics.contains(key));
        if (value.is_number_float() && b.metrics[key].is_number_float()) {
            const double x = value.get<double>(), y = b.metrics[key].get<double>();
            CHECK(std::fabs(x - y) <= 1e-12 * std::max(std::fabs(x), 1e-300));
        } else {
            CHECK(value == b.metrics[key]);
        }
    }
    fs::remove_all(root);
}
