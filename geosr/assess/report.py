"""The assessment report: figures, markdown tables, metrics.json, written atomically.

Figures are drawn on :class:`matplotlib.figure.Figure` objects with their own
Agg canvas, so no matplotlib backend is selected or changed.
"""

from __future__ import annotations

import contextlib
import errno
import json
import math
import os
import shutil
import tempfile
import warnings
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..cautions import SCORES_CAUTION
from ..errors import DestinationError

__all__ = ["GUIDE_CAUTION", "HIGHER_IS_BETTER", "METHODS", "prepare_destination", "write_guided_report", "write_report"]

#: Methods compared, in report order.
METHODS = ("geosr", "bicubic", "lanczos", "nearest")

#: Metric keys of metrics.json and whether a higher value is better.
HIGHER_IS_BETTER = {
    "psnr": True,
    "ssim": True,
    "ergas": False,
    "sam": False,
    "q": True,
    "consistency_rms": False,
    "consistency_max": False,
}



def _figure(figsize):
    """A figure drawn by its own Agg canvas (no pyplot, no backend switch)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize)
    FigureCanvasAgg(fig)
    return fig


def _most_textured(ref, valid, size):
    """Top-left (row, col) of the size x size window of highest local variance."""
    from scipy import ndimage

    x = np.where(valid, ref, 0.0).mean(axis=0)
    mean = ndimage.uniform_filter(x, size, mode="constant")
    var = ndimage.uniform_filter(x * x, size, mode="constant") - mean * mean
    ok = ndimage.uniform_filter(valid.astype(np.float64), size, mode="constant") > 1 - 1e-9
    h = size // 2
    rows, cols = x.shape
    score = np.where(ok, var, -np.inf)
    # keep windows wholly inside the image
    score[: h, :] = -np.inf
    score[:, : h] = -np.inf
    score[rows - (size - h) + 1 :, :] = -np.inf
    score[:, cols - (size - h) + 1 :] = -np.inf
    if not np.isfinite(score).any():
        score = var
    r, c = np.unravel_index(int(np.argmax(score)), score.shape)
    return max(0, int(r) - h), max(0, int(c) - h)




def _fmt(value):
    if value is None:
        return "-"
    if math.isinf(value):
        return "inf"
    return f"{value:.4f}" if abs(value) < 100 else f"{value:.2f}"


def _table(rows_by_method, title):
    keys = list(HIGHER_IS_BETTER)
    lines = [f"**{title}**", "", "| method | " + " | ".join(keys) + " |",
             "|---" * (len(keys) + 1) + "|"]
    best = {}
    for k in keys:
        vals = [rows_by_method[m][k] for m in rows_by_method if rows_by_method[m][k] is not None]
        if vals:
            best[k] = max(vals) if HIGHER_IS_BETTER[k] else min(vals)
    for method, row in rows_by_method.items():
        cells = []
        for k in keys:
            text = _fmt(row[k])
            if row[k] is not None and k in best and row[k] == best[k]:
                text = f"**{text}**"
            cells.append(text)
        lines.append(f"| {method} | " + " | ".join(cells) + " |")
    return lines + [""]


def _protocol_lines(result):
    """The reference, scale, degradation, crop and model sentences of report.md."""
    p = result["protocol"]
    return [
        f"Reference: `{p['reference']}`; bands {', '.join(map(str, p['bands']))}; "
        f"scale x{p['scale']}; degradation {p['degradation']}"
        + (f" (sigma {p['sigma']:.4f} high-res pixels)" if p["sigma"] is not None else "")
        + f"; crop {p['crop']['rows']} x {p['crop']['cols']} pixels; "
        f"{p['valid_pixels']} valid pixels compared.",
        "",
        f"geosr {result['geosr_version']}; model: {result['model']['source']} "
        f"(method {result['model']['method']}, sha256 {result['model_sha256']}); spectral guard "
        f"{'on' if result['model']['spectral_guard'] else 'off'}.",
        "",
    ]


def _write_markdown(path, result, band_names, figures):
    lines = ["# geosr assessment under Wald's protocol", ""] + _protocol_lines(result) + [
        "The reference was degraded by the scale, magnified back by each method and compared "
        "with the reference over valid pixels (Wald, Ranchin & Mangolini, PE&RS 1997). "
        "Bold marks the better value of each metric: higher PSNR, SSIM and Q; lower ERGAS, "
        "SAM (degrees) and consistency error (RMS and max of degrade(output) - low-res input).",
        "",
        f"> **Caution.** {SCORES_CAUTION}",
        "",
    ]
    lines += _table({m: result[m]["overall"] for m in METHODS}, "Overall")
    for b, name in enumerate(band_names):
        lines += _table({m: result[m]["bands"][b] for m in METHODS}, f"Band {name}")
    lines += ["## Figures", ""] + [f"- `{f}`" for f in figures] + [""]
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("\n".join(lines))


def _display(stack, lo, hi):
    """(bands, r, c) -> image for imshow: RGB from the first three bands or grey."""
    scaled = np.clip((stack - lo) / (hi - lo if hi > lo else 1.0), 0, 1)
    if stack.shape[0] >= 3:
        return np.moveaxis(scaled[:3], 0, -1), None
    return scaled[0], "gray"


def _write_figures(folder, ref, outputs, valid, window, band_names):
    names = []
    r, c, size = window
    crop = (slice(None), slice(r, r + size), slice(c, c + size))
    vals = ref[crop][:, valid[r : r + size, c : c + size]]
    lo, hi = (np.percentile(vals, [2, 98]) if vals.size else (ref.min(), ref.max()))
    fig = _figure(figsize=(12, 4.4))
    for i, (title, img) in enumerate(
        [("reference", ref), ("GDAL bicubic", outputs["bicubic"]), ("geosr", outputs["geosr"])]
    ):
        ax = fig.add_subplot(1, 3, i + 1)
        shown, cmap = _display(np.nan_to_num(img[crop]), lo, hi)
        ax.imshow(shown, cmap=cmap, interpolation="nearest")
        ax.set_title(title)
        ax.set_axis_off()
    fig.suptitle(f"Most textured {size} x {size} window at row {r}, col {c} "
                 "(geosr detail is synthesized)")
    names.append("crop_comparison.png")
    fig.savefig(os.path.join(folder, names[-1]), dpi=100)

    return names + _write_error_maps(folder, ref, outputs, valid, METHODS)


def _write_error_maps(folder, ref, outputs, valid, methods):
    """One map of the band-mean absolute error per method, on one colour scale."""
    names = []
    errs = {m: np.abs(np.nan_to_num(outputs[m]) - ref).mean(axis=0) for m in methods}
    vmax = max(float(np.percentile(e[valid], 99)) for e in errs.values()) or 1.0
    for m in methods:
        fig = _figure(figsize=(6, 6))
        ax = fig.add_subplot(1, 1, 1)
        im = ax.imshow(np.ma.masked_array(errs[m], ~valid), cmap="magma", vmin=0, vmax=vmax,
                       interpolation="nearest")
        fig.colorbar(im, ax=ax, shrink=0.8, label="absolute error (band mean)")
        ax.set_title(f"|{m} - reference|")
        ax.set_axis_off()
        names.append(f"error_{m}.png")
        fig.savefig(os.path.join(folder, names[-1]), dpi=100)
    return names


def _write_gain_chart(folder, result, band_names, method="geosr"):
    gain = [g["psnr"] - b["psnr"] for g, b in zip(result[method]["bands"], result["bicubic"]["bands"])]
    fig = _figure(figsize=(max(4, 1 + 0.8 * len(gain)), 4))
    ax = fig.add_subplot(1, 1, 1)
    ax.bar([str(n) for n in band_names], gain, color=["tab:green" if g >= 0 else "tab:red" for g in gain])
    ax.axhline(0, color="black", linewidth=0.8)
    ax.set_xlabel("band")
    ax.set_ylabel("PSNR gain over GDAL bicubic (dB)")
    ax.set_title(f"{method} - bicubic, per band")
    fig.tight_layout()
    fig.savefig(os.path.join(folder, "psnr_gain.png"), dpi=100)
    return ["psnr_gain.png"]


#: Files of every report besides the figures (whose names metrics.json lists).
REPORT_FILES = ("metrics.json", "report.md")

#: metrics.json larger than this is not geosr's (a report's is a few KiB).
_METRICS_MAX_BYTES = 16 * 2**20


def _report_files(folder):
    """The names geosr's report writes in ``folder``, from its metrics.json; None if it is not geosr's."""
    path = os.path.join(folder, "metrics.json")
    try:
        if not os.path.isfile(path) or os.path.getsize(path) > _METRICS_MAX_BYTES:
            return None
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return None
    if not (isinstance(data, dict) and isinstance(data.get("geosr_version"), str)
            and isinstance(data.get("protocol"), dict)):
        return None
    figures = data.get("figures", [])
    if not isinstance(figures, list) or not all(
        isinstance(f, str) and f == os.path.basename(f) and f not in ("", ".", "..") for f in figures
    ):
        return None
    return set(REPORT_FILES) | set(figures)


def _is_report(folder):
    """Whether ``folder`` is recognisably a geosr report: geosr's metrics.json, and only the report's files."""
    allowed = _report_files(folder)
    if allowed is None:
        return False
    with os.scandir(folder) as entries:
        return all(e.name in allowed and e.is_file(follow_symlinks=False) for e in entries)


def _refuse_reads_inside(folder, reads, shown):
    """Refuse to replace a folder that holds a file the run reads."""
    from ..raster.io import dataset_files

    inside = os.path.realpath(folder) + os.sep
    for r in reads:
        for f in dataset_files(r):
            if os.path.realpath(f).startswith(inside):
                raise DestinationError(
                    f"The 'report_dir' parameter must not hold a file the run reads, got {shown!r} "
                    f"holding {f!r}; name another folder"
                )


def prepare_destination(report_dir, overwrite, reads=()):
    """Check the report folder before any work; return its absolute path.

    A new folder, an empty one, or (with ``overwrite``) a folder that is
    recognisably a geosr report (:data:`REPORT_FILES` with geosr's
    metrics.json, and the figures it lists; nothing else) is accepted. Any
    other folder is refused, as is one holding a file of ``reads``: geosr
    never removes a file it did not write. A symbolic link to a folder is
    followed: the report replaces the folder it points to, the link stays.

    Raises
    ------
    DestinationError
    """
    shown = os.fspath(report_dir)
    report_dir = os.path.abspath(shown)
    if os.path.islink(report_dir):
        report_dir = os.path.realpath(report_dir)
    if os.path.exists(report_dir):
        if not os.path.isdir(report_dir):
            raise DestinationError(
                f"The 'report_dir' parameter must be a folder, got an existing file {report_dir!r}"
            )
        if os.listdir(report_dir):
            if not overwrite:
                raise DestinationError(
                    f"The 'report_dir' parameter must be an empty or new folder (or pass "
                    f"overwrite=True), got a non-empty folder {report_dir!r}"
                )
            if not _is_report(report_dir):
                raise DestinationError(_not_a_report(shown))
            _refuse_reads_inside(report_dir, reads, shown)
    parent = os.path.dirname(report_dir)
    if not os.path.isdir(parent):
        raise DestinationError(f"The 'report_dir' parameter must be in an existing folder, got {report_dir!r}")
    return report_dir


def _not_a_report(shown):
    return (
        f"The 'report_dir' parameter must be a new or empty folder, or a geosr report folder to "
        f"replace (geosr's metrics.json and the report's files only), got {shown!r} holding other "
        "files; geosr never removes files it did not write, so name another folder"
    )


def _umask():
    """The process's umask (read from /proc where it can be, so it is never changed)."""
    with contextlib.suppress(OSError, ValueError):
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _publish(tmp, report_dir, overwrite=True):
    """Move the finished temp folder into place, replacing an old report.

    A missing or empty ``report_dir`` is replaced in one rename. A full one
    is checked again (it may have changed during the run), moved aside,
    replaced, and then only the old report's own files are removed.
    """
    os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes it private; a report folder is an ordinary folder
    try:
        os.rename(tmp, report_dir)
        return
    except OSError as exc:
        if not os.path.isdir(report_dir) or exc.errno not in (errno.ENOTEMPTY, errno.EEXIST):
            raise DestinationError(f"The report folder {report_dir!r} must be writable, got: {exc}") from None
    if not overwrite:
        raise DestinationError(
            f"The 'report_dir' parameter must be an empty or new folder, got {report_dir!r} filled while "
            "this run was working (another run?); pass overwrite=True (--overwrite) to replace it"
        )
    old = tempfile.mkdtemp(prefix=".geosr-report-old-", dir=os.path.dirname(report_dir))
    os.rmdir(old)
    os.rename(report_dir, old)
    try:
        if not _is_report(old):
            raise DestinationError(_not_a_report(report_dir))
        os.rename(tmp, report_dir)
    except BaseException:
        os.rename(old, report_dir)
        raise
    _remove_report(old)


