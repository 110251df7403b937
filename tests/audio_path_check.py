#!/usr/bin/python3
"""Independent audio path for reference_test: ngspice's earpiece waveform (wrdata columns: time, v) ->
linear interpolation onto a uniform grid of `fine_hz` -> scipy.signal.resample_poly (polyphase FIR with
its Kaiser-windowed anti-alias low-pass, zero phase) down to `fs_hz`. Writes one sample per line; sample
k is the waveform's audio-band content at time k / fs_hz.

usage: audio_path_check.py IN OUT FINE_HZ FS_HZ      (FINE_HZ / FS_HZ must be a ratio of small integers)
"""
import sys
from fractions import Fraction

import numpy as np
from scipy.signal import resample_poly

src, dst, fine_hz, fs_hz = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
data = np.loadtxt(src)
t, v = data[:, 0], data[:, 1]
n = int(np.floor(t[-1] * fine_hz)) + 1
grid = np.arange(n) / fine_hz
x = np.interp(grid, t, v)
ratio = Fraction(fs_hz / fine_hz).limit_denominator(100000)
y = resample_poly(x, ratio.numerator, ratio.denominator)
np.savetxt(dst, y, fmt="%.17g")
