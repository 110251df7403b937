#!/usr/bin/env python3
"""Mutation check of the physics and audio path (not run in CI).

Each mutant is one planted one-line fault: a sign, a factor or a formula that a wrong derivation could
produce. For each, the script copies the tracked source tree into a scratch folder once, applies the
mutant there (never in the working tree), rebuilds, runs the test suite and reports whether some test
failed ("killed") or all passed ("survived"). A mutant whose build fails is reported as "stillborn" and
not counted. The score is killed / (killed + survived).

    python3 tests/mutate.py                      # every mutant, the whole suite minus the slow label
    python3 tests/mutate.py --tests 'signal|render' --only 3,5
    python3 tests/mutate.py --list

Options: --work DIR (scratch, default build-mutate/), --jobs N (build and ctest parallelism, default 2),
--tests REGEX (ctest -R), --exclude REGEX (ctest -E, besides package_consumer), --all-labels (include the
tests labelled slow: the ngspice comparisons of temperature, breakdown and the audio path live in one),
--only I,J (1-based indices).
"""
import argparse
import os
import shutil
import subprocess
import sys
import time

# (file, exact text that occurs once, replacement, what the fault means)
MUTANTS = [
    ("lib/stations.cpp", "m_scale = density * std::sqrt(m_rate);", "m_scale = density * std::sqrt(2.0 * m_rate);",
     "antenna noise: amplitude sqrt(2) high (density bookkeeping)"),
    ("lib/stations.cpp", "m_rate = 2.0 * half_band_hz / energy;", "m_rate = half_band_hz / energy;",
     "antenna noise: band B/2 wide instead of B (one-sided / two-sided confusion)"),
    ("lib/rf_integrator.cpp", "const std::complex<double> rp = rot * p[q];", "const std::complex<double> rp = rot * p[q].real();",
     "rf_integrator: the quadrature part of a complex envelope dropped"),
    ("lib/render.cpp", "band_noise(spec.noise.field_density * spec.antenna.effective_height_m,", "band_noise(spec.noise.field_density,",
     "antenna noise: the field density used as EMF (effective height left out)"),
    ("lib/dial.cpp", "band_noise(d, w, spec.noise.seed + (k << 32))", "band_noise(d, w, 1 + (k << 32))",
     "dial noise tiles ignore the seed"),
    ("lib/network.cpp", "return e11.partialPivLu().solve(to.basis.transpose() * q);", "(void)q; (void)e11; return x;",
     "a moved capacitor keeps its voltage (C dv/dt), not its charge"),
    ("lib/dial.cpp", "p.tuned_hz = dial_frequency(path, tuning, t_centre);", "p.tuned_hz = dial_frequency(path, tuning, t_centre + 1e-3);",
     "dial trace: the dial position recorded 1 ms late"),
    ("lib/dial.cpp", "p.level_v.push_back(2.0 * std::hypot(acc_re[k], acc_im[k]) / wsum);",
     "p.level_v.push_back(1.9 * std::hypot(acc_re[k], acc_im[k]) / wsum);", "dial trace: station level 5 % low"),
    ("lib/components.cpp", "std::exp((ratio - 1.0) * energy_gap_ev / nvt)", "std::exp(-(ratio - 1.0) * energy_gap_ev / nvt)",
     "band-gap term of Is(T) with the wrong sign"),
    ("lib/components.cpp", "std::pow(ratio, saturation_current_exponent / emission_coefficient)",
     "std::pow(ratio, saturation_current_exponent * emission_coefficient)", "XTI/N written as XTI*N"),
    ("include/galena/components.hpp", "r.current_a -= ib_e * (1.0 + excess_b);", "r.current_a += ib_e * (1.0 + excess_b);",
     "breakdown current with the wrong sign"),
    ("lib/components.cpp", "l.leakage_s = conductance_s(p.leakage_resistance_ohm);",
     "l.leakage_s = 2.0 * conductance_s(p.leakage_resistance_ohm);", "leakage conductance doubled"),
    ("lib/components.cpp", "l.linear_a_f = p.junction_capacitance_f * f2 * (1.0 - depletion_fc * (1.0 + m));",
     "l.linear_a_f = p.junction_capacitance_f * f2 * (1.0 + depletion_fc * (1.0 + m));", "depletion-capacitance continuation"),
    ("lib/cycle_integrator.cpp", "m_h * m_h / 12.0 * (output_slope_v_per_s(0) - output_slope_v_per_s(m_n))",
     "m_h * m_h / 12.0 * (output_slope_v_per_s(m_n) - output_slope_v_per_s(0))", "cycle mean: end correction with the wrong sign"),
    ("lib/cycle_integrator.cpp", "const double sum = 0.5 * (m_yb[0] + m_yb[static_cast<std::size_t>(m_n)]) + m_yb_interior_sum;",
     "const double sum = static_cast<double>(m_n) * m_yb[static_cast<std::size_t>(m_n) / 2];",
     "cycle mean replaced by one sample in the cycle"),
    ("lib/signal.cpp", "return std::sin(two_pi * m_f1 / m_k * (std::exp(m_k * t) - 1.0));",
     "return std::sin(two_pi * (m_f1 * t + 0.5 * (m_f2 - m_f1) / m_duration_s * t * t));",
     "log sweep replaced by a linear sweep between the same ends"),
    ("lib/signal.cpp", "return m_p.carrier_peak_v * r * (1.0 + m_p.modulation_index * x);",
     "return m_p.carrier_peak_v * r * (1.0 + 0.9 * m_p.modulation_index * x);", "modulation depth 10 % low"),
    ("lib/dsp.cpp", "return {norm, -2.0 * norm, norm, 2.0 * (k * k - 1.0) * norm, (1.0 - k / q + k * k) * norm};",
     "return {norm, -2.0 * norm, norm, 2.0 * (k * k - 1.0) * norm, (1.0 - k * q + k * k) * norm};",
     "DC-block high-pass: Q used instead of 1/Q"),
    ("lib/metrics.cpp", "p4 = 12194.217 * 12194.217;", "p4 = 1219.4217 * 1219.4217;", "A-weighting high pole a decade low"),
    ("lib/metrics.cpp", "100.0 * std::sqrt(hsum) / m.fundamental_v", "100.0 * hsum / m.fundamental_v", "THD without the square root"),
    ("lib/metrics.cpp", "m.imd_percent = m.f2_v > 0.0 ? 100.0 * std::sqrt(s) / m.f2_v", "m.imd_percent = m.f2_v > 0.0 ? 100.0 * s / m.f2_v",
     "IMD without the square root"),
    ("lib/characterize.cpp", "d.diagonal_m_max = std::isfinite(wrc) ? 1.0 / std::sqrt(1.0 + wrc * wrc) : 0.0;",
     "d.diagonal_m_max = std::isfinite(wrc) ? 1.0 / (1.0 + wrc) : 0.0;", "diagonal-clipping limit formula"),
    ("lib/characterize.cpp",
     "rm.detection_efficiency = am.modulation_index > 0.0 ? rm.tone.fundamental_v / (am.modulation_index * am.carrier_peak_v) : nan_v;",
     "rm.detection_efficiency = am.modulation_index > 0.0 ? rm.tone.fundamental_v / am.carrier_peak_v : nan_v;",
     "detection efficiency without m"),
    ("lib/job.cpp", "const double target = s.output.full_scale_v * std::pow(10.0, -1.0 / 20.0);",
     "const double target = s.output.full_scale_v * std::pow(10.0, -2.0 / 20.0);", "normalised copy at -2 dBFS, not -1"),
    ("lib/job.cpp", "return 0.5 * (1.0 - std::cos(pi * t / fade_s));", "return 0.5 * (1.0 - std::cos(2.0 * pi * t / fade_s));",
     "fade shape: the ramp rises and falls again"),
    ("lib/report.cpp", "const double peak_limit = std::pow(10.0, -1.0 / 20.0);", "const double peak_limit = 1.0;",
     "loudness matching without the -1 dBFS peak limit"),
    ("lib/render.cpp", "biquad dc_block = biquad::butterworth_highpass(s.dc_block_hz, fs);",
     "biquad dc_block = biquad::butterworth_highpass(10.0, fs);", "solver.dc_block_hz ignored"),
    ("include/galena/constants.hpp", "1.380649e-23", "1.380649e-22", "Boltzmann constant a decade off"),
    ("lib/cycle_integrator.cpp", "return ya + m_cb * (m_u[i] - m_v[i]) * m_inv_r;", "return ya - m_cb * (m_u[i] - m_v[i]) * m_inv_r;",
     "output slope: source term with the wrong sign"),
    ("lib/transducer.cpp", "c(1.0 - w * w * e.motional_inductance_h * e.motional_capacitance_f,",
     "c(1.0 + w * w * e.motional_inductance_h * e.motional_capacitance_f,", "BVD drive: the motional inductance's term with the wrong sign"),
    ("lib/transducer.cpp", "c(e.resistance_ohm, w * e.inductance_h * (1.0 + e.resistance_ohm * gp))",
     "c(e.resistance_ohm, w * e.inductance_h)", "magnetic drive: the loss resistance's share of the current ignored"),
    ("lib/report_plots.cpp", "if (score[w] >= 0.95 * best) return", "if (score[w] <= 0.95 * best) return",
     "zoom window: the smallest departure (near-silence) chosen"),
    ("lib/report_plots.cpp", "const std::vector<double> ac = detrended(v);", "const std::vector<double> ac(v.begin(), v.end());",
     "spectrum: DC and drift left in before the window"),
]