def _remove_report(folder):
    """Remove an old report's own files, then its folder if nothing else is left."""
    for name in _report_files(folder) or ():
        with contextlib.suppress(FileNotFoundError):
            os.unlink(os.path.join(folder, name))
    try:
        os.rmdir(folder)
    except OSError:
        warnings.warn(f"geosr left {folder!r}: it holds files geosr did not write", stacklevel=2)


def write_report(
    report_dir: str,
    result: dict[str, Any],
    ref: np.ndarray,
    outputs: Mapping[str, np.ndarray],
    valid: np.ndarray,
    crop_size: int,
    band_names: Sequence[str],
    overwrite: bool = True,
) -> None:
    """Write metrics.json, report.md and the figures into ``report_dir``.

    Everything goes into a temporary folder beside ``report_dir`` that is
    renamed into place at the end, so a failed run leaves no half report.
    Without ``overwrite`` a folder filled by someone else during the run is
    refused (see :func:`_publish`).
    ``result`` gains ``figures`` and ``protocol["figure_window"]``.
    """
    def figures(tmp, window):
        return (_write_figures(tmp, ref, outputs, valid, window, band_names)
                + _write_gain_chart(tmp, result, band_names))

    _write_all(report_dir, result, ref, valid, crop_size, figures,
               lambda path, names: _write_markdown(path, result, band_names, names), overwrite)


