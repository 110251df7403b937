// Warnings that are true: clipping reported as observed when observed; the diagonal formula's limit as
// information, with the frequency it applies to, when the render measures clean.
#include "galena/detector_analysis.hpp"
#include "galena/warning.hpp"

#include <doctest/doctest.h>
#include <cmath>
#include <string>

using namespace galena;

namespace {
/// A diagnosis as diagnose_clipping fills it for an R C load: m = 0.3 against the diagonal limit at 5 kHz.
/// The limit is the textbook 1/sqrt(1+(wm R C)^2) (Haykin, Communication Systems): R = 47 kohm, C = 10 nF,
/// wm = 2 pi 5 kHz give wm R C = 14.77 and m_max = 0.0676.
clipping_diagnosis at_5khz()
{
    clipping_diagnosis d;
    d.tone_hz = 5000.0;
    d.modulation_index = 0.3;
    d.dc_load_ohm = 47e3;
    d.node_capacitance_f = 10e-9;
    const double wrc = 2.0 * 3.14159265358979323846 * 5000.0 * 47e3 * 10e-9;
    d.diagonal_m_max = 1.0 / std::sqrt(1.0 + wrc * wrc);
    d.exceeds_diagonal = d.modulation_index > d.diagonal_m_max;
    return d;
}
} // namespace

TEST_CASE("a render that measures clean: no clipping warning, the formula's limit as information with its frequency")
{
    auto d = at_5khz();
    REQUIRE(d.exceeds_diagonal);
    d.observation_available = true;
    d.free_discharge_fraction = 0.004;
    d.observed_failure_to_follow = false;
    CHECK(clipping_warnings(d).empty());
    const auto notes = clipping_notes(d);
    REQUIRE(notes.size() == 1);
    CHECK(notes[0].rfind("information:", 0) == 0);
    CHECK(notes[0].find("0.0676") != std::string::npos);
    CHECK(notes[0].find("5000 Hz") != std::string::npos);
    CHECK(diagonal_clipping_status(d) == "not observed");
}

TEST_CASE("clipping observed: one warning that says observed, with the formula's limit and frequency as context")
{
    auto d = at_5khz();
    d.observation_available = true;
    d.free_discharge_fraction = 0.12;
    d.observed_failure_to_follow = true;
    const auto w = clipping_warnings(d);
    REQUIRE(w.size() == 1);
    CHECK(w[0].code == warning_code::failure_to_follow);
    CHECK(w[0].message.find("diagonal clipping observed") != std::string::npos);
    CHECK(w[0].message.find("12.0 %") != std::string::npos);
    CHECK(w[0].message.find("5000 Hz") != std::string::npos);
    CHECK(clipping_notes(d).empty());
    CHECK(diagonal_clipping_status(d) == "observed");
}

TEST_CASE("no waveform check for this load: the formula warns, marked as predicted and not checked")
{
    auto d = at_5khz();
    d.observation_available = false;
    const auto w = clipping_warnings(d);
    REQUIRE(w.size() == 1);
    CHECK(w[0].code == warning_code::diagonal_clipping);
    CHECK(w[0].message.find("predicted, not checked") != std::string::npos);
    CHECK(diagonal_clipping_status(d) == "predicted, not checked");
    // Below the limit nothing at all.
    d.modulation_index = 0.05;
    d.exceeds_diagonal = false;
    CHECK(clipping_warnings(d).empty());
    CHECK(clipping_notes(d).empty());
}
