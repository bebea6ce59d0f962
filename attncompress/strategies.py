"""Rank strategies: plain functions from spectra, a shape and a budget to a `RankPlan`.

Every strategy takes ``(spectra, shape, keep, *, options...)``, one `MatrixSpectrum` per matrix of the model
(see `plan.matrix_layout`), and returns a plan keeping at most ``keep`` of the block-matrix parameters.
`STRATEGIES` names them for ``--strategy``; a new strategy is one function and one entry there.
"""
from __future__ import annotations

import heapq
import inspect
import math
from typing import Callable, Sequence

import numpy as np

from .errors import CompressError
from .plan import (
    DEFAULT_BYTES_PER_ELEMENT, FF_KINDS, LayerRanks, MatrixSpectrum, RankPlan, check_keep, ff_kinds, is_whole,
    matrix_layout, plan_from_layers,
)
from .shape import ModelShape

# With calibration text the spectra are priced in loss units and `loss` measured best on SmolLM2 (README,
# benchmarks/quality_table.py); without it (--weights-only) there are no prices and `uniform` is used.
DEFAULT_STRATEGY = "loss"
WEIGHTS_ONLY_STRATEGY = "uniform"


def _check_spectra(spectra: Sequence[MatrixSpectrum], shape: ModelShape) -> list[MatrixSpectrum]:
    """One spectrum per matrix of the model, priced as :func:`matrix_layout` prices it; returned in layout order."""
    layout = matrix_layout(shape)
    by_key = {}
    for s in spectra:
        key = (s.layer, s.kind)
        if key in by_key:
            raise CompressError(f"spectra: layer {s.layer} {s.kind!r} given twice")
        by_key[key] = s
    wanted = {(c.layer, c.kind) for c in layout}
    for key in by_key:
        if key not in wanted:
            raise CompressError(f"spectra: layer {key[0]} {key[1]!r} is not a matrix of this model")
    out = []
    for c in layout:
        s = by_key.get((c.layer, c.kind))
        if s is None:
            raise CompressError(f"spectra: no spectrum for layer {c.layer} {c.kind!r}")
        for f in ("unit", "max_units", "unit_params", "dense_params"):
            if getattr(s, f) != getattr(c, f):
                raise CompressError(f"spectra: layer {c.layer} {c.kind!r} has {f} {getattr(s, f)!r}, this model "
                                    f"needs {getattr(c, f)!r}; build spectra from matrix_layout(shape)")
        out.append(s)
    return out


def _check_option(name: str, value, kind: str) -> None:
    """Strategy options: 'int>=1', 'fraction' in (0, 1], 'bool'."""
    if kind == "int>=1" and not (is_whole(value) and value >= 1):
        raise CompressError(f"strategy option {name}: expected a whole number >= 1, got {value!r}")
    if kind == "fraction" and (isinstance(value, bool) or not isinstance(value, (int, float))
                               or not 0 < value <= 1):
        raise CompressError(f"strategy option {name}: expected a fraction in (0, 1], got {value!r}")
    if kind == "bool" and not isinstance(value, bool):
        raise CompressError(f"strategy option {name}: expected true or false, got {value!r}")


def _prepare(spectra, shape, keep, bytes_per_element):
    """Validate the common inputs; returns (ordered spectra, dense total, budget)."""
    keep = check_keep(keep)
    _check_option("bytes_per_element", bytes_per_element, "int>=1")
    spectra = _check_spectra(spectra, shape)
    dense = sum(s.dense_params for s in spectra)
    # kept <= keep * dense  <=>  kept <= floor(keep * dense) for whole kept counts.
    return spectra, dense, math.floor(keep * dense)


