"""What the Frobenius penalty costs: the trace form against forming the product, forward and backward.

    python benchmarks/decay_cost.py                       # SmolLM2 feed-forward shape 1536 × 576, a few ranks
    python benchmarks/decay_cost.py --model DIR           # also: the ranks DIR's plan chose, and the whole
                                                          # model's penalty against one training step

Per rank r of one m × n pair (a: (m, r), b: (n, r)), each timed for value + backward:
    product   ‖A Bᵀ‖_F² with the (m, n) product formed              O(m n r)
    trace     tr((AᵀA)(BᵀB)) by autograd (factorize.product_sq_norm)  O((m + n) r²), 3 matmul passes
    closed    the same value with the gradient 2A(BᵀB), 2B(AᵀA) written out (tune.pair_sq_norm), 2 passes
The methods run interleaved and the median of --repeat runs is kept, so a busy machine slows them alike.
"""
from __future__ import annotations

import argparse
import statistics
import time

import torch

from attncompress.factorize import product_sq_norm
from attncompress.tune import frobenius_penalty, pair_sq_norm


def _explicit(a, b):
    return (a @ b.T).pow(2).sum()  # (m, r) @ (r, n) → (m, n)


METHODS = {"product": _explicit, "trace": product_sq_norm, "closed": pair_sq_norm}


def _time_once(fn, a, b) -> float:
    a.grad = b.grad = None
    t = time.perf_counter()
    fn(a, b).backward()
    return time.perf_counter() - t


def pair_table(m: int, n: int, ranks: list[int], repeat: int) -> list[dict]:
    rows = []
    for r in ranks:
        gen = torch.Generator().manual_seed(r)
        a = torch.randn(m, r, generator=gen).requires_grad_(True)
        b = torch.randn(n, r, generator=gen).requires_grad_(True)
        times = {k: [] for k in METHODS}
        for k, fn in METHODS.items():  # warm-up
            _time_once(fn, a, b)
        for _ in range(repeat):
            for k, fn in METHODS.items():
                times[k].append(_time_once(fn, a, b))
        med = {k: statistics.median(v) * 1e3 for k, v in times.items()}
        rows.append({"rank": r, **med, "product/closed": med["product"] / med["closed"],
                     "trace/closed": med["trace"] / med["closed"]})
    return rows


def model_rows(path: str, batch: int, context: int, repeat: int) -> dict:
    """The whole model's penalty (value + backward) against one forward + backward training step."""
    from attncompress.loading import load_model
    from attncompress.tune import factor_params
    loaded = load_model(path)
    model = loaded.model
    model.requires_grad_(False)
    for _, p, _ in factor_params(model):
        p.requires_grad_(True)
    gen = torch.Generator().manual_seed(0)
    x = torch.randint(0, loaded.shape.vocab_size, (batch, context), generator=gen)

    def step():
        model.zero_grad(set_to_none=True)
        logits = model(x)
        torch.nn.functional.cross_entropy(logits[:, :-1].reshape(-1, logits.shape[-1]), x[:, 1:].reshape(-1)).backward()

    def penalty():
        model.zero_grad(set_to_none=True)
        frobenius_penalty(model).backward()

    ts, tp = [], []
    step(), penalty()
    for _ in range(repeat):
        t = time.perf_counter(); step(); ts.append(time.perf_counter() - t)
        t = time.perf_counter(); penalty(); tp.append(time.perf_counter() - t)
    s, p = statistics.median(ts), statistics.median(tp)
    ranks = sorted({blk.ff.up.a.shape[1] for blk in model.blocks if hasattr(blk.ff.up, "a")})
    return {"step_s": s, "penalty_s": p, "ratio": p / s, "ranks": ranks}


def _print(rows: list[dict], m: int, n: int) -> None:
    print(f"pair {m} x {n} (value + backward, median ms)")
    print(f"{'rank':>6} {'product':>10} {'trace':>10} {'closed':>10} {'product/closed':>15} {'trace/closed':>13}")
    for r in rows:
        print(f"{r['rank']:>6} {r['product']:>10.2f} {r['trace']:>10.2f} {r['closed']:>10.2f} "
              f"{r['product/closed']:>15.2f} {r['trace/closed']:>13.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--m", type=int, default=1536, help="d_out of the pair (SmolLM2 d_ff)")
    ap.add_argument("--n", type=int, default=576, help="d_in of the pair (SmolLM2 d_model)")
    ap.add_argument("--ranks", default="64,128,256,384", help="comma-separated ranks")
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--model", help="a compressed directory: time at its planned ranks, and against a training step")
    ap.add_argument("--batch", type=int, default=4)
    ap.add_argument("--context", type=int, default=128)
    ap.add_argument("--penalty-every", type=int, default=4, help="for the share of a step with lazy evaluation")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0: torch's default)")
    args = ap.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)
    ranks = [int(r) for r in args.ranks.split(",")]
    print(f"torch {torch.__version__}, {torch.get_num_threads()} threads")
    if args.model:
        mr = model_rows(args.model, args.batch, args.context, max(3, args.repeat // 2))
        ranks = sorted(set(ranks) | {mr["ranks"][0], mr["ranks"][len(mr["ranks"]) // 2], mr["ranks"][-1]})
    _print(pair_table(args.m, args.n, ranks, args.repeat), args.m, args.n)
    if args.model:
        print(f"\n{args.model}: feed-forward ranks {mr['ranks'][0]}..{mr['ranks'][-1]}")
        print(f"training step (batch {args.batch} x {args.context} tokens, forward + backward): {mr['step_s']:.3f} s")
        print(f"whole-model Frobenius penalty (value + backward, closed form): {mr['penalty_s']:.3f} s = "
              f"{100 * mr['ratio']:.1f}% of a step every step, {100 * mr['ratio'] / args.penalty_every:.1f}% "
              f"evaluated every {args.penalty_every} steps")


if __name__ == "__main__":
    main()
