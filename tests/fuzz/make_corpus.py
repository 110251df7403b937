#!/usr/bin/env python3
"""Writes the seed corpora of the libFuzzer harnesses (tests/fuzz/corpus/<harness>/).

Small, valid and deliberately broken inputs, so the fuzzers start from every branch of the readers:
WAVs in each sample format galena reads, stereo and odd rates, a header that claims more frames than the
file holds, a zero-frame file, NaN/Inf float samples, a non-audio file; scenario files with every section,
overrides ("@set section.key=value" lines), and typical mistakes. Run from anywhere: python3 make_corpus.py
"""
import math
import pathlib
import struct

here = pathlib.Path(__file__).resolve().parent
wav_dir = here / "corpus" / "wav"
sc_dir = here / "corpus" / "scenario"
wav_dir.mkdir(parents=True, exist_ok=True)
sc_dir.mkdir(parents=True, exist_ok=True)


def wav(fmt_tag, channels, rate, bits, frames_bytes, data_size=None, extensible=False):
    """RIFF/WAVE with one fmt and one data chunk; data_size overrides the declared size."""
    block = channels * bits // 8
    if extensible:
        sub = struct.pack("<HII", bits, (1 << channels) - 1, fmt_tag) + b"\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"
        fmt = struct.pack("<HHIIHHH", 0xFFFE, channels, rate, rate * block, block, bits, 22) + sub
    else:
        fmt = struct.pack("<HHIIHH", fmt_tag, channels, rate, rate * block, block, bits)
    size = len(frames_bytes) if data_size is None else data_size
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + struct.pack("<I", size) + frames_bytes
    return b"RIFF" + struct.pack("<I", len(body)) + body


def sine(n, f, rate, amp=0.5):
    return [amp * math.sin(2 * math.pi * f * i / rate) for i in range(n)]


def pcm16(xs):
    return b"".join(struct.pack("<h", max(-32768, min(32767, int(round(x * 32767))))) for x in xs)


def pcm24(xs):
    out = b""
    for x in xs:
        v = max(-(1 << 23), min((1 << 23) - 1, int(round(x * ((1 << 23) - 1)))))
        out += struct.pack("<i", v)[:3]
    return out


def f32(xs):
    return b"".join(struct.pack("<f", x) for x in xs)


def inter(a, b):
    return [v for pair in zip(a, b) for v in pair]


n = 256
s = sine(n, 1000, 8000)
seeds = {
    "pcm16-8k-mono.wav": wav(1, 1, 8000, 16, pcm16(s)),
    "pcm24-16k-mono.wav": wav(1, 1, 16000, 24, pcm24(sine(n, 440, 16000))),
    "float-48k-mono.wav": wav(3, 1, 48000, 32, f32(sine(n, 3000, 48000))),
    "pcm16-22k-stereo.wav": wav(1, 2, 22050, 16, pcm16(inter(sine(n, 500, 22050), sine(n, 700, 22050, 0.3)))),
    "pcm8-11k-mono.wav": wav(1, 1, 11025, 8, bytes(128 + int(100 * x) for x in sine(n, 300, 11025))),
    "float-extensible-4ch.wav": wav(3, 4, 44100, 32, f32(sine(4 * 64, 1000, 44100)), extensible=True),
    "float-nan-middle.wav": wav(3, 1, 8000, 32, f32(s[:100] + [float("nan")] + s[101:])),
    "float-inf.wav": wav(3, 1, 8000, 32, f32([float("inf")] + s[1:])),
    # Found by wav_fuzz: finite samples near FLT_MAX overflowed the conditioning's float stages to NaN.
    "found-float-huge-finite.wav": wav(3, 1, 8000, 32, f32([x * 6.0e38 for x in s])),
    "float-subnormal.wav": wav(3, 1, 8000, 32, f32([x * 1e-39 for x in s])),
    "pcm16-truncated.wav": wav(1, 1, 8000, 16, pcm16(s)[:200], data_size=2 * n),
    "pcm16-zero-frames.wav": wav(1, 1, 8000, 16, b""),
    "pcm16-rate-100hz.wav": wav(1, 1, 100, 16, pcm16(s)),
    "pcm16-rate-2mhz.wav": wav(1, 1, 2000000, 16, pcm16(s)),
    "pcm16-silent.wav": wav(1, 1, 8000, 16, pcm16([0.0] * n)),
    "not-audio.wav": b"this is a text file, not audio\n",
}
for name, data in seeds.items():
    (wav_dir / name).write_bytes(data)

