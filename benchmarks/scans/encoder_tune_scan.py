"""Exploratory scan of the encoder tune (not a benchmark: prints, writes no results file).

    python benchmarks/scans/encoder_tune_scan.py DECAY LR STEPS KEEP [HIDDEN_WEIGHT] [norms] [dense] [--recompress]

Compresses builtin:minilm-l6 (examples/calibration.txt + corpus:pydoc-calibration) once into $SCAN_DIR/cKEEP,
tunes it and prints the held-out curve and mean cosine / neighbour agreement of the cut and the tuned model on
encoder_table's evaluation texts. Committed as it was run (only the scratch folder became $SCAN_DIR); figures
in benchmarks/results/scans.md. Run from the repository root.
"""
import os
import sys, json, time, torch
from pathlib import Path
sys.path.insert(0, "benchmarks")
from encoder_table import eval_files, quality
from attncompress import api
torch.set_num_threads(2)
tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc")); tmp.mkdir(parents=True, exist_ok=True)
calib = ["examples/calibration.txt", "corpus:pydoc-calibration"]
keep = float(sys.argv[4]) if len(sys.argv) > 4 else 0.7
c = tmp / f"c{keep}"
if not c.exists() or "--recompress" in sys.argv:
    api.compress("builtin:minilm-l6", str(c), keep=keep, texts=calib, quiet=True, force=True)
files = eval_files(tmp)
decay = sys.argv[1]; lr = float(sys.argv[2]); steps = int(sys.argv[3])
t0 = time.time()
t = api.tune(c, calib, tmp / f"t-{decay}-{lr}", steps=steps, lr=lr, teacher="builtin:minilm-l6",
             decay=decay, quiet=True, force=True, hidden_weight=float(sys.argv[5]) if len(sys.argv) > 5 else 0.0, train_norms="norms" in sys.argv, train_dense="dense" in sys.argv, batch=int(__import__("os").environ.get("B", "32")))
print("data", {k: v for k, v in t["data"].items() if k != "files"})
print("tune s", round(time.time() - t0), t["seconds"])
print("heldout", [(e["step"], round(e["loss"], 4)) for e in t["heldout"]["curve"]], "best", t["heldout"]["best_step"])
for kind, m in (("free", c), ("tuned", tmp / f"t-{decay}-{lr}")):
    q = quality("builtin:minilm-l6", str(m), files)
    print(kind, {n: (round(v["cosine"]["mean"], 3), round(v["neighbour_agreement"], 2)) for n, v in q.items()})
