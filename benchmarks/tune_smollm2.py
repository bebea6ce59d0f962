"""The calibration fine-tune on the real SmolLM2-135M, compressed to --keep 0.7.

    python benchmarks/tune_smollm2.py --work /tmp/tune-bench                    # the full table (slow)
    python benchmarks/tune_smollm2.py --work /tmp/tune-bench --steps 20 --threads 1 \
        --runs none:ce,factor:ce,frobenius:ce,none:kd --lambdas 1e-7,1e-6,1e-5     # a short version

Texts (`attncompress.corpora`, nothing written by the project): "pydoc-calibration" to compress and to
tune on; "pydoc-heldout" as held-out text of the same kind (other topics of the same reference); "licenses"
as held-out text of another kind (legal prose).

Steps: compress builtin:smollm2-135m with the calibration text (whitened, --keep 0.7; reused when the
work directory already holds it); measure the original and the compressed perplexity on the first
--eval-tokens tokens of both held-out texts at --context; then tune the compressed model once per run with
the same seed, data order and steps, and measure again. A run is DECAY:LOSS[:dense] with LOSS "ce" (next-token
loss alone) or "kd" (distillation from the source, --mix), ":dense" also training the feed-forward matrices
the plan left dense; λ is --frobenius-coef for frobenius and --decay-coef for factor. The λ sweep tunes
with frobenius at each --lambdas value (LOSS --sweep-loss). Every finished run is stored in
WORK/results.json and skipped next time, so the benchmark can be run in pieces; --fresh forgets them.
Runs share the 2 cores with whatever else runs: wall times are only comparable within one table.
"""
from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import torch

from attncompress import evaluate
from attncompress.compress import compress
from attncompress.corpora import write_corpus
from attncompress.loading import load_model, tokens
from attncompress.builtin import resolve
from attncompress.tune import tune

MODEL = "builtin:smollm2-135m"


