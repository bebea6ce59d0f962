"""Turning report dicts into terminal text and markdown."""
from __future__ import annotations


def _m(n: int) -> str:
    return f"{n / 1e6:.2f}M" if n >= 1e5 else f"{n:,}"


def inspect_text(r: dict) -> str:
    s = r["shape"]
    lines = [f"{r['path']}  ({r['format']}, {r['family']} family{', ' + r['model_type'] if r['model_type'] else ''})",
             f"layers {s['n_layers']}, width {s['d_model']}, heads {s['n_heads']} (kv {s['n_kv_heads']}) of "
             f"{s['head_dim']}, feed-forward {s['d_ff']} ({'gated' if s['gated'] else 'plain'}), vocab {s['vocab_size']}"
             + (f", rotary theta {s['rope_theta']:g}" if s["rope_theta"] else ""),
             "parameters: " + ", ".join(f"{k} {_m(v)}" for k, v in r["parameters"].items()),
             f"block matrices: {_m(r['block_matrix_parameters'])}"
             + (f"; KV cache {r['kv_bytes_per_token']:,} bytes/token (float32)" if r["kv_bytes_per_token"] else ""),
             "dtypes: " + ", ".join(f"{k} x{v}" for k, v in r["dtypes"].items())
             + (f" (format {r['storage']}; runs in float32)" if r.get("storage") else ""), ""]
    lines.append(f"{'layer':>5}  {'QK (heads x width)':<22} {'VO (groups x width)':<22} feed-forward")
    for L in r["layers"]:
        qk, vo = L["qk"], L["vo"]
        ff = ", ".join(f"{k} {v['shape'][0]}x{v['shape'][1]}" + (f" r{v['rank']}" if v["rank"] else "")
                       for k, v in L["ff"].items())
        qk_s = f"{qk['heads']}x{qk['width']}" + (" rotary" if qk["rotary"] else "") + \
            (f" on {qk['kv_heads']} kv" if qk["kv_heads"] != qk["heads"] else "")
        lines.append(f"{L['layer']:>5}  {qk_s:<22} {str(vo['groups']) + 'x' + str(vo['width']):<22} {ff}")
    lines.append("")
    lines.append("unused tensors: " + (", ".join(r["unused"]) if r["unused"] else "none"))
    return "\n".join(lines)


def plan_text(s: dict) -> str:
    head = (f"plan: {s['strategy']}, keep {s['keep']}: block matrices {_m(s['block_params_kept'])} of "
            f"{_m(s['block_params_dense'])} ({100 * s['kept_fraction']:.1f}%); KV cache {s['kv_bytes_per_token']:,} "
            f"of {s['kv_bytes_per_token_dense']:,} bytes/token")
    keys = [k for k in s["layers"][0] if k != "layer"]
    if "kept_by_kind" in s:
        head += "\nkept by kind: " + ", ".join(f"{k} {_m(v)}" for k, v in s["kept_by_kind"].items())
    if s.get("predicted_rise"):
        rise = s["predicted_rise"]
        head += (f"\npredicted rise of the calibration loss: {sum(rise.values()):.4g} nats/token ("
                 + ", ".join(f"{k} {v:.3g}" for k, v in rise.items()) + ")")
    rows = [f"{'layer':>5} " + " ".join(f"{k:>6}" for k in keys)]
    for L in s["layers"]:
        rows.append(f"{L['layer']:>5} " + " ".join(f"{('dense' if L[k] is None else L[k]):>6}" for k in keys))
    return head + "\n" + "\n".join(rows)


