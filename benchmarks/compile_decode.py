"""torch.compile of the decode step against eager, on the fused runtime (an experiment; eager stays the default).

    python benchmarks/compile_decode.py [--model builtin:smollm2-135m] [--steps 32] [--weights float16] [--threads SPEC]
        [--cpp-wrapper]

Compiles `Transformer.forward` for single-token steps (dynamic cache length) with the inductor backend (it
needs a C++ compiler), then times eager and compiled steps alternately after a 128-token prompt and prints
ms per token, the compile time, and the largest logit difference. A failure to compile is printed, not raised.
--weights float16 first stores the product weights in float16 (`attncompress.model.halve`, the default of
`generate` and `compare`); --cpp-wrapper sets inductor's `cpp_wrapper` (the compiled step calls its kernels
from generated C++ instead of Python). Writes benchmarks/results/compile_decode.json (command, commit, load,
figures), one entry per weights and wrapper.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from attncompress import threads as threadlib  # noqa: E402

CHOICE = threadlib.configure(sys.argv)

import argparse  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
from pathlib import Path  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402

import torch  # noqa: E402

from attncompress.builtin import resolve  # noqa: E402
from attncompress.loading import load_model  # noqa: E402
from attncompress.model import KVCache, fuse, halve  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", default="builtin:smollm2-135m")
    ap.add_argument("--steps", type=int, default=32)
    ap.add_argument("--threads")
    ap.add_argument("--weights", choices=["float32", "float16"], default="float32")
    ap.add_argument("--cpp-wrapper", action="store_true",
                    help="inductor's C++ wrapper: the compiled step calls its kernels from C++, not Python")
    args = ap.parse_args()
    if args.cpp_wrapper:
        import torch._inductor.config as inductor_config
        inductor_config.cpp_wrapper = True
    load_before = os.getloadavg()
    m = fuse(load_model(resolve(args.model)).model)
    if args.weights == "float16":
        halve(m)
    prompt = 128
    ids = torch.randint(0, m.shape.vocab_size, (1, prompt + args.steps), generator=torch.Generator().manual_seed(0))
    step = torch.compile(m, dynamic=True)
    print(f"{CHOICE.describe()}")
    with torch.inference_mode():
        caches = [KVCache(m, 1, prompt + args.steps) for _ in range(2)]
        for c in caches:
            m(ids[:, :prompt], cache=c, start=0)
        t0 = time.perf_counter()
        try:
            for i in (prompt, prompt + 1):  # two steps: the second shows whether the length recompiles
                got = step(ids[:, i:i + 1], cache=caches[1], start=i)
        except Exception as e:  # noqa: BLE001  (an experiment: report whatever the compiler raised)
            print(f"compile failed: {e.__class__.__name__}: {str(e).splitlines()[0][:200]}")
            return
        compile_s = time.perf_counter() - t0
        print(f"compile + first two steps: {compile_s:.1f} s")
        m(ids[:, prompt:prompt + 1], cache=caches[0], start=prompt)
        want = m(ids[:, prompt + 1:prompt + 2], cache=caches[0], start=prompt + 1)
        diff = float((got - want).abs().max())
        print(f"largest logit difference, compiled vs eager: {diff:.2e}")
        times = {"eager": [], "compiled": []}
        for i in range(prompt + 2, prompt + args.steps):
            for name, fn, c in (("eager", m, caches[0]), ("compiled", step, caches[1])):
                t = time.perf_counter()
                fn(ids[:, i:i + 1], cache=c, start=i)
                times[name].append(time.perf_counter() - t)
    for name, ts in times.items():
        print(f"{name}: {statistics.median(ts) * 1e3:.1f} ms/token (median of {len(ts)} steps)")
    commit = subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True,
                            cwd=Path(__file__).parent).stdout.strip()
    out = Path(__file__).parent / "results" / "compile_decode.json"
    runs = json.loads(out.read_text()) if out.exists() else {}
    runs[args.weights + (" cpp-wrapper" if args.cpp_wrapper else "")] = {
        "command": "python benchmarks/compile_decode.py " + " ".join(sys.argv[1:]), "commit": commit,
        "torch": torch.__version__, "thread_choice": CHOICE.to_json(), "load_before": load_before,
        "load_after": os.getloadavg(), "model": args.model, "weights": args.weights, "compile_seconds": compile_s,
        "cpp_wrapper": args.cpp_wrapper,
        "largest_logit_difference": diff, "eager_ms": statistics.median(times["eager"]) * 1e3,
        "compiled_ms": statistics.median(times["compiled"]) * 1e3, "steps": len(times["eager"])}
    out.write_text(json.dumps(runs, indent=2) + "\n", encoding="utf-8")


if __name__ == "__main__":
    main()
