"""torch.compile of the decode step against eager, on the fused runtime (an experiment; eager stays the default).

    python benchmarks/compile_decode.py [--model builtin:smollm2-135m] [--steps 32] [--threads SPEC]

Compiles `Transformer.forward` for single-token steps (dynamic cache length) with the inductor backend (it
needs a C++ compiler), then times eager and compiled steps alternately after a 128-token prompt and prints
ms per token, the compile time, and the largest logit difference. A failure to compile is printed, not raised.
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from attncompress import threads as threadlib  # noqa: E402

CHOICE = threadlib.configure(sys.argv)

import argparse  # noqa: E402
import statistics  # noqa: E402
import time  # noqa: E402

import torch  # noqa: E402

from attncompress.builtin import resolve  # noqa: E402
from attncompress.loading import load_model  # noqa: E402
from attncompress.model import KVCache, fuse  # noqa: E402


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", default="builtin:smollm2-135m")
    ap.add_argument("--steps", type=int, default=32)
    ap.add_argument("--threads")
    args = ap.parse_args()
    m = fuse(load_model(resolve(args.model)).model)
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
        print(f"compile + first two steps: {time.perf_counter() - t0:.1f} s")
        m(ids[:, prompt:prompt + 1], cache=caches[0], start=prompt)
        want = m(ids[:, prompt + 1:prompt + 2], cache=caches[0], start=prompt + 1)
        print(f"largest logit difference, compiled vs eager: {float((got - want).abs().max()):.2e}")
        times = {"eager": [], "compiled": []}
        for i in range(prompt + 2, prompt + args.steps):
            for name, fn, c in (("eager", m, caches[0]), ("compiled", step, caches[1])):
                t = time.perf_counter()
                fn(ids[:, i:i + 1], cache=c, start=i)
                times[name].append(time.perf_counter() - t)
    for name, ts in times.items():
        print(f"{name}: {statistics.median(ts) * 1e3:.1f} ms/token (median of {len(ts)} steps)")


if __name__ == "__main__":
    main()
