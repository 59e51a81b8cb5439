"""Peak memory of magnify_raster on a large scene against a 4096 x 4096 one.

Each size runs in a fresh child process, which reports its peak RSS
(``resource.getrusage``) before and after the run. Both use the default
chunk size and scheduler and the shipped x2 model. The reference is the
4096 x 4096 peak measured in the same run: memory is bounded by the chunk
size, so the 16384 x 16384 peak should stay within 10 % of it (and under
1.5 GB).

    .venv/bin/python benchmarks/bench_memory.py [--quick]

``--quick`` (or the environment variable GEOSR_BENCH_QUICK=1) uses 512 and
2048 pixel sides instead; ``make bench`` runs the full sizes.
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import make_raster, result  # noqa: E402

LIMIT_BYTES = 1.5e9

CHILD = r'''
import json, resource, sys, time
from geosr.modelfile import default_model
from geosr.pipeline.magnify import magnify_raster
model = default_model(2)
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t = time.perf_counter()
r = magnify_raster(sys.argv[1], sys.argv[2], model, overwrite=True)
dt = time.perf_counter() - t
print(json.dumps({"before_kib": base, "peak_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "seconds": dt, "out_mpx": r.width * r.height * r.count / 1e6, "chunk": r.chunk_size}))
'''


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    quick = args.quick or os.environ.get("GEOSR_BENCH_QUICK", "") not in ("", "0")
    sides = [512, 2048] if quick else [4096, 16384]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for side in sides:
            src = os.path.join(tmp, f"src-{side}.tif")
            make_raster(src, side)
            out = subprocess.run([sys.executable, "-c", CHILD, src, os.path.join(tmp, "out.tif")],
                                 capture_output=True, text=True, check=True)
            os.unlink(src)
            d = json.loads(out.stdout.strip().splitlines()[-1])
            d["side"] = side
            rows.append(d)
            print(f"{side:5d}^2 uint16 -> x2 {d['out_mpx']:8.1f} Mpx: peak RSS {d['peak_kib'] / 1024:7.1f} MiB "
                  f"(after loading {d['before_kib'] / 1024:6.1f} MiB), {d['seconds']:7.1f} s, "
                  f"{d['out_mpx'] / d['seconds']:5.2f} output Mpx/s, chunk {d['chunk']}", flush=True)
    ref = rows[0]
    for d in rows:
        peak = d["peak_kib"] * 1024
        ratio = d["peak_kib"] / ref["peak_kib"]
        fields = dict(metric=f"peak_rss_{d['side']}px", value=round(peak / 2**20, 1), unit="MiB",
                      reference=f"peak RSS of the {ref['side']} px raster in the same run",
                      reference_value=round(ref["peak_kib"] / 1024, 1), ratio=round(ratio, 3),
                      notes=f"default chunk ({d['chunk']}) and scheduler, x2, shipped model, "
                            f"{d['seconds']:.0f} s; ratio = peak / reference peak")
        if d is rows[-1]:
            fields.update(target="under 1.5 GB and within 10 % of the 4096 px peak",
                          meets_target=bool(peak < LIMIT_BYTES and ratio <= 1.10))
        result("memory", **fields)


if __name__ == "__main__":
    main()