def write_spectrum(r: dict, out: str, force: bool) -> str:
    """spectra.json, summary.md and (with matplotlib) PNG plots in one atomically written directory."""
    from .io.write import atomic_dir, dumps
    with atomic_dir(out, force) as tmp:
        (tmp / "spectra.json").write_text(dumps(r), encoding="utf-8")
        kinds = [k for k in r["layers"][0] if k != "layer"]
        md = [f"# Spectra of {r['path']}", "",
              f"{'Whitened by calibration text' if r['whitened'] else 'Weights only'}; energy kept at 75/50/25% of "
              "each matrix's rank.", "",
              "| layer | " + " | ".join(kinds) + " |", "|---|" + "---|" * len(kinds)]
        for L in r["layers"]:
            md.append(f"| {L['layer']} | " + " | ".join(
                "/".join(f"{L[k]['energy_at'][q]:.3f}" for q in ("75%", "50%", "25%")) for k in kinds) + " |")
        (tmp / "summary.md").write_text("\n".join(md) + "\n", encoding="utf-8")
        try:
            import matplotlib
        except ImportError:
            return "plots skipped: install the plots extra (pip install 'attncompress[plots]') for PNG plots"
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
        fig, axes = plt.subplots(1, len(kinds), figsize=(3.2 * len(kinds), 3), squeeze=False)
        for ax, k in zip(axes[0], kinds):
            for L in r["layers"]:
                e = L[k]["energy_kept"]
                ax.plot([i / (len(e) - 1) for i in range(len(e))], e, lw=0.8)
            ax.set_title(k), ax.set_xlabel("fraction of rank kept"), ax.set_ylim(0, 1.01)
        axes[0][0].set_ylabel("energy kept (one line per layer)")
        fig.tight_layout()
        fig.savefig(tmp / "energy.png", dpi=110)
        plt.close(fig)
    return "plots in energy.png"


def tune_lines(r: dict) -> list[str]:
    """What a tune read and which step it wrote: repeats per text, the held-out curve, an early stop."""
    lines = ["texts: " + ", ".join(f"{d['name']} ({d['blocks']} blocks, read {d['repeats']:.1f}×)" if "repeats" in d
                                   else d["name"] for d in r["data"]["files"])]
    h = r.get("heldout")
    if h:
        curve = ", ".join(f"{c['step']}: {c['loss']:.4f}" for c in h["curve"])
        lines.append(f"held-out loss ({h['blocks']} blocks) by step: {curve}")
        stop = f"; stopped early at step {h['stopped_early_at']}" if h["stopped_early_at"] else ""
        lines.append(f"wrote the weights of step {h['best_step']} (lowest held-out loss {h['best_loss']:.4f}){stop}")
    return lines


# ------------------------------------------------------------------------------------------------ compare

def _bytes(n: int) -> str:
    return f"{n / 1e6:.1f} MB" if n >= 1e5 else f"{n:,} B"


def _fmt(x, spec: str = ".4g") -> str:
    return "-" if x is None else format(x, spec)


def _ppl(x: float) -> str:
    return f"{x:.3f}" if x < 1e4 else f"{x:.3g}"


def _label(m: dict) -> str:
    plan = m.get("plan")
    extra = f", keep {plan['keep']:g} {plan['strategy']}" if plan else ""
    return f"{m['path']} ({m['format']}, {m['family']}{extra})"


