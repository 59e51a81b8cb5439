"""report.html: one self-contained page, checked with the standard library's html.parser."""

from __future__ import annotations

import base64
import json
import os
from html.parser import HTMLParser

import numpy as np
import pytest
import rasterio
from affine import Affine
from skimage import data as skdata

from geosr.assess.protocol import assess_raster
from geosr.assess.report import COLUMNS, _fmt, write_html

HEADERS = ["method", "PSNR (dB)", "SSIM", "ERGAS", "SAM (°)", "Q"]


class _Page(HTMLParser):
    """Images, tables (their header cells), links and scripts of a page."""

    def __init__(self):
        super().__init__()
        self.imgs, self.tables, self.refs, self.scripts, self.headings = [], [], [], [], []
        self._cell = None
        self._heading = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.imgs.append(attrs)
        if tag == "table":
            self.tables.append([])
        if tag == "th":
            self._cell = ""
        if tag in ("h1", "h2", "h3"):
            self._heading = ""
        if tag == "script":
            self.scripts.append(attrs)
        for key in ("src", "href"):
            if key in attrs:
                self.refs.append(attrs[key])

    def handle_data(self, data):
        if self._cell is not None:
            self._cell += data
        if self._heading is not None:
            self._heading += data

    def handle_endtag(self, tag):
        if tag == "th":
            self.tables[-1].append(self._cell.strip())
            self._cell = None
        if tag in ("h1", "h2", "h3"):
            self.headings.append(self._heading.strip())
            self._heading = None


def _parse(path):
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    page.close()
    return page


def _check_self_contained(page, folder):
    assert page.imgs, "no figure"
    for img in page.imgs:
        src = img["src"]
        assert src.startswith("data:image/png;base64,"), src[:40]
        # The embedded bytes are a PNG (its 8-byte signature, PNG specification 5.2).
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
        assert img.get("alt")
    for ref in page.refs:
        assert not ref.lower().startswith(("http:", "https:", "//")), ref
    assert all("src" not in s for s in page.scripts)
    # Every figure the report lists is embedded, plus the two crops of the before/after pair.
    listed = json.loads((folder / "metrics.json").read_text())["figures"]
    assert len(page.imgs) == len(listed) + 2
    alts = [img["alt"] for img in page.imgs]
    assert "GDAL bicubic" in alts
    # Without JavaScript the pair shows as two images; the script is inline (no src).
    assert len(page.scripts) == 1


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("html")
    # scikit-image's bundled astronaut photo (NASA, public domain), 3 bands.
    rgb = np.moveaxis(skdata.astronaut(), -1, 0)[:, 160:288, 160:288].copy()
    with rasterio.open(tmp / "ref.tif", "w", driver="GTiff", width=128, height=128, count=3, dtype="uint8",
                       crs="EPSG:32618", transform=Affine(10.0, 0, 5e5, 0, -10.0, 4e6)) as ds:
        ds.write(rgb)
    assess_raster(tmp / "ref.tif", tmp / "rep", 2, crop_size=48)
    return tmp / "rep"


def test_report_html_is_self_contained_with_every_table(report):
    names = set(os.listdir(report))
    assert {"report.html", "report.md", "metrics.json", "detail_map.png", "crop_comparison.png"} <= names
    page = _parse(report / "report.html")
    _check_self_contained(page, report)
    # The overall table and one per band, each with the readable headers.
    assert len(page.tables) == 4
    for headers in page.tables:
        assert headers[:6] == HEADERS
    assert page.headings.count("Overall") == 1
    assert len([h for h in page.headings if h.startswith("Band ")]) == 3
    md = (report / "report.md").read_text(encoding="utf-8")
    assert "| method | PSNR (dB) | SSIM | ERGAS | SAM (°) | Q |" in md


def test_table_values_match_metrics_json(report):
    text = (report / "report.html").read_text(encoding="utf-8")
    metrics = json.loads((report / "metrics.json").read_text())
    for method in ("geosr", "bicubic"):
        assert f"<td>{_fmt(metrics[method]['overall']['psnr'])}" in text.replace("<strong>", "")
    assert "<blockquote><p><strong>Caution.</strong>" in text


def test_write_html_escapes_and_embeds(tmp_path):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(1, 1))
    FigureCanvasAgg(fig)
    fig.savefig(tmp_path / "a.png")
    (tmp_path / "report.md").write_text(
        "# Title <x>\n\n**Overall**\n\n| method | " + " | ".join(COLUMNS[k] for k in ("psnr", "sam")) + " |\n"
        "|---|---|---|\n| geosr | **30.1** | 2.0 |\n\n> **Caution.** a & b\n\n## Figures\n\n- `a.png`\n"
        "- `missing.png`\n", encoding="utf-8")
    page = _parse(tmp_path / write_html(str(tmp_path)).split(os.sep)[-1])
    assert page.tables == [["method", "PSNR (dB)", "SAM (°)"]]
    assert len(page.imgs) == 1 and page.imgs[0]["src"].startswith("data:image/png;base64,")
    text = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert "Title &lt;x&gt;" in text and "a &amp; b" in text and "<strong>30.1</strong>" in text


def test_guided_report_html(tmp_path):
    # The bundled astronaut photo as reference; the guide is its band mean on the same grid.
    rgb = np.moveaxis(skdata.astronaut(), -1, 0)[:, 200:296, 200:296].astype(np.float32)
    profile = dict(driver="GTiff", width=96, height=96, dtype="float32", crs="EPSG:32618",
                   transform=Affine(10.0, 0, 5e5, 0, -10.0, 4e6))
    with rasterio.open(tmp_path / "ref.tif", "w", count=3, **profile) as ds:
        ds.write(rgb)
    with rasterio.open(tmp_path / "guide.tif", "w", count=1, **profile) as ds:
        ds.write(rgb.mean(axis=0)[None])
    assess_raster(tmp_path / "ref.tif", tmp_path / "rep", 2, guide=[tmp_path / "guide.tif"], crop_size=48)
    folder = tmp_path / "rep"
    page = _parse(folder / "report.html")
    _check_self_contained(page, folder)
    metric_tables = [t for t in page.tables if t[1:2] == ["PSNR (dB)"]]
    assert len(metric_tables) == 4 and all(t[:6] == HEADERS for t in metric_tables)
    assert ["band", "correlation with the guide"] in page.tables
    assert ["method", "QNR", "D_lambda", "D_s"] in page.tables
    assert "detail_map.png" in os.listdir(folder)


def test_a_report_with_its_html_can_be_replaced(report, tmp_path):
    # The folder holds report.html: it is still recognisably a geosr report, so overwrite replaces it.
    import shutil

    folder = tmp_path / "again"
    shutil.copytree(report, folder)
    before = (folder / "report.html").stat().st_mtime_ns
    assess_raster(report.parent / "ref.tif", folder, 2,
                  crop_size=48, overwrite=True)
    assert (folder / "report.html").stat().st_mtime_ns != before
    assert _parse(folder / "report.html").imgs
