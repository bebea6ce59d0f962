"""Print the README's markdown table of one results file: python benchmarks/readme_table.py quality_table"""
import json
import sys
from pathlib import Path

RESULTS = Path(__file__).resolve().parent / "results"


def quality_table(r: dict) -> str:
    f = r["figures"]
    keeps = sorted({row["keep"] for row in f["rows"]}, reverse=True)
    variants = list(dict.fromkeys(row["variant"] for row in f["rows"]))
    by = {(row["keep"], row["variant"]): row for row in f["rows"]}
    out = ["| keep | " + " | ".join(variants) + " |", "|---|" + "---|" * len(variants)]
    for k in keeps:
        cells = [f"{by[(k, v)]['same_kind_ratio']:.2f}× / {by[(k, v)]['other_kind_ratio']:.2f}×" for v in variants]
        out.append(f"| {k} | " + " | ".join(cells) + " |")
    out.append("")
    out.append("| keep | predicted rise (nats) | measured: loss | measured: default | second pass, default (s) |")
    out.append("|---|---|---|---|---|")
    first = next(v for v in variants if v == "loss")
    last = variants[-1]
    for k in keeps:
        row, base = by[(k, last)], by[(k, first)]
        out.append(f"| {k} | {base['predicted_rise_nats']:.3f} | {base['measured_rise_same_kind_nats']:.3f} | "
                   f"{row['measured_rise_same_kind_nats']:.3f} | {row['second_pass_seconds']} |")
    return "\n".join(out)


TABLES = {"quality_table": quality_table}

if __name__ == "__main__":
    name = sys.argv[1]
    print(TABLES[name](json.loads((RESULTS / f"{name}.json").read_text(encoding="utf-8"))))
