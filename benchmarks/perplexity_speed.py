"""Our perplexity evaluation time against transformers' on the same tokens, side by side, as a ratio.

    python benchmarks/perplexity_speed.py [--tokens 2048] [--repeats 3]

Both models are the built-in SmolLM2 GGUF dequantised to float32; both run through the same windowing
code (`attncompress.evaluate.perplexity`), so only the forward passes differ. Runs alternate A, B, A, B…
and the median of each is reported.
"""
import argparse
import statistics
import time

import torch

from attncompress import corpora, evaluate
from attncompress.loading import load_model, tokens
from attncompress.builtin import builtin


class Reference:
    is_decoder = True

    def __init__(self, m):
        self.m = m

    def __call__(self, ids):
        return self.m(ids).logits


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--tokens", type=int, default=2048)
    ap.add_argument("--context", type=int, default=512)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    import transformers as tf
    path = builtin("smollm2-135m")
    ours = load_model(path)
    ids = tokens(ours, corpora.pydoc_text("heldout"))[: args.tokens]
    ref = Reference(tf.AutoModelForCausalLM.from_pretrained(str(path.parent), gguf_file=path.name,
                                                            dtype=torch.float32).eval())
    times = {"ours": [], "reference": []}
    ppl = {}
    for _ in range(args.repeats):
        for name, m in (("ours", ours.model), ("reference", ref)):
            t = time.perf_counter()
            r = evaluate.perplexity(m, ids, context=args.context)
            times[name].append(time.perf_counter() - t)
            ppl[name] = r["perplexity"]
    a, b = statistics.median(times["ours"]), statistics.median(times["reference"])
    print(f"tokens {len(ids)}, context {args.context}, threads {torch.get_num_threads()}, repeats {args.repeats}")
    print(f"{'':>10} {'seconds':>8} {'tok/s':>8} {'perplexity':>11}")
    for name, t in (("ours", a), ("reference", b)):
        print(f"{name:>10} {t:8.2f} {len(ids) / t:8.1f} {ppl[name]:11.4f}")
    print(f"time ours / reference: {a / b:.3f} (goal: at most 1.2)")


if __name__ == "__main__":
    main()
