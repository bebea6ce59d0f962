"""Exploratory scan: an encoder tune pulled towards the teacher's hidden states of every layer, not only the
last (not a benchmark: prints, writes no results file).

    python benchmarks/scans/encoder_layers_scan.py MODE [STEPS] [WEIGHT] [--extra TEXT]

MODE "last" is the tune as it is; "all" replaces its hidden-state term by the mean over the blocks of the
same relative squared error of each block's output (patched in here for the scan). Compresses
builtin:minilm-l6 at keep 0.7 (examples/calibration.txt + corpus:pydoc-calibration [+ --extra]) once into
$SCAN_DIR and prints mean cosine / top-1 neighbour agreement on encoder_table's evaluation texts. Figures in
benchmarks/results/scans.md. Run from the repository root.
"""
import os
import sys
import time
from pathlib import Path

import torch
import torch.nn.functional as F

sys.path.insert(0, "benchmarks")
from encoder_table import eval_files, quality  # noqa: E402
from attncompress import api, tune as T  # noqa: E402

torch.set_num_threads(2)
mode = sys.argv[1]
steps = int(sys.argv[2]) if len(sys.argv) > 2 and not sys.argv[2].startswith("-") else 150
weight = float(sys.argv[3]) if len(sys.argv) > 3 and not sys.argv[3].startswith("-") else 1.0
extra = [sys.argv[sys.argv.index("--extra") + 1]] if "--extra" in sys.argv else []
tmp = Path(os.environ.get("SCAN_DIR", "/tmp/attncompress-scan/enc-layers")); tmp.mkdir(parents=True, exist_ok=True)
calib = ["examples/calibration.txt", "corpus:pydoc-calibration"] + extra
c = tmp / f"c-{len(extra)}"
if not c.exists():
    api.compress("builtin:minilm-l6", str(c), keep=0.7, texts=calib, quiet=True, force=True)
files = eval_files(tmp)

if mode == "all":
    STATES = []
    blocks_forward = T.Transformer.hidden

    def hidden(self, ids, **kw):  # record every block's output
        out = []
        for blk in self.blocks:
            if not hasattr(blk, "_scan_hook"):
                blk._scan_hook = blk.register_forward_hook(lambda m, a, y: m._scan_out.append(y))
            blk._scan_out = out
        h = blocks_forward(self, ids, **kw)
        STATES[:] = [out]
        return h
    T.Transformer.hidden = hidden

    def sentence(self, j):
        if j not in self._kept:
            n = int(self.mask[j].sum())
            with torch.no_grad():
                h = self.model(self.ids[j:j + 1, :n])[0].float()
            self._kept[j] = (F.normalize(h.mean(0), dim=-1), torch.stack([o[0].float() for o in STATES[0]]))
        return self._kept[j]
    T.SentenceTeacher.sentence = sentence

    def batch(self, idx, s):
        got = [self.sentence(int(j)) for j in idx]
        hid = torch.zeros(got[0][1].shape[0], len(got), s, got[0][1].shape[-1])  # (L, b, s, d)
        for i, (_, h) in enumerate(got):
            hid[:, i, :h.shape[1]] = h
        return T.SentenceTargets(self.mask[idx, :s], torch.stack([u for u, _ in got]), hid)
    T.SentenceTeacher.batch = batch

    def layers_loss(hidden, x, targets, temperature):
        m = targets.mask.bool()
        terms = [(h.float()[m] - t[m]).pow(2).sum() / t[m].pow(2).sum() for h, t in zip(STATES[0], targets.hidden)]
        return sum(terms) / len(terms)
    T.LOSSES["hidden"] = T.LossTerm(layers_loss, True)

t0 = time.time()
t = api.tune(c, calib, tmp / "t", steps=steps, teacher="builtin:minilm-l6", quiet=True, force=True,
             hidden_weight=weight)
print(mode, steps, weight, extra, "tune s", round(time.time() - t0),
      "heldout", [(e["step"], round(e["loss"], 4)) for e in t["heldout"]["curve"]], "best", t["heldout"]["best_step"])
if mode == "all":
    T.Transformer.hidden = blocks_forward
for kind, m in (("free", c), ("tuned", tmp / "t")):
    q = quality("builtin:minilm-l6", str(m), files)
    print(kind, {n[:8]: (round(v["cosine"]["mean"], 3), round(v["neighbour_agreement"], 2)) for n, v in q.items()},
          flush=True)
