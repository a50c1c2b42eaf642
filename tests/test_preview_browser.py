"""The HTML preview report in a real browser: Debian's Chromium, headless, driven over the
DevTools protocol (a websocket on 127.0.0.1). The page must load without console errors,
uncaught exceptions or failed loads, and every plot must have rendered: a non-empty box whose
screenshot holds the plot's drawing colours.

Chromium comes from ``deploy/install-chromium.sh`` (CI runs it); without it this test fails and
says so rather than skipping.
"""

from __future__ import annotations

import base64
import json
import shutil
import struct
import subprocess
import tempfile
import time
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from capture_rows import write_capture
from websockets.sync.client import ClientConnection, connect

from service.preview.page import MODEL_COLOUR, PALETTE, render
from service.preview.replay import parse_sweep, preview_capture
from service.registry import load_registry
from service.shards import read_shard

ROOT = Path(__file__).resolve().parents[1]
START_SECONDS = 30
STEP_SECONDS = 20
# A plot counts as drawn when at least this many pixels of its crop are near one of the
# report's series colours (a 560 x 300 plot with a few lines or bars has thousands).
MIN_DRAWN_PIXELS = 150


def chromium_binary() -> str:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    pytest.fail(
        "chromium is not installed: run `bash deploy/install-chromium.sh` (Debian's chromium "
        "package, apt-get install -y --no-install-recommends chromium)"
    )


