"""Exploratory scan of where the encoder's cut goes (not a benchmark: prints, writes no results file).

    python benchmarks/scans/encoder_cut_scan.py '{"qk_price":4}' '{"min_fraction":0.5}' ...

Each JSON variant compresses builtin:minilm-l6 at keep 0.7 (or "keep") with examples/calibration.txt +
corpus:pydoc-calibration, the `loss` strategy patched for the scan: "qk_price", "vo_price", "ff_price" multiply
the predicted loss of every query-key, value-output, feed-forward unit, "min_fraction" is plan_loss's own floor. Prints the ranks per layer and mean cosine /
top-1 neighbour agreement on encoder_table's evaluation texts. Figures in benchmarks/results/scans.md.
"""
import dataclasses
import functools
import json
import os
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, "benchmarks")
from encoder_table import eval_files, quality  # noqa: E402
from attncompress import api, strategies as S  # noqa: E402

torch.set_num_threads(2)
tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc-cut")); tmp.mkdir(parents=True, exist_ok=True)
calib = ["examples/calibration.txt", "corpus:pydoc-calibration"]
files = eval_files(tmp)
plan_loss = S.plan_loss
for spec in sys.argv[1:]:
    kw = json.loads(spec)
    scale = {"qk": kw.get("qk_price", 1.0), "vo": kw.get("vo_price", 1.0), "up": kw.get("ff_price", 1.0),
             "down": kw.get("ff_price", 1.0)}

    def patched(spectra, shape, keep, *, min_fraction=kw.get("min_fraction", 0.125), bytes_per_element=4):
        spectra = [dataclasses.replace(s, gains=tuple(g * scale[s.kind] for g in s.gains)) for s in spectra]
        return plan_loss(spectra, shape, keep, min_fraction=min_fraction, bytes_per_element=bytes_per_element)
    S.STRATEGIES["loss"] = functools.wraps(plan_loss)(patched)
    t0 = time.time()
    r = api.compress("builtin:minilm-l6", str(tmp / "c"), keep=kw.get("keep", 0.7), texts=calib, quiet=True,
                     force=True)
    plan = json.loads((tmp / "c" / "attncompress.json").read_text())["plan"]["layers"]
    q = quality("builtin:minilm-l6", str(tmp / "c"), files)
    print(spec, round(time.time() - t0), [(l["qk"], l["vo"], l["ff"]["up"], l["ff"]["down"]) for l in plan],
          {n[:8]: (round(v["cosine"]["mean"], 3), round(v["neighbour_agreement"], 2)) for n, v in q.items()},
          flush=True)
