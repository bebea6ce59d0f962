"""Exploratory scan of the README demo's cut alone (not a benchmark: prints, writes no results file).

    python benchmarks/scans/demo_cut_scan.py '{}' '{"damping":0.1}' '{"extra":["corpus:pydoc-calibration"]}'

Each JSON variant compresses builtin:smollm2-135m as `run` does (keep 0.7, examples/calibration.txt +
corpus:samples, plus the texts in "extra"), with the other keys passed to `compress`, and prints the
perplexity ratio of the cut alone (no tune) on 2048 tokens of corpus:pydoc-heldout and corpus:licenses.
Its printed figures are in benchmarks/results/scans.md.
"""
import json
import os
import sys
import time
from pathlib import Path

from attncompress import compare as C, compress as pipeline, generate as gen

tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/cut")); tmp.mkdir(parents=True, exist_ok=True)
src = "builtin:smollm2-135m"
ev = ["corpus:pydoc-heldout", "corpus:licenses"]


def score(m):
    r = C.compare(src, str(m), ev, max_tokens=2048, speed_runs=0)
    return {p["name"][:14]: round(p["ratio"], 3) for p in r["quality"]["per_text"]}


for spec in sys.argv[1:]:
    kw = json.loads(spec)
    keep = kw.pop("keep", 0.7)
    calib = gen.resolve_texts(["examples/calibration.txt", gen.SAMPLES] + kw.pop("extra", []), src, True)
    t0 = time.time()
    pipeline.compress(src, str(tmp / "c"), keep=keep, texts=calib, quiet=True, force=True, **kw)
    print(spec, "compress", round(time.time() - t0), score(tmp / "c"), flush=True)
