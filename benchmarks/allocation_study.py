"""How SmolLM2 reacts to cutting each kind of matrix, and which allocation of ranks hurts least (training-free).

    python benchmarks/allocation_study.py [--blocks 64] [--eval-tokens 2048] [--keep 0.8] [--runs probes,plans]

In one process: calibration statistics once (pydoc calibration topics, --blocks passages of 128 tokens),
then for each variant the model is factorised in memory with the package's own functions and evaluated on
held-out text of the same kind (other pydoc topics) and of another kind (license texts), 512-token windows.

probes: one kind cut alone in every layer (qk 32→24 pairs, vo 64→48, one feed-forward matrix to half its
        break-even rank), with gate/up factorised with and without the output-side weighting.
plans:  uniform / global (normalised) / global (raw energies) with qk held at full or at 28 pairs.
"""
import argparse
import dataclasses
import time

import torch

from attncompress import analysis, arch, corpora, evaluate, plan as planlib, strategies
from attncompress.compress import choose_pairs, factorize_layer, spectra_list
from attncompress.loading import load_model, tokens
from attncompress.model import build
from attncompress.builtin import builtin
from attncompress.texts import token_blocks


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--blocks", type=int, default=64)
    ap.add_argument("--eval-tokens", type=int, default=2048)
    ap.add_argument("--keep", type=float, default=0.8)
    ap.add_argument("--damping", type=float, default=0.01)
    ap.add_argument("--runs", default="probes,plans")
    args = ap.parse_args()
    L = load_model(builtin("smollm2-135m"))
    sh = L.shape
    W = dict(arch.canonical_weights(L.source, L.walk))
    blocks = token_blocks(tokens(L, corpora.pydoc_text("calibration")), 128, source="pydoc-calibration")
    blocks = blocks[torch.linspace(0, blocks.shape[0] - 1, args.blocks).round().long()]
    t = time.perf_counter()
    stats = analysis.collect_stats(L.model, blocks)
    print(f"calibration: {blocks.numel()} tokens in {time.perf_counter() - t:.1f}s", flush=True)
    down = [W[f"layers.{i}.ff.down.weight"] for i in range(sh.n_layers)]
    roots_w = [analysis.layer_roots(s, args.damping, down=d) for s, d in zip(stats, down)]  # output-weighted
    roots_p = [dataclasses.replace(r, up_out=None, gate_out=None) for r in roots_w]  # input whitening only
    texts = {"same": tokens(L, corpora.pydoc_text("heldout"))[: args.eval_tokens],
             "other": tokens(L, corpora.license_text())[: args.eval_tokens]}
    base = {k: evaluate.perplexity(L.model, ids, context=512)["perplexity"] for k, ids in texts.items()}
    print(f"original perplexity: same kind {base['same']:.3f}, other kind {base['other']:.3f}", flush=True)
    t = time.perf_counter()
    spectra = {"weighted": [analysis.layer_spectra(sh, W, i, roots_w[i]) for i in range(sh.n_layers)]}
    print(f"spectra in {time.perf_counter() - t:.1f}s", flush=True)

    def run(name, p, roots):
        p = choose_pairs(sh, p, spectra["weighted"])
        w = {n: x for n, x in W.items() if not n.startswith("layers.")}
        for i in range(sh.n_layers):
            w.update(factorize_layer(sh, W, i, p.ranks(i), roots[i]))
        m = build(sh, w).eval()
        ppl = {k: evaluate.perplexity(m, ids, context=512)["perplexity"] for k, ids in texts.items()}
        pc = planlib.count_params(sh, p)
        mean = lambda f: sum(f(lr) for lr in p.layers) / len(p.layers)  # noqa: E731
        ffm = " ".join(f"{k} {mean(lambda lr: lr.ff[k] or 0):.0f}" for k in planlib.ff_kinds(sh))
        print(f"| {name} | {pc.block_kept / pc.block_dense:.3f} | {ppl['same'] / base['same']:.2f} | "
              f"{ppl['other'] / base['other']:.2f} | qk {mean(lambda lr: lr.qk):.1f} vo {mean(lambda lr: lr.vo):.1f} "
              f"{ffm} (0 = dense) |", flush=True)

    print("| variant | block params kept | same-kind ppl ratio | other-kind ppl ratio | mean ranks |")
    print("|---|---|---|---|---|")
    full = planlib.full_plan(sh)
    if "probes" in args.runs:
        def only(kind):
            layers = []
            for lr in full.layers:
                ff = dict(lr.ff)
                if kind in ff:
                    m, n = planlib.ff_dims(sh, kind)
                    ff[kind] = int(0.5 * m * n / (m + n))
                layers.append(dataclasses.replace(lr, qk=24 if kind == "qk" else lr.qk,
                                                  vo=48 if kind == "vo" else lr.vo, ff=ff))
            return dataclasses.replace(full, layers=tuple(layers))
        for kind in ("qk", "vo", "gate", "up", "down"):
            run(f"only {kind}", only(kind), roots_w)
            if kind in ("gate", "up"):
                run(f"only {kind}, no output weighting", only(kind), roots_p)
    if "plans" in args.runs:
        sp = spectra_list(sh, spectra["weighted"])

        def held(n):  # qk gets n units first (an overwhelming gain), none beyond
            return [s if s.kind != "qk" else dataclasses.replace(s, gains=tuple([1e30] * n + [0.0] * (s.max_units - n)))
                    for s in sp]
        k = args.keep
        run(f"uniform {k}", strategies.make_plan(sp, sh, k, "uniform"), roots_w)
        run(f"global {k} (normalised)", strategies.make_plan(sp, sh, k, "global"), roots_w)
        run(f"global {k} (raw), qk full", strategies.make_plan(held(sh.n_pairs), sh, k, "global", normalise=False), roots_w)
        run(f"global {k} (raw), qk 28", strategies.make_plan(held(28), sh, k, "global", normalise=False), roots_w)


if __name__ == "__main__":
    main()
