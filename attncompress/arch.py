"""Model-family adapters: source tensor names and config → ModelShape and canonical weights.

Every stage after this one speaks one canonical naming, the one our runtime and
our compressed checkpoints use (weights are (d_out, d_in) as in torch):

    embed.tokens (vocab, d)         embed.positions (max_positions, d)   embed.types (types, d)
    embed.norm.{weight,bias}        final_norm.{weight,bias}             lm_head.weight (untied only)
    layers.{layer}.attn_norm.{weight,bias}     layers.{layer}.ff_norm.{weight,bias}
    layers.{layer}.attn.{q,k,v,o}.{weight,bias}
    layers.{layer}.ff.{gate,up,down}.{weight,bias}

An adapter is mostly data: a template map from canonical names to source names,
plus the few layout facts that differ (GPT-2's transposed Conv1D weights and its
fused query/key/value matrix). `ADAPTERS` is the one registry.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Iterator

import torch

from .errors import CompressError
from .shape import ModelShape


@dataclass(frozen=True)
class Ref:
    """Where one canonical tensor comes from: a source name, maybe transposed, maybe one third of a fused tensor."""
    source: str
    transposed: bool = False
    split: tuple[int, int] | None = None  # (part, parts) along the output dimension


@dataclass(frozen=True)
class Adapter:
    family: str  # runtime family (ModelShape.family)
    model_types: tuple[str, ...]  # config.json "model_type" values this adapter reads
    globals_: dict[str, str]  # canonical → source template, once per model
    per_layer: dict[str, str]  # canonical → source template with a {layer} slot
    optional: frozenset[str]  # canonical names that may be missing (biases, untied head)
    prefixes: tuple[str, ...]  # prefixes some checkpoints put before every name
    shape_from_config: Callable[[dict, str], ModelShape]
    transposed: frozenset[str] = frozenset()  # canonical names stored (d_in, d_out): GPT-2 Conv1D
    fused: dict[str, tuple[str, int]] = field(default_factory=dict)  # canonical → (source template, part of 3)
    signature: str = ""  # a per-layer source name that identifies the family in a bare .safetensors file
    # biases and an untied output head are read off the tensors present (the config does not say: llama, qwen2)
    extras_from_tensors: bool = False


def _get(cfg: dict, key: str, path: str, default=None):
    if key in cfg and cfg[key] is not None:
        return cfg[key]
    if default is None:
        raise CompressError(f"{path}: config.json lacks {key!r}; expected it for this model family")
    return default


def _rotary_check(cfg: dict, path: str) -> None:
    scaling = cfg.get("rope_scaling")
    if scaling:
        kind = scaling.get("rope_type", scaling.get("type"))
        if kind not in (None, "default"):
            raise CompressError(f"{path}: rotary scaling type {kind!r} is not supported; expected none or 'default'")


def _llama_shape(cfg: dict, path: str) -> ModelShape:
    _rotary_check(cfg, path)
    act = cfg.get("hidden_act", "silu")
    if act != "silu":
        raise CompressError(f"{path}: hidden_act {act!r} is not supported for this family; expected 'silu'")
    d, h = int(_get(cfg, "hidden_size", path)), int(_get(cfg, "num_attention_heads", path))
    qwen = cfg.get("model_type") == "qwen2"
    return ModelShape(
        family="llama", n_layers=int(_get(cfg, "num_hidden_layers", path)), d_model=d, n_heads=h,
        n_kv_heads=int(_get(cfg, "num_key_value_heads", path, h)), head_dim=int(_get(cfg, "head_dim", path, d // h)),
        d_ff=int(_get(cfg, "intermediate_size", path)), vocab_size=int(_get(cfg, "vocab_size", path)),
        rope_theta=float(_get(cfg, "rope_theta", path, 10000.0)), norm_eps=float(_get(cfg, "rms_norm_eps", path, 1e-6)),
        tied_embeddings=bool(cfg.get("tie_word_embeddings", False)),
        qkv_bias=qwen or bool(cfg.get("attention_bias", False)), o_bias=bool(cfg.get("attention_bias", False)) and not qwen,
        mlp_bias=bool(cfg.get("mlp_bias", False)), gated=True, activation="silu", norm="rms")


def _gpt2_shape(cfg: dict, path: str) -> ModelShape:
    d, h = int(_get(cfg, "n_embd", path)), int(_get(cfg, "n_head", path))
    act = cfg.get("activation_function", "gelu_new")
    acts = {"gelu_new": "gelu_tanh", "gelu_pytorch_tanh": "gelu_tanh", "gelu": "gelu"}
    if act not in acts:
        raise CompressError(f"{path}: activation_function {act!r} is not supported; expected one of {', '.join(acts)}")
    return ModelShape(
        family="gpt2", n_layers=int(_get(cfg, "n_layer", path)), d_model=d, n_heads=h, n_kv_heads=h, head_dim=d // h,
        d_ff=int(cfg.get("n_inner") or 4 * d), vocab_size=int(_get(cfg, "vocab_size", path)),
        norm_eps=float(_get(cfg, "layer_norm_epsilon", path, 1e-5)), tied_embeddings=True,
        max_positions=int(_get(cfg, "n_positions", path, 1024)), qkv_bias=True, o_bias=True, mlp_bias=True,
        gated=False, activation=acts[act], norm="layer")


def _bert_shape(cfg: dict, path: str) -> ModelShape:
    d, h = int(_get(cfg, "hidden_size", path)), int(_get(cfg, "num_attention_heads", path))
    pos = cfg.get("position_embedding_type", "absolute")
    if pos != "absolute":
        raise CompressError(f"{path}: position_embedding_type {pos!r} is not supported; expected 'absolute'")
    act = cfg.get("hidden_act", "gelu")
    acts = {"gelu": "gelu", "gelu_new": "gelu_tanh"}
    if act not in acts:
        raise CompressError(f"{path}: hidden_act {act!r} is not supported; expected one of {', '.join(acts)}")
    return ModelShape(
        family="bert", n_layers=int(_get(cfg, "num_hidden_layers", path)), d_model=d, n_heads=h, n_kv_heads=h,
        head_dim=d // h, d_ff=int(_get(cfg, "intermediate_size", path)), vocab_size=int(_get(cfg, "vocab_size", path)),
        norm_eps=float(_get(cfg, "layer_norm_eps", path, 1e-12)), tied_embeddings=True,  # no output head at all
        max_positions=int(_get(cfg, "max_position_embeddings", path, 512)),
        type_vocab_size=int(_get(cfg, "type_vocab_size", path, 2)), qkv_bias=True, o_bias=True, mlp_bias=True,
        gated=False, activation=acts[act], norm="layer", pre_norm=False, causal=False)


_LLAMA_LAYER = {
    "attn_norm.weight": "model.layers.{layer}.input_layernorm.weight",
    "attn.q.weight": "model.layers.{layer}.self_attn.q_proj.weight",
    "attn.k.weight": "model.layers.{layer}.self_attn.k_proj.weight",
    "attn.v.weight": "model.layers.{layer}.self_attn.v_proj.weight",
    "attn.o.weight": "model.layers.{layer}.self_attn.o_proj.weight",
    "attn.q.bias": "model.layers.{layer}.self_attn.q_proj.bias",
    "attn.k.bias": "model.layers.{layer}.self_attn.k_proj.bias",
    "attn.v.bias": "model.layers.{layer}.self_attn.v_proj.bias",
    "attn.o.bias": "model.layers.{layer}.self_attn.o_proj.bias",
    "ff_norm.weight": "model.layers.{layer}.post_attention_layernorm.weight",
    "ff.gate.weight": "model.layers.{layer}.mlp.gate_proj.weight",
    "ff.up.weight": "model.layers.{layer}.mlp.up_proj.weight",
    "ff.down.weight": "model.layers.{layer}.mlp.down_proj.weight",
    "ff.gate.bias": "model.layers.{layer}.mlp.gate_proj.bias",
    "ff.up.bias": "model.layers.{layer}.mlp.up_proj.bias",
    "ff.down.bias": "model.layers.{layer}.mlp.down_proj.bias",
}
_BIASES = frozenset(k for k in _LLAMA_LAYER if k.endswith(".bias"))

LLAMA = Adapter(
    family="llama", model_types=("llama", "mistral", "qwen2"),
    globals_={"embed.tokens": "model.embed_tokens.weight", "final_norm.weight": "model.norm.weight",
              "lm_head.weight": "lm_head.weight"},
    per_layer=_LLAMA_LAYER, optional=_BIASES | {"lm_head.weight"}, prefixes=("",),
    shape_from_config=_llama_shape, signature="model.layers.0.self_attn.q_proj.weight", extras_from_tensors=True)

GPT2 = Adapter(
    family="gpt2", model_types=("gpt2",),
    globals_={"embed.tokens": "wte.weight", "embed.positions": "wpe.weight",
              "final_norm.weight": "ln_f.weight", "final_norm.bias": "ln_f.bias"},
    per_layer={
        "attn_norm.weight": "h.{layer}.ln_1.weight", "attn_norm.bias": "h.{layer}.ln_1.bias",
        "attn.q.bias": "h.{layer}.attn.c_attn.bias", "attn.k.bias": "h.{layer}.attn.c_attn.bias",
        "attn.v.bias": "h.{layer}.attn.c_attn.bias",
        "attn.q.weight": "h.{layer}.attn.c_attn.weight", "attn.k.weight": "h.{layer}.attn.c_attn.weight",
        "attn.v.weight": "h.{layer}.attn.c_attn.weight",
        "attn.o.weight": "h.{layer}.attn.c_proj.weight", "attn.o.bias": "h.{layer}.attn.c_proj.bias",
        "ff_norm.weight": "h.{layer}.ln_2.weight", "ff_norm.bias": "h.{layer}.ln_2.bias",
        "ff.up.weight": "h.{layer}.mlp.c_fc.weight", "ff.up.bias": "h.{layer}.mlp.c_fc.bias",
        "ff.down.weight": "h.{layer}.mlp.c_proj.weight", "ff.down.bias": "h.{layer}.mlp.c_proj.bias",
    },
    optional=frozenset(), prefixes=("", "transformer."), shape_from_config=_gpt2_shape,
    # Conv1D stores (d_in, d_out): the transpose of a torch Linear weight.
    transposed=frozenset({"attn.q.weight", "attn.k.weight", "attn.v.weight", "attn.o.weight", "ff.up.weight",
                          "ff.down.weight"}),
    fused={"attn.q.weight": ("", 0), "attn.k.weight": ("", 1), "attn.v.weight": ("", 2),
           "attn.q.bias": ("", 0), "attn.k.bias": ("", 1), "attn.v.bias": ("", 2)},
    signature="h.0.attn.c_attn.weight")

_B = "encoder.layer.{layer}."
BERT = Adapter(
    family="bert", model_types=("bert",),
    globals_={"embed.tokens": "embeddings.word_embeddings.weight",
              "embed.positions": "embeddings.position_embeddings.weight",
              "embed.types": "embeddings.token_type_embeddings.weight",
              "embed.norm.weight": "embeddings.LayerNorm.weight", "embed.norm.bias": "embeddings.LayerNorm.bias"},
    per_layer={
        "attn.q.weight": _B + "attention.self.query.weight", "attn.q.bias": _B + "attention.self.query.bias",
        "attn.k.weight": _B + "attention.self.key.weight", "attn.k.bias": _B + "attention.self.key.bias",
        "attn.v.weight": _B + "attention.self.value.weight", "attn.v.bias": _B + "attention.self.value.bias",
        "attn.o.weight": _B + "attention.output.dense.weight", "attn.o.bias": _B + "attention.output.dense.bias",
        # post-norm: the norm after the attention residual, then the one after the feed-forward residual
        "attn_norm.weight": _B + "attention.output.LayerNorm.weight",
        "attn_norm.bias": _B + "attention.output.LayerNorm.bias",
        "ff.up.weight": _B + "intermediate.dense.weight", "ff.up.bias": _B + "intermediate.dense.bias",
        "ff.down.weight": _B + "output.dense.weight", "ff.down.bias": _B + "output.dense.bias",
        "ff_norm.weight": _B + "output.LayerNorm.weight", "ff_norm.bias": _B + "output.LayerNorm.bias",
    },
    optional=frozenset(), prefixes=("", "bert."), shape_from_config=_bert_shape,
    signature="encoder.layer.0.attention.self.query.weight")

ADAPTERS: dict[str, Adapter] = {"llama": LLAMA, "gpt2": GPT2, "bert": BERT}


def supported() -> str:
    types = sorted(t for a in ADAPTERS.values() for t in a.model_types)
    return ", ".join(types)


def find_adapter(config: dict | None, names: list[str], path: str) -> Adapter:
    """The adapter for a config's model_type, or (no config) the one whose signature tensor is present."""
    if config is not None:
        mt = config.get("model_type")
        for a in ADAPTERS.values():
            if mt in a.model_types:
                return a
        raise CompressError(f"{path}: unknown model family {mt!r}; supported: {supported()}")
    have = set(names)
    for a in ADAPTERS.values():
        if any(p + a.signature in have for p in a.prefixes):
            return a
    raise CompressError(f"{path}: no known model family matches these tensor names; supported: {supported()}")


