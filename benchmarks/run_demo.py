"""The README demo (`run`) with chosen calibration blends and tune settings; one JSON result per run.

    python benchmarks/run_demo.py --name demo-samples --blend samples
    python benchmarks/run_demo.py --name same-kind-samples --text corpus:pydoc-calibration --blend samples

Each run calls `attncompress.api.run` on builtin:smollm2-135m (defaults: the README demo, keep 0.7, its invented
calibration text, evaluated on corpus:pydoc-heldout and corpus:licenses) and writes
benchmarks/results/NAME.json: the command, the commit, the load average before and after, the perplexity
of the original, the compressed and the tuned model on each eval text with their ratios to the original,
the held-out curve of the tune, the repeats of each text and the seconds per stage (sampling, compress,
tune, compare). Model samples come from the user cache (`corpus:samples`), so the first run pays for them.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

from attncompress import api, tune as tunelib

ROOT = Path(__file__).resolve().parent.parent


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--name", required=True)
    ap.add_argument("--keep", type=float, default=0.7)
    ap.add_argument("--text", action="append", help="calibration text [default: examples/calibration.txt]")
    ap.add_argument("--eval-text", action="append", help="[default: corpus:pydoc-heldout, corpus:licenses]")
    ap.add_argument("--blend", default=api.DEFAULT_BLEND, choices=list(api.BLENDS))
    ap.add_argument("--steps", type=int, default=60)
    ap.add_argument("--lr", type=float, default=tunelib.DEFAULT_LR)
    ap.add_argument("--mix", type=float, default=api.RUN_MIX)
    ap.add_argument("--eval-tokens", type=int, default=4096)
    a = ap.parse_args()
    texts = a.text or [str(ROOT / "examples" / "calibration.txt")]
    evals = a.eval_text or ["corpus:pydoc-heldout", "corpus:licenses"]
    load0 = os.getloadavg()
    with tempfile.TemporaryDirectory() as tmp:
        r = api.run("builtin:smollm2-135m", str(Path(tmp) / "job"), keep=a.keep, texts=texts, eval_texts=evals,
                    blend=a.blend, steps=a.steps, lr=a.lr, mix=a.mix, max_eval_tokens=a.eval_tokens)
        manifest = json.loads((Path(tmp) / "job" / "compressed" / "attncompress.json").read_text(encoding="utf-8"))
    q, t = r["compare"]["quality"], r["tune"]
    result = {
        "command": "python " + " ".join([str(Path(sys.argv[0]).relative_to(ROOT)
                                             if Path(sys.argv[0]).is_absolute() else sys.argv[0])] + sys.argv[1:]),
        "commit": subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip(),
        "load_average": {"before": load0, "after": os.getloadavg()}, "cores": os.cpu_count(),
        "settings": {"keep": a.keep, "texts": texts, "eval_texts": evals, "blend": a.blend, "steps": a.steps,
                     "lr": a.lr, "mix": a.mix, "eval_tokens": a.eval_tokens},
        "per_text": [{"name": e["name"], "tokens": e["tokens"], "original": e["a"], "compressed": e["compressed"],
                      "tuned": e["b"], "compressed_ratio": e["compressed"] / e["a"], "tuned_ratio": e["ratio"]}
                     for e in q["per_text"]],
        "tune": {"steps_run": t["steps_run"], "heldout": t["heldout"],
                 "texts": [{k: d[k] for k in ("name", "blocks", "heldout_blocks", "repeats")} for d in t["data"]["files"]],
                 "warnings": t["warnings"]},
        "calibration": manifest["calibration"],
        "seconds": r["seconds"], "total_seconds": sum(r["seconds"].values()),
    }
    out = ROOT / "benchmarks" / "results" / f"{a.name}.json"
    out.write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    for e in result["per_text"]:
        print(f"{e['name']}: {e['original']:.2f} -> compressed {e['compressed']:.2f} ({e['compressed_ratio']:.2f}x)"
              f" -> tuned {e['tuned']:.2f} ({e['tuned_ratio']:.2f}x)")
    print(f"seconds: {result['seconds']}; wrote {out}")


if __name__ == "__main__":
    main()
