"""Embedding agreement of the built-in MiniLM encoder at several budgets, training-free and tuned.

    python benchmarks/encoder_table.py [--keeps 0.9,0.8,0.7,0.5] [--tuned 0.7] [--steps 150] [--lr LR]
                                       [--calib examples/calibration.txt,corpus:pydoc-calibration]

Calibration and tuning text (`--calib`): the demo scenario's handbook pages (examples/calibration.txt), by
default mixed with the calibration half of the pydoc topics, split into sentences as `compress` and `tune`
split them. Evaluation, never used for calibration or tuning:
    calibration kind: examples/sentences.txt (120 sentences of the same invented scenario)
    other kind: 200 paragraphs of the held-out pydoc topics, and 200 paragraphs of the license texts
Each cell runs `attncompress.api.compress`, `tune` (keeps in `--tuned`) and `compare`, the functions the
commands run, on 2 threads. Results go to benchmarks/results/encoder_table.json (with the command, the
commit and the load average) and a markdown table beside it.
"""
import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import torch

from attncompress import api, corpora
from attncompress.texts import split_sentences

ROOT = Path(__file__).resolve().parent.parent
RESULTS = ROOT / "benchmarks" / "results"


def eval_files(tmp: Path, n: int = 200) -> dict[str, str]:
    """The evaluation texts, one sentence (or paragraph) per line."""
    out = {"sentences (calibration kind)": str(ROOT / "examples" / "sentences.txt")}
    for name, text in (("pydoc held-out (other kind)", corpora.pydoc_text("heldout")),
                       ("licenses (other kind)", corpora.license_text())):
        paras = [p for p in split_sentences(text) if len(p) >= 40]  # headings and grammar fragments out
        paras = [paras[int(i)] for i in torch.linspace(0, len(paras) - 1, min(n, len(paras))).round().long()]
        f = tmp / (name.split(" ")[0] + ".txt")
        f.write_text("\n".join(paras) + "\n", encoding="utf-8")
        out[name] = str(f)
    return out


def quality(src: str, model: str, files: dict[str, str]) -> dict:
    """Per evaluation text: mean / p5 / min cosine, top-1 neighbour unchanged, Spearman."""
    out = {}
    for name, f in files.items():
        q = api.compare(src, model, [f], speed_runs=0)["quality"]
        out[name] = {"lines": q["lines"], "cosine": q["cosine"], "neighbour_agreement": q["neighbour_agreement"],
                     "spearman": q["spearman"]}
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--keeps", default="0.9,0.8,0.7,0.5")
    ap.add_argument("--tuned", default="0.7", help="keeps that are also tuned")
    ap.add_argument("--steps", type=int, default=150)
    ap.add_argument("--lr", type=float, default=None, help="default: the tune's own for an encoder")
    ap.add_argument("--calib", default="examples/calibration.txt,corpus:pydoc-calibration")
    ap.add_argument("--out", default=str(RESULTS / "encoder_table.json"))
    args = ap.parse_args()
    torch.set_num_threads(2)
    src = "builtin:minilm-l6"
    calib = [c if c.startswith("corpus:") else str(ROOT / c) for c in args.calib.split(",")]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        files = eval_files(tmp)
        sp = api.compare(src, src, [files["sentences (calibration kind)"]], speed_runs=5, threads=2)["speed"]["batch"]
        for keep in [float(k) for k in args.keeps.split(",")]:
            t0 = time.perf_counter()
            api.compress(src, str(tmp / f"c{keep}"), keep=keep, texts=calib, quiet=True)
            row = {"keep": keep, "compress_seconds": time.perf_counter() - t0,
                   "training_free": quality(src, str(tmp / f"c{keep}"), files)}
            if str(keep) in args.tuned.split(","):
                t = api.tune(tmp / f"c{keep}", calib, tmp / f"t{keep}", steps=args.steps, lr=args.lr,
                             teacher=src, quiet=True)
                row["tune"] = {"steps": args.steps, "lr": t["settings"]["lr"],
                               "hidden_weight": t["settings"]["hidden_weight"],
                               "seconds": t["seconds"]["train"] + t["seconds"]["heldout"],
                               "loss_first": t["curve"][0]["loss"], "loss_last": t["curve"][-1]["loss"],
                               "heldout": t["heldout"]}
                row["tuned"] = quality(src, str(tmp / f"t{keep}"), files)
                speed = api.compare(src, str(tmp / f"t{keep}"), [files["sentences (calibration kind)"]],
                                    speed_runs=5, threads=2)["speed"]["batch"]
                row["sentences_per_second"] = {"original": speed["a_sentences_s"], "tuned": speed["b_sentences_s"]}
            rows.append(row)
            print(json.dumps(row), flush=True)
    commit = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip()
    report = {"command": " ".join([Path(sys.argv[0]).name] + sys.argv[1:]), "commit": commit,
              "load_average": os.getloadavg(), "threads": 2, "calibration": calib,
              "original_sentences_per_second": sp["a_sentences_s"], "rows": rows}
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text(json.dumps(report, indent=1) + "\n", encoding="utf-8")
    Path(args.out).with_suffix(".md").write_text(markdown(report), encoding="utf-8")
    print(markdown(report))


def markdown(r: dict) -> str:
    """The README table: one line per keep and kind of model, one column group per evaluation text."""
    names = list(r["rows"][0]["training_free"])
    head = "| keep | model | " + " | ".join(f"{n}: mean cos / p5 / min / top-1 / Spearman" for n in names) + " |"
    lines = [head, "|" + "---|" * (2 + len(names))]
    for row in r["rows"]:
        for kind in ("training_free", "tuned"):
            if kind not in row:
                continue
            label = "training-free" if kind == "training_free" else f"tuned {row['tune']['steps']} steps " \
                                                                   f"({row['tune']['seconds']:.0f} s)"
            cells = [f"{q['cosine']['mean']:.3f} / {q['cosine']['p5']:.3f} / {q['cosine']['min']:.3f} / "
                     f"{100 * q['neighbour_agreement']:.0f}% / {q['spearman']:.3f}" for q in row[kind].values()]
            lines.append(f"| {row['keep']} | {label} | " + " | ".join(cells) + " |")
    lines.append("")
    lines.append(f"`{r['command']}` at {r['commit'][:10]}, load average {r['load_average'][0]:.1f}, "
                 f"{r['threads']} threads; calibration and tuning text: {', '.join(r['calibration'])}.")
    return "\n".join(lines) + "\n"


if __name__ == "__main__":
    main()
