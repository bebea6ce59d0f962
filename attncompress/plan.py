"""Rank plans: how many units of rank every transformer-block matrix keeps, what that costs, and its JSON.

The strategies that choose the ranks are in `strategies`.

Per layer the plan covers these matrices ("kinds"), each with its unit of rank:

* ``qk`` (query-key). Rotary families: one unit is one rotary frequency pair kept in every key/value group
  (at most ``head_dim // 2``); ``p`` pairs leave ``2p`` of the ``head_dim`` rows of each query and key head.
  Other families: one unit is one rank of each head's query-key bilinear form (at most ``head_dim``).
* ``vo`` (value-output): rank per key/value group, shared by the layer (at most ``head_dim``).
* feed-forward ``gate``, ``up``, ``down`` (gated) or ``up``, ``down`` (plain): an ``(m, n)`` matrix at rank
  ``r`` stores ``r * (m + n)`` numbers; that pays only below the break-even rank ``m n / (m + n)``, so at or
  above it the matrix stays dense (rank ``None``, ``m n`` numbers).

The budget counts only weight matrices of the transformer blocks ("block-matrix parameters": q, k, v, o and the
feed-forward weights). Biases, embeddings and norms are counted by :func:`count_params` but never budgeted.
The query bias of a non-rotary ``qk`` unit (one number per head) is therefore reported under biases.
"""
from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping, Sequence

import numpy as np

from .errors import CompressError
from .shape import ModelShape

PLAN_FORMAT = "attncompress.rank-plan"
PLAN_VERSION = 1
KINDS = ("qk", "vo", "gate", "up", "down")
FF_KINDS = ("gate", "up", "down")
UNITS = ("pair", "rank")
# The shape fields a plan is tied to: any change makes the stored ranks meaningless.
FINGERPRINT_FIELDS = ("family", "n_layers", "d_model", "n_heads", "n_kv_heads", "head_dim", "d_ff")
DEFAULT_BYTES_PER_ELEMENT = 4  # float32 key/value cache


# ----------------------------------------------------------------------------------------------- matrix costs

def ff_kinds(shape: ModelShape) -> tuple[str, ...]:
    """The feed-forward kinds of this model: ("gate", "up", "down") when gated, else ("up", "down")."""
    return shape.ff_kinds


def ff_dims(shape: ModelShape, kind: str) -> tuple[int, int]:
    """Shape ``(m, n) = (d_out, d_in)`` of one feed-forward weight.

    Args:
        shape: the model.
        kind: "gate", "up" or "down".
    Returns:
        ``(d_ff, d_model)`` for gate/up, ``(d_model, d_ff)`` for down.
    Raises:
        CompressError: kind is not a feed-forward kind of this model.
    """
    if kind not in ff_kinds(shape):
        raise CompressError(f"model shape: {kind!r} is not a feed-forward matrix of this model; "
                            f"expected one of {', '.join(ff_kinds(shape))}")
    return (shape.d_model, shape.d_ff) if kind == "down" else (shape.d_ff, shape.d_model)


def break_even_rank(m: int, n: int) -> float:
    """The rank ``m n / (m + n)`` at which two factors ``(m, r)``, ``(r, n)`` store as many numbers as ``(m, n)``."""
    return m * n / (m + n)


def ff_max_rank(m: int, n: int) -> int:
    """The largest rank ``r`` with ``r (m + n) < m n``: the highest rank worth storing factored."""
    return (m * n - 1) // (m + n)


@dataclass(frozen=True)
class MatrixCost:
    """What one matrix of one layer costs: the unit of rank, its count and price, and the dense price."""
    layer: int
    kind: str  # one of KINDS
    unit: str  # "pair" (rotary qk) or "rank"
    max_units: int
    unit_params: int  # block-matrix parameters per kept unit
    dense_params: int  # block-matrix parameters when stored dense / at full rank

    def with_gains(self, gains: Sequence[float]) -> "MatrixSpectrum":
        """This matrix with its per-unit energy gains attached (``gains: (max_units,)``)."""
        return MatrixSpectrum(self.layer, self.kind, self.unit, self.max_units, self.unit_params,
                              self.dense_params, tuple(gains))


