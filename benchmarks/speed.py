"""Decode and prompt speed, and bytes on disk, of compressed SmolLM2 against the dense model, in one run.

    python benchmarks/speed.py [--keeps 0.5,0.7] [--runs 7] [--threads SPEC] [--weights float32,float16,kernel]
                               [--plain] [--disk] [--work DIR]
    python benchmarks/speed.py --table        # the README's speed and disk tables from the results file

Every model (the dense built-in SmolLM2 in float32 and one compressed copy per --keep, in the tool's default
format) is loaded into this one process once per kind of product weights (--weights: float32 as loaded, and
float16, `attncompress.model.halve`; kernel: float16 and the compiled decode step, as `compare` and `generate`
decode by default, `attncompress.native`), fused as the tool runs it
(`attncompress.model.fuse`; --plain: not), and timed by `attncompress.compare.time_decoders`: per run, a 1×256 prompt (logits of the last position
only, as generation needs) and 16 single-token decode steps with the KV cache, the models alternating step
by step; the median over runs is reported. The streaming read bandwidth is sampled once per run
(`measure_bandwidth`), so the bytes-read limit of a decode step (every weight read once, plus the cached keys
and values) is measured under the same load.

Threads and OpenMP waiting are the tool's own start-up choice (`attncompress.threads`; --threads SPEC or
ATTNCOMPRESS_THREADS to override), stated in the output with the load average before and after.

--disk also compresses a keep-0.7 copy with calibration text (the tool's defaults), writes it in float32, its
default format and int8, and reports bytes on disk against the float32 size of the original (4 bytes per
parameter), and held-out perplexity (corpus:pydoc-heldout, first 4096 tokens,
context 512) of each format against float32, for that copy and for the dense model rounded to int8.

The compressed copies are made with plain SVD (`--weights-only`): only their shapes matter for speed, and a
calibrated plan of the same budget has the same parameter count. They are cached in --work. Results are
written to benchmarks/results/speed.json (the command, commit, load averages and thread choice included).
"""
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
from attncompress import threads as threadlib  # noqa: E402

CHOICE = threadlib.configure(sys.argv)  # before torch starts its thread pool
LOAD_BEFORE = os.getloadavg()

import argparse  # noqa: E402
import json  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
from pathlib import Path  # noqa: E402

import torch  # noqa: E402

from attncompress import evaluate, native  # noqa: E402
from attncompress.builtin import resolve  # noqa: E402
from attncompress.compare import decode_bytes, measure_bandwidth, time_decoders  # noqa: E402
from attncompress.compress import compress  # noqa: E402
from attncompress.io import storage  # noqa: E402
from attncompress.io.write import save_tensors  # noqa: E402
from safetensors import safe_open  # noqa: E402
from attncompress.loading import is_compressed, load_model, load_weights, read_manifest, tokens  # noqa: E402
from attncompress.model import build, fuse, halve  # noqa: E402
from attncompress.texts import read_texts  # noqa: E402

SOURCE = "builtin:smollm2-135m"
RESULTS = Path(__file__).parent / "results" / "speed.json"
# issue 14's goals: (decode, prompt) speedups by keep; decode within LIMIT_GOAL of the bytes-read limit;
# disk of keep 0.7 against the original's float32 size: default format, int8; int8 perplexity within 2%
GOALS = {0.5: (1.6, 1.8), 0.7: (1.25, 1.3)}
LIMIT_GOAL = 1.3
DISK_GOALS = {"default": 0.5, "int8": 0.3}
PPL_GOAL = 1.02
HELDOUT, PPL_TOKENS, PPL_CONTEXT = "corpus:pydoc-heldout", 4096, 512
CALIBRATION = "corpus:pydoc-calibration"


def compressed_copy(work: Path, keep: float) -> Path:
    """The plain-SVD copy at `keep` in the tool's default format, made once and cached."""
    out = work / f"smollm2-keep{keep:g}"
    if is_compressed(out) and read_manifest(out)["plan"]["keep"] == keep:
        return out
    print(f"compressing {SOURCE} at keep {keep:g} (plain SVD, default format) into {out} ...", file=sys.stderr)
    compress(SOURCE, str(out), keep=keep, weights_only=True, force=True, quiet=True)
    return out


def _commit() -> str:
    try:
        return subprocess.run(["git", "rev-parse", "HEAD"], capture_output=True, text=True,
                              cwd=Path(__file__).parent).stdout.strip()
    except OSError:
        return "?"