def _kcap(s: MatrixSpectrum) -> int:
    """The most units that still cost less than dense (qk/vo: max_units - 1; FF: the highest paying rank)."""
    return min(s.max_units, (s.dense_params - 1) // s.unit_params)


def _settle(s: MatrixSpectrum, k: int) -> int:
    """Map a unit count that would cost at least dense to ``max_units`` (the full / dense state)."""
    return s.max_units if k > _kcap(s) else k


def _cost(s: MatrixSpectrum, k: int) -> int:
    """Block-matrix parameters of one matrix at ``k`` units (dense once factors stop paying)."""
    return min(k * s.unit_params, s.dense_params)


def _total_cost(spectra, units) -> int:
    """Block-matrix parameters of a whole assignment."""
    return sum(_cost(s, k) for s, k in zip(spectra, units))


def _too_small(keep: float, budget: int, dense: int, need: int, floor: str, hint: str = "") -> CompressError:
    """The error for a budget below the smallest plan."""
    least = math.ceil(need / dense * 1e4) / 1e4  # rounded up, so the suggested keep is enough
    return CompressError(f"--keep {keep}: the budget is {budget} of {dense} block-matrix parameters but the "
                         f"smallest plan ({floor}) needs {need}; raise --keep to at least {least}{hint}")


def _plan_from_units(spectra, units, shape, strategy, keep, bytes_per_element) -> RankPlan:
    """Turn unit counts (``max_units`` = full / dense) into a checked plan."""
    per_layer: dict[int, dict[str, int | None]] = {}
    for s, k in zip(spectra, units):
        assert 1 <= k <= s.max_units
        dense = s.kind in FF_KINDS and k * s.unit_params >= s.dense_params
        per_layer.setdefault(s.layer, {})[s.kind] = None if dense else k
    layers = tuple(LayerRanks(i, r["qk"], r["vo"], {f: r[f] for f in ff_kinds(shape)})
                   for i, r in sorted(per_layer.items()))
    return plan_from_layers(shape, layers, strategy, keep, bytes_per_element)


def _bisect(spectra, units_at: Callable[[float], list[int]], budget: int, keep: float, dense: int,
            floor: str) -> list[int]:
    """Largest ``t`` in [0, 1] whose assignment ``units_at(t)`` fits the budget (costs are monotone in t)."""
    lo_units = units_at(0.0)
    need = _total_cost(spectra, lo_units)
    if need > budget:
        raise _too_small(keep, budget, dense, need, floor)
    hi_units = units_at(1.0)
    if _total_cost(spectra, hi_units) <= budget:
        return hi_units
    lo, hi = 0.0, 1.0
    # 60 halvings reach float64 resolution: the step of the cost curve is found as closely as t can say.
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        units = units_at(mid)
        if _total_cost(spectra, units) <= budget:
            lo, lo_units = mid, units
        else:
            hi = mid
    return lo_units


def plan_uniform(spectra: Sequence[MatrixSpectrum], shape: ModelShape, keep: float, *, min_units: int = 1,
                 bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> RankPlan:
    """One factor ``f`` scales every matrix: ``k = round(f * max_units)``, at least ``min_units``.

    ``f`` is bisected to the largest value whose plan keeps at most ``keep`` of the block-matrix parameters.
    A feed-forward rank that would not be cheaper than dense stays dense.

    Args:
        spectra: one per matrix of the model (only prices are used).
        shape: the model.
        keep: fraction of block-matrix parameters to keep, in (0, 1].
        min_units: floor on every matrix's units.
        bytes_per_element: bytes of one cached key/value number, for the KV prediction.
    Returns:
        The plan.
    Raises:
        CompressError: bad keep / option, spectra not matching the model, or a budget below every matrix at
            ``min_units``.
    """
    _check_option("min_units", min_units, "int>=1")
    spectra, dense, budget = _prepare(spectra, shape, keep, bytes_per_element)

    def units_at(f: float) -> list[int]:
        # floor(x + 0.5): round half up, so the rank never shrinks as f grows.
        return [_settle(s, min(s.max_units, max(min_units, math.floor(f * s.max_units + 0.5)))) for s in spectra]

    units = _bisect(spectra, units_at, budget, keep, dense, f"every matrix at {min_units} unit(s)")
    return _plan_from_units(spectra, units, shape, "uniform", keep, bytes_per_element)


def plan_energy(spectra: Sequence[MatrixSpectrum], shape: ModelShape, keep: float, *, min_units: int = 1,
                bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> RankPlan:
    """Every matrix keeps the fewest units that reach one energy fraction ``e``; ``e`` is bisected to the budget.

    Args:
        spectra: one per matrix of the model.
        shape: the model.
        keep: fraction of block-matrix parameters to keep, in (0, 1].
        min_units: floor on every matrix's units.
        bytes_per_element: bytes of one cached key/value number.
    Returns:
        The plan.
    Raises:
        CompressError: as :func:`plan_uniform`.
    """
    _check_option("min_units", min_units, "int>=1")
    spectra, dense, budget = _prepare(spectra, shape, keep, bytes_per_element)
    cums = [np.cumsum(np.asarray(s.gains, dtype=np.float64)) for s in spectra]  # (max_units,) each

    def units_at(e: float) -> list[int]:
        out = []
        for s, c in zip(spectra, cums):
            # First index whose cumulative energy reaches e * total; comparing sums avoids dividing.
            k = int(np.searchsorted(c, e * c[-1], side="left")) + 1
            out.append(_settle(s, min(s.max_units, max(min_units, k))))
        return out

    units = _bisect(spectra, units_at, budget, keep, dense, f"every matrix at {min_units} unit(s)")
    return _plan_from_units(spectra, units, shape, "energy", keep, bytes_per_element)


def _upper_hull(points: list[tuple[int, float, int]]) -> list[tuple[int, float, int]]:
    """Upper concave hull of (cost, energy, units) points sorted by cost; collinear middles are dropped."""
    hull: list[tuple[int, float, int]] = []
    for p in points:
        # Pop the last vertex while it lies on or below the chord from its predecessor to p.
        while len(hull) >= 2:
            (x0, y0, _), (x1, y1, _) = hull[-2], hull[-1]
            if (x1 - x0) * (p[1] - y1) - (y1 - y0) * (p[0] - x1) >= 0:
                hull.pop()
            else:
                break
        hull.append(p)
    return hull


def plan_global(spectra: Sequence[MatrixSpectrum], shape: ModelShape, keep: float, *,
                min_fraction: float = 0.125, min_units: int | None = None, normalise: bool = True,
                bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> RankPlan:
    """Greedy allocation across all matrices by energy gained per parameter.

    Every matrix starts at ``min_units`` (default ``max(1, ceil(min_fraction * max_units))``). Units are then
    bought, best energy per parameter first, until the budget is spent. A feed-forward matrix's last step is
    the switch to dense: from its highest paying rank ``r*`` it costs ``m n - r* (m + n)`` (at most one unit)
    and wins all the remaining energy, so it is the best-value step of that matrix. Because that makes the
    matrix's value curve non-concave, the greedy walks each matrix's upper concave hull of (cost, energy)
    points (a hull edge may span several units; e.g. a flat spectrum jumps straight to dense). When a matrix's
    next edge no longer fits, that matrix goes on one unit at a time (in the same best-value-first queue), so
    less than one unit's price of budget is left unspent. Units that win no energy are never bought.

    ``normalise=True`` divides each matrix's gains by its total energy, so a unit's value is the relative
    reduction of that matrix's squared error (every matrix counts alike whatever its norm).
    ``normalise=False`` compares raw energies, favouring matrices with large singular values.

    Args:
        spectra: one per matrix of the model.
        shape: the model.
        keep: fraction of block-matrix parameters to keep, in (0, 1].
        min_fraction: starting units as a fraction of each matrix's maximum.
        min_units: starting units for every matrix (overrides ``min_fraction``; capped at the maximum).
        normalise: compare gains relative to each matrix's total energy.
        bytes_per_element: bytes of one cached key/value number.
    Returns:
        The plan.
    Raises:
        CompressError: bad keep / option, spectra not matching the model, or a budget below the starting plan.
    """
    return _greedy(spectra, shape, keep, min_fraction, min_units, normalise, bytes_per_element, "global")


def plan_loss(spectra: Sequence[MatrixSpectrum], shape: ModelShape, keep: float, *,
              min_fraction: float = 0.125, bytes_per_element: int = DEFAULT_BYTES_PER_ELEMENT) -> RankPlan:
    """Drop the units whose predicted loss rise per parameter is lowest, until the budget is met.

    For spectra priced in loss units (`analysis.layer_spectra` with sensitivities): a unit's gain is the rise
    of the mean calibration loss its removal would cause, the same unit for a rotary pair, a value-output
    rank and a feed-forward rank of any layer, so the greedy of `plan_global` on raw gains (``normalise``
    off) is a knapsack by price per parameter: near optimal, since within one matrix the next unit's price
    only rises (exact when all units cost alike). Every matrix keeps at least ``min_fraction`` of its units.

    Args:
        spectra: one per matrix of the model, gains in loss units.
        shape: the model.
        keep: fraction of block-matrix parameters to keep, in (0, 1].
        min_fraction: the least each matrix keeps, as a fraction of its maximum units.
        bytes_per_element: bytes of one cached key/value number.
    Returns:
        The plan.
    Raises:
        CompressError: as :func:`plan_global`.
    """
    if keep >= 1:  # everything fits: keep everything, even units whose price rounds to nothing
        return _plan_from_units(spectra, [s.max_units for s in spectra], shape, "loss", keep, bytes_per_element)
    return _greedy(spectra, shape, keep, min_fraction, None, False, bytes_per_element, "loss")


def _greedy(spectra, shape, keep, min_fraction, min_units, normalise, bytes_per_element, name) -> RankPlan:
    """The greedy purchase behind `plan_global` and `plan_loss` (see `plan_global`)."""
    _check_option("min_fraction", min_fraction, "fraction")
    if min_units is not None:
        _check_option("min_units", min_units, "int>=1")
    _check_option("normalise", normalise, "bool")
    spectra, dense, budget = _prepare(spectra, shape, keep, bytes_per_element)
    units, cums, hulls = _global_start(spectra, min_fraction, min_units, normalise)
    need = _total_cost(spectra, units)
    floor = f"every matrix at {min_units} unit(s)" if min_units is not None else \
        f"every matrix at {min_fraction:g} of its maximum units"
    if need > budget:
        raise _too_small(keep, budget, dense, need, floor,
                         " or lower min_units" if min_units is not None else " or lower min_fraction")
    remaining = _buy_units(spectra, units, cums, hulls, budget - need)
    assert _total_cost(spectra, units) == budget - remaining
    return _plan_from_units(spectra, units, shape, name, keep, bytes_per_element)


def _global_start(spectra, min_fraction: float, min_units: int | None, normalise: bool):
    """Starting units, cumulative (maybe normalised) energy (max_units + 1,) and upper hull of each matrix."""
    units, cums, hulls = [], [], []
    for s in spectra:
        start = min_units if min_units is not None else max(1, math.ceil(min_fraction * s.max_units))
        k0 = _settle(s, min(s.max_units, start))
        g = np.asarray(s.gains, dtype=np.float64)
        total = float(g.sum())
        if normalise and total > 0:
            g = g / total  # relative error reduction per unit
        c = np.concatenate([[0.0], np.cumsum(g)])  # (max_units + 1,): energy kept at k units
        cums.append(c)
        units.append(k0)
        if k0 == s.max_units:
            hulls.append([])
            continue
        kc = _kcap(s)
        # States: k0..kcap factored, then full / dense (cost dense_params, all the energy).
        pts = [(k * s.unit_params, float(c[k]), k) for k in range(k0, kc + 1)]
        pts.append((s.dense_params, float(c[s.max_units]), s.max_units))
        hulls.append(_upper_hull(pts))
    return units, cums, hulls


def _buy_units(spectra, units: list[int], cums, hulls, remaining: int) -> int:
    """Spend `remaining` parameters on the best energy per parameter first, updating `units`; returns what is left.

    One heap of next moves: a whole hull edge while the matrix is in "edge" mode, then single steps (one
    unit, or the switch to dense from the highest paying rank) once an edge has failed to fit.
    """
    pos = [0] * len(spectra)  # current hull vertex per matrix
    single = [False] * len(spectra)
    heap: list[tuple[float, int]] = []

    def move(i: int):
        """(cost, energy, units after) of matrix i's next move, or None when it has none."""
        s, k, c = spectra[i], units[i], cums[i]
        if not single[i]:
            h = hulls[i]
            if pos[i] + 1 >= len(h):
                return None
            (x0, y0, _), (x1, y1, k1) = h[pos[i]], h[pos[i] + 1]
            return x1 - x0, y1 - y0, k1
        if k >= s.max_units:
            return None
        nxt = s.max_units if k + 1 > _kcap(s) else k + 1
        return _cost(s, nxt) - _cost(s, k), float(c[nxt] - c[k]), nxt

    def push(i: int) -> None:
        """Queue matrix i's next move by energy per parameter (ties: layout order)."""
        mv = move(i)
        if mv is not None and mv[1] > 0:  # never buy units that win nothing
            heapq.heappush(heap, (-mv[1] / mv[0], i))

    for i in range(len(spectra)):
        push(i)
    while heap:
        _, i = heapq.heappop(heap)
        dc, _, nxt = move(i)
        if dc <= remaining:
            remaining -= dc
            units[i] = nxt
            if not single[i]:
                pos[i] += 1
            push(i)
        elif not single[i]:
            # Later hull edges are worse value; keep filling this matrix one unit at a time.
            single[i] = True
            push(i)
        # A single step that does not fit is the matrix's last: the budget only shrinks.
    return remaining


STRATEGIES: dict[str, Callable[..., RankPlan]] = {"loss": plan_loss, "uniform": plan_uniform,
                                                  "energy": plan_energy, "global": plan_global}


def predicted_rise(spectra: Sequence[MatrixSpectrum], plan: RankPlan) -> dict[str, float]:
    """Per kind, the summed gains of the units a plan drops: with priced spectra, the predicted loss rise (nats).

    Example: one "up" matrix with gains [3, 2, 1] kept at rank 1 → {"up": 3.0, ...} (2 + 1 dropped), 0 elsewhere.
    """
    out: dict[str, float] = {}
    for s in spectra:
        lr = plan.ranks(s.layer)
        k = lr.qk if s.kind == "qk" else lr.vo if s.kind == "vo" else lr.ff[s.kind]
        dropped = 0.0 if k is None else float(np.sum(np.asarray(s.gains[k:], dtype=np.float64)))
        out[s.kind] = out.get(s.kind, 0.0) + dropped
    return out


def make_plan(spectra: Sequence[MatrixSpectrum], shape: ModelShape, keep: float, strategy: str = DEFAULT_STRATEGY,
              **opts) -> RankPlan:
    """Choose ranks with a named strategy.

    Args:
        spectra: one :class:`MatrixSpectrum` per matrix of the model (see :func:`matrix_layout`).
        shape: the model.
        keep: fraction of block-matrix parameters to keep, in (0, 1] (``--keep``).
        strategy: a key of :data:`STRATEGIES` (``--strategy``).
        **opts: that strategy's keyword options.
    Returns:
        A plan whose block-matrix parameters are at most ``keep`` times the dense count.
    Raises:
        CompressError: keep outside (0, 1], unknown strategy or option, spectra not matching the model,
            a budget that even the smallest plan exceeds.
    """
    check_keep(keep)
    if strategy not in STRATEGIES:
        raise CompressError(f"--strategy: unknown strategy {strategy!r}; expected one of "
                            f"{', '.join(sorted(STRATEGIES))}")
    fn = STRATEGIES[strategy]
    allowed = [p for p in inspect.signature(fn).parameters.values() if p.kind is p.KEYWORD_ONLY]
    names = [p.name for p in allowed]
    for name in opts:
        if name not in names:
            raise CompressError(f"strategy {strategy!r} has no option {name!r}; its options are {', '.join(names)}")
    return fn(spectra, shape, keep, **opts)