def matrix_layout(shape: ModelShape) -> list[MatrixCost]:
    """Every plannable matrix of the model with its unit and prices, in layer order then ``KINDS`` order.

    Args:
        shape: the model.
    Returns:
        ``n_layers * (2 + len(ff_kinds(shape)))`` entries.
    Raises:
        CompressError: a non-rotary model with grouped-query attention (its per-head query-key rank would
            need one key column per query head, which the key/value sharing forbids).
    """
    d, nh, nkv, hd = shape.d_model, shape.n_heads, shape.n_kv_heads, shape.head_dim
    if shape.rotary:
        # One pair keeps 2 rows of every query head and every key head.
        qk = ("pair", shape.n_pairs, 2 * d * (nh + nkv))
    else:
        if nkv != nh:
            raise CompressError(f"model shape: a non-rotary {shape.family} model needs n_kv_heads == n_heads "
                                f"for per-head query-key ranks, got {nkv} and {nh}")
        # One rank keeps one query weight column and one key weight column per head (the query bias is a bias).
        qk = ("rank", hd, 2 * d * nh)
    qk_dense = d * hd * (nh + nkv)
    vo = ("rank", hd, d * (nkv + nh))  # one value row per group plus one output column per query head
    out = []
    for layer in range(shape.n_layers):
        out.append(MatrixCost(layer, "qk", *qk, qk_dense))
        out.append(MatrixCost(layer, "vo", *vo, d * hd * (nkv + nh)))
        for kind in ff_kinds(shape):
            m, n = ff_dims(shape, kind)
            out.append(MatrixCost(layer, kind, "rank", min(m, n), m + n, m * n))
    return out


@dataclass(frozen=True)
class MatrixSpectrum:
    """One matrix's price list and the energy each successive unit of rank wins.

    ``gains[k]`` is the energy (sum of squared singular values, or pair scores) won by unit ``k + 1``,
    summed across heads / groups; non-increasing and non-negative. Energy kept at ``k`` units is
    ``sum(gains[:k]) / sum(gains)``.
    """
    layer: int
    kind: str
    unit: str
    max_units: int
    unit_params: int
    dense_params: int
    gains: tuple[float, ...]  # (max_units,)

    def __post_init__(self):
        where = f"spectrum of layer {self.layer} {self.kind!r}"
        if self.kind not in KINDS:
            raise CompressError(f"{where}: unknown kind; expected one of {', '.join(KINDS)}")
        if self.unit not in UNITS:
            raise CompressError(f"{where}: unknown unit {self.unit!r}; expected 'pair' or 'rank'")
        for name in ("max_units", "unit_params", "dense_params"):
            if not is_whole(getattr(self, name)) or getattr(self, name) <= 0:
                raise CompressError(f"{where}: {name} must be a positive whole number, got {getattr(self, name)!r}")
        if not is_whole(self.layer) or self.layer < 0:
            raise CompressError(f"{where}: layer must be a whole number >= 0")
        if self.max_units * self.unit_params < self.dense_params:
            raise CompressError(f"{where}: full rank ({self.max_units} x {self.unit_params}) is cheaper than dense "
                                f"({self.dense_params}); the price list is wrong")
        gains = tuple(float(g) for g in self.gains)
        object.__setattr__(self, "gains", gains)
        if len(gains) != self.max_units:
            raise CompressError(f"{where}: {len(gains)} gains for {self.max_units} units; give one gain per unit")
        g = np.asarray(gains, dtype=np.float64)
        if not np.all(np.isfinite(g)) or np.any(g < 0):
            raise CompressError(f"{where}: gains must be finite and >= 0")
        # Tolerate rounding noise of a float64 sum, nothing more.
        if np.any(np.diff(g) > 1e-12 * max(float(g.max()), 0.0)):
            raise CompressError(f"{where}: gains must be non-increasing (sort the singular values / pair scores)")

    @property
    def total(self) -> float:
        """The matrix's whole energy, ``sum(gains)``."""
        return float(np.sum(np.asarray(self.gains, dtype=np.float64)))


# ---------------------------------------------------------------------------------------------- plan types

