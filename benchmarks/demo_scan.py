"""The README demo's cut and tune, varied one setting at a time: which knob moves other-kind perplexity.

    python benchmarks/demo_scan.py [--dampings 0.01,0.001,0.1] [--tunes '{}' '{"mix": 0.0}' ...]

The demo's model, keep (0.7) and calibration text (examples/calibration.txt plus `run`'s default blend) are
fixed. Each whitening damping in `--dampings` is one `api.compress`; the first is also tuned once per JSON
object in `--tunes` (keyword arguments of `api.tune` over the demo's own: 60 steps, `run`'s next-token
weight, the source as teacher). Every model is scored as `compare` scores it (perplexity at context 512 of the
first 4,096 tokens of corpus:pydoc-heldout and corpus:licenses), as a ratio to the original scored in the
same run. Results: benchmarks/results/demo_scan.json (NAME with --name).
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
from results import write_results  # noqa: E402

from attncompress import api, generate as gen  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent
SRC = "builtin:smollm2-135m"
EVALS = ("corpus:pydoc-heldout", "corpus:licenses")


def scores(path: str) -> dict[str, float]:
    return {e: api.perplexity(path, [e], max_tokens=4096, quiet=True)["perplexity"] for e in EVALS}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--name", default="demo_scan")
    ap.add_argument("--dampings", default="0.01,0.001,0.1")
    ap.add_argument("--tunes", nargs="*", default=['{"lr": 2e-4}', '{"mix": 0.0}', '{"mix": 1.0}', '{"lr": 4e-4}'])
    a = ap.parse_args()
    torch.set_num_threads(2)
    started = time.perf_counter()
    calib = gen.resolve_texts([str(ROOT / "examples" / "calibration.txt")] + list(api.BLENDS[api.DEFAULT_BLEND]),
                              SRC, False)
    original = scores(SRC)
    rows = []

    def row(kind: str, settings: dict, path: str, seconds: float) -> None:
        s = scores(path)
        rows.append({"stage": kind, "settings": settings, "seconds": round(seconds, 1), "perplexity": s,
                     "ratio": {e: s[e] / original[e] for e in EVALS}})
        print(f"{kind} {json.dumps(settings)}: " + ", ".join(f"{e} {s[e] / original[e]:.3f}x" for e in EVALS)
              + f" ({seconds:.0f} s)", flush=True)

    with tempfile.TemporaryDirectory() as tmp:
        for i, damping in enumerate(float(d) for d in a.dampings.split(",")):
            cut = str(Path(tmp) / f"c{i}")
            t0 = time.perf_counter()
            api.compress(SRC, cut, keep=0.7, texts=calib, damping=damping, quiet=True)
            row("compressed", {"damping": damping}, cut, time.perf_counter() - t0)
            if i:
                continue
            for j, opts in enumerate(json.loads(o) for o in a.tunes):
                kw = {"steps": 60, "mix": api.RUN_MIX, "teacher": SRC, **opts}
                t0 = time.perf_counter()
                api.tune(cut, calib, str(Path(tmp) / f"t{j}"), quiet=True, **kw)
                row("tuned", {"damping": damping, **kw}, str(Path(tmp) / f"t{j}"), time.perf_counter() - t0)
    out = write_results(a.name, {"original": original, "keep": 0.7, "texts": calib, "rows": rows}, started)
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
