"""Held-out perplexity of SmolLM2 at several budgets, plain vs whitened factors, uniform vs global plans.

    python benchmarks/compress_table.py [--keeps 0.9,0.8,0.7,0.5] [--eval-tokens 4096] [--blocks 256]

Calibration: the pydoc topics of the calibration half (`attncompress.corpora`, 256 passages of 128 tokens).
Held-out: the other half of the pydoc topics (same kind) and license texts (other kind), 512-token windows.
Statistics and spectra are computed once per method and reused for every budget; each cell factorises the
model in memory and evaluates it with the same functions `attncompress compress` uses (whole-model
calibration here instead of the streaming one: the same numbers). Prints peak resident memory at the end.
"""
import argparse
import resource
import time

import torch

from attncompress import analysis, arch, corpora, evaluate, strategies
from attncompress.compress import choose_pairs, factorize_layer, spectra_list
from attncompress.loading import load_model, tokens
from attncompress.model import build
from attncompress.builtin import builtin
from attncompress.texts import token_blocks


def evaluate_plan(sh, W, roots, p, texts):
    w = {n: t for n, t in W.items() if not n.startswith("layers.")}
    for i in range(sh.n_layers):
        w.update(factorize_layer(sh, W, i, p.ranks(i), roots[i]))
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
    L = load_model(builtin("smollm2-135m"))
    sh = L.shape
    W = dict(arch.canonical_weights(L.source, L.walk))
    texts = {"same kind": tokens(L, corpora.pydoc_text("heldout"))[: args.eval_tokens],
             "other kind": tokens(L, corpora.license_text())[: args.eval_tokens]}
    base = {k: evaluate.perplexity(L.model, ids, context=512)["perplexity"] for k, ids in texts.items()}
    print(f"original: same kind {base['same kind']:.3f}, other kind {base['other kind']:.3f} "
          f"({args.eval_tokens} tokens each)", flush=True)
    rows = []
    for method in args.methods.split(","):
        t0 = time.perf_counter()
        stats = [None] * sh.n_layers
        if method == "whitened":
            blocks = token_blocks(tokens(L, corpora.pydoc_text("calibration")), 128, source="pydoc-calibration")
            blocks = blocks[torch.linspace(0, blocks.shape[0] - 1, min(args.blocks, blocks.shape[0])).round().long()]
            stats = analysis.collect_stats(L.model, blocks)
        t1 = time.perf_counter()
        roots = [analysis.layer_roots(stats[i], args.damping, down=W[f"layers.{i}.ff.down.weight"])
                 for i in range(sh.n_layers)]
        spectra = [analysis.layer_spectra(sh, W, i, roots[i]) for i in range(sh.n_layers)]
        print(f"{method}: calibration {t1 - t0:.1f}s, spectra {time.perf_counter() - t1:.1f}s", flush=True)
        for strategy in args.strategies.split(","):
            for keep in [float(k) for k in args.keeps.split(",")]:
                p = strategies.make_plan(spectra_list(sh, spectra), sh, keep, strategy)
                p = choose_pairs(sh, p, spectra)
                ppl = evaluate_plan(sh, W, roots, p, texts)
                rows.append((keep, method, strategy, ppl))
                print(f"  keep {keep} {strategy:8} same {ppl['same kind']:9.3f} ({ppl['same kind'] / base['same kind']:6.2f}x)"
                      f"  other {ppl['other kind']:9.3f} ({ppl['other kind'] / base['other kind']:6.2f}x)", flush=True)
    print()
    print("| keep | factors | plan | same-kind ppl | ratio | other-kind ppl | ratio |")
    print("|---|---|---|---|---|---|---|")
    print(f"| 1.0 | original | - | {base['same kind']:.2f} | 1.00 | {base['other kind']:.2f} | 1.00 |")
    for keep, method, strategy, ppl in sorted(rows, key=lambda r: (-r[0], r[1], r[2])):
        print(f"| {keep} | {method} | {strategy} | {ppl['same kind']:.2f} | {ppl['same kind'] / base['same kind']:.2f} | "
              f"{ppl['other kind']:.2f} | {ppl['other kind'] / base['other kind']:.2f} |")
    print(f"\npeak resident memory of this process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")


if __name__ == "__main__":
    main()
