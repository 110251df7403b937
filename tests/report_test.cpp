// The report's data before it is drawn: the selectivity curve against closed forms of tuned circuits.
#include "galena/error.hpp"
#include "galena/front_end.hpp"
#include "galena/network.hpp"
#include "galena/report.hpp"
#include "galena/report_plots.hpp"

#include <doctest/doctest.h>

#include <algorithm>
#include <cmath>
#include <complex>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <string>
#include <vector>

using namespace galena;
namespace fs = std::filesystem;

namespace {

constexpr double two_pi = 6.283185307179586;

/// A series-resonant circuit driven by the EMF: EMF -- L -- C -- detector node -- R1 -- ground, with the
/// junction port across R1 (so a port admittance adds in parallel with R1). The voltage at the detector
/// node is the loop current times the resistance: exactly the series circuit's current response.
receiver_network series_circuit(double l_h, double f0_hz, double r1_ohm)
{
    receiver_network rn;
    const node_id top = rn.net.add_node("emf");
    const node_id mid = rn.net.add_node("l-c");
    const node_id det = rn.net.add_node("detector");
    rn.emf_input = rn.net.add_voltage_source(top, ground_node);
    (void)rn.net.add_inductor(top, mid, l_h);
    rn.net.add_capacitor(mid, det, 1.0 / (std::pow(two_pi * f0_hz, 2) * l_h));
    rn.net.add_resistor(det, ground_node, r1_ohm);
    rn.net.set_junction(det, ground_node);
    rn.detector_node = det;
    return rn;
}

/// Universal resonance curve of a single tuned circuit, dB: -10 log10(1 + x^2), x = Q (f/f0 - f0/f).
double universal_db(double q, double f0, double f)
{
    const double x = q * (f / f0 - f0 / f);
    return -10.0 * std::log10(1.0 + x * x);
}

} // namespace

TEST_CASE("selectivity of a plain tuned circuit is the universal resonance curve (Q = 100 at 1 MHz, loading included)")
{
    // Q = w0 L / R with R = R1 || R_port: 240 uH at 1 MHz is 1508 ohm of reactance, so R = 15.08 ohm for
    // Q = 100, made of 30.16 ohm in the network and 1/30.16 S put across the port as the "detector's"
    // loading (the path the pack uses for the measured detector admittance).
    const double f0 = 1e6, l = 240e-6, q = 100.0;
    const double r = two_pi * f0 * l / q;
    const receiver_network rn = series_circuit(l, f0, 2.0 * r);
    const selectivity_curve c = compute_selectivity(rn, 1.0 / (2.0 * r), f0, 20e3, 41); // 1 kHz steps
    REQUIRE(c.frequency_hz.size() == 41);
    CHECK(c.centre_hz == f0);
    CHECK(c.frequency_hz[20] == f0);
    CHECK(c.relative_db[20] == 0.0);
    // Published points of the universal resonance curve at Q = 100, 1 MHz (radio engineering handbooks'
    // universal resonance curve; the dB values derived from it, to two decimals).
    CHECK(c.frequency_hz[25] == doctest::Approx(f0 + 5e3).epsilon(1e-15));
    CHECK(std::fabs(c.relative_db[25] - -3.00) < 0.005);
    CHECK(std::fabs(c.relative_db[30] - -6.96) < 0.005);
    CHECK(std::fabs(c.relative_db[40] - -12.22) < 0.005);
    // Every point, both sides, against the closed form (the series circuit's current follows it exactly;
    // only round-off remains).
    for (std::size_t k = 0; k < c.frequency_hz.size(); ++k)
        CHECK(c.relative_db[k] == doctest::Approx(universal_db(q, f0, c.frequency_hz[k])).epsilon(1e-9));
    // Without the port's loading the loop holds 30.16 ohm and Q = 50: a broader curve, so the loading is used.
    const selectivity_curve open = compute_selectivity(rn, 0.0, f0, 20e3, 41);
    CHECK(open.relative_db[25] == doctest::Approx(universal_db(50.0, f0, f0 + 5e3)).epsilon(1e-9));
}

TEST_CASE("selectivity of two coupled identical circuits at kQ = 2: two humps 1.94 dB above the centre")
{
    // Coupled-resonator theory (reference-data handbooks for radio engineers): two identical series-tuned
    // circuits coupled by k respond as 2kQ / sqrt((1 + k^2 Q^2 - x^2)^2 + 4 x^2) relative to the maximum; at
    // kQ = 2 the humps lie at x = +-sqrt(3) and the centre is 20 log10(2kQ / (1 + k^2 Q^2)) = -1.938 dB below
    // them. The exact circuit keeps the hump height (measured 1.93820 dB on both sides) and moves the humps
    // by the f/f0 factors of w M (measured x = +1.752 and -1.713).
    const double f0 = 1e6, l = 240e-6, q = 100.0, k = 2.0 / q;
    const double r = two_pi * f0 * l / q;
    const double c_f = 1.0 / (std::pow(two_pi * f0, 2) * l);
    // EMF -- R -- C1 -- L1 -- ground, L1 coupled to L2; L2 -- C2 -- detector node -- R -- ground.
    receiver_network pair;
    const node_id p_top = pair.net.add_node("emf");
    const node_id p_r = pair.net.add_node("r1");
    const node_id p_c = pair.net.add_node("c1");
    const node_id s_c = pair.net.add_node("c2");
    const node_id s_det = pair.net.add_node("detector");
    pair.emf_input = pair.net.add_voltage_source(p_top, ground_node);
    pair.net.add_resistor(p_top, p_r, r);
    pair.net.add_capacitor(p_r, p_c, c_f);
    const int i1 = pair.net.add_inductor(p_c, ground_node, l);
    const int i2 = pair.net.add_inductor(s_c, ground_node, l);
    pair.net.add_capacitor(s_c, s_det, c_f);
    pair.net.add_resistor(s_det, ground_node, r);
    pair.net.couple(i1, i2, k);
    pair.detector_node = s_det;
    const selectivity_curve c = compute_selectivity(pair, 0.0, f0, 20e3, 20001); // 2 Hz steps
    const auto peak = std::max_element(c.relative_db.begin(), c.relative_db.end());
    CHECK(std::fabs(*peak - 1.938) < 0.001);
    // The humps at x = +-sqrt(3) (about 8.7 kHz either side), the lower one found on its own.
    const auto lower = std::max_element(c.relative_db.begin(), c.relative_db.begin() + 10000);
    CHECK(std::fabs(*lower - 1.938) < 0.001);
    for (const auto hump : {peak, lower}) {
        const double f = c.frequency_hz[static_cast<std::size_t>(hump - c.relative_db.begin())];
        CHECK(std::fabs(std::fabs(q * (f / f0 - f0 / f)) - std::sqrt(3.0)) < 0.03);
    }
}