def timings(paths: list[str], keeps: list[float | None], runs: int, decode_tokens: int, plain: bool,
            weights: list[str]) -> dict:
    """Every model once per product-weight kind in `weights` ("float32", "float16": `model.halve`, "kernel":
    float16 with the compiled decode step, `native.attach`), all timed in one interleaved `time_decoders`
    call; speedups are against the dense model with the same weights."""
    models, rows = [], []
    for kind in weights:
        for p, keep in zip(paths, keeps):
            m = load_model(resolve(p)).model
            m = m if plain else fuse(m)
            if kind in ("float16", "kernel"):
                halve(m)
            if kind == "kernel" and native.attach(m) != "compiled kernel":
                raise SystemExit(f"the compiled decode step does not apply: {native.attach(m)}")
            models.append(m)
            rows.append({"model": "dense" if keep is None else f"keep {keep:g}", "keep": keep, "weights": kind})
    buf = torch.ones(256 << 18)  # 256 MB of float32
    t = time_decoders(models, runs=runs, decode_tokens=decode_tokens, probe=lambda: measure_bandwidth(runs=3, buffer=buf))
    bw = statistics.median(t["probe"])
    cached = t["prompt_tokens"] + t["decode_tokens"] // 2
    for j, (r, m) in enumerate(zip(rows, models)):
        prompt, decode = statistics.median(t["prompt"][j]), statistics.median(t["decode"][j])
        nbytes = decode_bytes(m, cached)
        r.update({"parameters": sum(p.numel() for p in m.parameters()),
                  "bytes_per_token": nbytes, "prompt_ms": prompt * 1e3, "decode_ms": decode * 1e3,
                  "limit_ms": nbytes / bw * 1e3, "decode_runs_ms": [x * 1e3 for x in t["decode"][j]],
                  "prompt_runs_ms": [x * 1e3 for x in t["prompt"][j]]})
    for r in rows:
        d = next(x for x in rows if x["keep"] is None and x["weights"] == r["weights"])
        r["prompt_speedup"] = d["prompt_ms"] / r["prompt_ms"]
        r["decode_speedup"] = d["decode_ms"] / r["decode_ms"]
        r["limit_speedup"] = d["bytes_per_token"] / r["bytes_per_token"]
        r["decode_over_limit"] = r["decode_ms"] / r["limit_ms"]
        r["decode_over_dense_float32"] = r["decode_ms"] / next(
            x for x in rows if x["keep"] is None and x["weights"] == weights[0])["decode_ms"]
    return {"runs": runs, "prompt_tokens": t["prompt_tokens"], "decode_tokens": t["decode_tokens"],
            "fused": not plain, "bandwidth_gb_s": bw / 1e9, "bandwidth_runs_gb_s": [x / 1e9 for x in t["probe"]],
            "rows": rows}


def _ppl(model, ids) -> float:
    return evaluate.perplexity(fuse(model), ids, context=PPL_CONTEXT)["perplexity"]


def calibrated_copy(work: Path) -> Path:
    """The keep-0.7 copy compressed with the tool's defaults and CALIBRATION text (the plan a user gets), cached."""
    out = work / "smollm2-keep0.7-calibrated"
    if not (is_compressed(out) and read_manifest(out)["plan"]["keep"] == 0.7):
        print(f"compressing {SOURCE} at keep 0.7 with {CALIBRATION} into {out} ...", file=sys.stderr)
        compress(SOURCE, str(out), keep=0.7, texts=[CALIBRATION], force=True, quiet=True)
    return out


def disk(work: Path) -> dict:
    """Bytes on disk of the keep-0.7 copy per format and the perplexity each format costs against float32.

    The copy is the calibrated one (a plain-SVD cut at keep 0.7 has a perplexity in the millions, too far off
    for a 2% comparison to mean anything); each format is written by `io.write.save_tensors` into one file
    and read back, so its bytes and its rounding are what `compress --dtype` writes.
    """
    dense = load_model(resolve(SOURCE))
    original_f32 = 4 * sum(p.numel() for p in dense.model.parameters())
    text, _ = read_texts([HELDOUT])
    ids = tokens(dense, text)[:PPL_TOKENS]
    shape, w, *_ = load_weights(resolve(SOURCE))
    base = _ppl(build(shape, w), ids)
    stored = storage.encode_all(w, "int8")
    w8 = storage.decode(list(stored), stored.__getitem__)
    dense_int8 = {"perplexity_float32": base, "perplexity_int8": _ppl(build(shape, w8), ids)}
    del w, w8, stored
    out = {"original_gguf_bytes": sum(f.stat().st_size for f in dense.source.files),
           "original_float32_bytes": original_f32, "dense_rounded": dense_int8, "keep_0.7": {},
           "copy": f"keep 0.7, calibrated on {CALIBRATION} (compress defaults)"}
    copy = calibrated_copy(work)
    shape, w, *_ = load_weights(copy)
    default = read_manifest(copy)["dtype"]
    ppl32 = None
    for dtype in ("float32", default, "int8"):
        f = work / f"keep0.7-calibrated.{dtype}.safetensors"
        save_tensors(f, w, dtype)
        with safe_open(str(f), "pt") as st:
            back = storage.decode(list(st.keys()), st.get_tensor)
        ppl = _ppl(build(shape, back), ids)
        ppl32 = ppl if dtype == "float32" else ppl32
        name = dtype + (" (default)" if dtype == default else "")
        out["keep_0.7"][name] = {"bytes": f.stat().st_size, "over_original_float32": f.stat().st_size / original_f32,
                                 "perplexity": ppl, "perplexity_over_float32": ppl / ppl32}
        f.unlink()
    out["heldout"] = {"text": HELDOUT, "tokens": len(ids), "context": PPL_CONTEXT}
    return out