def compare_rows(r: dict) -> list[tuple[str, str, str, str]]:
    """The comparison as (what, A, B, B vs A) rows, shared by the terminal table and the markdown report."""
    a, b, q, sp = r["a"], r["b"], r["quality"], r["speed"]
    ratio = r["ratios"]
    rows = [("parameters", _m(a["parameters"]["total"]), _m(b["parameters"]["total"]),
             _fmt(ratio["parameters"], ".3f")),
            ("block-matrix parameters", _m(a["parameters"]["block_matrices"]), _m(b["parameters"]["block_matrices"]),
             _fmt(ratio["block_matrices"], ".3f"))]
    disk = [_bytes(m["disk"]["bytes"]) + f" ({m['disk'].get('format') or ('quantised' if m['disk']['quantised'] else '?')})"
            for m in (a, b)]
    rows.append(("bytes on disk", disk[0], disk[1], _fmt(ratio["disk_bytes"], ".3f")))
    rows.append(("bytes in memory (float32)", _bytes(a["runtime_bytes"]), _bytes(b["runtime_bytes"]),
                 _fmt(ratio["runtime_bytes"], ".3f")))
    if a["kv_bytes_per_token"] is not None:
        rows.append(("KV cache bytes/token", f"{a['kv_bytes_per_token']:,}", f"{b['kv_bytes_per_token']:,}",
                     _fmt(ratio["kv_bytes_per_token"], ".3f")))
    if q and q["kind"] == "perplexity":
        rows += _perplexity_rows(q)
        fe = r.get("format_effect")
        if fe:
            rows.append((f"perplexity of A as {fe['format']} (format alone)", _ppl(fe["float32"]), _ppl(fe["rounded"]),
                         _ppl(fe["ratio"])))
    elif q:
        c = q["cosine"]
        rows.append((f"cosine A·B per line ({q['lines']} lines)", "", f"mean {c['mean']:.4f} p5 {c['p5']:.4f} "
                     f"min {c['min']:.4f}", ""))
        rows.append(("top-1 neighbour unchanged", "", f"{100 * q['neighbour_agreement']:.1f}%", ""))
        rows.append(("Spearman of pairwise similarities", "", f"{q['spearman']:.4f}", ""))
        for t in q.get("per_text", []):
            c = t["cosine"]
            rows.append((f"  {t['name']} ({t['lines']} lines)", "", f"cos {c['mean']:.4f} p5 {c['p5']:.4f} min "
                         f"{c['min']:.4f}, top-1 {100 * t['neighbour_agreement']:.1f}%, Spearman {t['spearman']:.4f}",
                         ""))
    if sp:
        if "prompt" in sp:
            p, d = sp["prompt"], sp["decode"]
            rows.append((f"prompt 1x{p['tokens']} (ms)", f"{p['a_ms']:.1f}", f"{p['b_ms']:.1f}",
                         f"speedup {p['speedup']:.2f}x"))
            rows.append((f"decode (ms/token, {sp.get('decode_weights', 'float32')} weights)", f"{d['a_ms']:.1f}",
                         f"{d['b_ms']:.1f}", f"speedup {d['speedup']:.2f}x"))
            rows.append(("generation (tokens/s)", f"{d['a_tokens_per_s']:.1f}", f"{d['b_tokens_per_s']:.1f}", ""))
            if "a_limit_ms" in d:
                rows.append(("  bytes-read limit (ms/token)", f"{d['a_limit_ms']:.1f}", f"{d['b_limit_ms']:.1f}",
                             f"speedup {d['limit_speedup']:.2f}x at best"))
                rows.append(("  decode / limit", f"{d['a_over_limit']:.2f}", f"{d['b_over_limit']:.2f}", ""))
        if "batch" in sp:
            t = sp["batch"]
            rows.append((f"batch of {t['sentences']} sentences (ms)", f"{t['a_ms']:.1f}", f"{t['b_ms']:.1f}",
                         f"speedup {t['speedup']:.2f}x"))
            rows.append(("sentences/s", f"{t['a_sentences_s']:.0f}", f"{t['b_sentences_s']:.0f}", ""))
    return rows


def _perplexity_rows(q: dict) -> list[tuple[str, str, str, str]]:
    """One row per text (and, from `run`, the compressed model before tuning below it); all texts when several."""
    rows = []
    for t in q.get("per_text") or []:
        rows.append((f"perplexity {t['name']} ({t['tokens']:,} tokens)", _ppl(t["a"]), _ppl(t["b"]), _ppl(t["ratio"])))
        if "compressed" in t:
            rows.append(("  compressed, before tuning", "", _ppl(t["compressed"]), _ppl(t["compressed"] / t["a"])))
    if len(rows) != 1:
        rows.append((f"perplexity, all texts ({q['tokens']:,} tokens)", _ppl(q["a"]), _ppl(q["b"]), _ppl(q["ratio"])))
    return rows


def _speed_note(sp: dict | None) -> str:
    if not sp:
        return "speed not measured"
    bw = f"streaming read {sp['bandwidth_gb_s']:.1f} GB/s; " if "bandwidth_gb_s" in sp else ""
    tc = sp.get("thread_choice") or {}
    how = (f"{sp['threads']} threads, {tc['wait_policy']} waiting ({tc['reason']})" if tc
           else f"{sp['threads']} threads")
    note = (f"speed: same process, A and B interleaved, median of {sp['runs']} runs, {how}; "
            f"{bw}speedup = time A / time B")
    if sp.get("decode_step"):
        st = sp["decode_step"]
        note += (f"; decode steps: {st['a']}" if st["a"] == st["b"] else
                 f"; decode steps: A {st['a']}, B {st['b']}")
    series = [sp[k][f"{side}_runs_ms"] for k in ("prompt", "decode", "batch") if k in sp for side in "ab"]
    spread = max((max(r) / min(r) for r in series if r), default=1.0)
    if spread > 1.3:
        note += (f"\nnoisy: runs of one figure differ by up to {spread:.1f}x (a loaded machine?); try --threads 1, "
                 "more --runs, or --threads N:passive when other jobs share the cores")
    return note