TEST_CASE("selectivity refuses a span that does not fit and an even point count")
{
    const receiver_network rn = series_circuit(240e-6, 1e6, 30.0);
    CHECK_THROWS_WITH_AS((void)compute_selectivity(rn, 0.0, 1e6, 2e6, 41), doctest::Contains("needs 0 < span < centre"), config_error);
    CHECK_THROWS_WITH_AS((void)compute_selectivity(rn, 0.0, 1e6, 10e3, 40), doctest::Contains("points = 40: must be odd"), config_error);
}

TEST_CASE("a whole-receiver pack draws the selectivity and tradeoff plots and shows the front end's columns")
{
    // Two short renders of the demo's crystal set: loose and near-critical coupling.
    const fs::path out = fs::path(GALENA_TEST_TMP) / "receiver-pack";
    fs::remove_all(out);
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios/crystal-set.toml";
    std::vector<variant_spec> variants = {{"loose", "k = 0.01", {"tuner.coupling=0.01"}, {}},
                                          {"critical", "k = 0.028", {"tuner.coupling=0.028"}, {}}};
    pack_options po;
    po.sweep.threads = 2;
    const pack_outcome o = make_pack(base, {"signal.duration_s=0.1"}, variants, out, po);
    CHECK(o.warnings.empty());
    for (const char* stem : {"selectivity", "tradeoff"}) {
        CHECK(fs::file_size(out / "plots" / (std::string(stem) + ".svg")) > 0);
        CHECK(fs::file_size(out / "plots" / (std::string(stem) + ".png")) > 0);
    }
    // The bench detector's response and transfer curves do not describe a tuned set: left out.
    CHECK_FALSE(fs::exists(out / "plots" / "response.svg"));
    CHECK_FALSE(fs::exists(out / "plots" / "transfer.svg"));
    const std::string page = [&] {
        std::ifstream in(out / "index.html");
        return std::string(std::istreambuf_iterator<char>(in), {});
    }();
    CHECK(page.find("<th>loaded Q</th>") != std::string::npos);
    CHECK(page.find("id=\"plot-selectivity\"") != std::string::npos);
    CHECK(page.find("id=\"plot-tradeoff\"") != std::string::npos);
    // Coupled-resonator theory: coupling the antenna circuit tighter loads the tuning circuit more, so the
    // loaded Q falls and the neighbours come up relative to the wanted station.
    const auto& loose = o.sweep.variants[0].metrics;
    const auto& critical = o.sweep.variants[1].metrics;
    CHECK(loose["loaded_q"].get<double>() > 1.5 * critical["loaded_q"].get<double>());
    CHECK(loose["loudest_neighbour_db"].get<double>() < critical["loudest_neighbour_db"].get<double>() - 5.0);
    // loudest_neighbour_db is the larger of the two neighbours' levels (the definition in job.hpp), and
    // wanted_tone_v the first station's tone.
    for (const auto* m : {&loose, &critical}) {
        const auto& st = (*m)["stations"];
        REQUIRE(st.size() == 3);
        CHECK((*m)["loudest_neighbour_db"].get<double>() ==
              std::max(st[1]["level_db"].get<double>(), st[2]["level_db"].get<double>()));
        CHECK((*m)["wanted_tone_v"].get<double>() == st[0]["tone_v"].get<double>());
    }
    // Up to critical coupling the wanted station gets louder.
    CHECK(loose["wanted_tone_v"].get<double>() < critical["wanted_tone_v"].get<double>());
}

TEST_CASE("an untuned set has no resonance: no selectivity curve, and the tradeoff keeps only the neighbour panel")
{
    const fs::path out = fs::path(GALENA_TEST_TMP) / "untuned-pack";
    fs::remove_all(out);
    const fs::path base = fs::path(GALENA_SOURCE_DIR) / "scenarios/crystal-set.toml";
    pack_options po;
    po.sweep.threads = 1;
    const pack_outcome o =
        make_pack(base, {"signal.duration_s=0.1", "tuner.layout=untuned"}, {{"untuned", "", {"load.bleeder_ohm=47k"}, {}}}, out, po);
    CHECK(o.sweep.variants[0].metrics["rf_bandwidth_hz"].is_null());
    CHECK_FALSE(fs::exists(out / "plots" / "selectivity.svg"));
    REQUIRE(fs::exists(out / "plots" / "tradeoff.gp"));
    std::ifstream in(out / "plots" / "tradeoff.gp");
    const std::string gp(std::istreambuf_iterator<char>(in), {});
    CHECK(gp.find("layout 1,1") != std::string::npos);
    CHECK(gp.find("loudest neighbour") != std::string::npos);
    CHECK(gp.find("bandwidth") == std::string::npos);
}
