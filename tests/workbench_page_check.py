#!/usr/bin/env python3
"""The workbench page in headless Chromium (Debian's), driven through the DevTools protocol.

Starts `galena workbench --port 0`, opens the page with a short excerpt, waits for the first render, pins it
as A, changes the bleeder control to a smaller value and checks that a new render arrives, that the DC level
shown falls (a smaller bleeder loads the detector more: the peak-detector load line, any diode-detector
text), that A/B switches the audio source between the pinned and the current render, and that the console
holds no errors. Then Ctrl-C (SIGINT) must stop the server with exit status 0 and leave its temporary folder
removed. Standard library only: the WebSocket client is the small one below (RFC 6455, client side).

Usage: workbench_page_check.py GALENA_TOOL SCRATCH_DIR    (exit 77 = skipped: no chromium)
"""
import base64
import json
import os
import re
import shutil
import signal
import socket
import struct
import subprocess
import sys
import time
import urllib.request


class WebSocket:
    """A minimal RFC 6455 client: text frames out (masked), text frames in (reassembled)."""

    def __init__(self, url):
        m = re.match(r"ws://([^:/]+):(\d+)(/.*)", url)
        host, port, path = m.group(1), int(m.group(2)), m.group(3)
        self.sock = socket.create_connection((host, port), timeout=60)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall((f"GET {path} HTTP/1.1\r\nHost: {host}:{port}\r\nUpgrade: websocket\r\nConnection: Upgrade\r\n"
                           f"Sec-WebSocket-Key: {key}\r\nSec-WebSocket-Version: 13\r\n\r\n").encode())
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(1)
            if not chunk:
                raise RuntimeError("websocket handshake: connection closed")
            head += chunk
        if b" 101 " not in head.split(b"\r\n")[0]:
            raise RuntimeError("websocket handshake refused: " + head.decode(errors="replace"))

    def _recv_exact(self, n):
        data = b""
        while len(data) < n:
            chunk = self.sock.recv(n - len(data))
            if not chunk:
                raise RuntimeError("websocket closed")
            data += chunk
        return data

    def send(self, text):
        payload = text.encode()
        head = bytearray([0x81])
        n = len(payload)
        if n < 126:
            head.append(0x80 | n)
        elif n < 65536:
            head.append(0x80 | 126)
            head += struct.pack(">H", n)
        else:
            head.append(0x80 | 127)
            head += struct.pack(">Q", n)
        mask = os.urandom(4)
        head += mask
        self.sock.sendall(bytes(head) + bytes(b ^ mask[i % 4] for i, b in enumerate(payload)))

    def recv(self):
        message = b""
        while True:
            b0, b1 = self._recv_exact(2)
            n = b1 & 0x7F
            if n == 126:
                n = struct.unpack(">H", self._recv_exact(2))[0]
            elif n == 127:
                n = struct.unpack(">Q", self._recv_exact(8))[0]
            payload = self._recv_exact(n)
            opcode = b0 & 0x0F
            if opcode == 0x8:
                raise RuntimeError("websocket closed by the browser")
            if opcode in (0x9, 0xA):  # ping / pong: not expected from DevTools; ignore
                continue
            message += payload
            if b0 & 0x80:
                return message.decode()


