"""Held-out perplexity of SmolLM2 at several budgets, plain vs whitened factors, uniform vs global plans.

    python benchmarks/compress_table.py [--keeps 0.9,0.8,0.7,0.5] [--eval-tokens 4096] [--blocks 256]

Calibration: the pydoc topics of the calibration half (`attncompress.corpora`, 256 passages of 128 tokens).
Held-out: the other half of the pydoc topics (same kind) and license texts (other kind), 512-token windows.
Statistics and spectra are computed once per method and reused for every budget; each cell factorises the
model in memory and evaluates it, exactly as `attncompress compress` would (same functions).
Also prints compress wall time per stage and peak resident memory of this process.
"""
import argparse
import resource
import tempfile
import time
from pathlib import Path

import torch

from attncompress import corpora, evaluate, plan as planlib
from attncompress.compress import analyse, choose_pairs, factorize_layer, spectra_list
from attncompress.io.load import tokens
from attncompress.model import build


def evaluate_plan(an, p, texts):
    sh = an.loaded.shape
    w = {n: t for n, t in an.weights.items() if not n.startswith("layers.")}
    for i in range(sh.n_layers):
        w.update(factorize_layer(sh, an.weights, i, p.ranks(i), an.roots[i]))
    m = build(sh, w).eval()
    return {k: evaluate.perplexity(m, ids, context=512)["perplexity"] for k, ids in texts.items()}


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--keeps", default="0.9,0.8,0.7,0.5")
    ap.add_argument("--strategies", default="uniform,global")
    ap.add_argument("--methods", default="svd,whitened")
    ap.add_argument("--eval-tokens", type=int, default=4096)
    ap.add_argument("--blocks", type=int, default=256)
    ap.add_argument("--damping", type=float, default=0.01)
    args = ap.parse_args()
    tmp = Path(tempfile.mkdtemp())
    calib = tmp / "calib.txt"
    corpora.write_corpus("pydoc-calibration", calib)
    rows = []
    base = None
    for method in args.methods.split(","):
        t0 = time.perf_counter()
        an = analyse("builtin:smollm2-135m", [str(calib)] if method == "whitened" else None,
                     damping=args.damping, n_blocks=args.blocks, quiet=True)
        stages = dict(an.timer.stages)
        if base is None:
            texts = {"same kind": tokens(an.loaded, corpora.pydoc_text("heldout"))[: args.eval_tokens],
                     "other kind": tokens(an.loaded, corpora.license_text())[: args.eval_tokens]}
            base = {k: evaluate.perplexity(an.loaded.model, ids, context=512)["perplexity"] for k, ids in texts.items()}
            print(f"original: same kind {base['same kind']:.3f}, other kind {base['other kind']:.3f} "
                  f"({args.eval_tokens} tokens each)", flush=True)
        print(f"{method}: analysis {time.perf_counter() - t0:.1f}s {stages}", flush=True)
        for strategy in args.strategies.split(","):
            for keep in [float(k) for k in args.keeps.split(",")]:
                t = time.perf_counter()
                p = planlib.make_plan(spectra_list(an.loaded.shape, an.spectra), an.loaded.shape, keep, strategy)
                p = choose_pairs(an.loaded.shape, p, an.spectra)
                ppl = evaluate_plan(an, p, texts)
                rows.append((keep, method, strategy, ppl, time.perf_counter() - t))
                print(f"  keep {keep} {strategy:8} same {ppl['same kind']:9.3f} ({ppl['same kind'] / base['same kind']:6.2f}x)"
                      f"  other {ppl['other kind']:9.3f} ({ppl['other kind'] / base['other kind']:6.2f}x)", flush=True)
        del an
    print()
    print("| keep | factors | plan | same-kind ppl | ratio | other-kind ppl | ratio |")
    print("|---|---|---|---|---|---|---|")
    print(f"| 1.0 | original | - | {base['same kind']:.2f} | 1.00 | {base['other kind']:.2f} | 1.00 |")
    for keep, method, strategy, ppl, _ in sorted(rows, key=lambda r: (-r[0], r[1], r[2])):
        print(f"| {keep} | {method} | {strategy} | {ppl['same kind']:.2f} | {ppl['same kind'] / base['same kind']:.2f} | "
              f"{ppl['other kind']:.2f} | {ppl['other kind'] / base['other kind']:.2f} |")
    print(f"\npeak resident memory of this process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