scenarios = {
    "tone.toml": """[signal]
test_signal = "tone"
tone_hz = 1000
duration_s = 0.5
carrier_hz = 1.0e6
carrier_peak_v = 0.3
modulation_index = 0.3
audio_cutoff_hz = 5000
[source]
resistance_ohm = 20e3
[diode]
preset = "germanium-point-contact"
[load]
bleeder_ohm = 47e3
filter_capacitance_f = 0
[earpiece]
kind = "piezo"
capacitance_f = 10e-9
leakage_ohm = inf
[output]
format = "pcm24"
full_scale_v = 2.0
""",
    "clip-overrides.toml": """[signal]
audio = "clip.wav"
duration_s = 1.5
carrier_hz = 600e3
[earpiece]
kind = "magnetic"
resistance_ohm = 2000
inductance_h = 1.5
loss_resistance_ohm = 30e3
@set load.bleeder_ohm=inf
@set diode.preset=small-signal-schottky
@set signal.audio="other.wav"
""",
    "two-tone-bvd.toml": """[signal]
test_signal = "two-tone"
tone_hz = 100
tone2_hz = 4000
tone_ratio = 4
[diode]
saturation_current_a = 2e-6
emission_coefficient = 1.5
series_resistance_ohm = 20
junction_capacitance_f = 0.5e-12
junction_potential_v = 0.3
grading_coefficient = 0.5
breakdown_voltage_v = 30
breakdown_current_a = 1e-6
temperature_c = 40
nominal_temperature_c = 27
energy_gap_ev = 0.67
saturation_current_exponent = 3
[earpiece]
kind = "piezo"
motional_resistance_ohm = 5e3
motional_inductance_h = 0.1
motional_capacitance_f = 20e-9
[output]
sample_rate_hz = 48000
[solver]
method = "adaptive"
steps_per_cycle = 64
dc_tolerance = 2e-5
newton_tolerance = 1e-8
relative_tolerance = 1e-4
absolute_tolerance_v = 1e-7
preroll_s = 0.01
dc_block_hz = 10
carrier_steps_floor = 40
""",
    "log-sweep-resistor.toml": """[signal]
test_signal = "log-sweep"
sweep_start_hz = 50
sweep_stop_hz = 5000
modulation_index = 1.5
allow_overmodulation = true
[earpiece]
kind = "resistor"
resistance_ohm = 47e3
[load]
stray_capacitance_f = 10e-12
""",
    "mistakes.toml": """[signal]
carrier_hz = 5e4
modulation_index = 1.3
[diode]
emision_coefficient = 12
[loads]
bleeder_ohm = -5
""",
    "types.toml": """[signal]
carrier_hz = "fast"
duration_s = [1, 2]
allow_overmodulation = "yes"
[source]
resistance_ohm = { a = 1 }
[output]
format = 24
""",
    "malformed.toml": """[signal
carrier_hz = = 3
""",
    "engineering-values.toml": """[signal]
tone_hz = "1kHz"
carrier_hz = "1 MHz"
carrier_peak_v = "300mV"
duration_s = "200ms"
[source]
resistance_ohm = "20k ohm"
[diode]
junction_capacitance_f = "0.5pF"
saturation_current_a = "2uA"
temperature_c = "25°C"
[load]
bleeder_ohm = "47kΩ"
filter_capacitance_f = "1nF"
[earpiece]
capacitance_f = "10 nF"
@set load.bleeder_ohm=2.2M
@set signal.modulation_index=30
@set bleeder_ohm=47k
@set earpiece.leakage_ohm=10nF
""",
    "diode-file.toml": """[signal]
tone_hz = 1000
[diode]
file = "no-such-diode.toml"
emission_coefficient = 1.4
@set diode.file=/dev/null
""",
}
for name, text in scenarios.items():
    (sc_dir / name).write_text(text)