def compare_text(r: dict) -> str:
    """The comparison as a terminal table."""
    rows = compare_rows(r)
    w0 = max(len(x[0]) for x in rows)
    w1 = max(max(len(x[1]) for x in rows), 1)
    w2 = max(len(x[2]) for x in rows)
    out = [f"A: {_label(r['a'])}", f"B: {_label(r['b'])}", "",
           f"{'':<{w0}}  {'A':>{w1}}  {'B':>{w2}}  B vs A"]
    out += [f"{x[0]:<{w0}}  {x[1]:>{w1}}  {x[2]:>{w2}}  {x[3]}" for x in rows]
    out.append("")
    for m, name in ((r["a"], "A"), (r["b"], "B")):
        if m["disk"]["note"]:
            out.append(f"{name}: {m['disk']['note']}")
    if r["quality"] and r["quality"].get("tokenizer"):
        out.append(f"tokenizers: {r['quality']['tokenizer']}")
    out.append(_speed_note(r["speed"]))
    return "\n".join(out)


def compare_markdown(r: dict, plots: list[str]) -> str:
    """The comparison as a markdown report that links the given PNG files."""
    md = ["# Comparison", "", f"- **A**: `{r['a']['path']}` ({r['a']['format']}, {r['a']['family']})",
          f"- **B**: `{r['b']['path']}` ({r['b']['format']}, {r['b']['family']})", "",
          "| | A | B | B vs A |", "|---|---:|---:|---|"]
    md += [f"| {x[0].strip()} | {x[1]} | {x[2]} | {x[3]} |" for x in compare_rows(r)]
    md += ["", _speed_note(r["speed"]) + "."]
    for m, name in ((r["a"], "A"), (r["b"], "B")):
        if m["disk"]["note"]:
            md.append(f"\n{name}: {m['disk']['note']}.")
    q = r["quality"]
    if q:
        md += ["", "Texts: " + ", ".join(f"`{t['name']}` ({t['bytes']:,} bytes, sha256 {t['sha256'][:12]}…)"
                                         for t in q["texts"]) if q["texts"] else "Texts: lines given directly."]
    for m, name in ((r["a"], "A"), (r["b"], "B")):
        plan = m.get("plan")
        if not plan:
            continue
        kinds = ["qk", "vo"] + [k for k in ("gate", "up", "down") if k in plan["layers"][0]["ff"]]
        md += ["", f"## Ranks of {name} (plan {plan['strategy']}, keep {plan['keep']:g})", "",
               "| layer | " + " | ".join(kinds) + " |", "|---|" + "---:|" * len(kinds)]
        for L in plan["layers"]:
            vals = [L["qk"], L["vo"]] + [L["ff"][k] for k in kinds[2:]]
            md.append(f"| {L['layer']} | " + " | ".join("dense" if v is None else str(v) for v in vals) + " |")
    if plots:
        md += ["", "## Plots", ""] + [f"![{p[:-4]}]({p})" for p in plots]
    return "\n".join(md) + "\n"


def _rank_plot(plt, r: dict, path) -> bool:
    """Rank per layer and pair type for each compressed side; False when neither has a plan."""
    sides = [(n, m) for n, m in (("A", r["a"]), ("B", r["b"])) if m.get("plan")]
    if not sides:
        return False
    plan0 = sides[0][1]["plan"]
    kinds = ["qk", "vo"] + [k for k in ("gate", "up", "down") if k in plan0["layers"][0]["ff"]]
    fig, axes = plt.subplots(1, len(kinds), figsize=(3.0 * len(kinds), 2.8), squeeze=False)
    for ax, kind in zip(axes[0], kinds):
        for name, m in sides:
            layers = m["plan"]["layers"]
            ys = [L[kind] if kind in ("qk", "vo") else L["ff"][kind] for L in layers]
            xs = [L["layer"] for L in layers]
            ax.plot([x for x, y in zip(xs, ys) if y is not None], [y for y in ys if y is not None], "o-", ms=3,
                    lw=1, label=f"{name} keep {m['plan']['keep']:g}")
            dense = [x for x, y in zip(xs, ys) if y is None]
            if dense:  # dense matrices: a mark along the top edge
                ax.plot(dense, [0.97] * len(dense), "x", ms=4, transform=ax.get_xaxis_transform(),
                        label=f"{name} dense")
        full = (plan0.get("full") or {}).get(kind)
        if full:
            ax.axhline(full, ls="--", lw=0.8, color="grey", label="full rank")
        ax.set_ylim(0, None)
        ax.set_title(kind + (" (pairs)" if kind == "qk" and r["a"]["family"] == "llama" else ""))
        ax.set_xlabel("layer")
    axes[0][0].set_ylabel("kept rank")
    axes[0][-1].legend(fontsize=7)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return True