def canonical_names(shape: ModelShape) -> list[str]:
    """Every canonical tensor the runtime wants for this shape, in a fixed order."""
    out = ["embed.tokens"]
    if shape.max_positions:
        out.append("embed.positions")
    if shape.type_vocab_size:
        out.append("embed.types")
    if shape.embed_norm:
        out += ["embed.norm.weight", "embed.norm.bias"]
    for i in range(shape.n_layers):
        p = f"layers.{i}."
        out.append(p + "attn_norm.weight")
        if shape.norm == "layer":
            out.append(p + "attn_norm.bias")
        for m in ("q", "k", "v", "o"):
            out.append(p + f"attn.{m}.weight")
            if (m != "o" and shape.qkv_bias) or (m == "o" and shape.o_bias):
                out.append(p + f"attn.{m}.bias")
        out.append(p + "ff_norm.weight")
        if shape.norm == "layer":
            out.append(p + "ff_norm.bias")
        for m in shape.ff_kinds:
            out.append(p + f"ff.{m}.weight")
            if shape.mlp_bias:
                out.append(p + f"ff.{m}.bias")
    if shape.final_norm:
        out.append("final_norm.weight")
        if shape.norm == "layer":
            out.append("final_norm.bias")
    if shape.is_decoder and not shape.tied_embeddings:
        out.append("lm_head.weight")
    return out


