#!/usr/bin/python3
"""Independent spectrum for metrics_test: reads samples (one per line) and writes the single-sided peak-amplitude
spectrum computed by numpy.fft.rfft with scipy's window, one value per line.

usage: numpy_fft_check.py IN OUT WINDOW   (WINDOW: boxcar | hann | blackmanharris | flattop)
Scaling: bins 1..N/2-1 by 2/sum(w), DC and Nyquist by 1/sum(w) (a tone on a bin reads its own amplitude).
"""
import sys

import numpy as np
from scipy.signal import get_window

src, dst, name = sys.argv[1], sys.argv[2], sys.argv[3]
x = np.loadtxt(src)
n = x.size
w = get_window(name, n, fftbins=True)  # periodic form, as in galena::make_window
spec = np.abs(np.fft.rfft(x * w)) / w.sum()
spec[1:] *= 2.0
if n % 2 == 0:
    spec[-1] /= 2.0
np.savetxt(dst, spec, fmt="%.17g")
