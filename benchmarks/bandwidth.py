"""What bounds a decode step: streaming read bandwidth against the matrix-vector products of SmolLM2's shapes.

    python benchmarks/bandwidth.py [--threads 1,2] [--runs 5]

For each thread count: the bandwidth of summing a 256 MB float32 tensor (the limit `benchmarks/speed.py`
divides by), then the bandwidth one-row products x Wᵀ reach on the matrices a decode step reads, in the
layout the runtime stores them (`attncompress.model.gemv_layout`) and in the other one. Each shape is
timed over enough distinct copies (≥ 100 MB) that nothing is served from cache. All in one run, interleaved.
"""
import argparse
import os
import statistics
import time

os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")  # see benchmarks/speed.py

import torch  # noqa: E402
import torch.nn.functional as F  # noqa: E402

from attncompress.compare import measure_bandwidth  # noqa: E402
from attncompress.model import gemv_layout  # noqa: E402

# (what, d_out, d_in) read per decode step by dense SmolLM2 and by a keep-0.5 copy (typical ranks)
SHAPES = [("dense q|k|v fused", 960, 576), ("dense o", 576, 576), ("dense gate|up fused", 3072, 576),
          ("dense down", 576, 1536), ("output head (tied)", 49152, 576),
          ("0.5 q|k|v fused", 822, 576), ("0.5 gate|up first factors", 330, 576), ("0.5 gate/up second", 1536, 165),
          ("0.5 down first", 160, 1536), ("0.5 down second", 576, 160)]


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
    buf = torch.ones(256 << 18)
    mats = {}
    for what, n, m in SHAPES:
        copies = max(2, int(100e6 // (n * m * 4)))
        ours = [gemv_layout(torch.randn(n, m)) for _ in range(copies)]
        other = [w.contiguous() if not w.is_contiguous() else w.T.contiguous().T for w in ours]
        mats[what] = (n, m, ours, other)
    for threads in (int(t) for t in args.threads.split(",")):
        torch.set_num_threads(threads)
        print(f"{threads} thread(s): streaming read (sum of 256 MB) {measure_bandwidth(buffer=buf) / 1e9:.1f} GB/s")
        print(f"  {'matrix':<28} {'d_out x d_in':>13} {'runtime layout':>15} {'other layout':>13}")
        for what, (n, m, ours, other) in mats.items():
            x = torch.randn(1, m)
            rate = []
            for ws in (ours, other):
                t = _time(lambda: [F.linear(x, w) for w in ws], args.runs) / len(ws)
                rate.append(n * m * 4 / t / 1e9)
            lay = "col" if not ours[0].is_contiguous() else "row"
            print(f"  {what:<28} {f'{n}x{m}':>13} {rate[0]:>9.1f} GB/s ({lay}) {rate[1]:>8.1f} GB/s")


if __name__ == "__main__":
    main()
