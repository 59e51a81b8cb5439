"""Progress on a terminal (a bar redrawn in place) and off it (plain lines)."""

from __future__ import annotations

import io
import os
import subprocess
import sys

import numpy as np
import pytest
import rasterio
from affine import Affine

from geosr.cli.progress import Progress

from helpers import camera


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_terminal_bar_redraws_one_line():
    out = _Terminal()
    with Progress(5, "magnify", stream=out, min_interval=0) as bar:
        for _ in range(5):
            bar.update()
    text = out.getvalue()
    # Redrawn in place: carriage returns, a single line ended once at the close.
    assert text.count("\r") >= 5 and text.count("\n") == 1 and text.endswith("\n")
    last = text.rstrip("\n").split("\r")[-1]
    assert last.startswith("magnify: 100%") and "5/5" in last and "blocks/s" in last


def test_plain_lines_when_not_a_terminal():
    out = io.StringIO()
    with Progress(20, "magnify", stream=out) as bar:
        for _ in range(20):
            bar.update()
    text = out.getvalue()
    lines = text.splitlines()
    assert "\r" not in text and "\x1b" not in text
    # One line at each tenth of the work, and the first.
    assert len(lines) == 11 and lines[-1].startswith("magnify: 20/20 blocks (100%)")


def test_quiet_terminal_draws_nothing():
    out = _Terminal()
    with Progress(3, stream=out, quiet=True) as bar:
        bar.update(3)
    assert out.getvalue() == ""


@pytest.mark.skipif(sys.platform == "win32", reason="pseudo-terminals are POSIX")
def test_geosr_magnify_under_a_pseudo_terminal(tmp_path):
    import pty

    src = tmp_path / "src.tif"
    with rasterio.open(src, "w", driver="GTiff", width=64, height=64, count=1, dtype="float32",
                       crs="EPSG:32618", transform=Affine(30, 0, 5e5, 0, -30, 4.2e6)) as ds:
        ds.write(camera(64, 64).astype(np.float32)[None])
    main, child = pty.openpty()
    exe = os.path.join(os.path.dirname(sys.executable), "geosr")
    proc = subprocess.run([exe, "magnify", str(src), str(tmp_path / "out.tif"), "-s", "2", "--chunk", "16"],
                          stdin=subprocess.DEVNULL, stdout=subprocess.PIPE, stderr=child, timeout=120)
    os.close(child)
    chunks = []
    while True:
        try:
            data = os.read(main, 65536)
        except OSError:
            break
        if not data:
            break
        chunks.append(data)
    os.close(main)
    err = b"".join(chunks).decode("utf-8", "replace")
    assert proc.returncode == 0, err
    # The terminal turns "\n" into "\r\n": split on "\n" and look inside the bar's line.
    bar = [line for line in err.split("\n") if "magnify:" in line and "%" in line]
    assert len(bar) == 1, err
    draws = [d for d in bar[0].split("\r") if d.strip()]
    assert len(draws) >= 2 and draws[0].startswith("magnify:   0%") and "16/16" in draws[-1], draws
    # Off a terminal the same run writes plain lines.
    plain = subprocess.run([exe, "magnify", str(src), str(tmp_path / "out2.tif"), "-s", "2", "--chunk", "16"],
                           capture_output=True, text=True, timeout=120)
    assert plain.returncode == 0 and "\r" not in plain.stderr and "magnify: 16/16 blocks (100%)" in plain.stderr
