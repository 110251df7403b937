// The whole-receiver circuits written as ngspice netlists from their element values, the way the front end
// documents them (front_end.hpp): shared by tests/receiver_reference_test.cpp, tests/dial_spice_test.cpp,
// benchmarks/bench_receiver.cpp and benchmarks/bench_dial.cpp.
#pragma once

#include "galena/front_end.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

namespace galena_test {
using namespace galena;
namespace fs = std::filesystem;
// Independent constants: the test does not take them from galena/constants.hpp.
constexpr double k_pi = 3.14159265358979323846;
constexpr double k_tap = 0.99;       // section coupling the front end documents (front_end.hpp)
constexpr double k_tap_stray = 1e-12; // tap stray capacitance it documents, F
// SI defining constants (CODATA 2018, exact): the thermal voltage kT/q at the diode's temperature.
constexpr double k_boltzmann = 1.380649e-23;   // J/K
constexpr double k_charge = 1.602176634e-19;    // C

inline std::string num(double v) { return fmt::format("{:.17g}", v); }

struct station_case {
    double carrier_hz, emf_peak_v, m, tone_hz;
};

/// A tuning capacitor turned at a constant rate: C(t) = c0_f + rate_f_per_s (t - start_s) over [start_s, end_s],
/// held at its end values outside. Written with its charge q as the state: a linear capacitor of c0_f holds
/// q (its voltage is q / c0_f), the current into the tuning capacitor charges it, and the tuning node is held
/// at v = q / C(t) by a behavioural voltage source: i = dq/dt = d(C v)/dt (charge conservation), integrated by
/// ngspice's own method like every other capacitor (its ddt() is a first-order difference, too coarse
/// here). charge_form = false writes the wrong C dv/dt form instead (v integrated from i / C(t)), for
/// comparison. The coil's loss follows the capacitor the way the front end documents it (the series loss
/// w0 L / Q at the bare coil's w0 = 1 / sqrt(L C), so R(t) = sqrt(L / C(t)) / Q): each loss resistor is then a
/// behavioural current I = v / R(t).
struct tuning_ramp {
    double start_s = 0.0, end_s = 0.0;
    double c0_f = 0.0;
    double rate_f_per_s = 0.0;
    bool charge_form = true;
};

/// Antenna: EMF -- C -- R -- terminal (no series L); the detector as D with RS = 0 after an explicit Rs.
struct receiver_case {
    std::string name;
    /// (steps per cycle, bound on the waveform relRMS) pairs to check; the bounds are the measured figures
    /// rounded up, so a regression shows.
    std::vector<std::pair<int, double>> checks;
    circuit_params circuit;
    antenna_params antenna;
    tuner_params tuner;
    std::vector<station_case> stations;
    /// Each station's EMF as am_source writes it: the carrier ramped up from 0 with a raised cosine over
    /// carrier_ramp_s, the tone starting at programme_start_s (0 before). Both 0: the plain tone from t = 0.
    double carrier_ramp_s = 0.0;
    double programme_start_s = 0.0;
    /// The tuning capacitor moving (tuned layouts; tuner.capacitance_f must then be ramp->c0_f).
    std::optional<tuning_ramp> ramp;
};

/// The netlist, written from the element values the way the front end documents them.
inline std::string netlist(const receiver_case& rc, double t_end, double max_step, const fs::path& out)
{
    std::ostringstream s;
    s << "* galena whole-receiver reference: " << rc.name << "\n";
    s << "B1 e 0 V = 0";
    const bool plain = rc.carrier_ramp_s == 0.0 && rc.programme_start_s == 0.0;
    for (const auto& st : rc.stations) {
        if (plain) {
            s << " + " << num(st.emf_peak_v) << "*(1+" << num(st.m) << "*sin(" << num(2 * k_pi * st.tone_hz) << "*time))*cos("
              << num(2 * k_pi * st.carrier_hz) << "*time)";
            continue;
        }
        const std::string ramp = rc.carrier_ramp_s > 0.0 ? fmt::format("0.5*(1-cos({}*min(time,{})))", num(k_pi / rc.carrier_ramp_s), num(rc.carrier_ramp_s))
                                                         : std::string("1");
        const std::string tp = num(rc.programme_start_s);
        s << " + " << num(st.emf_peak_v) << "*" << ramp << "*(1+" << num(st.m) << "*u(time-" << tp << ")*sin(" << num(2 * k_pi * st.tone_hz)
          << "*(time-" << tp << ")))*cos(" << num(2 * k_pi * st.carrier_hz) << "*time)";
    }
    s << "\n";
    const auto& a = rc.antenna;
    const auto& t = rc.tuner;
    // Antenna: EMF -- C -- R -- terminal (no series L in these cases).
    s << "Ca e am " << num(a.capacitance_f) << "\nRa am ant " << num(a.resistance_ohm) << "\n";
    std::string det = "ant";
    if (t.layout == tuner_layout::untuned) {
        s << "Rdc ant 0 " << num(t.dc_return_ohm) << "\n";
    } else {
        // The tuning capacitor as the front end solved it for the loaded tank (an element value of the circuit
        // under comparison, not an expected result); the losses at the tuned frequency, as documented.
        const double c_tune = build_receiver_network(rc.circuit, rc.antenna, rc.tuner).tuning_capacitance_f;
        // The losses at the design frequency the front end documents: the bare coil's 1 / (2 pi sqrt(L C)) with
        // a given capacitor, else tuned_hz.
        const double f_loss = t.capacitance_f > 0.0 ? 1.0 / (2.0 * k_pi * std::sqrt(t.coil_h * t.capacitance_f)) : t.tuned_hz;
        const double loss = 2.0 * k_pi * f_loss * t.coil_h / t.coil_q;
        // A moving capacitor: C(t), and the loss resistors' factor sqrt(C(t) / c0) (R(t) = R(c0) sqrt(c0 / C(t))).
        // Node cr holds C(t) / c0 and node sr its square root (each written once: a B-source's expression is
        // evaluated at every iteration).
        if (rc.ramp) {
            const auto& r = *rc.ramp;
            s << "Bcr cr 0 V = 1+" << num(r.rate_f_per_s / r.c0_f) << "*(uramp(time-" << num(r.start_s) << ")-uramp(time-" << num(r.end_s)
              << "))\nBsr sr 0 V = sqrt(v(cr))\n";
        }
        auto resistor = [&](const std::string& name, const std::string& a, const std::string& b, double ohm) {
            if (rc.ramp)
                s << "B" << name << " " << a << " " << b << " I = v(" << a << "," << b << ")*v(sr)/" << num(ohm) << "\n";
            else
                s << name << " " << a << " " << b << " " << num(ohm) << "\n";
        };
        std::vector<double> fr{0.0, t.detector_tap, 1.0};
        if (t.layout == tuner_layout::single_coil) fr.push_back(t.antenna_tap);
        std::sort(fr.begin(), fr.end());
        fr.erase(std::unique(fr.begin(), fr.end()), fr.end());
        auto node = [&](double f) {
            if (f == 0.0) return std::string("0");
            return f == 1.0 ? std::string("top") : fmt::format("tap{}", static_cast<int>(std::lround(f * 1000)));
        };
        const std::size_t ns = fr.size() - 1;
        std::vector<double> n(ns);
        double sq = 0.0, cross = 0.0;
        for (std::size_t i = 0; i < ns; ++i) n[i] = fr[i + 1] - fr[i];
        for (std::size_t i = 0; i < ns; ++i) {
            sq += n[i] * n[i];
            for (std::size_t j = i + 1; j < ns; ++j) cross += n[i] * n[j];
        }
        const double sc = t.coil_h / (sq + 2.0 * k_tap * cross);
        for (std::size_t i = 0; i < ns; ++i) {
            double link = n[i] * n[i];
            for (std::size_t j = 0; j < ns; ++j)
                if (j != i) link += k_tap * n[i] * n[j];
            s << "L" << i << " " << node(fr[i + 1]) << " x" << i << " " << num(sc * n[i] * n[i]) << "\n";
            resistor(fmt::format("R{}", i), fmt::format("x{}", i), node(fr[i]), loss * sc * link / t.coil_h);
            if (fr[i] > 0.0) s << "Cs" << i << " " << node(fr[i]) << " 0 " << num(k_tap_stray) << "\n";
        }
        for (std::size_t i = 0; i < ns; ++i)
            for (std::size_t j = i + 1; j < ns; ++j) s << "K" << i << "_" << j << " L" << i << " L" << j << " " << num(k_tap) << "\n";
        if (!rc.ramp) {
            s << "Ct top 0 " << num(c_tune) << "\n";
        } else {
            // i(Vct) flows into the tuning capacitor; node q holds v(q) = charge / c0 (charge form) or v (C dv/dt).
            const std::string c0 = num(rc.ramp->c0_f);
            s << "Vct top ct 0\nCq q 0 " << c0 << "\n";
            if (rc.ramp->charge_form)
                s << "Bct ct 0 V = v(q)/v(cr)\nFq 0 q Vct 1\n";
            else
                s << "Ect ct 0 q 0 1\nBq 0 q I = i(Vct)/v(cr)\n";
        }
        if (t.layout == tuner_layout::single_coil) {
            s << "Rant_tap ant " << node(t.antenna_tap) << " 1e-6\n";
        } else {
            const double la_loss = 2.0 * k_pi * f_loss * t.antenna_coil_h / t.antenna_coil_q;
            s << "La ant xa " << num(t.antenna_coil_h) << "\n";
            resistor("Rla", "xa", "0", la_loss);
            for (std::size_t i = 0; i < ns; ++i) s << "Ka_" << i << " La L" << i << " " << num(t.coupling) << "\n";
        }
        det = node(t.detector_tap);
    }
    const diode_params& d = rc.circuit.diode;
    // The junction current is written as the Shockley law I = Is (exp(v / n Vt) - 1) in a behavioural source, and
    // the D element (with a vanishing Is) keeps only the SPICE depletion charge. ngspice's own diode current
    // replaces the exponential below -3 n Vt by the SPICE2 cubic -Is (1 + (3 n Vt / (e v))^3), up to 0.4 % off
    // the Shockley law there (measured with a DC sweep of ngspice-39); with Is = 2 uA comparable to the
    // detector's 1.6 uA load current that raised ngspice's detected DC by 0.15 % in the coupled set, a
    // difference of model, not of accuracy.
    const double nvt = d.emission_coefficient * k_boltzmann * (d.temperature_c + 273.15) / k_charge;
    s << "Rs " << det << " j " << num(d.series_resistance_ohm) << "\nD1 j b dmod\n";
    s << "Bd j b I = " << num(d.saturation_current_a) << "*(exp(v(j,b)/" << num(nvt) << ")-1)\n";
    s << "Cb b 0 " << num(rc.circuit.load.filter_capacitance_f + rc.circuit.load.stray_capacitance_f + rc.circuit.earpiece.capacitance_f) << "\n";
    s << "Rb b 0 " << num(rc.circuit.load.bleeder_ohm) << "\n";
    s << ".model dmod D(IS=1e-30 N=" << num(d.emission_coefficient) << " RS=0 CJO="
      << num(d.junction_capacitance_f) << " VJ=" << num(d.junction_potential_v) << " M=" << num(d.grading_coefficient) << " FC=0.5)\n";
    s << ".options reltol=1e-6 abstol=1e-15 vntol=1e-9 gmin=1e-18 temp=25 tnom=25\n";
    s << ".tran " << num(max_step) << " " << num(t_end) << " 0 " << num(max_step) << " uic\n";
    s << ".control\nset wr_singlescale\nset numdgt=15\nrun\nwrdata " << out.string() << " v(b)\nquit 0\n.endc\n.end\n";
    return s.str();
}

/// Runs ngspice in batch mode; returns an empty string on success, else what went wrong.
inline std::string run_ngspice(const fs::path& dir, const std::string& net, std::vector<double>& t, std::vector<double>& v, double t_end)
{
    const fs::path cir = dir / "circuit.cir", log = dir / "ngspice.log", out = dir / "out.txt";
    fs::remove(out);
    std::ofstream(cir) << net;
    if (std::system("command -v ngspice > /dev/null 2>&1") != 0)
        return "ngspice not found on PATH: this needs the Debian package ngspice (CI installs it)";
    const int rc = std::system(fmt::format("ngspice -b '{}' > '{}' 2>&1", cir.string(), log.string()).c_str());
    std::ifstream in(out);
    double a = 0.0, b = 0.0;
    while (in >> a >> b) t.push_back(a), v.push_back(b);
    if (rc != 0 || t.size() < 100 || t.back() < t_end * (1.0 - 1e-9))
        return fmt::format("ngspice failed or did not finish (rc {}); see {}", rc, log.string());
    return {};
}

} // namespace galena_test