def run(cmd, cwd, log, timeout=None):
    with open(log, "w") as f:
        return subprocess.run(cmd, cwd=cwd, stdout=f, stderr=subprocess.STDOUT, timeout=timeout).returncode


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--work", default=None)
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--tests", default=None)
    ap.add_argument("--exclude", default=None)
    ap.add_argument("--all-labels", action="store_true")
    ap.add_argument("--only", default=None)
    ap.add_argument("--list", action="store_true")
    a = ap.parse_args()
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    if a.list:
        for i, (f, _, _, what) in enumerate(MUTANTS, 1):
            print(f"{i:2d} {f}: {what}")
        return 0
    work = os.path.abspath(a.work or os.path.join(root, "build-mutate"))
    src = os.path.join(work, "src")
    build = os.path.join(work, "build")
    os.makedirs(work, exist_ok=True)
    # A pristine copy of the tracked files (and untracked, not ignored ones), refreshed every run.
    files = subprocess.run(["git", "ls-files", "-co", "--exclude-standard"], cwd=root, capture_output=True, text=True,
                           check=True).stdout.split()
    for rel in files:
        s = os.path.join(root, rel)
        if not os.path.isfile(s):
            continue
        d = os.path.join(src, rel)
        os.makedirs(os.path.dirname(d), exist_ok=True)
        if not os.path.exists(d) or open(s, "rb").read() != open(d, "rb").read():
            shutil.copy2(s, d)
    for f, old, _, what in MUTANTS:
        text = open(os.path.join(src, f)).read()
        if text.count(old) != 1:
            print(f"mutant table out of date: {f}: '{old}' occurs {text.count(old)} times ({what})", file=sys.stderr)
            return 2
    if run(["cmake", "-S", src, "-B", build, "-DCMAKE_BUILD_TYPE=Release", "-DGALENA_BUILD_TESTS=ON"], work,
           os.path.join(work, "configure.log")) != 0:
        print("configure failed; see " + os.path.join(work, "configure.log"), file=sys.stderr)
        return 2
    # A mutant is killed by its first failing test: stop there.
    ctest = ["ctest", "--test-dir", build, "-j", str(a.jobs), "--stop-on-failure", "-E",
             "package_consumer" + ("|" + a.exclude if a.exclude else "")]
    if not a.all_labels:
        ctest += ["-LE", "slow"]
    if a.tests:
        ctest += ["-R", a.tests]
    if run(["cmake", "--build", build, "-j", str(a.jobs)], work, os.path.join(work, "build-pristine.log")) != 0 or \
            run(ctest, work, os.path.join(work, "ctest-pristine.log")) != 0:
        print("the unmutated suite does not pass here; see " + work, file=sys.stderr)
        return 2
    only = {int(x) for x in a.only.split(",")} if a.only else None
    killed = survived = stillborn = 0
    for i, (f, old, new, what) in enumerate(MUTANTS, 1):
        if only and i not in only:
            continue
        path = os.path.join(src, f)
        original = open(path).read()
        open(path, "w").write(original.replace(old, new, 1))
        t0 = time.time()
        try:
            if run(["cmake", "--build", build, "-j", str(a.jobs)], work, os.path.join(work, f"build-{i}.log")) != 0:
                verdict = "stillborn"
                stillborn += 1
            else:
                rc = run(ctest, work, os.path.join(work, f"ctest-{i}.log"))
                verdict = "killed" if rc != 0 else "SURVIVED"
                if rc != 0:
                    killed += 1
                else:
                    survived += 1
        finally:
            open(path, "w").write(original)
        failed = ""
        if verdict == "killed":
            lines = open(os.path.join(work, f"ctest-{i}.log")).read().splitlines()
            failed = " ".join(l.split("-")[-1].strip() for l in lines if "(Failed)" in l or "(Timeout)" in l)
        print(f"{i:2d} {verdict:9s} {time.time() - t0:6.0f} s  {f}: {what}  {failed}", flush=True)
    # Rebuild the pristine tree so the scratch build matches the sources again.
    run(["cmake", "--build", build, "-j", str(a.jobs)], work, os.path.join(work, "build-pristine.log"))
    total = killed + survived
    print(f"mutation score: {killed} of {total} killed" + (f" ({stillborn} stillborn)" if stillborn else ""))
    return 0 if survived == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
