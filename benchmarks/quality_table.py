"""Held-out perplexity at several budgets, training-free: uniform ranks against the loss-priced allocation,
then with sequential calibration, then with the least-squares refit (the default of `compress`).

    python benchmarks/quality_table.py [--keep 0.9 0.8 0.7 0.5] [--blocks 64] [--eval-tokens 2048] [--no-timed-run]

Model: the built-in SmolLM2-135M. Calibration: corpus:pydoc-calibration, --blocks passages of 128 tokens (the
default of `compress`). Held out, never used for calibration: corpus:pydoc-heldout (same kind: other topics of
the same documentation) and corpus:licenses (other kind: legal text), the first --eval-tokens tokens of each,
512-token windows; the figure is the perplexity ratio to the original model on the same tokens.

One process. The first pass of the pipeline (calibration forward; for the priced variants also the backward
pass of sensitivities) runs once per kind of spectra; every variant then plans and cuts with the pipeline's own
functions into memory instead of a file. "uniform" is the previous default (uniform ranks, gate/up weighted by
their reach into the down matrix, no sequential pass). Last, one whole `compress` with the defaults at keep
0.8 is timed end to end (the issue's target: at most 3 minutes on 2 cores). Writes
benchmarks/results/quality_table.json.
"""
import argparse
import dataclasses
import shutil
import sys
import tempfile
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).resolve().parent))
from results import write_results  # noqa: E402

from attncompress import compress as pipeline, corpora, evaluate, strategies  # noqa: E402
from attncompress.builtin import builtin  # noqa: E402
from attncompress.factorize import DEFAULT_DAMPING, DEFAULT_REFIT_DAMPING  # noqa: E402
from attncompress.loading import load_model, tokens  # noqa: E402
from attncompress.model import build  # noqa: E402
from attncompress.progress import Timer  # noqa: E402

VARIANTS = [  # name, priced first pass, strategy, sequential, refit
    ("uniform", False, "uniform", False, False),
    ("loss", True, "loss", False, False),
    ("loss + sequential", True, "loss", True, False),
    ("loss + sequential + refit", True, "loss", True, True),
]


class _Tensors(dict):
    """Stands in for the shard writer: the cut model's tensors in memory."""

    def add(self, name, t):
        self[name] = t


def _ppl(model, texts):
    return {k: evaluate.perplexity(model, ids, context=512)["perplexity"] for k, ids in texts.items()}


def _variant(an, scratch: Path, keep, strategy, sequential, refit, texts, base):
    """Plan and cut with one variant; its perplexity ratios, predicted rise and seconds per stage."""
    work = scratch.with_name(scratch.name + "-work")
    shutil.rmtree(work, ignore_errors=True)
    shutil.copytree(scratch, work)  # the second pass consumes the statistics it reads
    an = dataclasses.replace(an, scratch=work, timer=Timer())
    t0 = time.perf_counter()
    p = pipeline.make_rank_plan(an, keep, strategy)
    tensors = _Tensors()
    pipeline._second_pass(an, p, tensors, True, sequential, refit, DEFAULT_REFIT_DAMPING)
    seconds = time.perf_counter() - t0
    shutil.rmtree(work, ignore_errors=True)
    model = build(an.loaded.shape, dict(tensors)).eval()
    ppl = _ppl(model, texts)
    summary = pipeline.plan_summary(an, p)
    rise = summary.get("predicted_rise")
    return {"same_kind_ratio": ppl["same"] / base["same"], "other_kind_ratio": ppl["other"] / base["other"],
            "perplexity": ppl, "kept_fraction": summary["kept_fraction"], "kept_by_kind": summary["kept_by_kind"],
            "predicted_rise_nats": None if rise is None else sum(rise.values()),
            "measured_rise_same_kind_nats": float(torch.tensor(ppl["same"] / base["same"]).log()),
            "second_pass_seconds": round(seconds, 1), "stages": an.timer.stages,
            "ranks": [{"layer": lr.layer, "qk": lr.qk, "vo": lr.vo, **dict(lr.ff)} for lr in p.layers]}


def _timed_compress(keep: float, blocks: int) -> dict:
    """One whole `compress` with the defaults, end to end."""
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        r = pipeline.compress("builtin:smollm2-135m", Path(tmp) / "c", keep=keep, texts=["corpus:pydoc-calibration"],
                              n_blocks=blocks, quiet=True)
        return {"keep": keep, "seconds": round(time.perf_counter() - t0, 1), "stages": r["seconds"],
                "method": r["method"]}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--keep", type=float, nargs="+", default=[0.9, 0.8, 0.7, 0.5])
    ap.add_argument("--blocks", type=int, default=pipeline.CALIB_BLOCKS)
    ap.add_argument("--eval-tokens", type=int, default=2048)
    ap.add_argument("--no-timed-run", action="store_true", help="Skip the end-to-end timing of one compress.")
    args = ap.parse_args()
    started = time.perf_counter()
    dense = load_model(builtin("smollm2-135m"))
    texts = {"same": tokens(dense, corpora.pydoc_text("heldout"))[: args.eval_tokens],
             "other": tokens(dense, corpora.license_text())[: args.eval_tokens]}
    base = _ppl(dense.model, texts)
    del dense
    print(f"original perplexity: same kind {base['same']:.3f}, other kind {base['other']:.3f}", flush=True)
    loaded = pipeline.open_model("builtin:smollm2-135m")
    calib = pipeline._calibration(loaded, ["corpus:pydoc-calibration"], pipeline.CALIB_CONTEXT, args.blocks)
    rows, first = [], {}
    with tempfile.TemporaryDirectory() as tmp:
        analysed = {}
        for priced in (False, True):
            timer = Timer()
            scratch = Path(tmp) / f"first-{int(priced)}"
            analysed[priced] = (pipeline._first_pass(loaded, calib, DEFAULT_DAMPING, scratch, True, timer, priced),
                                scratch)
            first["priced" if priced else "unpriced"] = timer.stages
            print(f"first pass ({'priced' if priced else 'unpriced'}): {timer.stages}", flush=True)
        for keep in args.keep:
            for name, priced, strategy, sequential, refit in VARIANTS:
                an, scratch = analysed[priced]
                r = _variant(an, scratch, keep, strategy, sequential, refit, texts, base)
                rows.append({"keep": keep, "variant": name, **r})
                print(f"keep {keep} {name}: same {r['same_kind_ratio']:.3f}x other {r['other_kind_ratio']:.3f}x "
                      f"(predicted rise {r['predicted_rise_nats']}, second pass {r['second_pass_seconds']}s)",
                      flush=True)
    timed = None if args.no_timed_run else _timed_compress(0.8, args.blocks)
    if timed:
        print(f"compress with the defaults at keep 0.8: {timed['seconds']}s {timed['stages']}", flush=True)
    path = write_results("quality_table", {
        "model": "builtin:smollm2-135m", "calibration": "corpus:pydoc-calibration", "blocks": args.blocks,
        "context": pipeline.CALIB_CONTEXT, "eval_tokens": args.eval_tokens, "eval_context": 512,
        "same_kind": "corpus:pydoc-heldout", "other_kind": "corpus:licenses", "original_perplexity": base,
        "strategy_default": strategies.DEFAULT_STRATEGY, "first_pass_seconds": first, "rows": rows,
        "timed_compress": timed}, started)
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
