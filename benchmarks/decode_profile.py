"""Where one decode step's time goes, by kind of operation: dense SmolLM2 and compressed copies, plain and fused.

    python benchmarks/decode_profile.py [--keeps 0.5] [--steps 20] [--threads SPEC] [--work DIR] [--out FILE]

Each model (the dense built-in SmolLM2 and the --keeps copies from `benchmarks/speed.py`'s --work folder)
decodes `--steps` single tokens after a 128-token prompt under torch.profiler, once as loaded ("plain": q, k,
v, gate and up as separate products), once after `attncompress.model.fuse` ("fused") and once fused with
float16 product weights (`attncompress.model.halve`, what `generate` and `compare` decode with). Self CPU time of
every aten operation is summed into kinds (products, attention, rotary, norms, cache writes, element-wise,
views, other); "outside aten" is the wall time of the steps minus that sum (Python and dispatch).
Writes a markdown table to --out (default benchmarks/results/decode_profile.md) and prints it.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from attncompress import threads as threadlib  # noqa: E402

CHOICE = threadlib.configure(sys.argv)  # before torch starts its thread pool

import argparse  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import torch  # noqa: E402
from torch.profiler import ProfilerActivity, profile  # noqa: E402

from attncompress.loading import load_model  # noqa: E402
from attncompress.model import KVCache, fuse, halve  # noqa: E402
from attncompress.builtin import resolve  # noqa: E402

KINDS = [  # (kind, aten operation names); first match wins
    ("matrix products", ("aten::mm", "aten::addmm", "aten::bmm", "aten::linear", "aten::matmul", "aten::baddbmm")),
    ("attention (softmax, scale)", ("aten::_softmax", "aten::softmax", "aten::mul_", "aten::masked_fill")),
    ("rotary", ("aten::roll", "aten::addcmul")),
    ("norms", ("aten::rms_norm", "aten::_fused_rms_norm", "aten::layer_norm", "aten::native_layer_norm")),
    ("cache writes", ("aten::copy_", "aten::select", "aten::narrow")),
    ("float16 casts", ("aten::_to_copy", "aten::to", "aten::_to_dtype")),
    ("element-wise (residual, act)", ("aten::add", "aten::mul", "aten::silu", "aten::gelu", "aten::embedding")),
    ("views and splits", ("aten::view", "aten::transpose", "aten::split", "aten::as_strided", "aten::t",
                          "aten::slice", "aten::reshape", "aten::split_with_sizes", "aten::unsafe_view",
                          "aten::expand", "aten::_unsafe_view", "aten::index_select", "aten::empty",
                          "aten::empty_strided", "aten::resize_")),
]


def _kind(name: str) -> str:
    for kind, names in KINDS:
        if name in names:
            return kind
    return "other"


def profile_steps(model, steps: int, prompt: int = 128) -> dict:
    """ms per step by kind, products per step, and the wall ms per step of the profiled steps."""
    ids = torch.randint(0, model.shape.vocab_size, (1, prompt + steps), generator=torch.Generator().manual_seed(0))
    with torch.inference_mode():
        for _ in range(2):  # warm-up rounds, then the profiled one
            cache = KVCache(model, 1, prompt + steps)
            model(ids[:, :prompt], cache=cache, start=0)
            with profile(activities=[ProfilerActivity.CPU]) as prof:
                t0 = time.perf_counter()
                for i in range(prompt, prompt + steps):
                    model(ids[:, i:i + 1], cache=cache, start=i)
                wall = time.perf_counter() - t0
    kinds: dict[str, float] = {}
    products = 0
    calls = sum(1 for e in prof.events() if e.cpu_parent is None)  # operations called from Python
    for e in prof.key_averages():
        kinds[_kind(e.key)] = kinds.get(_kind(e.key), 0.0) + e.self_cpu_time_total / 1e3 / steps
        if e.key in ("aten::mm", "aten::addmm", "aten::bmm"):
            products += e.count
    kinds["outside aten (Python, dispatch)"] = max(0.0, wall * 1e3 / steps - sum(kinds.values()))
    return {"kinds": kinds, "products_per_step": products / steps, "wall_ms": wall * 1e3 / steps,
            "calls_per_step": calls / steps}


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keeps", default="0.5")
    ap.add_argument("--steps", type=int, default=20)
    ap.add_argument("--threads", help="auto | N | N:active | N:passive (read at start-up)")
    ap.add_argument("--work", default="/tmp/attncompress-speed")
    ap.add_argument("--out", default=str(Path(__file__).parent / "results" / "decode_profile.md"))
    args = ap.parse_args()
    paths = {"dense": "builtin:smollm2-135m"} | {f"keep {k}": f"{args.work}/smollm2-keep{float(k):g}"
                                                 for k in args.keeps.split(",")}
    cols = {}
    for name, path in paths.items():
        for variant in ("plain", "fused", "fused, float16"):
            m = load_model(resolve(path)).model
            if variant != "plain":
                fuse(m)
            if variant == "fused, float16":
                halve(m)
            cols[f"{name}, {variant}"] = profile_steps(m, args.steps)
            del m
    kinds = [k for k, _ in KINDS] + ["other", "outside aten (Python, dispatch)"]
    lines = [f"Decode step of SmolLM2-135M after a 128-token prompt, {args.steps} profiled steps; "
             f"{CHOICE.describe()}; load average at the end {os.getloadavg()[0]:.2f}. ms per step (self CPU time "
             "under torch.profiler, which adds its own overhead).", "",
             "| kind | " + " | ".join(cols) + " |", "|---" * (len(cols) + 1) + "|"]
    for k in kinds:
        lines.append(f"| {k} | " + " | ".join(f"{c['kinds'].get(k, 0.0):.2f}" for c in cols.values()) + " |")
    lines.append("| **wall per step** | " + " | ".join(f"**{c['wall_ms']:.2f}**" for c in cols.values()) + " |")
    lines.append("| matrix products per step | " + " | ".join(f"{c['products_per_step']:.0f}" for c in cols.values())
                 + " |")
    lines.append("| operations called from Python per step | "
                 + " | ".join(f"{c['calls_per_step']:.0f}" for c in cols.values()) + " |")
    text = "\n".join(lines) + "\n"
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(f"# Decode profile\n\n`python benchmarks/decode_profile.py {' '.join(sys.argv[1:])}`\n\n"
                              + text, encoding="utf-8")
    print(text)


if __name__ == "__main__":
    main()
