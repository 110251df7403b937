#!/usr/bin/env python3
"""The pack page (`galena compare`'s index.html) in headless Chromium (Debian's), driven through the DevTools
protocol, opened from the folder as file:// (offline: every request must be a local file).

Renders a small pack (four bleeder values on the bench scenario, one second of the bundled speech clip each),
then checks: the page's order (conclusions, matched playlist, level-consistent playlist, blind test, table);
the presenter view opens with P and advances with the arrow keys; A/B switches the audio source while the
playback position is kept; the A/B/X quiz hides its answer until revealed, draws X from the stated seed
(mulberry32, written out below from its published form) and keeps the score; the "which is which" mode hides
its answers until revealed; no console errors. Writes a screenshot of the presenter view (1280 x 720, a
projector's size) as SCRATCH_DIR/presenter.png. Standard library only (the DevTools client of
workbench_page_check.py).

Usage: pack_page_check.py GALENA_TOOL SCRATCH_DIR    (exit 77 = skipped: no chromium)
Environment: GALENA_PACK_PAGE_REUSE=1 checks the pack already in SCRATCH_DIR/pack (for trying mutants of the
page's script by editing its index.html) instead of rendering it again.
"""
import base64
import json
import os
import re
import shutil
import subprocess
import sys
import time
import urllib.request

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from workbench_page_check import Page  # noqa: E402

SOURCE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

PACK = """[pack]
title = "Bleeder values (test pack)"
scenario = "{scenario}"
measure_tone_hz = 0

[[variant]]
name = "no-bleeder"
label = "no bleeder"
set = ["load.bleeder_ohm=inf", "signal.duration_s=1"]

[[variant]]
name = "1M"
label = "1M bleeder"
set = ["load.bleeder_ohm=1M", "signal.duration_s=1"]

[[variant]]
name = "220k"
label = "220k bleeder"
set = ["load.bleeder_ohm=220k", "signal.duration_s=1"]

[[variant]]
name = "10k"
label = "10k bleeder"
set = ["load.bleeder_ohm=10k", "signal.duration_s=1"]
"""

KEYS = {"ArrowRight": ("ArrowRight", 39), "ArrowLeft": ("ArrowLeft", 37), " ": ("Space", 32), "p": ("KeyP", 80),
        "a": ("KeyA", 65), "b": ("KeyB", 66), "Escape": ("Escape", 27)}


def mulberry32(seed):
    """mulberry32 (Tommy Ettinger's 32-bit generator, public domain), as the page's script has it."""
    a = seed & 0xFFFFFFFF

    def imul(x, y):
        return (x * y) & 0xFFFFFFFF

    def draw():
        nonlocal a
        a = (a + 0x6D2B79F5) & 0xFFFFFFFF
        t = a
        t = imul(t ^ (t >> 15), t | 1)
        t ^= (t + imul(t ^ (t >> 7), t | 61)) & 0xFFFFFFFF
        return ((t ^ (t >> 14)) & 0xFFFFFFFF) / 4294967296.0
    return draw


class PackPage(Page):
    def wait_for(self, expression, seconds=20.0):
        until = time.monotonic() + seconds
        while time.monotonic() < until:
            if self.js(expression):
                return True
            time.sleep(0.05)
        raise AssertionError(f"timed out waiting for: {expression}")

    def key(self, k):
        code, vk = KEYS[k]
        params = dict(key=k, code=code, windowsVirtualKeyCode=vk, nativeVirtualKeyCode=vk)
        self.call("Input.dispatchKeyEvent", type="keyDown", text=k if len(k) == 1 else "", **params)
        self.call("Input.dispatchKeyEvent", type="keyUp", **params)

    def visible_slide(self):
        # What is drawn, not the attribute: a CSS display rule could show a slide marked hidden.
        return self.js("Array.from(document.querySelectorAll('#presenter .slide'))"
                       ".filter(s => getComputedStyle(s).display !== 'none' && s.getClientRects().length > 0).map(s => Number(s.dataset.i))")