def _write_all(report_dir, result, ref, valid, crop_size, figures, markdown, overwrite=True):
    """The figures (``figures(folder, window)``), metrics.json and report.md, atomically."""
    rows, cols = ref.shape[1:]
    size = int(min(crop_size, rows, cols))
    r0, c0 = _most_textured(ref, valid, size)
    tmp = tempfile.mkdtemp(prefix=".geosr-report-", dir=os.path.dirname(report_dir))
    try:
        names = figures(tmp, (r0, c0, size))
        result["figures"] = names
        result["protocol"]["figure_window"] = {"row_off": r0, "col_off": c0, "size": size}
        with open(os.path.join(tmp, "metrics.json"), "w", encoding="utf-8") as fh:
            json.dump(result, fh, indent=2, allow_nan=True)
        markdown(os.path.join(tmp, "report.md"), names)
        _publish(tmp, report_dir, overwrite)
    except BaseException:
        with contextlib.suppress(OSError):
            shutil.rmtree(tmp)
        raise


# --------------------------------------------------------------------------
# Guided assessment
# --------------------------------------------------------------------------

#: The cautions of a guided report.
GUIDE_CAUTION = (
    "Guided detail is measured in the guide, not in the band itself: the guide must be "
    "co-registered with the reference and acquired at nearly the same time (moved or changed "
    "ground puts wrong detail in place), and detail taken from a band of another spectral "
    "response can be wrong for a band that does not correlate with it."
)

