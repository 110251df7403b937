#!/usr/bin/env python3
"""Independent reference for tests/diode_fit_test.cpp (scipy from Debian, python3-scipy).

usage: diode_fit_check.py current VT IS N RS RSH V1 V2 ...
         prints I(V) for each V from the published Lambert-W forms with scipy.special.lambertw:
         series resistance only (RSH = inf): Electronics Letters 36(4), 2000,
           I = (n Vt / Rs) W0[(Is Rs / (n Vt)) exp((V + Is Rs) / (n Vt))] - Is;
         with a shunt: Solar Energy Materials & Solar Cells 81 (2004) 269-277,
           I = (V - Rsh Is)/(Rs + Rsh) + (n Vt / Rs) W0[(Rs Rsh Is / (n Vt (Rs + Rsh))) exp(Rsh (Rs Is + V) / (n Vt (Rs + Rsh)))].
       diode_fit_check.py fit VT POINTS START_LN_IS START_LN_N START_LN_RS START_LN_RSH
         POINTS holds lines 'V I relative_error'; fits ln|I| with scipy.optimize.curve_fit (sigma = relative
         error, the same weighting as galena) over theta = (ln Is, ln n, ln Rs, ln Rsh) and prints the four
         fitted values, then the four standard errors of theta (curve_fit's pcov, scaled by the residual variance).
"""
import sys
import numpy as np
from scipy.special import lambertw
from scipy.optimize import curve_fit


def current(v, vt, i_s, n, rs, rsh):
    a = n * vt
    v = np.asarray(v, dtype=float)
    if np.isinf(rsh):
        x = np.log(i_s * rs / a) + (v + i_s * rs) / a
        return a / rs * np.real(lambertw(np.exp(x))) - i_s
    x = np.log(rs * rsh * i_s / (a * (rs + rsh))) + rsh * (rs * i_s + v) / (a * (rs + rsh))
    return (v - rsh * i_s) / (rs + rsh) + a / rs * np.real(lambertw(np.exp(x)))


def main():
    mode = sys.argv[1]
    if mode == "current":
        vt, i_s, n, rs, rsh = (float(s) for s in sys.argv[2:7])
        for v in sys.argv[7:]:
            print(repr(float(current(float(v), vt, i_s, n, rs, rsh))))
        return
    vt = float(sys.argv[2])
    data = np.loadtxt(sys.argv[3], ndmin=2)
    p0 = [float(s) for s in sys.argv[4:8]]
    v, i, rel = data[:, 0], data[:, 1], data[:, 2]

    def model(vv, ln_is, ln_n, ln_rs, ln_rsh):
        return np.log(np.abs(current(vv, vt, np.exp(ln_is), np.exp(ln_n), np.exp(ln_rs), np.exp(ln_rsh))))

    popt, pcov = curve_fit(model, v, np.log(np.abs(i)), p0=p0, sigma=rel, method="lm", xtol=1e-15, ftol=1e-15,
                           gtol=1e-15, maxfev=100000)
    for p in popt:
        print(repr(float(np.exp(p))))
    for s in np.sqrt(np.diag(pcov)):
        print(repr(float(s)))


if __name__ == "__main__":
    main()
