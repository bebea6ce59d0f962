"""Exploratory scan of the README demo's cut alone (not a benchmark: prints, writes no results file).

    python benchmarks/scans/demo_cut_scan.py '{}' '{"damping":0.1}' '{"extra":["corpus:pydoc-calibration"]}'

Each JSON variant compresses builtin:smollm2-135m as `run` does (keep 0.7, examples/calibration.txt +
corpus:samples, plus the texts in "extra"), "KIND_price" (KIND one of qk, vo, gate, up, down) multiplying the
`loss` strategy's price of every unit of that kind (patched for the scan), the other keys passed to
`compress`, and prints the ranks per layer and the
perplexity ratio of the cut alone (no tune) on 2048 tokens of corpus:pydoc-heldout and corpus:licenses.
Its printed figures are in benchmarks/results/scans.md.
"""
import dataclasses
import functools
import json
import os
import sys
import time
from pathlib import Path

from attncompress import compare as C, compress as pipeline, generate as gen, strategies as S

tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/cut")); tmp.mkdir(parents=True, exist_ok=True)
src = "builtin:smollm2-135m"
ev = ["corpus:pydoc-heldout", "corpus:licenses"]


def score(m):
    r = C.compare(src, str(m), ev, max_tokens=2048, speed_runs=0)
    return {p["name"][:14]: round(p["ratio"], 3) for p in r["quality"]["per_text"]}


plan_loss = S.plan_loss
for spec in sys.argv[1:]:
    kw = json.loads(spec)
    scale = {k: kw.pop(f"{k}_price", 1.0) for k in ("qk", "vo", "gate", "up", "down")}

    def patched(spectra, shape, keep, *, min_fraction=0.125, bytes_per_element=4):
        spectra = [dataclasses.replace(s, gains=tuple(g * scale[s.kind] for g in s.gains)) for s in spectra]
        return plan_loss(spectra, shape, keep, min_fraction=min_fraction, bytes_per_element=bytes_per_element)
    S.STRATEGIES["loss"] = functools.wraps(plan_loss)(patched)
    keep = kw.pop("keep", 0.7)
    calib = gen.resolve_texts(["examples/calibration.txt", gen.SAMPLES] + kw.pop("extra", []), src, True)
    t0 = time.time()
    pipeline.compress(src, str(tmp / "c"), keep=keep, texts=calib, quiet=True, force=True, **kw)
    plan = json.loads((tmp / "c" / "attncompress.json").read_text())["plan"]["layers"]
    print(spec, "compress", round(time.time() - t0), score(tmp / "c"),
          [(l["qk"], l["vo"], *[l["ff"][k] for k in ("gate", "up", "down")]) for l in plan], flush=True)
