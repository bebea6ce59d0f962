"""Time of one tuning step in float32 and in bfloat16 products (`tune --compute`), side by side in one process.

    python benchmarks/tune_step.py COMPRESSED_DIR [--teacher builtin:smollm2-135m] [--runs 5] [--batch 4]
        [--allocator tune|compress|default]

A step as `tune` runs it on a decoder: the student's forward over `batch` blocks of 128 tokens, the
next-token and distillation loss, the backward pass and the AdamW update; and, apart, the teacher's top-k
targets of those blocks (computed once per block, one block at a time). The two precisions alternate, each
timed `--runs` times after a warm-up; the medians and their ratio are printed and written to
benchmarks/results/tune_step.json with the command, the commit and the machine load. Token ids are drawn
at random (the time does not depend on them). `--allocator`: glibc's setting during the steps
(`attncompress.allocator`): the tune's (default), the one `compress` leaves behind, or glibc's own; each is
a key of the results file.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from results import RESULTS, write_results  # noqa: E402

from attncompress import threads  # noqa: E402  (before torch: it sets the OpenMP waiting policy)

CHOICE = threads.configure(sys.argv)

import torch  # noqa: E402

from attncompress import allocator, tune as tunelib  # noqa: E402
from attncompress.builtin import resolve  # noqa: E402
from attncompress.loading import load_model  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("compressed")
    ap.add_argument("--teacher", default="builtin:smollm2-135m")
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--threads")
    ap.add_argument("--allocator", choices=["tune", "compress", "default"], default="tune")
    args = ap.parse_args()
    if args.allocator == "tune":
        allocator.keep_freed_memory()
    elif args.allocator == "compress":
        allocator.release_large_frees()
    load_before = os.getloadavg()
    student = load_model(args.compressed).model
    teacher = load_model(str(resolve(args.teacher))).model
    settings = tunelib.TuneSettings(steps=1, batch=args.batch, context=128, lr=1e-4, seed=0, decay="frobenius",
                                    decay_coef=1e-8, penalty_every=4, temperature=1.0, mix=0.5, topk=64,
                                    train_norms=False, train_dense=False, warmup=1, heldout=0.1, eval_every=10,
                                    patience=3)
    opt, _ = tunelib._optimizer(student, settings)
    gen = torch.Generator().manual_seed(0)
    x = torch.randint(0, student.shape.vocab_size, (args.batch, 128), generator=gen)  # (b, s)
    print(f"{CHOICE.describe()}; allocator setting: {args.allocator}")

    def step(compute: str) -> tuple[float, float]:
        t0 = time.perf_counter()
        with torch.no_grad(), tunelib.products_in(compute):
            logits = [teacher(x[j:j + 1])[0] for j in range(args.batch)]  # (s, V) each, as the cache does
        targets = [tunelib.teacher_targets(lg, 64, 1.0) for lg in logits]
        logp = torch.cat([t[0] for t in targets])
        ids = torch.cat([t[1] for t in targets])
        t1 = time.perf_counter()
        opt.zero_grad(set_to_none=True)
        with tunelib.products_in(compute):
            out = student(x)  # (b, s, V)
        loss, _ = tunelib.step_loss(out, x, (logp, ids), {"ce": 0.5, "kl": 0.5}, 1.0)
        loss.backward()
        opt.step()
        return time.perf_counter() - t1, t1 - t0

    computes = ("float32", "bfloat16")
    times = {c: {"step": [], "teacher": []} for c in computes}
    for c in computes:
        step(c)  # warm-up
    for _ in range(args.runs):
        for c in computes:
            s, t = step(c)
            times[c]["step"].append(s)
            times[c]["teacher"].append(t)
    med = {c: {k: statistics.median(v) for k, v in times[c].items()} for c in computes}
    for c in computes:
        print(f"{c:9s} step {med[c]['step']:.2f} s, teacher targets of {args.batch} blocks {med[c]['teacher']:.2f} s")
    ratio = {k: med["float32"][k] / med["bfloat16"][k] for k in ("step", "teacher")}
    print(f"float32 / bfloat16: step {ratio['step']:.2f}x, teacher {ratio['teacher']:.2f}x")
    path = RESULTS / "tune_step.json"
    figures = json.loads(path.read_text())["figures"] if path.is_file() else {}
    figures[args.allocator] = {"command": " ".join(sys.argv), "thread_choice": CHOICE.to_json(),
                               "load_before": load_before, "load_after": os.getloadavg(),
                               "native_bfloat16": tunelib.native_bfloat16(), "batch": args.batch, "runs": args.runs,
                               "median_s": med, "all_s": times, "float32_over_bfloat16": ratio}
    out = write_results("tune_step", figures)
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