def _ppl(model_path, texts: dict[str, Path], n_tokens: int, context: int) -> dict[str, float]:
    loaded = load_model(resolve(str(model_path)))
    out = {}
    for kind, path in texts.items():
        ids = tokens(loaded, path.read_text(encoding="utf-8"))[:n_tokens]
        out[kind] = evaluate.perplexity(loaded.model, ids, context=context)["perplexity"]
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--work", required=True, help="directory for texts, models and results.json")
    ap.add_argument("--keep", type=float, default=0.7)
    ap.add_argument("--compressed", help="use this compressed directory instead of compressing into WORK")
    ap.add_argument("--steps", type=int, default=40)
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--context", type=int, default=128)
    ap.add_argument("--lr", type=float, default=1e-4)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--mix", type=float, default=0.5, help="weight of the next-token loss in 'kd' runs")
    ap.add_argument("--decay-coef", type=float, default=0.01,  # the usual AdamW value (common practice, no source)
                    help="λ of the 'factor' runs")
    ap.add_argument("--frobenius-coef", type=float, default=1e-8, help="λ of the 'frobenius' comparison runs")
    ap.add_argument("--eval-tokens", type=int, default=4096, help="tokens scored of each held-out text")
    ap.add_argument("--runs", default="frobenius:ce,factor:ce,none:ce,frobenius:kd,factor:kd,none:kd")
    ap.add_argument("--lambdas", default="1e-9,1e-7,1e-6,1e-5", help="frobenius λ sweep ('' to skip)")
    ap.add_argument("--sweep-loss", choices=["ce", "kd"], default="ce")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0: torch's default)")
    ap.add_argument("--fresh", action="store_true", help="forget stored results")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    store = work / "results.json"
    results = {} if args.fresh or not store.is_file() else json.loads(store.read_text())

    def save():
        store.write_text(json.dumps(results, indent=2, sort_keys=True) + "\n")

    texts = {}
    for kind, name in (("train", "pydoc-calibration"), ("same", "pydoc-heldout"), ("other", "licenses")):
        texts[kind] = work / f"{name}.txt"
        if not texts[kind].is_file():
            write_corpus(name, texts[kind])
    held = {"same": texts["same"], "other": texts["other"]}
    cmp = Path(args.compressed) if args.compressed else work / f"k{round(args.keep * 100):03d}"
    if not cmp.is_dir():
        t = time.perf_counter()
        compress(MODEL, str(cmp), keep=args.keep, texts=[str(texts["train"])])
        results["compress_seconds"] = time.perf_counter() - t
        save()
    ekey = f"eval:{args.eval_tokens}:{args.context}"
    for name, path in (("original", MODEL), ("compressed", cmp)):
        key = f"{ekey}:{name}"
        if key not in results:
            results[key] = _ppl(path, held, args.eval_tokens, args.context)
            save()
    orig = results[f"{ekey}:original"]

    base = dict(steps=args.steps, batch=args.batch, context=args.context, lr=args.lr, seed=args.seed, quiet=False,
                save_every=0, force=True)
    todo = []
    for spec in filter(None, args.runs.split(",")):
        decay, loss, *extra = spec.split(":")
        lam = args.frobenius_coef if decay == "frobenius" else args.decay_coef
        todo.append((decay, loss, lam, "dense" in extra))
    for lam in filter(None, args.lambdas.split(",")):
        todo.append(("frobenius", args.sweep_loss, float(lam), False))

    def key_of(decay, loss, lam, dense):
        return (f"run:{decay}:{loss}:{lam:g}{':dense' if dense else ''}:steps{args.steps}:b{args.batch}:"
                f"c{args.context}:lr{args.lr:g}:mix{args.mix:g}:s{args.seed}:{ekey}")
    for decay, loss, lam, dense in todo:
        key = key_of(decay, loss, lam, dense)
        if key in results:
            continue
        out = work / "tuned"
        t = time.perf_counter()
        rep = tune(cmp, [texts["train"]], out, decay=decay, decay_coef=lam, teacher=None if loss == "kd" else "none",
                   mix=args.mix if loss == "kd" else 1.0, train_dense=dense, **base)
        wall = time.perf_counter() - t
        results[key] = {"decay": decay, "loss": loss, "lambda": lam, "wall_s": wall, "train_s": rep["seconds"]["train"],
                        "tokens_per_s": rep["tokens_per_second"], "first_loss": rep["curve"][0]["loss"],
                        "last_loss": rep["curve"][-1]["loss"], "penalty_first": rep["curve"][0]["penalty"],
                        "penalty_last": rep["curve"][-1]["penalty"], "ppl": _ppl(out, held, args.eval_tokens,
                                                                                 args.context)}
        save()

    def cell(p, kind):
        return f"{p[kind]:9.3f} ({p[kind] / orig[kind]:5.2f}x)"

    print(f"\nSmolLM2-135M, keep {args.keep}, {args.steps} steps of {args.batch} x {args.context} tokens, lr {args.lr:g}, "
          f"seed {args.seed}; perplexity on the first {args.eval_tokens} tokens at context {args.context}")
    print(f"{'run':<28} {'λ':>8} {'wall s':>8} {'tok/s':>6} {'loss first→last':>17} {'penalty':>9} "
          f"{'same-kind ppl':>20} {'other-kind ppl':>20}")
    print(f"{'original':<28} {'':>8} {'':>8} {'':>6} {'':>17} {'':>9} {cell(orig, 'same'):>20} {cell(orig, 'other'):>20}")
    c = results[f"{ekey}:compressed"]
    print(f"{'compressed, not tuned':<28} {'':>8} {'':>8} {'':>6} {'':>17} {'':>9} {cell(c, 'same'):>20} "
          f"{cell(c, 'other'):>20}")
    for decay, loss, lam, dense in todo:
        r = results[key_of(decay, loss, lam, dense)]
        name = f"{decay} + {'distil' if loss == 'kd' else 'next-token'}{' + dense' if dense else ''}"
        pen = f"{r['penalty_first']:.3g}" if r["penalty_first"] is not None else "-"
        lam_s = f"{lam:.0e}" if decay != "none" else "-"
        print(f"{name:<28} {lam_s:>8} {r['wall_s']:>8.0f} {r['tokens_per_s']:>6.0f} "
              f"{r['first_loss']:>8.3f}→{r['last_loss']:<8.3f} {pen:>9} {cell(r['ppl'], 'same'):>20} "
              f"{cell(r['ppl'], 'other'):>20}")


if __name__ == "__main__":
    main()