@dataclass(frozen=True)
class LayerRanks:
    """The ranks one layer keeps.

    ``qk``: rotary pairs (rotary families) or per-head rank; ``vo``: rank per key/value group;
    ``ff``: rank per feed-forward kind, ``None`` = dense. ``qk_pairs`` (rotary only, optional): per key/value
    group the sorted indices of the kept pairs; ``None`` until a later stage picks them.
    """
    layer: int
    qk: int
    vo: int
    ff: Mapping[str, int | None]
    qk_pairs: tuple[tuple[int, ...], ...] | None = None

    def __post_init__(self):
        object.__setattr__(self, "ff", MappingProxyType(dict(self.ff)))
        if self.qk_pairs is not None:
            object.__setattr__(self, "qk_pairs", tuple(tuple(g) for g in self.qk_pairs))

    def __hash__(self):
        return hash((self.layer, self.qk, self.vo, tuple(sorted(self.ff.items())), self.qk_pairs))

    def _to_dict(self) -> dict:
        """Plain-JSON form."""
        return {"layer": self.layer, "qk": self.qk, "vo": self.vo, "ff": dict(self.ff),
                "qk_pairs": None if self.qk_pairs is None else [list(g) for g in self.qk_pairs]}


@dataclass(frozen=True)
class ParamCount:
    """Parameter counts of a plan next to the dense model (only ``block_*`` enter the budget)."""
    block_kept: int
    block_dense: int
    bias_kept: int
    bias_dense: int
    embeddings: int  # token, position, token-type tables and an untied output head
    norms: int

    @property
    def total_kept(self) -> int:
        return self.block_kept + self.bias_kept + self.embeddings + self.norms

    @property
    def total_dense(self) -> int:
        return self.block_dense + self.bias_dense + self.embeddings + self.norms