def main():
    tool, scratch = sys.argv[1], sys.argv[2]
    chromium = shutil.which("chromium")
    if chromium is None:
        print("pack_page_check: skipped: no chromium (bootstrap.sh test installs it)")
        return 77
    out = os.path.join(scratch, "pack")
    if os.environ.get("GALENA_PACK_PAGE_REUSE") == "1":
        shutil.rmtree(os.path.join(scratch, "profile"), ignore_errors=True)
    else:
        shutil.rmtree(scratch, ignore_errors=True)
        os.makedirs(scratch)
        pack = os.path.join(scratch, "bleeders.toml")
        with open(pack, "w") as f:
            f.write(PACK.format(scenario=os.path.join(SOURCE, "scenarios", "demo.toml")))
        r = subprocess.run([tool, "compare", pack, "--out", out, "--no-curves", "--quiet"], capture_output=True, text=True, timeout=600)
        assert r.returncode == 0, f"galena compare failed ({r.returncode}): {r.stderr}"
    index = os.path.join(out, "index.html")
    html = open(index, encoding="utf-8").read()

    # Offline: no resource outside the folder (the SVG namespace is a name, not a request).
    for attr in re.findall(r'(?:src|href)="([^"]*)"', html):
        assert not re.match(r"[a-z]+:|//", attr), f"external resource: {attr}"
        assert not attr.startswith("/"), f"absolute path: {attr}"
    assert "<script src" not in html and "@import" not in html and "url(" not in html
    # The order of the page.
    marks = [html.find(m) for m in ('id="conclusions"', 'id="playlist-matched"', 'id="playlist-level"', 'id="blind-test"',
                                    "<h2>Variants</h2>")]
    assert all(m >= 0 for m in marks) and marks == sorted(marks), f"page order: {marks}"

    profile = os.path.join(scratch, "profile")
    os.makedirs(profile)
    browser = subprocess.Popen([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--mute-audio",
                                "--autoplay-policy=no-user-gesture-required", "--remote-debugging-port=0",
                                f"--user-data-dir={profile}", "about:blank"],
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        ws_browser = None
        until = time.monotonic() + 60
        while ws_browser is None and time.monotonic() < until:
            m = re.search(r"DevTools listening on (ws://\S+)", browser.stderr.readline())
            if m:
                ws_browser = m.group(1)
        assert ws_browser, "chromium printed no DevTools address"
        port = re.match(r"ws://[^:]+:(\d+)/", ws_browser).group(1)
        targets = json.load(urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=30))
        page = PackPage(next(t for t in targets if t["type"] == "page")["webSocketDebuggerUrl"])
        for domain in ("Runtime", "Log", "Page", "Network"):
            page.call(f"{domain}.enable")
        page.call("Emulation.setDeviceMetricsOverride", width=1280, height=720, deviceScaleFactor=1, mobile=False)
        page.call("Page.navigate", url="file://" + os.path.abspath(index))
        page.wait_for("window.galenaTalk !== undefined && document.readyState === 'complete'")
        n = page.js("galenaTalkData.items.length")
        assert n == 4
        conclusions = page.js("Array.from(document.querySelectorAll('.conclusions li')).map(e => e.textContent)")
        assert conclusions and conclusions[-1].startswith("Thresholds"), conclusions

        # Presenter view: P opens it on the first item; the arrows move (and wrap).
        assert page.js("document.getElementById('presenter').hidden")
        page.key("p")
        assert not page.js("document.getElementById('presenter').hidden")
        assert page.visible_slide() == [0]
        page.key("ArrowRight")
        assert page.visible_slide() == [1]
        page.key("ArrowRight")
        assert page.visible_slide() == [2]
        page.key("ArrowLeft")
        assert page.visible_slide() == [1]
        page.key("ArrowLeft")
        page.key("ArrowLeft")
        assert page.visible_slide() == [n - 1], "left from the first item wraps to the last"
        page.key("ArrowRight")
        page.key("ArrowRight")
        assert page.visible_slide() == [1]
        name = page.js("document.querySelector('#slide-1 .p-name').textContent")
        assert name == page.js("galenaTalkData.items[1].name")
        assert page.js("document.querySelector('#slide-1 .p-summary').textContent").strip(), "no summary on the slide"
        assert page.js("document.querySelector('#slide-1 .p-plot svg') !== null"), "no plot on the slide"

        # A/B: space plays A; B takes over at the same moment, from its own file.
        page.wait_for("galenaTalk.pa.readyState >= 1 && galenaTalk.pb.readyState >= 1")
        src_a, src_b = page.js("galenaTalk.pa.src"), page.js("galenaTalk.pb.src")
        partner = page.js("galenaTalk.partner(1)")
        assert src_a.endswith("/" + page.js("galenaTalkData.items[1].wav")), src_a
        assert src_b.endswith("/" + page.js(f"galenaTalkData.items[{partner}].wav")), src_b
        assert src_a != src_b
        page.key(" ")
        page.wait_for("!galenaTalk.pa.paused && galenaTalk.pa.currentTime > 0.3")
        page.key("b")
        t_a = page.js("galenaTalk.pa.currentTime")
        assert page.js("galenaTalk.P.hearing") == "b"
        assert page.js("galenaTalk.pa.paused") and not page.js("galenaTalk.pb.paused"), "B should play, A pause"
        t_b = page.js("galenaTalk.pb.currentTime")
        assert t_a - 0.05 <= t_b <= t_a + 0.25, f"B starts at {t_b:.3f} s, A stopped at {t_a:.3f} s"
        time.sleep(0.2)
        page.key("a")
        t_b2 = page.js("galenaTalk.pb.currentTime")
        t_a2 = page.js("galenaTalk.pa.currentTime")
        assert page.js("galenaTalk.P.hearing") == "a" and not page.js("galenaTalk.pa.paused")
        assert t_b2 > t_b and t_b2 - 0.05 <= t_a2 <= t_b2 + 0.25, f"A resumes at {t_a2:.3f} s, B stopped at {t_b2:.3f} s"
        page.key(" ")
        assert page.js("galenaTalk.pa.paused")

        # Screenshot of the presenter view at a projector's size.
        shot = page.call("Page.captureScreenshot", format="png")
        with open(os.path.join(scratch, "presenter.png"), "wb") as f:
            f.write(base64.b64decode(shot["data"]))
        page.key("Escape")
        assert page.js("document.getElementById('presenter').hidden")

        # A/B/X: the answer stays hidden until the reveal; X follows the seeded sequence.
        seed = page.js("galenaTalkData.seed")
        assert f"seed <b id=\"quiz-seed-shown\">{seed}</b>" in html
        draw = mulberry32(seed)
        right = voted = 0
        for rnd in range(1, 4):
            page.js("document.getElementById('quiz-new').click()")
            expected_x = "A" if draw() < 0.5 else "B"
            assert page.js("galenaTalk.Q.x") == expected_x, f"round {rnd}: X is not the seeded draw"
            hidden_text = page.js("document.getElementById('quiz').innerText")
            assert page.js("document.getElementById('quiz-answer').textContent") == ""
            assert "X was" not in hidden_text
            page.js("document.getElementById('quiz-vote-a').click()")
            assert page.js("document.getElementById('quiz-answer').textContent") == "", "the vote revealed the answer"
            x_src = page.js("document.getElementById('quiz-audio-x').src")
            assert x_src == page.js(f"document.getElementById('quiz-audio-{expected_x.lower()}').src")
            page.js("document.getElementById('quiz-reveal').click()")
            answer = page.js("document.getElementById('quiz-answer').textContent")
            assert answer.startswith(f"X was {expected_x}, "), answer
            voted += 1
            right += expected_x == "A"
            assert page.js("document.getElementById('quiz-score').textContent").startswith(
                f"Score: the room was right {right} of {voted} times")
        # The note names both variants and their level difference from the data.
        level = page.js("galenaTalkData.pairs[0][1].level")
        note = page.js("document.getElementById('quiz-note').textContent")
        assert f"differ by {abs(level):.1f} dB in level" in note, note

        # Which is which: names hidden until revealed.
        page.js("(() => { const m = document.getElementById('quiz-mode'); m.value = 'which'; m.dispatchEvent(new Event('change')); })()")
        page.js("document.getElementById('quiz-shuffle').click()")
        assert page.js("document.querySelectorAll('#quiz-samples audio').length") == 4
        assert page.js("Array.from(document.querySelectorAll('.quiz-truth')).every(e => e.textContent === '')")
        page.js("document.getElementById('quiz-which-reveal').click()")
        assert page.js("Array.from(document.querySelectorAll('.quiz-truth')).every(e => e.textContent !== '')")

        time.sleep(0.3)
        page.js("0")
        errors = page.errors()
        assert not errors, "console errors: " + "; ".join(errors)
        requests = [e["params"]["request"]["url"] for e in page.events if e["method"] == "Network.requestWillBeSent"]
        outside = [u for u in requests if not u.startswith(("file://", "data:"))]
        assert not outside, f"requests outside the folder: {outside}"
        print(f"pack_page_check: {n} slides; A/B kept the position ({t_a:.2f} -> {t_b:.2f} s, {t_b2:.2f} -> {t_a2:.2f} s); "
              f"X drawn from seed {seed}; {len(requests)} requests, all local; no console errors")
        print("conclusions:\n  " + "\n  ".join(conclusions))
    finally:
        browser.terminate()
        browser.wait(timeout=30)
    return 0


if __name__ == "__main__":
    sys.exit(main())
