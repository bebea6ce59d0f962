"""Where the compiled decode step's time goes: each phase of one step, dense and compressed SmolLM2.

    python benchmarks/kernel_profile.py [--keeps 0.5,0.7] [--runs 5] [--tokens 16] [--prompt 256] [--work DIR]

The kernel (attncompress/kernels/decode_step.c) is built a second time with -DPROFILE: thread 0 then adds
the time since its previous mark to the phase that just ended (a product's phase ends at its barrier, so
it includes the wait for the slower thread) and the bytes that phase read. Each model (the dense built-in
SmolLM2 and the plain-SVD copies of benchmarks/speed.py, halved and fused as `compare` decodes them)
prefills a `--prompt`-token cache through torch, then decodes `--tokens` steps per run through the
profiled kernel; the run with the fastest step is reported. Results: benchmarks/results/kernel_profile.json
(command, commit, load averages, thread choice) and a table on stdout.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from attncompress import threads as threadlib  # noqa: E402

CHOICE = threadlib.configure(sys.argv)  # before torch starts its thread pool
LOAD_BEFORE = os.getloadavg()

import argparse  # noqa: E402
import ctypes  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import torch  # noqa: E402

from attncompress import native  # noqa: E402
from attncompress.builtin import resolve  # noqa: E402
from attncompress.loading import load_model  # noqa: E402
from attncompress.model import KVCache, fuse, halve  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from speed import SOURCE, _commit, compressed_copy  # noqa: E402

RESULTS = Path(__file__).parent / "results" / "kernel_profile.json"
# the kernel's phase enum, in order (decode_step.c: P_NORM ... P_HEAD)
PHASES = ["norms + residual", "q/k/v (first)", "q/k/v second", "attention", "attention merge", "o",
          "o second", "gate/up first", "gate/up + SiLU", "down", "down second", "output head"]


def profile(lib, path: str, runs: int, tokens: int, prompt: int) -> dict:
    m = halve(fuse(load_model(path).model))
    if native.attach(m) != "compiled kernel":
        raise SystemExit(f"{path}: the kernel does not apply")
    m.native.lib = lib
    cache = KVCache(m, 1, prompt + tokens + 1)
    ids = torch.randint(0, m.shape.vocab_size, (1, prompt), generator=torch.Generator().manual_seed(0))
    with torch.inference_mode():
        m(ids, cache=cache, start=0)
    m.native.step(5, prompt, cache)  # warm-up, binds the cache
    sec = (ctypes.c_double * len(PHASES)).in_dll(lib, "profile_seconds")
    nbytes = (ctypes.c_double * len(PHASES)).in_dll(lib, "profile_bytes")
    best = None
    for _ in range(runs):
        for k in range(len(PHASES)):
            sec[k], nbytes[k] = 0.0, 0.0
        t = time.perf_counter()
        for i in range(tokens):  # the same positions each run: the cache is rewritten in place
            m.native.step(5, prompt + 1 + i, cache)
        step = (time.perf_counter() - t) / tokens
        if best is None or step < best["step_ms"] / 1e3:
            best = {"step_ms": step * 1e3,
                    "phases": {PHASES[k]: {"ms": sec[k] / tokens * 1e3, "mb": nbytes[k] / tokens / 1e6}
                               for k in range(len(PHASES)) if sec[k] > 0}}
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keeps", default="0.5,0.7")
    ap.add_argument("--runs", type=int, default=5)
    ap.add_argument("--tokens", type=int, default=16)
    ap.add_argument("--prompt", type=int, default=256)
    ap.add_argument("--threads", default=None, help="thread spec (attncompress.threads), read before torch starts")
    ap.add_argument("--work", type=Path, default=Path("/tmp/attncompress-speed"))
    args = ap.parse_args()
    lib, why = native.build(native.FLAGS + ("-DPROFILE",))
    if lib is None:
        raise SystemExit(f"no profiled kernel: {why}")
    models = {"dense": str(resolve(SOURCE))}
    for keep in (float(k) for k in args.keeps.split(",") if k):
        models[f"keep {keep:g}"] = str(compressed_copy(args.work, keep))
    rows = {name: profile(lib, path, args.runs, args.tokens, args.prompt) for name, path in models.items()}
    report = {"command": "python benchmarks/kernel_profile.py " + " ".join(sys.argv[1:]), "commit": _commit(),
              "thread_choice": CHOICE.to_json(), "threads": torch.get_num_threads(), "load_before": LOAD_BEFORE,
              "load_after": os.getloadavg(), "prompt_tokens": args.prompt, "tokens": args.tokens,
              "runs": args.runs, "models": rows}
    RESULTS.parent.mkdir(parents=True, exist_ok=True)
    RESULTS.write_text(json.dumps(report, indent=1) + "\n")
    names = list(rows)
    print(f"`{report['command']}` at {report['commit'][:10]}: {report['threads']} threads "
          f"({report['thread_choice']['wait_policy']} waiting, {report['thread_choice']['reason']}); load {LOAD_BEFORE[0]:.2f} before, "
          f"{report['load_after'][0]:.2f} after; {args.prompt} cached positions, fastest of {args.runs} runs "
          f"of {args.tokens} steps; ms per step (GB/s of the bytes the phase read)\n")
    print("| phase | " + " | ".join(names) + " |")
    print("|---|" + "---|" * len(names))
    for ph in PHASES:
        cells = []
        for n in names:
            p = rows[n]["phases"].get(ph)
            cells.append("" if p is None else f"{p['ms']:.3f}" + (f" ({p['mb'] / p['ms']:.0f})" if p["mb"] else ""))
        if any(cells):
            print(f"| {ph} | " + " | ".join(cells) + " |")
    print("| **step** | " + " | ".join(f"**{rows[n]['step_ms']:.2f}**" for n in names) + " |")


if __name__ == "__main__":
    main()