class Page:
    """One DevTools page session: commands with ids; events are kept for the console check."""

    def __init__(self, ws_url):
        self.ws = WebSocket(ws_url)
        self.next_id = 0
        self.events = []

    def call(self, method, **params):
        self.next_id += 1
        my_id = self.next_id
        self.ws.send(json.dumps({"id": my_id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == my_id:
                if "error" in msg:
                    raise RuntimeError(f"{method}: {msg['error']}")
                return msg.get("result", {})
            if "method" in msg:
                self.events.append(msg)

    def js(self, expression):
        r = self.call("Runtime.evaluate", expression=expression, returnByValue=True, awaitPromise=True)
        if "exceptionDetails" in r:
            raise RuntimeError(f"{expression}: {r['exceptionDetails']}")
        return r["result"].get("value")

    def wait_for(self, expression, seconds=120.0):
        until = time.monotonic() + seconds
        while time.monotonic() < until:
            if self.js(expression):
                return True
            time.sleep(0.05)
        status = self.js("document.getElementById('status').textContent")
        raise AssertionError(f"timed out waiting for: {expression}; status: {status}")

    def errors(self, expected_400_after=None):
        """Console errors; after event index `expected_400_after`, the browser's network note about the
        deliberate HTTP 400 from /api/render is expected and not counted."""
        found = []
        for i, e in enumerate(self.events):
            m, p = e["method"], e.get("params", {})
            if m == "Runtime.exceptionThrown":
                found.append("exception: " + json.dumps(p.get("exceptionDetails", {}))[:300])
            elif m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "assert"):
                found.append("console.error: " + json.dumps(p.get("args", []))[:300])
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") == "error":
                entry = p["entry"]
                if (expected_400_after is not None and i >= expected_400_after and entry.get("source") == "network"
                        and "/api/render" in entry.get("url", "") and "400" in entry.get("text", "")):
                    continue
                found.append("log: " + p["entry"].get("text", "")[:300])
        return found


def main():
    tool, scratch = sys.argv[1], sys.argv[2]
    chromium = shutil.which("chromium")
    if chromium is None:
        print("workbench_page_check: skipped: no chromium (bootstrap.sh test installs it)")
        return 77
    shutil.rmtree(scratch, ignore_errors=True)
    tmp = os.path.join(scratch, "tmp")
    profile = os.path.join(scratch, "profile")
    os.makedirs(tmp)
    os.makedirs(profile)
    env = dict(os.environ, TMPDIR=tmp)
    server = subprocess.Popen([tool, "workbench", "--port", "0"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    browser = None
    try:
        line = server.stdout.readline()
        m = re.search(r"(http://127\.0\.0\.1:\d+/)", line)
        assert m, f"no address on the first line: {line!r}"
        address = m.group(1)
        assert os.listdir(tmp), "the server made no private temporary folder"

        browser = subprocess.Popen([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                                    "--remote-debugging-port=0", f"--user-data-dir={profile}", "about:blank"],
                                   stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        ws_browser = None
        until = time.monotonic() + 60
        while ws_browser is None and time.monotonic() < until:
            line = browser.stderr.readline()
            m = re.search(r"DevTools listening on (ws://\S+)", line)
            if m:
                ws_browser = m.group(1)
        assert ws_browser, "chromium printed no DevTools address"
        port = re.match(r"ws://[^:]+:(\d+)/", ws_browser).group(1)
        targets = json.load(urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=30))
        page_target = next(t for t in targets if t["type"] == "page")
        page = Page(page_target["webSocketDebuggerUrl"])
        page.call("Runtime.enable")
        page.call("Log.enable")
        page.call("Page.enable")
        page.call("Page.navigate", url=address + "?signal.duration_s=0.5")

        # The first render arrives with the base bleeder (47k).
        page.wait_for("window.galenaState && galenaState.renders >= 1")
        dc_base = page.js("galenaState.current.metrics.dc_v")
        shown_base = page.js("document.getElementById('metric-dc_v-b').textContent")
        assert page.js("document.getElementById('bleeder').value") == "47k"

        # Pin it as A.
        page.js("document.getElementById('pin').click()")
        assert page.js("galenaState.pinned === galenaState.current")
        url_a = page.js("galenaState.pinned.url")

        # Change the bleeder control to 4.7k: a new render arrives, with a lower DC level.
        page.js("(() => { const e = document.getElementById('bleeder'); e.focus(); e.value = '4.7k'; "
                "e.dispatchEvent(new Event('input', {bubbles: true})); e.dispatchEvent(new Event('change', {bubbles: true})); })()")
        page.wait_for("galenaState.renders >= 2")
        dc_small = page.js("galenaState.current.metrics.dc_v")
        shown_small = page.js("document.getElementById('metric-dc_v-b').textContent")
        assert dc_small < dc_base, f"a smaller bleeder should lower the DC level: 47k {dc_base} V, 4.7k {dc_small} V"
        assert shown_small != shown_base, f"the metrics shown did not change: {shown_small}"
        assert page.js("document.getElementById('metric-dc_v-a').textContent") == shown_base

        # A/B: the pinned render and the current one are different sources; the toggle switches between them.
        url_b = page.js("galenaState.current.url")
        assert url_a != url_b
        assert page.js("document.getElementById('audio-a').src") == url_a
        assert page.js("document.getElementById('audio-b').src") == url_b
        page.js("document.getElementById('ab').click()")
        assert page.js("galenaState.hearing") == "a"
        assert page.js("document.getElementById('ab').textContent") == "Hearing A"
        page.js("document.getElementById('ab').click()")
        assert page.js("galenaState.hearing") == "b"

        # The front end: one tapped coil. The bench-only controls hide, the coil's show, and the render is the
        # whole receiver at RF: its loaded Q is below the coil's unloaded Q of 200 (a load across a tuned
        # circuit only adds loss: Q_loaded = Q_u R_p' / (R_p + R_p'), any text on tuned circuits).
        renders = page.js("galenaState.renders")
        page.js("(() => { const e = document.getElementById('layout'); e.value = 'single-coil'; "
                "e.dispatchEvent(new Event('change', {bubbles: true})); })()")
        page.wait_for(f"galenaState.renders >= {renders + 1}")
        assert page.js("document.getElementById('level').closest('label').style.display") == "none"
        assert page.js("document.getElementById('coupling').closest('label').style.display") == "none"
        assert page.js("document.getElementById('coil-q').closest('label').style.display") == ""
        loaded_q = page.js("galenaState.current.metrics.loaded_q")
        assert isinstance(loaded_q, (int, float)) and 1.0 < loaded_q < 200.0, f"loaded Q {loaded_q}"
        assert page.js("document.getElementById('metric-loaded_q-b').textContent") not in ("", "–")
        page.js("(() => { const e = document.getElementById('layout'); e.value = 'bench'; "
                "e.dispatchEvent(new Event('change', {bubbles: true})); })()")
        page.wait_for(f"galenaState.renders >= {renders + 2}")
        assert page.js("galenaState.current.metrics.loaded_q") is None

        # A bad value is shown as the server's one-line message, not thrown.
        before_bad = len(page.events)
        page.js("(() => { const e = document.getElementById('bleeder'); e.value = '-5'; e.dispatchEvent(new Event('change', {bubbles: true})); })()")
        page.wait_for("document.getElementById('status').className === 'bad'")
        status = page.js("document.getElementById('status').textContent")
        assert "load.bleeder_ohm" in status, status

        time.sleep(0.3)  # late console messages
        page.js("0")  # collect the events that arrived meanwhile
        errors = page.errors(expected_400_after=before_bad)
        assert not errors, "console errors: " + "; ".join(errors)
        print(f"workbench_page_check: DC {dc_base:.4g} V at 47k, {dc_small:.4g} V at 4.7k; pin and A/B switch sources; "
              f"single-coil loaded Q {loaded_q:.4g}; no console errors")
    finally:
        if browser is not None:
            browser.terminate()
            browser.wait(timeout=30)
        if server.poll() is None:
            server.send_signal(signal.SIGINT)
        rc = server.wait(timeout=60)
    err = server.stderr.read()
    assert rc == 0, f"galena workbench exited {rc} after SIGINT: {err}"
    assert not os.listdir(tmp), f"temporary files left after shutdown: {os.listdir(tmp)}"
    assert "temporary folder removed" in err, err
    return 0


if __name__ == "__main__":
    sys.exit(main())
