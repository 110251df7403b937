#include "galena/front_end.hpp"

#include "galena/constants.hpp"
#include "galena/error.hpp"
#include "galena/validate.hpp"

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <limits>

namespace galena {

using detail::require_above;
using detail::require_range;

namespace {
constexpr double inf = std::numeric_limits<double>::infinity();
/// The dummy antenna of the classic receiver-test standard (from memory): 200 pF in series with 20 uH,
/// and 400 ohm in series with 400 pF across the 20 uH.
constexpr double dummy_series_c_f = 200e-12;
constexpr double dummy_l_h = 20e-6;
constexpr double dummy_shunt_r_ohm = 400.0;
constexpr double dummy_shunt_c_f = 400e-12;
} // namespace

const antenna_params& antenna_params::validate() const
{
    if (!preset.empty() && preset != "standard-dummy")
        throw config_error(fmt::format("antenna.preset = \"{}\": must be standard-dummy (or leave it out and give the fields)", preset));
    require_above("antenna.effective_height_m", effective_height_m, 0.0, 1000.0, "m");
    if (preset.empty()) {
        require_above("antenna.capacitance_f", capacitance_f, 0.0, 1e-6, "F");
        require_range("antenna.inductance_h", inductance_h, 0.0, 1e-2, "H");
        require_above("antenna.resistance_ohm", resistance_ohm, 0.0, 1e6, "ohm");
    }
    return *this;
}

antenna_params resolved(const antenna_params& a)
{
    antenna_params r = a;
    if (a.preset == "standard-dummy") {
        r.capacitance_f = dummy_series_c_f;
        r.inductance_h = dummy_l_h;
        r.resistance_ohm = dummy_shunt_r_ohm;
    }
    return r;
}

std::string_view to_string(tuner_layout l) noexcept
{
    switch (l) {
    case tuner_layout::untuned: return "untuned";
    case tuner_layout::single_coil: return "single-coil";
    case tuner_layout::coupled: return "coupled";
    case tuner_layout::bench: break;
    }
    return "bench";
}

tuner_layout parse_tuner_layout(std::string_view s)
{
    if (s == "bench") return tuner_layout::bench;
    if (s == "untuned") return tuner_layout::untuned;
    if (s == "single-coil") return tuner_layout::single_coil;
    if (s == "coupled") return tuner_layout::coupled;
    throw config_error(fmt::format("tuner.layout = \"{}\": must be one of untuned, single-coil, coupled, bench", s));
}

const tuner_params& tuner_params::validate() const
{
    require_above("tuner.coil_h", coil_h, 0.0, 0.1, "H");
    require_range("tuner.coil_q", coil_q, 1.0, 1e5);
    require_range("tuner.capacitance_f", capacitance_f, 0.0, 1e-6, "F");
    if (capacitance_f == 0.0) require_range("tuner.tuned_hz", tuned_hz, 1e4, 1e8, "Hz");
    require_above("tuner.detector_tap", detector_tap, 0.0, 1.0);
    require_above("tuner.antenna_tap", antenna_tap, 0.0, 1.0);
    require_above("tuner.antenna_coil_h", antenna_coil_h, 0.0, 0.1, "H");
    require_range("tuner.antenna_coil_q", antenna_coil_q, 1.0, 1e5);
    require_above("tuner.coupling", coupling, 0.0, 0.9);
    require_above("tuner.dc_return_ohm", dc_return_ohm, 0.0, 1e12, "ohm");
    return *this;
}

double tuner_params::tuning_capacitance_f() const noexcept
{
    if (capacitance_f > 0.0) return capacitance_f;
    const double w = two_pi * tuned_hz;
    return 1.0 / (w * w * coil_h);
}

double tuner_params::design_hz() const noexcept
{
    return capacitance_f > 0.0 ? 1.0 / (two_pi * std::sqrt(coil_h * capacitance_f)) : tuned_hz;
}

void stamp_load(network& net, node_id out, const load_params& load, const earpiece_params& ear)
{
    net.add_resistor(out, ground_node, load.bleeder_ohm);
    net.add_capacitor(out, ground_node, load.filter_capacitance_f + load.stray_capacitance_f);
    switch (ear.kind) {
    case earpiece_kind::piezo:
        net.add_capacitor(out, ground_node, ear.capacitance_f);
        net.add_resistor(out, ground_node, ear.leakage_ohm);
        if (ear.has_motional_branch()) {
            // Butterworth-Van Dyke motional branch: Rm + Lm (one lossy inductor), then Cm to ground.
            const node_id m = net.add_node("earpiece motional");
            net.add_inductor(out, m, ear.motional_inductance_h, ear.motional_resistance_ohm);
            net.add_capacitor(m, ground_node, ear.motional_capacitance_f);
        }
        break;
    case earpiece_kind::magnetic: {
        // DC resistance in series with the inductance, the core loss resistance across the inductance.
        const node_id m = net.add_node("earpiece coil");
        net.add_resistor(out, m, ear.resistance_ohm);
        net.add_inductor(m, ground_node, ear.inductance_h);
        net.add_resistor(m, ground_node, ear.loss_resistance_ohm);
        break;
    }
    case earpiece_kind::resistor: net.add_resistor(out, ground_node, ear.resistance_ohm); break;
    }
}

int stamp_antenna(network& net, node_id terminal, const antenna_params& a)
{
    a.validate();
    const node_id emf = net.add_node("antenna EMF");
    const int input = net.add_voltage_source(emf, ground_node);
    const node_id mid = net.add_node("antenna series");
    if (a.preset == "standard-dummy") {
        net.add_capacitor(emf, mid, dummy_series_c_f);
        net.add_inductor(mid, terminal, dummy_l_h);
        const node_id shunt = net.add_node("antenna shunt");
        net.add_resistor(mid, shunt, dummy_shunt_r_ohm);
        net.add_capacitor(shunt, terminal, dummy_shunt_c_f);
        return input;
    }
    net.add_capacitor(emf, mid, a.capacitance_f);
    if (a.inductance_h > 0.0) net.add_inductor(mid, terminal, a.inductance_h, a.resistance_ohm);
    else net.add_resistor(mid, terminal, a.resistance_ohm);
    return input;
}

namespace {

/// A coil split at taps into sections that are coupled to each other (tap_section_coupling) and,
/// optionally, all coupled by k_ext to one more inductor. Section inductances, mutuals and losses as in
/// the header; the loss w0 L / Q is shared in proportion to each section's flux linkage.
struct tapped_coil {
    std::vector<node_id> taps;     // node at each boundary: taps[0] = ground (bottom), taps.back() = top
    std::vector<double> fractions; // turns fraction at each boundary, increasing, 0 .. 1
};

void stamp_tapped_coil(network& net, const std::vector<node_id>& nodes, const std::vector<double>& fractions, double coil_h,
                       double loss_ohm, int couple_to, double k_ext, double couple_h)
{
    const std::size_t ns = nodes.size() - 1;
    std::vector<double> n(ns);
    for (std::size_t i = 0; i < ns; ++i) n[i] = fractions[i + 1] - fractions[i];
    double sum_sq = 0.0, sum_cross = 0.0;
    for (std::size_t i = 0; i < ns; ++i) {
        sum_sq += n[i] * n[i];
        for (std::size_t j = i + 1; j < ns; ++j) sum_cross += n[i] * n[j];
    }
    const double s = coil_h / (sum_sq + 2.0 * tap_section_coupling * sum_cross);
    // Inductance matrix of the sections (and the external coil), checked positive definite.
    const auto dim = static_cast<int>(ns) + (couple_to >= 0 ? 1 : 0);
    Eigen::MatrixXd lm = Eigen::MatrixXd::Zero(dim, dim);
    std::vector<int> idx(ns);
    for (std::size_t i = 0; i < ns; ++i) {
        double linkage = n[i] * n[i];
        for (std::size_t j = 0; j < ns; ++j)
            if (j != i) linkage += tap_section_coupling * n[i] * n[j];
        const double li = s * n[i] * n[i];
        // Section i, from the node above it down to the node below (current flows top to bottom).
        idx[i] = net.add_inductor(nodes[i + 1], nodes[i], li, loss_ohm * s * linkage / coil_h);
        lm(static_cast<int>(i), static_cast<int>(i)) = li;
    }
    for (std::size_t i = 0; i < ns; ++i)
        for (std::size_t j = i + 1; j < ns; ++j) {
            net.couple(idx[i], idx[j], tap_section_coupling);
            lm(static_cast<int>(i), static_cast<int>(j)) = lm(static_cast<int>(j), static_cast<int>(i)) =
                tap_section_coupling * s * n[i] * n[j];
        }
    if (couple_to >= 0) {
        lm(dim - 1, dim - 1) = couple_h;
        for (std::size_t i = 0; i < ns; ++i) {
            net.couple(couple_to, idx[i], k_ext);
            lm(static_cast<int>(i), dim - 1) = lm(dim - 1, static_cast<int>(i)) = k_ext * std::sqrt(couple_h * s * n[i] * n[i]);
        }
    }
    const Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> es(lm, Eigen::EigenvaluesOnly);
    if (!(es.eigenvalues().minCoeff() > 1e-9 * es.eigenvalues().maxCoeff()))
        throw config_error(fmt::format("tuner.coupling = {}: too tight for a coil tapped into {} sections coupled with k = {} "
                                       "(the inductance matrix is not positive definite); loosen the coupling",
                                       detail::format_value(k_ext), ns, tap_section_coupling));
}

} // namespace

namespace {

/// The receiver with the tuning capacitor given (F; used by the tuned layouts only).
receiver_network build_with(const circuit_params& circuit, const antenna_params& antenna, const tuner_params& tuner, double c_tune_f)
{
    receiver_network r;
    network& net = r.net;
    const double w0_for_loss = [&] {
        if (tuner.layout == tuner_layout::bench || tuner.layout == tuner_layout::untuned) return 0.0;
        return two_pi * tuner.design_hz();
    }();
    switch (tuner.layout) {
    case tuner_layout::bench: {
        circuit.source.validate();
        r.antenna_node = net.add_node("generator");
        r.emf_input = net.add_voltage_source(r.antenna_node, ground_node);
        if (circuit.source.resistance_ohm > 0.0) {
            r.detector_node = net.add_node("detector input");
            net.add_resistor(r.antenna_node, r.detector_node, circuit.source.resistance_ohm);
        } else {
            r.detector_node = r.antenna_node;
        }
        break;
    }
    case tuner_layout::untuned:
        r.antenna_node = net.add_node("antenna terminal");
        r.emf_input = stamp_antenna(net, r.antenna_node, antenna);
        net.add_resistor(r.antenna_node, ground_node, tuner.dc_return_ohm);
        r.detector_node = r.antenna_node;
        break;
    case tuner_layout::single_coil:
    case tuner_layout::coupled: {
        r.tuning_capacitance_f = c_tune_f;
        r.design_hz = tuner.design_hz();
        const double loss = w0_for_loss * tuner.coil_h / tuner.coil_q;
        // Boundaries of the tapped tuning coil, bottom (ground, 0) to top (1).
        std::vector<double> fr{0.0, 1.0};
        const bool single = tuner.layout == tuner_layout::single_coil;
        fr.push_back(tuner.detector_tap);
        if (single) fr.push_back(tuner.antenna_tap);
        std::sort(fr.begin(), fr.end());
        fr.erase(std::unique(fr.begin(), fr.end()), fr.end());
        std::vector<node_id> nodes{ground_node};
        for (std::size_t i = 1; i < fr.size(); ++i)
            nodes.push_back(net.add_node(i + 1 == fr.size() ? "tuning coil top" : fmt::format("tuning coil tap {:.3g}", fr[i])));
        auto node_at = [&](double f) { return nodes[static_cast<std::size_t>(std::find(fr.begin(), fr.end(), f) - fr.begin())]; };
        const node_id top = nodes.back();
        r.tank_node = top;
        net.add_capacitor(top, ground_node, r.tuning_capacitance_f);
        for (std::size_t i = 1; i + 1 < nodes.size(); ++i) net.add_capacitor(nodes[i], ground_node, tap_stray_capacitance_f);
        r.detector_node = node_at(tuner.detector_tap);
        if (single) {
            r.antenna_node = node_at(tuner.antenna_tap);
            r.emf_input = stamp_antenna(net, r.antenna_node, antenna);
            stamp_tapped_coil(net, nodes, fr, tuner.coil_h, loss, -1, 0.0, 0.0);
        } else {
            r.antenna_node = net.add_node("antenna coil");
            r.emf_input = stamp_antenna(net, r.antenna_node, antenna);
            const int la = net.add_inductor(r.antenna_node, ground_node, tuner.antenna_coil_h,
                                            w0_for_loss * tuner.antenna_coil_h / tuner.antenna_coil_q);
            stamp_tapped_coil(net, nodes, fr, tuner.coil_h, loss, la, tuner.coupling, tuner.antenna_coil_h);
        }
        break;
    }
    }
    // The diode: series resistance, then the junction (anode at the detector input, cathode at the output).
    node_id anode = r.detector_node;
    if (circuit.diode.series_resistance_ohm > 0.0) {
        anode = net.add_node("junction");
        net.add_resistor(r.detector_node, anode, circuit.diode.series_resistance_ohm);
    }
    r.output_node = net.add_node("earpiece");
    // The linear part of the junction charge: Cj at junction_linear_reverse_v of reverse bias, so that the
    // nonlinear remainder q(v) - C_lin v has a positive slope over every bias a receiver reaches (a negative
    // remainder made the integrator's backward-Euler treatment of it unstable).
    const double c_lin = circuit.diode.junction_capacitance_f > 0.0 ? diode_model(circuit.diode).capacitance_f(-junction_linear_reverse_v) : 0.0;
    net.set_junction(anode, r.output_node, c_lin);
    stamp_load(net, r.output_node, circuit.load, circuit.earpiece);
    return r;
}

/// The largest response |v_detector / EMF| (junction open) within f_hz (1 +- span): a scan, then golden-section
/// refinement; Hz.
double response_peak_hz(const receiver_network& rn, double f_hz, double span)
{
    auto gain = [&](double f) { return std::abs(rn.net.transfer_to(rn.emf_input, rn.detector_node, ground_node, f, 0.0)); };
    constexpr int scan = 40;
    const double lo = f_hz * (1.0 - span), step = 2.0 * span * f_hz / scan;
    int best = 0;
    double best_g = -1.0;
    for (int k = 0; k <= scan; ++k) {
        const double g = gain(lo + k * step);
        if (g > best_g) best_g = g, best = k;
    }
    if (best == 0 || best == scan) return lo + best * step;
    double a = lo + (best - 1) * step, b = lo + (best + 1) * step;
    const double gr = 0.5 * (std::sqrt(5.0) - 1.0);
    double x1 = b - gr * (b - a), x2 = a + gr * (b - a);
    double g1 = gain(x1), g2 = gain(x2);
    while (b - a > 1e-12 * f_hz) {
        if (g1 > g2) b = x2, x2 = x1, g2 = g1, x1 = b - gr * (b - a), g1 = gain(x1);
        else a = x1, x1 = x2, g1 = g2, x2 = a + gr * (b - a), g2 = gain(x2);
    }
    return 0.5 * (a + b);
}

} // namespace

receiver_network build_receiver_network(const circuit_params& circuit, const antenna_params& antenna, const tuner_params& tuner)
{
    circuit.diode.validate();
    circuit.load.validate();
    circuit.earpiece.validate();
    tuner.validate();
    const bool tuned = tuner.layout == tuner_layout::single_coil || tuner.layout == tuner_layout::coupled;
    if (!tuned || tuner.capacitance_f > 0.0) return build_with(circuit, antenna, tuner, tuner.tuning_capacitance_f());
    // Solve the tuning capacitor for the loaded tank: the admittance at the top of the tuning coil (the
    // capacitor's node; EMF shorted, junction port open, its linear capacitance in place) is Y_rest + jwC,
    // affine in C, so the C that makes it real at w = 2 pi tuned_hz follows from one evaluation at the bare
    // value C0: C = C0 - Im(Y(C0)) / w.
    const double c0 = tuner.tuning_capacitance_f();
    const receiver_network first = build_with(circuit, antenna, tuner, c0);
    const double w = two_pi * tuner.tuned_hz;
    const std::complex<double> z = first.net.impedance(first.tank_node, ground_node, tuner.tuned_hz, 0.0);
    double c = c0 - (1.0 / z).imag() / w;
    if (!(c > 0.0) || !std::isfinite(c))
        throw config_error(fmt::format("tuner.tuned_hz = {}: the antenna and the detector already tune a {} coil above it (no "
                                       "positive tuning capacitance is left); give a lower tuned_hz or a smaller coil_h",
                                       detail::format_value(tuner.tuned_hz), detail::format_value(tuner.coil_h)));
    // Then the response peak at the detector (junction open) onto tuned_hz: the loss moves it from the parallel
    // resonance by about f / (2 Q^2). A peak more than 1e-3 away (two humps of an over-coupled pair) keeps the
    // parallel resonance. The peak moves as 1 / sqrt(C).
    receiver_network rn = build_with(circuit, antenna, tuner, c);
    for (int it = 0; it < 6; ++it) {
        const double fp = response_peak_hz(rn, tuner.tuned_hz, 2e-3);
        const double r = fp / tuner.tuned_hz;
        if (!(std::fabs(r - 1.0) < 1e-3) || std::fabs(r - 1.0) < 1e-8) break;
        c *= r * r;
        rn = build_with(circuit, antenna, tuner, c);
    }
    return rn;
}

double detector_gain(const receiver_network& rn, std::complex<double> y, double f_hz)
{
    return std::abs(rn.net.transfer_to(rn.emf_input, rn.detector_node, ground_node, f_hz, y));
}

rf_tuning analyse_tuning(const receiver_network& rn, std::complex<double> y, double around_hz)
{
    const double nan = std::numeric_limits<double>::quiet_NaN();
    rf_tuning t{nan, nan, nan, nan};
    auto gain = [&](double f) { return detector_gain(rn, y, f); };
    const double lo = 0.6 * around_hz, hi = 1.6 * around_hz;
    constexpr int scan = 600;
    int best = 0;
    double best_g = -1.0;
    const double ratio = std::pow(hi / lo, 1.0 / scan);
    for (int k = 0; k <= scan; ++k) {
        const double g = gain(lo * std::pow(ratio, k));
        if (g > best_g) best_g = g, best = k;
    }
    if (best == 0 || best == scan) return t;
    // Golden-section refinement of the maximum inside the bracketing scan points.
    double a = lo * std::pow(ratio, best - 1), b = lo * std::pow(ratio, best + 1);
    const double gr = 0.5 * (std::sqrt(5.0) - 1.0);
    double c = b - gr * (b - a), d = a + gr * (b - a);
    double gc = gain(c), gd = gain(d);
    for (int it = 0; it < 100 && (b - a) > 1e-12 * b; ++it) {
        if (gc > gd) {
            b = d, d = c, gd = gc;
            c = b - gr * (b - a), gc = gain(c);
        } else {
            a = c, c = d, gc = gd;
            d = a + gr * (b - a), gd = gain(d);
        }
    }
    const double fp = 0.5 * (a + b);
    const double gp = gain(fp);
    const double target = gp / std::sqrt(2.0);
    auto edge = [&](double inside, double outside) {
        if (gain(outside) > target) return nan;
        for (int it = 0; it < 200 && std::fabs(outside - inside) > 1e-12 * inside; ++it) {
            const double m = 0.5 * (inside + outside);
            (gain(m) > target ? inside : outside) = m;
        }
        return 0.5 * (inside + outside);
    };
    const double f_lo = edge(fp, lo), f_hi = edge(fp, hi);
    t.tuned_hz = fp;
    t.peak_gain = gp;
    if (std::isfinite(f_lo) && std::isfinite(f_hi)) {
        t.bandwidth_hz = f_hi - f_lo;
        t.loaded_q = fp / t.bandwidth_hz;
    }
    return t;
}

} // namespace galena
