"""Exploratory scan of the encoder cut without tuning (not a benchmark: prints, writes no results file).

    python benchmarks/scans/encoder_calibration_scan.py default uniform no-seq no-refit n256 n512 n1024

Compresses builtin:minilm-l6 at keep 0.7 (examples/calibration.txt + corpus:pydoc-calibration) with each
variant's options and prints mean cosine / neighbour agreement on encoder_table's evaluation texts.
Committed as it was run (only the scratch folder became $SCAN_DIR); figures in benchmarks/results/scans.md.
Run from the repository root.
"""
import os
import sys, time, torch
from pathlib import Path
sys.path.insert(0, "benchmarks")
from encoder_table import eval_files, quality
from attncompress import api
torch.set_num_threads(2)
tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc")); tmp.mkdir(parents=True, exist_ok=True)
files = eval_files(tmp)
calib = ["examples/calibration.txt", "corpus:pydoc-calibration"]
variants = {"default": {}, "uniform": {"strategy": "uniform"}, "no-seq": {"sequential": False},
            "no-refit": {"refit": False}, "n256": {"n_blocks": 256}, "n512": {"n_blocks": 512}, "n1024": {"n_blocks": 1024}}
for name in sys.argv[1:]:
    t0 = time.time()
    api.compress("builtin:minilm-l6", str(tmp / f"v-{name}"), keep=0.7, texts=calib, quiet=True, force=True, **variants[name])
    q = quality("builtin:minilm-l6", str(tmp / f"v-{name}"), files)
    print(name, round(time.time() - t0), {n[:6]: (round(v["cosine"]["mean"], 3), round(v["neighbour_agreement"], 2)) for n, v in q.items()}, flush=True)