@dataclass(frozen=True)
class RankPlan:
    """A rank for every matrix of every layer, with the predictions made when the plan was built.

    The predicted counts describe the ranks at creation; after editing ranks use :func:`count_params`.
    """
    strategy: str
    keep: float | None  # the target fraction of block-matrix parameters (None in a hand-written plan)
    model: Mapping[str, object]  # shape fingerprint, FINGERPRINT_FIELDS ({} in a hand-written plan)
    layers: tuple[LayerRanks, ...]
    # the predicted counts; None where a hand-edited plan left them out (`recount` fills them in)
    block_params_kept: int | None
    block_params_dense: int | None
    kv_bytes_per_token: int | None
    kv_bytes_per_token_dense: int | None
    bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT

    def __post_init__(self):
        object.__setattr__(self, "model", MappingProxyType(dict(self.model)))
        object.__setattr__(self, "layers", tuple(self.layers))

    def __hash__(self):
        return hash((self.strategy, self.keep, tuple(sorted(self.model.items())), self.layers))

    def ranks(self, layer: int) -> LayerRanks:
        """The ranks of one layer (KeyError if the plan lists none)."""
        for lr in self.layers:
            if lr.layer == layer:
                return lr
        raise KeyError(layer)

    def with_qk_pairs(self, pairs: Mapping[int, Sequence[Sequence[int]]]) -> "RankPlan":
        """A copy with ``qk_pairs`` filled in for the given layers (``pairs[layer]: (n_kv_heads, qk)``)."""
        layers = tuple(dataclasses.replace(lr, qk_pairs=tuple(tuple(sorted(g)) for g in pairs[lr.layer]))
                       if lr.layer in pairs else lr for lr in self.layers)
        return dataclasses.replace(self, layers=layers)

    # -- JSON
    def to_json(self) -> str:
        """The plan as JSON text (``from_json(plan.to_json()) == plan``)."""
        data = {
            "format": PLAN_FORMAT, "version": PLAN_VERSION, "strategy": self.strategy, "keep": self.keep,
            "model": dict(self.model), "bytes_per_element": self.bytes_per_element,
            "predicted": {"block_params_kept": self.block_params_kept,
                          "block_params_dense": self.block_params_dense,
                          "kv_bytes_per_token": self.kv_bytes_per_token,
                          "kv_bytes_per_token_dense": self.kv_bytes_per_token_dense},
            "layers": [lr._to_dict() for lr in self.layers],
        }
        return json.dumps(data, indent=1)

    @classmethod
    def from_json(cls, text: str, source: str = "<plan>") -> "RankPlan":
        """Read a plan written by :meth:`to_json`, or edited by hand.

        Only ``layers`` (each with ``layer``, ``qk``, ``vo`` and ``ff``) is required. ``qk_pairs`` may be absent
        or null (a later stage picks the pairs); ``predicted`` may be absent (its counts are then ``None``
        until :func:`recount` fills them in); ``format``, ``version`` and ``model`` are checked when present.

        Args:
            text: the JSON text.
            source: the file name, used in error messages.
        Returns:
            The plan (not yet checked against a model: call :func:`recount` or :meth:`check`).
        Raises:
            CompressError: not JSON, another format or version, unknown / mistyped fields, a layer without ranks.
        """
        pre = f"plan {source}"
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise CompressError(f"{pre}: not valid JSON ({exc}); write the plan with attncompress") from None
        if not isinstance(data, dict) or data.get("format", PLAN_FORMAT) != PLAN_FORMAT or "layers" not in data:
            raise CompressError(f"{pre}: not a rank plan (expected \"format\": \"{PLAN_FORMAT}\" and \"layers\")")
        if data.get("version", PLAN_VERSION) != PLAN_VERSION:
            raise CompressError(f"{pre}: plan version {data.get('version')!r}, this attncompress reads version "
                                f"{PLAN_VERSION}; make the plan again")
        _known_keys(data, {"format", "version", "strategy", "keep", "model", "bytes_per_element", "predicted",
                           "layers"}, {"layers"}, pre)
        pred = _typed(data, "predicted", dict, pre) if data.get("predicted") is not None else {}
        _known_keys(pred, set(_PREDICTED), set(), f"{pre} predicted")
        model = _typed(data, "model", dict, pre) if data.get("model") is not None else {}
        _known_keys(model, set(FINGERPRINT_FIELDS), set(), f"{pre} model")
        keep = data.get("keep")
        if keep is not None and (isinstance(keep, bool) or not isinstance(keep, (int, float))):
            raise CompressError(f"{pre}: keep must be a number, got {keep!r}")
        layers = tuple(_layer_from_json(item, f"{pre} layers[{i}]")
                       for i, item in enumerate(_typed(data, "layers", list, pre)))
        counts = {k: (_typed(pred, k, int, f"{pre} predicted") if k in pred else None) for k in _PREDICTED}
        bpe = _typed(data, "bytes_per_element", int, pre) if "bytes_per_element" in data else \
            DEFAULT_BYTES_PER_ELEMENT
        return cls(strategy=str(_typed(data, "strategy", str, pre)) if "strategy" in data else "edited",
                   keep=keep, model=model, layers=layers, bytes_per_element=bpe, **counts)

    # -- validation
    def check(self, shape: ModelShape, source: str = "<plan>") -> None:
        """Check that the plan fits this model.

        Args:
            shape: the model the plan is applied to.
            source: the plan file name, used in error messages.
        Raises:
            CompressError: plan of another model, a layer missing / repeated / out of range, a unit count that
                is not a whole number, below 1 or above the maximum, a feed-forward rank that would not be
                cheaper than dense, an unknown or missing kind, malformed ``qk_pairs``.
        """
        pre = f"plan {source}"
        differ = [f"{f} {self.model.get(f)!r} in the plan, {getattr(shape, f)!r} in the model"
                  for f in FINGERPRINT_FIELDS if f in self.model and self.model[f] != getattr(shape, f)]
        if differ:
            raise CompressError(f"{pre}: made for another model ({'; '.join(differ)}); make a new plan for this model")
        if not is_whole(self.bytes_per_element) or self.bytes_per_element <= 0:
            raise CompressError(f"{pre}: bytes_per_element must be a positive whole number, "
                                f"got {self.bytes_per_element!r}")
        seen = set()
        for lr in self.layers:
            if not is_whole(lr.layer) or not 0 <= lr.layer < shape.n_layers:
                raise CompressError(f"{pre}: layer {lr.layer!r} does not exist (the model has layers "
                                    f"0..{shape.n_layers - 1})")
            if lr.layer in seen:
                raise CompressError(f"{pre}: layer {lr.layer} is listed twice")
            seen.add(lr.layer)
        missing = [i for i in range(shape.n_layers) if i not in seen]
        if missing:
            raise CompressError(f"{pre}: layer {missing[0]} missing (the plan lists {len(seen)} of the model's "
                                f"{shape.n_layers} layers); make the plan again")
        for lr in self.layers:
            _check_layer(lr, shape, pre)