def _bar_plot(plt, labels: list[str], values: list[list[float]], series: list[str], ylabel: str, path,
              log: bool = False) -> None:
    """Grouped bars: one group per label, one bar per series (on a log axis with `log`)."""
    fig, ax = plt.subplots(figsize=(1.2 + 1.6 * len(labels), 2.8))
    if log:
        ax.set_yscale("log")
    width = 0.8 / len(series)
    for i, name in enumerate(series):
        ax.bar([j + i * width for j in range(len(labels))], [v[i] for v in values], width, label=name)
    ax.set_xticks([j + width * (len(series) - 1) / 2 for j in range(len(labels))], labels)
    ax.set_ylabel(ylabel)
    ax.legend(fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _cosine_plot(plt, cosines: list[float], path) -> None:
    """Histogram of the per-sentence cosine between A's and B's embeddings, with its mean and 5th percentile."""
    import statistics
    fig, ax = plt.subplots(figsize=(6, 3.2))
    ax.hist(cosines, bins=min(40, max(5, len(cosines) // 5)), color="tab:blue")
    srt = sorted(cosines)
    p5 = srt[max(0, round(0.05 * (len(srt) - 1)))]
    for x, style, name in ((statistics.fmean(cosines), "-", "mean"), (p5, "--", "5th percentile")):
        ax.axvline(x, color="black", linestyle=style, label=f"{name} {x:.3f}")
    ax.set_xlabel("cosine of A's and B's embedding of a sentence")
    ax.set_ylabel("sentences")
    ax.legend(loc="upper left")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _quality_plot(plt, q: dict, path) -> None:
    """Perplexity per text of A and B, and of the compressed model before tuning when `run` measured it."""
    per = q.get("per_text") or [{"name": "all texts", "a": q["a"], "b": q["b"]}]
    staged = all("compressed" in t for t in per)
    series = ["original (A)", "compressed", "tuned (B)"] if staged else ["A", "B"]
    values = [[t["a"], t["compressed"], t["b"]] if staged else [t["a"], t["b"]] for t in per]
    _bar_plot(plt, [t["name"].removeprefix("corpus:") for t in per], values, series, "perplexity", path, log=True)


def write_compare(r: dict, out: str, force: bool) -> str:
    """compare.json, report.md and (with matplotlib) ranks.png, quality.png, cosines.png (encoders) and speed.png."""
    from .io.write import atomic_dir, dumps
    with atomic_dir(out, force) as tmp:
        (tmp / "compare.json").write_text(dumps(r), encoding="utf-8")
        plots, note = [], "plots skipped: install the plots extra (pip install 'attncompress[plots]') for PNG plots"
        try:
            import matplotlib
        except ImportError:
            matplotlib = None
        if matplotlib is not None:
            matplotlib.use("Agg")
            import matplotlib.pyplot as plt
            if _rank_plot(plt, r, tmp / "ranks.png"):
                plots.append("ranks.png")
            q = r["quality"]
            if q and q["kind"] == "perplexity":
                _quality_plot(plt, q, tmp / "quality.png")
                plots.append("quality.png")
            elif q:
                c = q["cosine"]
                _bar_plot(plt, ["mean", "p5", "min", "top-1 kept"],
                          [[c["mean"]], [c["p5"]], [c["min"]], [q["neighbour_agreement"]]], ["A vs B"],
                          "cosine / fraction", tmp / "quality.png")
                plots.append("quality.png")
                _cosine_plot(plt, q["cosines"], tmp / "cosines.png")
                plots.append("cosines.png")
            sp = r["speed"]
            if sp:
                keys = [k for k in ("prompt", "decode", "batch") if k in sp]
                _bar_plot(plt, keys, [[sp[k]["a_ms"], sp[k]["b_ms"]] for k in keys], ["A", "B"], "ms (median)",
                          tmp / "speed.png")
                plots.append("speed.png")
            note = "plots in " + ", ".join(plots) if plots else "no plots (nothing to plot)"
        (tmp / "report.md").write_text(compare_markdown(r, plots), encoding="utf-8")
    return note