def expected_shape(shape: ModelShape, name: str) -> tuple[int, ...]:
    """The dense shape of a canonical tensor (weights (d_out, d_in))."""
    d, hd = shape.d_model, shape.head_dim
    leaf = name.split(".", 2)[-1] if name.startswith("layers.") else name
    table = {
        "embed.tokens": (shape.vocab_size, d), "embed.positions": (shape.max_positions, d),
        "embed.types": (shape.type_vocab_size, d), "lm_head.weight": (shape.vocab_size, d),
        "attn.q.weight": (shape.n_heads * hd, d), "attn.k.weight": (shape.n_kv_heads * hd, d),
        "attn.v.weight": (shape.n_kv_heads * hd, d), "attn.o.weight": (d, shape.n_heads * hd),
        "attn.q.bias": (shape.n_heads * hd,), "attn.k.bias": (shape.n_kv_heads * hd,),
        "attn.v.bias": (shape.n_kv_heads * hd,), "attn.o.bias": (d,),
        "ff.gate.weight": (shape.d_ff, d), "ff.up.weight": (shape.d_ff, d), "ff.down.weight": (d, shape.d_ff),
        "ff.gate.bias": (shape.d_ff,), "ff.up.bias": (shape.d_ff,), "ff.down.bias": (d,),
    }
    return table.get(leaf, (d,))  # norms


