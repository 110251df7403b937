#!/usr/bin/python3
"""Regenerates the bundled clips in audio-samples/ (CC0, see README.md).

Everything here is synthesized: speech by espeak-ng from our own text (a fictional hobby club's
evening bulletin), a test-tone set, and a short music-like phrase made from additive tones.
All files are mono, 16-bit PCM, 16 kHz, a few seconds long.

Usage: /usr/bin/python3 audio-samples/make-samples.py   (needs numpy and espeak-ng)
"""
import os
import subprocess
import tempfile
import wave

import numpy as np

RATE = 16000
HERE = os.path.dirname(os.path.abspath(__file__))


def write_wav(name, x):
    """Writes x (floats, |x| <= 1) as 16-bit mono PCM at RATE, with 10 ms raised-cosine fades."""
    x = np.asarray(x, dtype=np.float64)
    n = int(0.01 * RATE)
    ramp = 0.5 * (1 - np.cos(np.pi * np.arange(n) / n))
    x[:n] *= ramp
    x[-n:] *= ramp[::-1]
    pcm = np.round(np.clip(x, -1, 1) * 32767).astype("<i2")
    with wave.open(os.path.join(HERE, name), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(RATE)
        w.writeframes(pcm.tobytes())


def speech(name, text, voice="en", speed=150):
    """espeak-ng to a temporary WAV, resampled to RATE by linear interpolation, peak-normalised to -3 dBFS."""
    with tempfile.TemporaryDirectory() as d:
        raw = os.path.join(d, "s.wav")
        subprocess.run(["espeak-ng", "-v", voice, "-s", str(speed), "-w", raw, text], check=True)
        with wave.open(raw, "rb") as w:
            fs = w.getframerate()
            y = np.frombuffer(w.readframes(w.getnframes()), dtype="<i2").astype(np.float64) / 32768
    t_out = np.arange(int(len(y) * RATE / fs)) / RATE
    y = np.interp(t_out, np.arange(len(y)) / fs, y)
    y *= 10 ** (-3 / 20) / max(1e-9, np.max(np.abs(y)))
    write_wav(name, y)


def tone(name, freqs_hz, seconds=2.0, level_dbfs=-6.0):
    t = np.arange(int(seconds * RATE)) / RATE
    y = sum(np.sin(2 * np.pi * f * t) for f in freqs_hz)
    y *= 10 ** (level_dbfs / 20) / np.max(np.abs(y))
    write_wav(name, y)


def music(name, seconds=4.0):
    """A slow four-chord phrase: each note has harmonics 1..6 falling as 1/k and a plucked envelope."""
    t = np.arange(int(seconds * RATE)) / RATE
    y = np.zeros_like(t)
    chords = [[220.0, 277.18, 329.63], [196.0, 246.94, 293.66], [174.61, 220.0, 261.63], [196.0, 246.94, 329.63]]
    step = seconds / len(chords)
    for i, chord in enumerate(chords):
        for j, f in enumerate(chord):
            start = i * step + 0.06 * j
            tt = t - start
            on = tt >= 0
            env = np.where(on, np.exp(-np.clip(tt, 0, None) * 2.5) * (1 - np.exp(-np.clip(tt, 0, None) * 200)), 0)
            for k in range(1, 7):
                y += env * np.sin(2 * np.pi * k * f * tt) / k
    # a soft high melody line
    mel = [659.25, 587.33, 523.25, 587.33, 659.25, 659.25, 659.25, 587.33]
    ms = seconds / len(mel)
    for i, f in enumerate(mel):
        tt = t - i * ms
        env = np.where((tt >= 0) & (tt < ms), np.sin(np.pi * np.clip(tt, 0, ms) / ms), 0)
        y += 0.5 * env * np.sin(2 * np.pi * f * tt)
    y *= 10 ** (-3 / 20) / np.max(np.abs(y))
    write_wav(name, y)


if __name__ == "__main__":
    speech("speech-bulletin.wav",
           "Good evening from the Marsh Lane wireless circle. Tonight we listen to a cat's whisker set "
           "and compare two detectors.")
    speech("speech-count.wav", "One, two, three, four, five. Testing the detector.")
    tone("tone-400hz.wav", [400.0])
    tone("tone-1khz.wav", [1000.0])
    tone("tone-3khz.wav", [3000.0])
    tone("two-tone-100hz-4khz.wav", [100.0, 4000.0])
    music("music-phrase.wav")