#: Report labels of the methods that need one.
_LABELS = {"geosr": "geosr (single image)", "bicubic": "bicubic (GDAL)",
           "interpolation": "bicubic (geosr)", "lanczos": "lanczos (GDAL)",
           "highpass": "highpass (GLP/HPF)", "substitution": "substitution (GSA)",
           "guided": "guided (geosr)"}


def _guide_lines(result, band_names):
    g = result["guide"]
    lines = [
        f"Guide: {', '.join(f'`{f}`' for f in g['files'])}; bands {', '.join(map(str, g['bands']))}; "
        + ("on the reference's grid, used as read" if g["scale_ratio"] == 1 else
           f"{g['scale_ratio']} times finer than the reference, brought onto its grid: "
           f"{g['on_reference_grid']}")
        + (f"; resampled onto the grid (cubic): {', '.join(g['resampled'])}" if g["resampled"] else "")
        + f". The guided output is plain bicubic interpolation at {100 * g['fallback_share']:.1f}% of "
        "the compared pixels, where the guide's footprint is not wholly valid"
        + ("" if not g["footprint_psnr"] else "; PSNR over the other pixels: " + ", ".join(
            f"{_LABELS.get(m, m)} {v:.2f} dB" for m, v in g["footprint_psnr"].items()))
        + ".",
        "",
        "| band | correlation with the guide |", "|---|---|",
    ]
    lines += [f"| {n} | {c:.4f} |" for n, c in zip(band_names, g["correlation"])] + [""]
    lines += [f"> **Warning.** Band {n} correlates with the guide at {c:.2f}, below "
              f"{g['weak_correlation_below']}: its guided detail may be wrong."
              for n, c in zip(band_names, g["correlation"]) if not c >= g["weak_correlation_below"]]
    return lines + [""]