@pytest.fixture
def browser(tmp_path: Path) -> Iterator[str]:
    """A headless Chromium with DevTools on a free loopback port; its page's websocket URL."""
    profile = Path(tempfile.mkdtemp(prefix="keepset-chromium-", dir=tmp_path))
    process = subprocess.Popen(
        [
            chromium_binary(),
            "--headless",
            "--no-sandbox",  # tests run as root in CI containers
            "--disable-gpu",
            "--no-first-run",
            "--disable-extensions",
            "--disable-background-networking",
            "--remote-debugging-address=127.0.0.1",
            "--remote-debugging-port=0",
            f"--user-data-dir={profile}",
            "about:blank",
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        port = _devtools_port(profile, process)
        yield _page_socket(port)
    finally:
        process.terminate()
        try:
            process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)


def _devtools_port(profile: Path, process: subprocess.Popen[bytes]) -> int:
    """Chromium writes the port it chose to DevToolsActivePort in its profile folder."""
    deadline = time.monotonic() + START_SECONDS
    marker = profile / "DevToolsActivePort"
    while time.monotonic() < deadline:
        if process.poll() is not None:
            pytest.fail(f"chromium exited with code {process.returncode} before DevTools opened")
        if marker.exists():
            lines = marker.read_text().splitlines()
            if lines and lines[0].isdigit():
                return int(lines[0])
        time.sleep(0.05)
    pytest.fail(f"chromium opened no DevTools port within {START_SECONDS} s")


def _page_socket(port: int) -> str:
    import httpx

    deadline = time.monotonic() + START_SECONDS
    while time.monotonic() < deadline:
        try:
            targets = httpx.get(f"http://127.0.0.1:{port}/json/list", timeout=5).json()
        except httpx.HTTPError:
            targets = []
        pages = [t for t in targets if t.get("type") == "page"]
        if pages:
            return str(pages[0]["webSocketDebuggerUrl"])
        time.sleep(0.1)
    pytest.fail("chromium listed no page target")


class DevTools:
    """Commands over one page's websocket, keeping every event that arrives meanwhile."""

    def __init__(self, ws: ClientConnection) -> None:
        self.ws = ws
        self.events: list[dict[str, Any]] = []
        self.next_id = 0

    def send(self, method: str, **params: Any) -> dict[str, Any]:
        self.next_id += 1
        self.ws.send(json.dumps({"id": self.next_id, "method": method, "params": params}))
        deadline = time.monotonic() + STEP_SECONDS
        while True:
            message = json.loads(self.ws.recv(timeout=max(deadline - time.monotonic(), 0.01)))
            if message.get("id") == self.next_id:
                assert "error" not in message, message
                result: dict[str, Any] = message["result"]
                return result
            self.events.append(message)

    def wait_for(self, method: str) -> dict[str, Any]:
        for event in self.events:
            if event.get("method") == method:
                return event
        deadline = time.monotonic() + STEP_SECONDS
        while True:
            message = json.loads(self.ws.recv(timeout=max(deadline - time.monotonic(), 0.01)))
            self.events.append(message)
            if message.get("method") == method:
                return message


def decode_png(data: bytes) -> np.ndarray:
    """An 8-bit RGB or RGBA, non-interlaced PNG (what Chromium writes) as uint8 [H, W, C]."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG"
    at, idat, header = 8, b"", None
    while at < len(data):
        (length,) = struct.unpack(">I", data[at : at + 4])
        kind, body = data[at + 4 : at + 8], data[at + 8 : at + 8 + length]
        at += 12 + length
        if kind == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif kind == b"IDAT":
            idat += body
    assert header is not None
    width, height, depth, colour_type, _, _, interlace = header
    assert depth == 8 and colour_type in (2, 6) and interlace == 0, header
    channels = 3 if colour_type == 2 else 4
    raw = zlib.decompress(idat)
    stride = width * channels
    out = np.zeros((height, stride), np.uint8)
    prev = np.zeros(stride, np.int32)
    for y in range(height):
        kind = raw[y * (stride + 1)]
        line = np.frombuffer(raw, np.uint8, stride, y * (stride + 1) + 1).astype(np.int32)
        row = _unfilter(kind, line, prev, channels)
        out[y] = row
        prev = row.astype(np.int32)
    return out.reshape(height, width, channels)


def _unfilter(kind: int, line: np.ndarray, prev: np.ndarray, bpp: int) -> np.ndarray:
    if kind == 0:
        return line % 256
    if kind == 2:
        return (line + prev) % 256
    if kind == 1:  # each byte adds the reconstructed byte bpp to its left: a running sum
        return line.reshape(-1, bpp).cumsum(axis=0).reshape(-1) % 256
    row = np.zeros_like(line)
    for x in range(line.size):  # average and Paeth depend on the byte just reconstructed
        a = int(row[x - bpp]) if x >= bpp else 0
        b = int(prev[x])
        if kind == 3:
            row[x] = (line[x] + (a + b) // 2) % 256
        else:
            c = int(prev[x - bpp]) if x >= bpp else 0
            p = a + b - c
            pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
            pred = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
            row[x] = (line[x] + pred) % 256
    return row


def _rgb(hex_colour: str) -> tuple[int, int, int]:
    return tuple(int(hex_colour[i : i + 2], 16) for i in (1, 3, 5))  # type: ignore[return-value]


def drawn_pixels(image: np.ndarray, colours: list[str]) -> dict[str, int]:
    """Pixels within a small distance of each colour (anti-aliasing shifts edges only)."""
    rgb = image[:, :, :3].astype(np.int32)
    out = {}
    for c in colours:
        target = np.array(_rgb(c), np.int32)
        out[c] = int((np.abs(rgb - target).max(axis=2) <= 24).sum())
    return out


def test_decode_png_matches_a_known_image() -> None:
    # A 2 x 2 RGB image, rows filtered with Sub and Paeth; bytes built by hand per RFC 2083.
    pixels = [[(10, 20, 30), (40, 50, 60)], [(70, 80, 90), (100, 110, 120)]]
    sub = bytes([1, 10, 20, 30, 30, 30, 30])
    # Paeth, row 2: x0 predicts from b = above (10, 20, 30); x1 from a, b, c per channel.
    second = [70 - 10, 80 - 20, 90 - 30]
    for ch in range(3):
        a, b, c = pixels[1][0][ch], pixels[0][1][ch], pixels[0][0][ch]
        p = a + b - c
        pred = (
            a
            if abs(p - a) <= abs(p - b) and abs(p - a) <= abs(p - c)
            else (b if abs(p - b) <= abs(p - c) else c)
        )
        second.append((pixels[1][1][ch] - pred) % 256)
    raw = sub + bytes([4, *second])

    def chunk(kind: bytes, body: bytes) -> bytes:
        crc = zlib.crc32(kind + body)
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", crc)

    png = b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", 2, 2, 8, 2, 0, 0, 0))
    png += chunk(b"IDAT", zlib.compress(raw)) + chunk(b"IEND", b"")
    np.testing.assert_array_equal(decode_png(png), np.array(pixels, np.uint8))


def test_report_renders_in_headless_chromium(tmp_path: Path, browser: str) -> None:
    snapshot = load_registry(ROOT / "policies")
    paths = write_capture(
        tmp_path / "cap",
        snapshot,
        [(("prompt-book", 3), "control"), (("prompt-book", 4), "candidate")],
        shards=2,
        requests=20,
        vocab=1024,
    )
    report = preview_capture(
        [read_shard(p) for p in paths],
        ["prompt-book@3", "prompt-book@4", "prompt-book@5"],
        snapshot,
        resamples=50,
        sweep=parse_sweep("temperature=0.5:1.1:0.1"),
    )
    page = tmp_path / "report.html"
    page.write_text(render(report), encoding="utf-8")

    with connect(browser, max_size=None, open_timeout=STEP_SECONDS) as ws:
        tools = DevTools(ws)
        for domain in ("Runtime", "Log", "Page", "Network"):
            tools.send(f"{domain}.enable")
        tools.send(
            "Emulation.setDeviceMetricsOverride",
            width=1300,
            height=900,
            deviceScaleFactor=1,
            mobile=False,
        )
        tools.send("Page.navigate", url=page.as_uri())
        tools.wait_for("Page.loadEventFired")
        boxes = tools.send(
            "Runtime.evaluate",
            expression="""JSON.stringify([...document.querySelectorAll('figure.plot')].map(f => ({
                id: f.id,
                svgs: [...f.querySelectorAll('svg')].map(s => {
                    const r = s.getBoundingClientRect();
                    return [r.x + window.scrollX, r.y + window.scrollY, r.width, r.height];
                })})))""",
            returnByValue=True,
        )
        figures = json.loads(boxes["result"]["value"])
        shots = {}
        for figure in figures:
            for i, (x, y, w, h) in enumerate(figure["svgs"]):
                assert w > 100 and h > 100, (figure["id"], w, h)
                shot = tools.send(
                    "Page.captureScreenshot",
                    format="png",
                    captureBeyondViewport=True,
                    clip={"x": x, "y": y, "width": w, "height": h, "scale": 1},
                )
                shots[f"{figure['id']}/{i}"] = decode_png(base64.b64decode(shot["data"]))
        tools.send("Runtime.evaluate", expression="1")  # drain events that arrived meanwhile

    problems = []
    for event in tools.events:
        method, params = event.get("method"), event.get("params", {})
        if method == "Runtime.exceptionThrown":
            problems.append(params["exceptionDetails"])
        elif method == "Runtime.consoleAPICalled" and params.get("type") in ("error", "assert"):
            problems.append(params)
        elif method == "Log.entryAdded" and params["entry"]["level"] == "error":
            problems.append(params["entry"])
        elif method == "Network.loadingFailed":
            problems.append(params)
    assert problems == []

    assert [f["id"] for f in figures] == ["plot-kept", "plot-entropy", "plot-sweep"]
    versions = len(report.versions)
    expected = {
        # one bar colour per version
        "plot-kept/0": list(PALETTE[:versions]),
        # the model's dashed curve and one curve per version
        "plot-entropy/0": [MODEL_COLOUR, *PALETTE[:versions]],
        # kept median and mean; entropy after policy
        "plot-sweep/0": list(PALETTE[:2]),
        "plot-sweep/1": list(PALETTE[:1]),
    }
    assert set(shots) == set(expected)
    for key, colours in expected.items():
        counts = drawn_pixels(shots[key], colours)
        assert all(n >= MIN_DRAWN_PIXELS for n in counts.values()), (key, counts)
        background = (shots[key][:, :, :3] == 255).all(axis=2).mean()
        assert background < 0.97, (key, background)
