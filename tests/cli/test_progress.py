"""The command line's rendering of library output: progress bars and log lines on stderr."""

import io
import logging

from geosr.cli.progress import Progress, ProgressBars, format_duration, library_output


def test_progress_text_and_quiet():
    out = io.StringIO()
    with Progress(4, "magnify", stream=out) as bar:
        for _ in range(4):
            bar.update()
    text = out.getvalue()
    assert "magnify: 0/4 blocks (0%)" in text and "magnify: 4/4 blocks (100%)" in text
    assert "blocks/s" in text and "in all" in text
    mid = Progress(10, "train", stream=io.StringIO())
    mid.done = 5
    mid.start -= 10.0  # 5 blocks in 10 s: 0.5 blocks/s, 10 s left
    assert mid.text() .endswith("0.50 blocks/s, 10 s left")
    quiet = io.StringIO()
    with Progress(3, stream=quiet, quiet=True) as bar:
        bar.update(3)
    assert quiet.getvalue() == ""
    assert format_duration(42) == "42 s" and format_duration(185) == "3 min 05 s"
    assert format_duration(7620) == "2 h 07 min" and format_duration(float("inf")) == "?"


def test_progress_bars_follow_the_callback(monkeypatch):
    err = io.StringIO()
    monkeypatch.setattr("sys.stderr", err)
    bars = ProgressBars("train: collect")
    for done in range(5):
        bars(done, 4)
    assert bars.bar is None  # finished at done == total
    lines = err.getvalue().splitlines()
    assert lines[0] == "train: collect: 0/4 blocks (0%)"
    assert lines[-1].startswith("train: collect: 4/4 blocks (100%)") and "in all" in lines[-1]
    bars(0, 3)  # a new run starts a new bar
    bars(1, 3)
    bars.close()  # an interrupted run still ends its line
    assert err.getvalue().splitlines()[-1].startswith("train: collect: 1/3 blocks (33%)")


def test_library_log_lines_name_their_step(capsys):
    with library_output(quiet=False):
        logging.getLogger("geosr.pipeline.train").info("fitting the model for %s on %d pairs", "red", 9)
        logging.getLogger("geosr.pipeline.magnify").info("writing the Cloud Optimized GeoTIFF")
        logging.getLogger("geosr.assess.protocol").info("computing metrics")
        logging.getLogger("geosr.pipeline.train").debug("not shown")
    with library_output(quiet=True):
        logging.getLogger("geosr.pipeline.magnify").info("not shown either")
    logging.getLogger("geosr.pipeline.magnify").info("nor outside a command")
    assert capsys.readouterr().err.splitlines() == [
        "train: fitting the model for red on 9 pairs",
        "magnify: writing the Cloud Optimized GeoTIFF",
        "geosr assess: computing metrics",
    ]
