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
             "dtypes: " + ", ".join(f"{k} x{v}" for k, v in r["dtypes"].items()), ""]
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
