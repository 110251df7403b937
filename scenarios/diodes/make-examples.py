#!/usr/bin/env python3
"""Writes the bundled example measurement files. The specimens are INVENTED: their parameters are made up to
resemble the kinds of diode a builder meets (a leaky germanium-like point contact, a Schottky-like diode, a
mineral contact with high series resistance); the readings are computed from those parameters and given a
seeded scatter and a meter's rounding. They are not measurements of any real part.

Run: /usr/bin/python3 scenarios/diodes/make-examples.py   (numpy only; output is deterministic)
"""
import math
import os
import numpy as np

K_B = 1.380649e-23
Q_E = 1.602176634e-19
here = os.path.dirname(os.path.abspath(__file__))


def current(v, i_s, n, rs, rsh, t_c):
    """Diode current at terminal voltage v: solves vj + Rs I(vj) = v by bisection (I increasing in vj)."""
    a = n * K_B * (t_c + 273.15) / Q_E
    lo, hi = min(v, 0.0) - 1.0, max(v, 0.0) + 1e-12
    f = lambda vj: vj + rs * (i_s * math.expm1(vj / a) + vj / rsh) - v
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        if f(mid) > 0:
            hi = mid
        else:
            lo = mid
    vj = 0.5 * (lo + hi)
    return i_s * math.expm1(vj / a) + vj / rsh


def ladder_reading(supply, r_series, meter_ohm, p, t_c):
    """Diode voltage read across the diode when `supply` drives it through r_series (meter across the diode)."""
    # h(vd) = (supply - vd) / R - I_total(vd) falls with vd; its root lies between 0 and the supply.
    lo, hi = min(0.0, supply), max(0.0, supply)
    for _ in range(200):
        vd = 0.5 * (lo + hi)
        if (supply - vd) / r_series - (current(vd, *p, t_c) + vd / meter_ohm) > 0:
            lo = vd
        else:
            hi = vd
    return 0.5 * (lo + hi)


def write_ladder(name, header, p, t_c, supply, resistors, reverse, meter_ohm, scatter_v, rng, repeats=1):
    rows = []
    for s, r in [(-supply, x) for x in reverse] + [(supply, x) for x in resistors]:
        for _ in range(repeats):
            vd = ladder_reading(s, r, meter_ohm, p, t_c) + rng.normal(0.0, scatter_v)
            rows.append((s, r, round(vd, 4)))
    rows.sort(key=lambda x: x[2])
    with open(os.path.join(here, name), "w") as f:
        f.write(header)
        f.write(f"# temperature_c = {t_c}\n# meter_input_ohm = {meter_ohm:g}\n")
        f.write("supply_v,series_ohm,diode_v\n")
        last = None
        for s, r, vd in rows:
            if vd == last:
                continue  # a repeat that read the same: one row
            last = vd
            f.write(f"{s:g},{r:g},{vd:.4f}\n")


def main():
    rng = np.random.default_rng(15)
    ladder = [1e6, 470e3, 220e3, 100e3, 47e3, 22e3, 10e3, 4.7e3, 2.2e3, 1e3, 470, 220, 100]
    write_ladder("germanium-like-leaky.csv",
                 "# INVENTED example data (not a real part): a leaky germanium-like point-contact diode, read by the\n"
                 "# resistor-ladder method: a 3 V supply through 1M down to 100 ohm, the diode voltage read on a\n"
                 "# 10 Mohm meter, two reverse points with the supply reversed. Made by make-examples.py from\n"
                 "# Is = 1.5 uA, n = 1.35, Rs = 25 ohm, leakage 150 kohm with a meter's scatter and rounding.\n",
                 (1.5e-6, 1.35, 25.0, 150e3), 22.0, 3.0, ladder, [1e6, 100e3], 10e6, 0.4e-3, rng)
    write_ladder("mineral-contact-like.csv",
                 "# INVENTED example data (not a real part): a mineral-contact-like detector (a crystal and a fine\n"
                 "# wire) with high series resistance, read by the resistor-ladder method with each reading repeated\n"
                 "# three times (a contact drifts). Made by make-examples.py from Is = 5 uA, n = 2.6, Rs = 900 ohm,\n"
                 "# leakage 60 kohm with a contact's scatter and a meter's rounding.\n",
                 (5e-6, 2.6, 900.0, 60e3), 19.0, 3.0, ladder[:-2], [1e6, 100e3], 10e6, 3e-3, rng, repeats=3)
    # Schottky-like: direct readings of voltage and current (a bench supply and two meters).
    p, t_c = (20e-9, 1.08, 12.0, 20e6), 24.0
    volts = [-2.0, -1.0, 0.05, 0.1, 0.15, 0.2, 0.25, 0.3, 0.35, 0.4, 0.45]
    with open(os.path.join(here, "schottky-like.csv"), "w") as f:
        f.write("# INVENTED example data (not a real part): a small-signal Schottky-like diode read directly\n"
                "# (voltage across it, current through it), two reverse points. Made by make-examples.py from\n"
                "# Is = 20 nA, n = 1.08, Rs = 12 ohm, leakage 20 Mohm with 1 % scatter and 4-digit rounding.\n")
        f.write(f"# temperature_c = {t_c}\nvoltage_v,current_a\n")
        for v in volts:
            i = current(v, *p, t_c) * (1.0 + rng.normal(0.0, 0.01))
            f.write(f"{v:g},{float(f'{i:.4g}'):g}\n")


if __name__ == "__main__":
    main()
