"""Peak memory of `attncompress compress` on a synthetic model larger than the memory it is allowed.

Builds a random rotary-family checkpoint (llama layout: config.json, tokenizer.json, sharded safetensors with
model.safetensors.index.json) of at least --size-gb gigabytes of float32 in a temporary directory, one shard at
a time so the builder stays small, then runs

    attncompress compress DIR --keep 0.5 --text CALIB --out OUT

in a child process and prints the child's peak resident memory (ru_maxrss of the waited-for child, from the
operating system) beside the model's size. Goal: peak under 1.5 GB for a model of 4 GB or more.

Many layers of moderate width keep the per-layer work (Gram roots, SVDs) cheap, so the run takes minutes on
two cores; the calibration text is short for the same reason (the forward pass costs 2 x parameters x tokens).
Not part of the test suite: run it by hand.

    python benchmarks/large_model_memory.py [--size-gb 4.3] [--tmp DIR] [--keep-files]
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import torch
from safetensors.torch import save_file

# d_model 384, 6 query heads on 2 key/value heads of width 64, d_ff 1024: about 1.6M parameters per layer, so
# about 670 layers make 4.3 GB. The cost of the SVDs per parameter grows with the width, the per-layer overhead
# with the number of layers; this width is near the cheapest of the two.
SHAPE = dict(hidden_size=384, num_attention_heads=6, num_key_value_heads=2, head_dim=64, intermediate_size=1024,
             vocab_size=32000)
WORDS = 4000  # word-level tokenizer vocabulary (plus [UNK]); below vocab_size
LAYERS_PER_SHARD = 48  # about 300 MB per input shard


def _layer_params(c: dict) -> int:
    d, f, hd = c["hidden_size"], c["intermediate_size"], c["head_dim"]
    attn = d * hd * (2 * c["num_attention_heads"] + 2 * c["num_key_value_heads"])
    return attn + 3 * d * f + 2 * d


def _layer(c: dict, i: int, g: torch.Generator) -> dict[str, torch.Tensor]:
    """Random llama-layout tensors of one layer (std 0.02, norms at one)."""
    d, f, hd = c["hidden_size"], c["intermediate_size"], c["head_dim"]
    h, kv = c["num_attention_heads"], c["num_key_value_heads"]
    p = f"model.layers.{i}."
    shapes = {"self_attn.q_proj.weight": (h * hd, d), "self_attn.k_proj.weight": (kv * hd, d),
              "self_attn.v_proj.weight": (kv * hd, d), "self_attn.o_proj.weight": (d, h * hd),
              "mlp.gate_proj.weight": (f, d), "mlp.up_proj.weight": (f, d), "mlp.down_proj.weight": (d, f)}
    out = {p + k: torch.randn(s, generator=g) * 0.02 for k, s in shapes.items()}
    out[p + "input_layernorm.weight"] = torch.ones(d)
    out[p + "post_attention_layernorm.weight"] = torch.ones(d)
    return out


def build(root: Path, size_gb: float, seed: int = 0) -> tuple[int, int]:
    """Write the model into `root`; return (bytes of tensor data, layers)."""
    c = dict(SHAPE)
    d, vocab = c["hidden_size"], c["vocab_size"]
    globals_ = 2 * vocab * d + d  # embeddings, untied head, final norm
    n_layers = max(1, -(-(int(size_gb * 1e9) // 4 - globals_) // _layer_params(c)))  # ceiling
    config = {"model_type": "llama", "architectures": ["LlamaForCausalLM"], "num_hidden_layers": n_layers,
              "rms_norm_eps": 1e-5, "rope_theta": 10000.0, "max_position_embeddings": 2048, "hidden_act": "silu",
              "tie_word_embeddings": False, "torch_dtype": "float32", **c}
    (root / "config.json").write_text(json.dumps(config, indent=2))
    _tokenizer().save(str(root / "tokenizer.json"))
    g = torch.Generator().manual_seed(seed)
    groups = [list(range(s, min(s + LAYERS_PER_SHARD, n_layers))) for s in range(0, n_layers, LAYERS_PER_SHARD)]
    n_shards = len(groups) + 1
    weight_map, total = {}, 0
    for k in range(n_shards):
        if k < len(groups):
            tensors = {}
            for i in groups[k]:
                tensors.update(_layer(c, i, g))
        else:
            tensors = {"model.embed_tokens.weight": torch.randn(vocab, d, generator=g) * 0.02,
                       "lm_head.weight": torch.randn(vocab, d, generator=g) * 0.02, "model.norm.weight": torch.ones(d)}
        name = f"model-{k + 1:05d}-of-{n_shards:05d}.safetensors"
        save_file(tensors, str(root / name), metadata={"format": "pt"})
        weight_map.update({t: name for t in tensors})
        total += sum(t.numel() * 4 for t in tensors.values())
        del tensors  # one shard in memory at a time
    (root / "model.safetensors.index.json").write_text(
        json.dumps({"metadata": {"total_size": total}, "weight_map": weight_map}, indent=2))
    return total, n_layers


def _tokenizer():
    from tokenizers import Tokenizer, models, pre_tokenizers
    tok = Tokenizer(models.WordLevel({"[UNK]": 0, **{f"w{i}": i + 1 for i in range(WORDS)}}, unk_token="[UNK]"))
    tok.pre_tokenizer = pre_tokenizers.Whitespace()
    return tok


def calibration_text(path: Path, n_tokens: int = 1100, seed: int = 1) -> None:
    """Seeded random words: 1100 tokens give 8 calibration blocks of 128."""
    g = torch.Generator().manual_seed(seed)
    ids = torch.randint(0, WORDS, (n_tokens,), generator=g).tolist()
    path.write_text("\n".join(" ".join(f"w{i}" for i in ids[j:j + 12]) for j in range(0, n_tokens, 12)) + "\n")


def _dir_bytes(d: Path) -> int:
    return sum(f.stat().st_size for f in d.iterdir() if f.is_file())


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--size-gb", type=float, default=4.3, help="tensor data to build, in 10^9 bytes of float32")
    ap.add_argument("--tmp", help="where to build (default: the system temporary directory)")
    ap.add_argument("--keep", type=float, default=0.5)
    ap.add_argument("--keep-files", action="store_true", help="leave the model and the output on disk")
    ap.add_argument("--threads", type=int, help="OMP_NUM_THREADS / MKL_NUM_THREADS for the compress process "
                    "(default: as inherited); 1 helps a lot on a machine shared with other busy processes")
    args = ap.parse_args()

    base = tempfile.mkdtemp(prefix="attncompress-bench-", dir=args.tmp)
    root, out, calib = Path(base) / "model", Path(base) / "out", Path(base) / "calib.txt"
    root.mkdir()
    try:
        t0 = time.perf_counter()
        data_bytes, n_layers = build(root, args.size_gb)
        calibration_text(calib)
        t_build = time.perf_counter() - t0
        model_bytes = _dir_bytes(root)
        print(f"built {n_layers} layers, d_model {SHAPE['hidden_size']}, d_ff {SHAPE['intermediate_size']}: "
              f"{model_bytes / 1e9:.2f} GB on disk ({data_bytes / 1e9:.2f} GB of float32 tensors) in {t_build:.0f}s",
              flush=True)
        cmd = [sys.executable, "-c", "from attncompress.cli import main; main()", "compress", str(root),
               "--keep", str(args.keep), "--text", str(calib), "--out", str(out), "--json"]
        env = dict(os.environ)
        if args.threads:
            env.update(OMP_NUM_THREADS=str(args.threads), MKL_NUM_THREADS=str(args.threads))
        t0 = time.perf_counter()
        child = subprocess.run(cmd, capture_output=True, text=True, env=env)
        t_run = time.perf_counter() - t0
        # ru_maxrss of waited-for children, in kilobytes on Linux; the compress run is the only child
        usage = resource.getrusage(resource.RUSAGE_CHILDREN)
        peak, cpu = usage.ru_maxrss * 1024, usage.ru_utime + usage.ru_stime
        if child.returncode != 0:
            print(child.stderr[-2000:], file=sys.stderr)
            print(f"compress failed with exit status {child.returncode}", file=sys.stderr)
            return 1
        report = json.loads(child.stdout)
        out_bytes = _dir_bytes(out)
        load = os.getloadavg()[0]
        print(f"compress --keep {args.keep}: {t_run:.0f}s wall, {cpu:.0f}s of CPU, load average {load:.1f} on {os.cpu_count()} cores, "
              f"threads {env.get('OMP_NUM_THREADS', 'default')}; stages: {', '.join(f'{k} {v:.0f}s' for k, v in report['seconds'].items())}")
        print(f"output: {out_bytes / 1e9:.2f} GB in {len(report['files'])} file(s); "
              f"kept {report['plan']['kept_fraction']:.3f} of the block-matrix parameters")
        print(f"peak resident memory of the compress process: {peak / 1e9:.3f} GB "
              f"= {peak / model_bytes:.1%} of the {model_bytes / 1e9:.2f} GB model "
              f"(goal: under 1.5 GB) -> {'PASS' if peak < 1.5e9 else 'FAIL'}")
        return 0 if peak < 1.5e9 else 2
    finally:
        if args.keep_files:
            print(f"files kept in {base}")
        else:
            import shutil
            shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
