"""Exploratory scan of the README demo's tune (not a benchmark: prints, writes no results file).

    python benchmarks/scans/demo_tune_scan.py '{"steps":60,"mix":0.5}' '{"steps":60,"mix":0.5,"lr":3e-4}'

Compresses builtin:smollm2-135m once as `run` does (keep 0.7, examples/calibration.txt + corpus:samples), then
tunes each JSON variant and prints the perplexity ratio on 2048 tokens of corpus:pydoc-heldout and
corpus:licenses. Committed as it was run (only the scratch folder became $SCAN_DIR); its printed figures are
in benchmarks/results/scans.md.
"""
import os
import sys, json, time, torch
from pathlib import Path
from attncompress import api, compare as C, generate as gen
from attncompress import compress as pipeline, tune as T
tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/dec")); tmp.mkdir(parents=True, exist_ok=True)
src = "builtin:smollm2-135m"
calib = gen.resolve_texts(["examples/calibration.txt", gen.SAMPLES], src, True)
ev = ["corpus:pydoc-heldout", "corpus:licenses"]
def score(m):
    r = C.compare(src, str(m), ev, max_tokens=2048, speed_runs=0)
    return {p["name"][:14]: round(p["ratio"], 3) for p in r["quality"]["per_text"]}
c = tmp / "c0.7"
if not c.exists():
    t0 = time.time(); pipeline.compress(src, str(c), keep=0.7, texts=calib, quiet=True); print("compress", round(time.time() - t0))
    print("free", score(c), flush=True)
for spec in sys.argv[1:]:
    kw = json.loads(spec)
    t0 = time.time()
    t = T.tune(c, calib, tmp / "t", teacher=src, quiet=True, force=True, **kw)
    print(spec, "tune", round(time.time() - t0), "best", t["heldout"]["best_step"], "stopped", t["heldout"]["stopped_early_at"],
          [(e["step"], round(e["loss"], 3)) for e in t["heldout"]["curve"]], flush=True)
    print(spec, score(tmp / "t"), flush=True)