def table(report: dict) -> str:
    """The README's markdown tables from a results dict."""
    sp = report["speed"]
    tc = report["thread_choice"]
    lines = [f"`{report['command']}` at {report['commit'][:10]}: {tc['threads']} threads, {tc['wait_policy']} "
             f"waiting ({tc['reason']}); load average {report['load_before'][0]:.2f} before, "
             f"{report['load_after'][0]:.2f} after; read bandwidth {sp['bandwidth_gb_s']:.1f} GB/s; median of "
             f"{sp['runs']} interleaved runs.", "",
             "| model | product weights | prompt 1×256 | speedup | goal | decode ms/token | speedup | goal | "
             "bytes-read limit | limit speedup | decode / limit |", "|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in sp["rows"]:
        gd, gp = GOALS.get(r.get("keep"), ("", ""))
        lines.append(f"| {r['model']} | {r.get('weights', 'float32')} | {r['prompt_ms']:.0f} ms | "
                     f"{r['prompt_speedup']:.2f}× | {gp and f'≥ {gp}×'} | "
                     f"{r['decode_ms']:.1f} | {r['decode_speedup']:.2f}× | {gd and f'≥ {gd}×'} | "
                     f"{r['limit_ms']:.1f} ms | {r['limit_speedup']:.2f}× | {r['decode_over_limit']:.2f} "
                     f"(goal ≤ {LIMIT_GOAL}) |")
    if report.get("disk"):
        dk = report["disk"]
        lines += ["", f"Disk, {dk.get('copy', 'keep 0.7 (plain SVD)')}, against the original's float32 size "
                  f"({dk['original_float32_bytes'] / 1e6:.0f} MB; the GGUF file is "
                  f"{dk['original_gguf_bytes'] / 1e6:.1f} MB); perplexity on {dk['heldout']['text']} "
                  f"({dk['heldout']['tokens']} tokens, context {dk['heldout']['context']}):", "",
                  "| format | bytes on disk | × original float32 | perplexity | × float32 of the same model |",
                  "|---|---|---|---|---|"]
        for name, e in dk["keep_0.7"].items():
            lines.append(f"| {name} | {e['bytes'] / 1e6:.1f} MB | {e['over_original_float32']:.3f} | "
                         f"{e['perplexity']:.2f} | {e['perplexity_over_float32']:.4f} |")
        dr = dk["dense_rounded"]
        lines += ["", f"The dense model rounded to int8: perplexity {dr['perplexity_int8']:.3f} against "
                  f"{dr['perplexity_float32']:.3f} in float32 ({dr['perplexity_int8'] / dr['perplexity_float32']:.4f}×)."]
    return "\n".join(lines)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--keeps", default="0.5,0.7")
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--decode-tokens", type=int, default=16)
    ap.add_argument("--threads", help="auto | N | N:active | N:passive (read at start-up; default auto)")
    ap.add_argument("--plain", action="store_true", help="time the unfused models")
    ap.add_argument("--weights", default="float32,float16,kernel",
                    help="product weights to time every model with, comma-separated (float32, float16: model.halve, "
                    "kernel: float16 and the compiled decode step, native.attach)")
    ap.add_argument("--disk", action="store_true", help="also bytes on disk and perplexity per format")
    ap.add_argument("--work", default="/tmp/attncompress-speed", help="where the compressed copies are cached")
    ap.add_argument("--results", default=str(RESULTS))
    ap.add_argument("--table", action="store_true", help="print the README tables from --results and stop")
    args = ap.parse_args()
    if args.table:
        print(table(json.loads(Path(args.results).read_text(encoding="utf-8"))))
        return
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    keeps = [float(k) for k in args.keeps.split(",")]
    paths = [SOURCE] + [str(compressed_copy(work, k)) for k in keeps]
    sp = timings(paths, [None] + keeps, args.runs, args.decode_tokens, args.plain, args.weights.split(","))
    report = {"command": "python benchmarks/speed.py " + " ".join(sys.argv[1:]), "commit": _commit(),
              "torch": torch.__version__, "thread_choice": CHOICE.to_json(), "threads": torch.get_num_threads(),
              "load_before": LOAD_BEFORE, "speed": sp, "disk": disk(work) if args.disk else None}
    report["load_after"] = os.getloadavg()
    Path(args.results).parent.mkdir(parents=True, exist_ok=True)
    Path(args.results).write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    print(table(report))


if __name__ == "__main__":
    main()