def _qnr_lines(nr):
    lines = ["## No-reference quality", "",
             f"{nr['name']}, at the guide's native resolution (x{nr['scale']}, Q in "
             f"{nr['block']} x {nr['block']} windows): {nr['setup']} QNR = (1 - D_lambda)(1 - D_s); "
             "1 is best, D_lambda and D_s 0 are best.", "",
             "| method | QNR | D_lambda | D_s |", "|---|---|---|---|"]
    for m, v in nr["methods"].items():
        lines.append(f"| {_LABELS.get(m, m)} | {_fmt(v['qnr'])} | {_fmt(v['d_lambda'])} | {_fmt(v['d_s'])} |")
    return lines + [""]


def _write_guided_markdown(path, result, band_names, figures):
    methods = result["methods"]
    lines = ["# geosr assessment of guided magnification under Wald's protocol", ""]
    lines += _protocol_lines(result) + _guide_lines(result, band_names) + [
        "The reference was degraded by the scale and magnified back by each method, the guided "
        "ones reading the guide on the reference's grid as their finer band; each result was "
        "compared with the reference over valid pixels (Wald, Ranchin & Mangolini, PE&RS 1997). "
        "highpass: high-pass injection with regression gains (Aiazzi et al., PE&RS 2006); "
        "substitution: GSA (Aiazzi, Baronti & Selva, IEEE TGRS 2007); guided: geosr's guided "
        "regression learned on the degraded reference. Bold marks the better value of each metric.",
        "",
        f"> **Caution.** {SCORES_CAUTION}",
        "",
        f"> **Caution.** {GUIDE_CAUTION}",
        "",
    ]
    lines += _table({_LABELS.get(m, m): result[m]["overall"] for m in methods}, "Overall")
    for b, name in enumerate(band_names):
        lines += _table({_LABELS.get(m, m): result[m]["bands"][b] for m in methods}, f"Band {name}")
    lines += _qnr_lines(result["no_reference"])
    lines += ["## Figures", ""] + [f"- `{f}`" for f in figures] + [""]
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("\n".join(lines))


def _write_guided_crops(folder, ref, outputs, valid, window, guide):
    """Reference, guide, GDAL bicubic, single-image geosr and guided crops side by side."""
    r, c, size = window
    crop = (slice(None), slice(r, r + size), slice(c, c + size))
    vals = ref[crop][:, valid[r : r + size, c : c + size]]
    lo, hi = (np.percentile(vals, [2, 98]) if vals.size else (ref.min(), ref.max()))
    g = guide[r : r + size, c : c + size]
    g_lo, g_hi = np.percentile(g, [2, 98])
    panels = [("reference", ref[crop], lo, hi), ("guide", g[None], g_lo, g_hi),
              ("GDAL bicubic", outputs["bicubic"][crop], lo, hi),
              ("geosr (single image)", outputs["geosr"][crop], lo, hi),
              ("guided", outputs["guided"][crop], lo, hi)]
    fig = _figure(figsize=(20, 4.6))
    for i, (title, img, a, b) in enumerate(panels):
        ax = fig.add_subplot(1, len(panels), i + 1)
        shown, cmap = _display(np.nan_to_num(img), a, b)
        ax.imshow(shown, cmap=cmap, interpolation="nearest")
        ax.set_title(title)
        ax.set_axis_off()
    fig.suptitle(f"Most textured {size} x {size} window at row {r}, col {c} "
                 "(single-image detail is synthesized; guided detail comes from the guide)")
    fig.savefig(os.path.join(folder, "crop_comparison.png"), dpi=100)
    return ["crop_comparison.png"]


def write_guided_report(
    report_dir: str,
    result: dict[str, Any],
    ref: np.ndarray,
    outputs: Mapping[str, np.ndarray],
    valid: np.ndarray,
    crop_size: int,
    band_names: Sequence[str],
    guide: np.ndarray,
    overwrite: bool = True,
) -> None:
    """Write the report of a guided assessment, as :func:`write_report` does.

    ``result`` must hold ``methods`` (the report order), ``guide`` and
    ``no_reference`` as :func:`geosr.assess.guided.assess_guided` makes them;
    ``guide`` is the guide on the reference's grid, one band (the mean of the
    guide bands), for the crop figure.
    """
    def figures(tmp, window):
        return (_write_guided_crops(tmp, ref, outputs, valid, window, guide)
                + _write_error_maps(tmp, ref, outputs, valid, result["methods"])
                + _write_gain_chart(tmp, result, band_names, "guided"))

    _write_all(report_dir, result, ref, valid, crop_size, figures,
               lambda path, names: _write_guided_markdown(path, result, band_names, names), overwrite)