# ---------------------------------------------------------------------------------------------- counting

def full_plan(shape: ModelShape, bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> RankPlan:
    """The identity plan: every matrix at full rank or dense.

    Args:
        shape: the model.
        bytes_per_element: bytes of one cached key/value number.
    Returns:
        A plan with strategy "full" and keep 1.0.
    """
    return plan_from_layers(shape, _full_layers(shape), "full", 1.0, bytes_per_element)


def count_params(shape: ModelShape, plan: RankPlan) -> ParamCount:
    """Count the parameters a plan keeps, next to the dense model.

    Biases under the plan: rotary query/key biases keep ``2p`` rows per head; a non-rotary query keeps ``r``
    bias entries per head and the key bias is dropped (it shifts every score of a query equally, which the
    softmax ignores); the value bias is folded into the output bias (attention weights sum to 1).
    Embeddings: token table, position and token-type tables, plus an output head when not tied.
    Norms: ``2 n_layers + 1`` norms of width ``d_model`` (weight, plus bias for layer norm).

    Args:
        shape: the model.
        plan: a plan for it.
    Returns:
        The counts.
    Raises:
        CompressError: the plan does not fit the model (see :meth:`RankPlan.check`).
    """
    plan.check(shape)
    return _count(shape, plan.layers)


def kv_cache_bytes(shape: ModelShape, layers: Sequence[LayerRanks],
                   bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> int:
    """Key/value-cache bytes per token: ``sum_layers n_kv_heads (qk_width + vo_width) bytes_per_element``.

    ``qk_width`` is ``2 p`` for rotary pairs, the rank otherwise; ``vo_width`` is the value rank.

    Args:
        shape: the model.
        layers: the ranks of every layer.
        bytes_per_element: bytes of one cached number (4 for float32).
    Returns:
        Bytes per token over all layers.
    """
    per_unit = 2 if shape.rotary else 1  # a rotary pair is two cached key numbers
    return shape.kv_bytes([(per_unit * lr.qk, lr.vo) for lr in layers], bytes_per_element)


def shape_fingerprint(shape: ModelShape) -> dict:
    """The shape fields a plan is tied to."""
    return {f: getattr(shape, f) for f in FINGERPRINT_FIELDS}


def _count(shape: ModelShape, layers: Sequence[LayerRanks]) -> ParamCount:
    """Parameter counts of already-checked ranks."""
    d, nh, nkv, hd, dff = shape.d_model, shape.n_heads, shape.n_kv_heads, shape.head_dim, shape.d_ff
    costs = {(c.layer, c.kind): c for c in matrix_layout(shape)}
    block_kept = block_dense = bias_kept = 0
    for lr in layers:
        ranks = {"qk": lr.qk, "vo": lr.vo, **lr.ff}
        for kind, r in ranks.items():
            c = costs[(lr.layer, kind)]
            block_dense += c.dense_params
            block_kept += c.dense_params if r is None else r * c.unit_params
        if shape.qkv_bias:
            # Rotary: 2p rows of each query and key bias; otherwise r query-bias entries per head.
            bias_kept += 2 * lr.qk * (nh + nkv) if shape.rotary else lr.qk * nh
        if shape.qkv_bias or shape.o_bias:
            bias_kept += d  # output bias, absorbing the value bias
    ff_bias = (len(ff_kinds(shape)) - 1) * dff + d if shape.mlp_bias else 0
    bias_kept += ff_bias * len(layers)
    bias_dense = shape.n_layers * (((nh + 2 * nkv) * hd if shape.qkv_bias else 0)
                                   + (d if shape.o_bias else 0) + ff_bias)
    tables = shape.vocab_size + shape.max_positions + shape.type_vocab_size
    embeddings = d * (tables + (0 if shape.tied_embeddings else shape.vocab_size))
    norms = (2 * shape.n_layers + 1) * d * (2 if shape.norm == "layer" else 1)
    return ParamCount(block_kept, block_dense, bias_kept, bias_dense, embeddings, norms)


def plan_from_layers(shape: ModelShape, layers: Sequence[LayerRanks], strategy: str, keep: float,
            bytes_per_element: int) -> RankPlan:
    """Wrap ranks in a checked plan with its predicted counts (what every strategy returns)."""
    layers = tuple(layers)
    counts = _count(shape, layers)
    plan = RankPlan(strategy=strategy, keep=float(keep), model=shape_fingerprint(shape), layers=layers,
                    block_params_kept=counts.block_kept, block_params_dense=counts.block_dense,
                    kv_bytes_per_token=kv_cache_bytes(shape, layers, bytes_per_element),
                    kv_bytes_per_token_dense=kv_cache_bytes(shape, _full_layers(shape), bytes_per_element),
                    bytes_per_element=bytes_per_element)
    plan.check(shape, source=f"<{strategy} plan>")  # a strategy must never emit an invalid plan
    return plan


_PREDICTED = ("block_params_kept", "block_params_dense", "kv_bytes_per_token", "kv_bytes_per_token_dense")


def recount(shape: ModelShape, plan: RankPlan, source: str = "<plan>") -> tuple[RankPlan, list[str]]:
    """A (maybe hand-edited) plan checked against the model, with its predicted counts made from its ranks.

    Example: a plan whose ranks were lowered by hand but whose ``predicted`` was left as written comes back
    with fresh counts and ``stale == ["block_params_kept", "kv_bytes_per_token"]``.

    Args:
        shape: the model the plan is applied to.
        plan: the plan as read.
        source: the plan file name, used in error messages.
    Returns:
        (plan, stale): the plan with counts, fingerprint and keep (the kept fraction, when absent) filled in,
        and the names of the counts the plan gave that did not match its ranks.
    Raises:
        CompressError: the plan does not fit the model (see :meth:`RankPlan.check`).
    """
    plan.check(shape, source)
    counts = _count(shape, plan.layers)
    keep = plan.keep if plan.keep is not None else counts.block_kept / counts.block_dense
    fresh = plan_from_layers(shape, plan.layers, plan.strategy, keep, plan.bytes_per_element)
    stale = [k for k in _PREDICTED if getattr(plan, k) is not None and getattr(plan, k) != getattr(fresh, k)]
    return fresh, stale


def _full_layers(shape: ModelShape) -> tuple[LayerRanks, ...]:
    """The layers of :func:`full_plan` (full rank, dense feed-forward)."""
    qk = shape.n_pairs if shape.rotary else shape.head_dim
    return tuple(LayerRanks(i, qk, shape.head_dim, {k: None for k in ff_kinds(shape)})
                 for i in range(shape.n_layers))


def _check_layer(lr: LayerRanks, shape: ModelShape, pre: str) -> None:
    """Check one layer's ranks against the shape."""
    i = lr.layer
    if shape.rotary:
        _check_units(lr.qk, shape.n_pairs, f"{pre}: layer {i} qk", "rotary pairs",
                     f"head_dim {shape.head_dim} has {shape.n_pairs} pairs")
    else:
        _check_units(lr.qk, shape.head_dim, f"{pre}: layer {i} qk", "rank", f"head_dim {shape.head_dim}")
    _check_units(lr.vo, shape.head_dim, f"{pre}: layer {i} vo", "rank", f"head_dim {shape.head_dim}")
    kinds = ff_kinds(shape)
    for kind in lr.ff:
        if kind not in kinds:
            raise CompressError(f"{pre}: layer {i}: unknown kind {kind!r}; this model's feed-forward has "
                                f"{', '.join(kinds)}")
    for kind in kinds:
        if kind not in lr.ff:
            raise CompressError(f"{pre}: layer {i} {kind}: no rank given; write a rank or null (dense)")
        r = lr.ff[kind]
        if r is None:
            continue
        m, n = ff_dims(shape, kind)
        _check_units(r, min(m, n), f"{pre}: layer {i} {kind}", "rank", f"{m}x{n}")
        if r * (m + n) >= m * n:
            raise CompressError(f"{pre}: layer {i} {kind}: rank {r} stores {r * (m + n)} parameters, not fewer "
                                f"than dense {m}x{n} = {m * n}; write null (dense) or a rank of at most "
                                f"{ff_max_rank(m, n)}")
    if lr.qk_pairs is not None:
        where = f"{pre}: layer {i} qk_pairs"
        if not shape.rotary:
            raise CompressError(f"{where}: only rotary models keep pairs; write null")
        if len(lr.qk_pairs) != shape.n_kv_heads:
            raise CompressError(f"{where}: {len(lr.qk_pairs)} groups listed, the model has {shape.n_kv_heads} "
                                f"key/value groups")
        for g, group in enumerate(lr.qk_pairs):
            if len(group) != lr.qk:
                raise CompressError(f"{where} group {g}: {len(group)} pairs listed, qk keeps {lr.qk}")
            ok = all(is_whole(p) and 0 <= p < shape.n_pairs for p in group)
            if not ok or any(a >= b for a, b in zip(group, group[1:])):
                raise CompressError(f"{where} group {g}: expected sorted distinct pair indices in "
                                    f"0..{shape.n_pairs - 1}, got {list(group)}")


def _check_units(value, maximum: int, where: str, what: str, why: str) -> None:
    """A unit count must be a whole number in 1..maximum."""
    if not is_whole(value):
        raise CompressError(f"{where}: expected a whole number ({what}), got {value!r}")
    if value <= 0:
        raise CompressError(f"{where}: {what} {value}; every matrix keeps at least 1")
    if value > maximum:
        raise CompressError(f"{where}: {what} {value} is above the maximum {maximum} ({why}); lower it")


def is_whole(x) -> bool:
    """A whole number that is not a bool."""
    return isinstance(x, int) and not isinstance(x, bool)


def _typed(data: dict, key: str, typ: type, where: str):
    """``data[key]`` checked to be of ``typ`` (bools are not ints)."""
    value = data[key]
    if not isinstance(value, typ) or (typ is int and isinstance(value, bool)):
        raise CompressError(f"{where}: field {key!r} must be {typ.__name__}, got {value!r}")
    return value


def _known_keys(data: dict, keys: set, required: set, where: str) -> None:
    """The JSON object has the required fields and no field outside `keys`."""
    missing, extra = sorted(required - set(data)), sorted(set(data) - keys)
    if missing:
        raise CompressError(f"{where}: missing field {missing[0]!r}")
    if extra:
        raise CompressError(f"{where}: unknown field {extra[0]!r}")


def _layer_from_json(item, where: str) -> LayerRanks:
    """One entry of a plan's ``layers``: layer, qk, vo and ff required; qk_pairs absent or null means 'choose'."""
    if not isinstance(item, dict):
        raise CompressError(f"{where}: expected an object with layer, qk, vo, ff (and optionally qk_pairs)")
    _known_keys(item, {"layer", "qk", "vo", "ff", "qk_pairs"}, {"layer", "qk", "vo", "ff"}, where)
    ff = _typed(item, "ff", dict, where)
    pairs = item.get("qk_pairs")
    if pairs is not None and not (isinstance(pairs, list) and all(isinstance(g, list) for g in pairs)):
        raise CompressError(f"{where}: qk_pairs must be null or a list of lists of pair indices")
    return LayerRanks(item["layer"], item["qk"], item["vo"], ff, pairs)


# ---------------------------------------------------------------------------------------------- the budget

def check_keep(keep) -> float:
    """``--keep`` checked: a number in (0, 1], returned as a float; else CompressError."""
    if isinstance(keep, bool) or not isinstance(keep, (int, float)) or not math.isfinite(keep) \
            or not 0 < keep <= 1:
        raise CompressError(f"--keep: expected the fraction of block-matrix parameters to keep, in (0, 1], "
                            f"got {keep!r}; e.g. --keep 0.5")
    return float(keep)


def summary(shape: ModelShape, p: RankPlan) -> dict:
    """Plain-dict overview of a plan for reports: counts, fractions, KV bytes and the ranks per layer."""
    pc = count_params(shape, p)
    return {"strategy": p.strategy, "keep": p.keep, "block_params_kept": pc.block_kept,
            "block_params_dense": pc.block_dense, "kept_fraction": pc.block_kept / pc.block_dense,
            "kv_bytes_per_token": kv_cache_bytes(shape, p.layers, p.bytes_per_element),
            "kv_bytes_per_token_dense": kv_cache_bytes(shape, full_plan(shape).layers,
                                                               p.bytes_per_element),
            "layers": [{"layer": lr.layer, "qk": lr.qk, "vo": lr.vo, **{k: v for k, v in lr.ff.items()}}
                       for lr in p.layers]}