@dataclass
class Walk:
    """A checkpoint seen through its adapter: the shape, where each canonical tensor lives, what was left unused."""
    adapter: Adapter
    shape: ModelShape
    refs: dict[str, Ref]  # canonical name → source reference
    unused: list[str]  # source tensors no canonical name reads
    prefix: str


def walk(source, n_heads: int | None = None, n_kv_heads: int | None = None) -> Walk:
    """Map a TensorSource onto canonical names and check every shape against the config.

    Args:
        source: an `attncompress.io.TensorSource`.
        n_heads, n_kv_heads: head counts for a bare .safetensors file with no config.json.
    Raises:
        CompressError: unknown family, missing tensors, or shapes that disagree with the config.
    """
    names = source.names()
    path = str(source.path)
    adapter = find_adapter(source.config, names, path)
    have = set(names)
    prefix = next((p for p in adapter.prefixes if p + adapter.signature in have), None)
    if prefix is None:
        raise CompressError(f"{path}: tensor {adapter.signature} not found; expected a {adapter.family}-family checkpoint "
                            f"(found e.g. {', '.join(names[:3])})")
    config = source.config
    if config is None:
        config = _config_from_tensors(adapter, source, prefix, n_heads, n_kv_heads)
    shape = adapter.shape_from_config(config, str(source.path / "config.json") if source.path.is_dir() else path)
    refs: dict[str, Ref] = {}
    for name in canonical_names(shape) + [n for n in _optional_extras(adapter, shape)]:
        leaf, layer = (name.split(".", 2)[2], name.split(".")[1]) if name.startswith("layers.") else (name, None)
        template = adapter.per_layer.get(leaf) if layer is not None else adapter.globals_.get(leaf)
        if template is None:
            raise CompressError(f"{path}: the {adapter.family} adapter has no source for {name}")
        src = prefix + template.format(layer=layer)
        if src not in have:
            if leaf in adapter.optional or name in adapter.optional:
                continue
            raise CompressError(f"{path}: tensor {src} is missing; expected it for a {shape.n_layers}-layer {adapter.family} model")
        split = (adapter.fused[leaf][1], 3) if leaf in adapter.fused else None
        refs[name] = Ref(src, transposed=leaf in adapter.transposed, split=split)
    # Optional tensors that exist change the shape (biases, an untied output head).
    if adapter.extras_from_tensors:
        shape = _shape_with_extras(shape, refs)
    for name, ref in refs.items():
        got = tuple(source.shape(ref.source))
        if ref.transposed:
            got = got[::-1]
        if ref.split:
            got = (got[0] // ref.split[1],) + got[1:]
        want = expected_shape(shape, name)
        if got != want:
            raise CompressError(f"{source.file_of(ref.source)}: tensor {ref.source} has shape {list(got)} but the config "
                                f"implies {list(want)}; config.json and the weights disagree")
    used = {r.source for r in refs.values()}
    unused = [n for n in names if n not in used]
    return Walk(adapter, shape, refs, unused, prefix)


def _optional_extras(adapter: Adapter, shape: ModelShape) -> list[str]:
    """Optional canonical names worth probing for (biases the config may not announce, an untied head)."""
    out = []
    if adapter is LLAMA:
        for i in range(shape.n_layers):
            for leaf in sorted(_BIASES):
                out.append(f"layers.{i}.{leaf}")
    names = canonical_names(shape)
    return [n for n in out if n not in names]


def _shape_with_extras(shape: ModelShape, refs: dict[str, Ref]) -> ModelShape:
    """The shape with the optional tensors that are present: biases, an untied output head."""
    import dataclasses
    # A tied model ignores any stored lm_head.weight (it is then reported unused), as the reference does.
    return dataclasses.replace(shape, qkv_bias="layers.0.attn.q.bias" in refs, o_bias="layers.0.attn.o.bias" in refs,
                               mlp_bias="layers.0.ff.up.bias" in refs,
                               tied_embeddings=shape.tied_embeddings or "lm_head.weight" not in refs)


def _config_from_tensors(adapter: Adapter, source, prefix: str, n_heads, n_kv_heads) -> dict:
    """A config for a bare .safetensors file: sizes from tensor shapes, head counts from the user."""
    path = str(source.path)
    if n_heads is None:
        raise CompressError(f"{path}: a bare .safetensors file does not say its head count; pass --heads "
                            "(and --kv-heads for grouped-query attention)")
    def shp(leaf, layer="0"):
        t = adapter.per_layer.get(leaf) or adapter.globals_[leaf]
        return source.shape(prefix + t.format(layer=layer))
    n_layers = 0
    while prefix + adapter.signature.replace(".0.", f".{n_layers}.") in set(source.names()):
        n_layers += 1
    vocab, d = shp("embed.tokens")
    if adapter is LLAMA:
        hd = shp("attn.q.weight")[0] // n_heads
        kv = n_kv_heads or shp("attn.k.weight")[0] // hd
        return {"model_type": "llama", "hidden_size": d, "num_hidden_layers": n_layers, "num_attention_heads": n_heads,
                "num_key_value_heads": kv, "head_dim": hd, "intermediate_size": shp("ff.up.weight")[0],
                "vocab_size": vocab, "tie_word_embeddings": prefix + "lm_head.weight" not in set(source.names())}
    if adapter is GPT2:
        return {"model_type": "gpt2", "n_embd": d, "n_layer": n_layers, "n_head": n_heads, "vocab_size": vocab,
                "n_positions": shp("embed.positions")[0], "n_inner": shp("ff.up.weight")[1]}
    return {"model_type": "bert", "hidden_size": d, "num_hidden_layers": n_layers, "num_attention_heads": n_heads,
            "intermediate_size": shp("ff.up.weight")[0], "vocab_size": vocab,
            "max_position_embeddings": shp("embed.positions")[0], "type_vocab_size": shp("embed.types")[0]}


def load_tensor(source, ref: Ref) -> torch.Tensor:
    """One canonical tensor in float32, transposed and split as the adapter says."""
    t = source.get(ref.source)
    if not t.is_floating_point():
        raise CompressError(f"{source.file_of(ref.source)}: tensor {ref.source} has dtype {t.dtype}; expected floating point")
    t = t.to(torch.float32)
    if ref.transposed:
        t = t.T
    if ref.split:
        part, parts = ref.split
        t = t.chunk(parts, dim=0)[part]
    t = t.contiguous()
    if not torch.isfinite(t).all():
        bad = int((~torch.isfinite(t)).sum())
        raise CompressError(f"{source.file_of(ref.source)}: tensor {ref.source} has {bad} NaN or infinite values; "
                            "expected finite weights")
    return t


def canonical_weights(source, w: Walk) -> Iterator[tuple[str, torch.Tensor]]:
    """Yield (canonical name, float32 tensor), one at a time, in canonical order."""
    for name, ref in w.refs.items():
        yield name, load_tensor(source, ref)


def to_source_layout(adapter: Adapter, shape: ModelShape, weights: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """Canonical dense weights back to the family's own directory names (for `expand`)."""
    out: dict[str, torch.Tensor] = {}
    fused: dict[str, list] = {}
    for name, t in weights.items():
        leaf, layer = (name.split(".", 2)[2], name.split(".")[1]) if name.startswith("layers.") else (name, None)
        template = adapter.per_layer.get(leaf) if layer is not None else adapter.globals_.get(leaf)
        if template is None:
            raise CompressError(f"{adapter.family} layout has no place for tensor {name}")
        src = template.format(layer=layer)
        if leaf in adapter.fused:
            fused.setdefault(src, [None] * 3)[adapter.fused[leaf][1]] = t
            continue
        out[src] = t.T.contiguous() if leaf in adapter.transposed else t.contiguous()
    for src, parts in fused.items():
        cat = torch.cat(parts, dim=0)
        out[src] = cat.T.contiguous() if src.endswith("weight") else cat
    return out
