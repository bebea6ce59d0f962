"""What bounds a decode step: streaming read bandwidth against the one-row products of SmolLM2's shapes.

    python benchmarks/bandwidth.py [--threads 1,2] [--runs 5]

For each thread count: the bandwidth of summing a 256 MB float32 tensor (the limit `benchmarks/speed.py`
divides by), then the bandwidth one-row products x Wᵀ reach on the matrices a decode step reads: float32
column-major (the layout `attncompress.model.fuse` gives, `gemv_layout`), float32 row-major, and float16
row-major through `attncompress.model.product` (what `halve` runs: the input rounded to float16, the output
widened back). Bandwidth = bytes of W as stored / time. Each shape is timed over enough distinct copies
(≥ 100 MB of float32) that nothing is served from cache. All in one run, interleaved. OpenMP waiting is
active (run it on an idle machine). Writes benchmarks/results/bandwidth.json.
"""
import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

os.environ["OMP_WAIT_POLICY"] = "ACTIVE"  # before torch starts its thread pool
sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import torch  # noqa: E402

from attncompress.compare import measure_bandwidth  # noqa: E402
from attncompress.model import gemv_layout, product  # noqa: E402

# (what, d_out, d_in) read per decode step by dense SmolLM2 and by a keep-0.5 copy (typical ranks)
SHAPES = [("dense q|k|v fused", 960, 576), ("dense o", 576, 576), ("dense gate|up fused", 3072, 576),
          ("dense down", 576, 1536), ("output head (tied)", 49152, 576),
          ("0.5 q|k|v fused", 822, 576), ("0.5 gate|up first factors", 330, 576), ("0.5 gate/up second", 1536, 165),
          ("0.5 down first", 160, 1536), ("0.5 down second", 576, 160)]
LAYOUTS = ("float32 column-major", "float32 row-major", "float16 row-major")
RESULTS = Path(__file__).parent / "results" / "bandwidth.json"


def _time(fn, runs):
    ts = []
    for _ in range(runs):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return statistics.median(ts)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--threads", default="1,2")
    ap.add_argument("--runs", type=int, default=5)
    args = ap.parse_args()
    load_before = os.getloadavg()
    buf = torch.ones(256 << 18)
    mats = {}
    for what, n, m in SHAPES:
        copies = max(2, int(100e6 // (n * m * 4)))
        col = [gemv_layout(torch.randn(n, m)) for _ in range(copies)]
        mats[what] = (n, m, {LAYOUTS[0]: col, LAYOUTS[1]: [w.contiguous() for w in col],
                             LAYOUTS[2]: [w.half().contiguous() for w in col]})
    out = {"command": "python benchmarks/bandwidth.py " + " ".join(sys.argv[1:]),
           "commit": subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True,
                                    cwd=Path(__file__).parent).stdout.strip(),
           "torch": torch.__version__, "load_before": load_before, "runs": args.runs, "by_threads": {}}
    for threads in (int(t) for t in args.threads.split(",")):
        torch.set_num_threads(threads)
        stream = measure_bandwidth(buffer=buf) / 1e9
        print(f"{threads} thread(s): streaming read (sum of 256 MB) {stream:.1f} GB/s")
        print(f"  {'matrix':<28} {'d_out x d_in':>13} " + " ".join(f"{k:>21}" for k in LAYOUTS))
        rows = []
        for what, (n, m, ws) in mats.items():
            x = torch.randn(1, m)
            rate = {}
            with torch.inference_mode():
                for lay, group in ws.items():
                    t = _time(lambda: [product(x, w) for w in group], args.runs) / len(group)
                    rate[lay] = n * m * group[0].element_size() / t / 1e9
            rows.append({"matrix": what, "d_out": n, "d_in": m, "gb_s": rate})
            print(f"  {what:<28} {f'{n}x{m}':>13} " + " ".join(f"{rate[k]:>16.1f} GB/s" for k in LAYOUTS))
        out["by_threads"][str(threads)] = {"streaming_gb_s": stream, "rows": rows}
    out["load_after"] = os.getloadavg()
    RESULTS.write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
