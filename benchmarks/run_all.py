"""Run every benchmarks/bench_*.py and write BENCHMARKS.md at the repository root.

    .venv/bin/python benchmarks/run_all.py                 # all of them (make bench)
    .venv/bin/python benchmarks/run_all.py -k sparse       # those whose name contains "sparse"
    .venv/bin/python benchmarks/run_all.py --quick         # pass --quick to each script
    .venv/bin/python benchmarks/run_all.py -k bench_quality --script-args=--train-sparse

Convention for benchmark authors
--------------------------------
A benchmark is a script ``benchmarks/bench_<name>.py`` runnable on its own
with the project's interpreter. It prints whatever it likes for people
(a plain table is best) and, for every figure it wants collected, one line

    RESULT {"benchmark": "<name>", "metric": "...", "value": 1.23, "unit": "..."}

that is the word ``RESULT``, one space, and one JSON object on one line.
Required keys: ``benchmark`` (str), ``metric`` (str), ``value`` (number),
``unit`` (str). Optional keys: ``reference`` (what it was compared with, a
library function or a tool, measured in the same run), ``reference_value``
(number, same unit), ``ratio`` (how many times faster than the reference,
> 1 means faster; say so in ``notes`` if your ratio means something else),
``target`` (str, the issue's target), ``meets_target`` (bool) and ``notes``
(str). Speed is always shown as a ratio against a reference measured in
the same run, never as an absolute promise. It should accept ``--quick``
(small sizes, a smoke run). Exit status 0 on success.

Each script runs as a subprocess with the same interpreter and environment
(this runner changes no BLAS or threading variable; OPENBLAS_CORETYPE, if
the machine sets it, is recorded in the machine section).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import shlex
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PREFIX = "RESULT "


def parse_results(stdout):
    """The RESULT records in a script's output; malformed lines are reported, not fatal."""
    records, errors = [], []
    for line in stdout.splitlines():
        if not line.startswith(PREFIX):
            continue
        try:
            rec = json.loads(line[len(PREFIX) :])
        except json.JSONDecodeError as exc:
            errors.append(f"unreadable RESULT line ({exc}): {line[:120]}")
            continue
        missing = [k for k in ("benchmark", "metric", "value", "unit") if k not in rec]
        if not isinstance(rec, dict) or missing:
            errors.append(f"RESULT line without {missing}: {line[:120]}")
            continue
        records.append(rec)
    return records, errors


def _cpu_name():
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.lower().startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def machine_info():
    """Facts about this machine and the numerical stack, as (label, value) pairs."""
    info = [
        ("CPU", _cpu_name()),
        ("cores usable", str(len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count())),
        ("logical CPUs", str(os.cpu_count())),
    ]
    try:
        import psutil

        info.append(("memory", f"{psutil.virtual_memory().total / 2**30:.1f} GiB"))
    except ImportError:
        pass
    info.append(("OS", platform.platform()))
    info.append(("Python", platform.python_version()))
    for mod in ("numpy", "scipy", "sklearn", "numba", "threadpoolctl", "dask", "rasterio"):
        try:
            m = __import__(mod)
            info.append((mod, getattr(m, "__version__", "?")))
        except ImportError:
            info.append((mod, "not installed"))
    try:
        import numpy  # noqa: F401  (loads its BLAS)
        import scipy.linalg  # noqa: F401
        from threadpoolctl import threadpool_info

        for lib in threadpool_info():
            label = f"{lib.get('user_api')}: {lib.get('internal_api')}"
            info.append(
                (
                    label,
                    f"{lib.get('version')} ({lib.get('architecture', '-')}, "
                    f"{lib.get('num_threads')} threads) {Path(lib.get('filepath', '')).name}",
                )
            )
    except ImportError:
        pass
    for var in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "NUMBA_NUM_THREADS"):
        if var in os.environ:
            info.append((var, os.environ[var]))
    return info


def run_script(path, quick, timeout, extra=()):
    cmd = [sys.executable, str(path)] + (["--quick"] if quick else []) + list(extra)
    t0 = time.perf_counter()
    try:
        proc = subprocess.run(cmd, cwd=ROOT, capture_output=True, text=True, timeout=timeout)
        rc, out, err = proc.returncode, proc.stdout, proc.stderr
    except subprocess.TimeoutExpired as exc:
        rc = "timeout"
        out = exc.stdout.decode() if isinstance(exc.stdout, bytes) else (exc.stdout or "")
        err = f"timed out after {timeout} s"
    return rc, out, err, time.perf_counter() - t0


def _fmt(v):
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.4g}"
    return str(v)


def write_report(path, machine, runs, quick):
    lines = [
        "# Benchmarks",
        "",
        f"Written by `benchmarks/run_all.py` on {_dt.datetime.now(_dt.timezone.utc).strftime('%Y-%m-%d %H:%M UTC')}"
        + (" (quick sizes: smoke run, not the figures)" if quick else "")
        + ". Every speed figure is a ratio against a reference measured in the same run on this machine.",
        "",
        "## Machine",
        "",
        "| | |",
        "| --- | --- |",
    ]
    lines += [f"| {k} | {v} |" for k, v in machine]
    for run in runs:
        lines += ["", f"## {run['script']}", ""]
        status = "ok" if run["rc"] == 0 else f"FAILED (exit {run['rc']})"
        lines.append(f"Status: {status}, {run['seconds']:.1f} s.")
        if run["records"]:
            lines += [
                "",
                "| metric | value | unit | reference | reference value | ratio | target | meets target | notes |",
                "| --- | --- | --- | --- | --- | --- | --- | --- | --- |",
            ]
            for r in run["records"]:
                cells = [r.get(k) for k in ("metric", "value", "unit", "reference", "reference_value", "ratio", "target", "meets_target", "notes")]
                lines.append("| " + " | ".join(_fmt(c).replace("|", "/") for c in cells) + " |")
        for e in run["errors"]:
            lines += ["", f"- {e}"]
        if run["rc"] != 0 and run["stderr"]:
            tail = "\n".join(run["stderr"].strip().splitlines()[-15:])
            lines += ["", "```", tail, "```"]
    Path(path).write_text("\n".join(lines) + "\n")


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("-k", dest="pattern", default="", help="only scripts whose name contains this")
    p.add_argument("--quick", action="store_true", help="pass --quick to every script")
    p.add_argument("--output", default=str(ROOT / "BENCHMARKS.md"))
    p.add_argument("--timeout", type=float, default=3600.0, help="seconds per script")
    p.add_argument("--script-args", default="", help="more arguments for every script, one string "
                   "(e.g. -k bench_quality --script-args=--train-sparse)")
    args = p.parse_args(argv)

    scripts = sorted(s for s in HERE.glob("bench_*.py") if args.pattern in s.name)
    if not scripts:
        print(f"no benchmarks/bench_*.py matching {args.pattern!r}", file=sys.stderr)
        return 1
    runs = []
    for script in scripts:
        print(f"== {script.name}", flush=True)
        rc, out, err, seconds = run_script(script, args.quick, args.timeout, shlex.split(args.script_args))
        sys.stdout.write(out)
        if rc != 0:
            sys.stdout.write(err)
        records, errors = parse_results(out)
        runs.append(
            {"script": script.name, "rc": rc, "records": records, "errors": errors, "stderr": err, "seconds": seconds}
        )
    write_report(args.output, machine_info(), runs, args.quick)
    print(f"wrote {args.output}")
    return 0 if all(r["rc"] == 0 for r in runs) else 1


if __name__ == "__main__":
    sys.exit(main())
