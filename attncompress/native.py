"""A decode step in one compiled call: kernels/decode_step.c, built on first use with the machine's C compiler.

Through torch a decode step of the built-in SmolLM2 is ~270 one-row matrix products and ~1,200 small
operations, each paying a few microseconds of dispatch: about half of the step's time
(benchmarks/results/decode_profile.md). The kernel runs the whole step (embedding, every layer, the logits)
in one OpenMP parallel region, the products' rows split over the threads; it reads the model's own float16
weights and writes the model's own KV cache, so a step may go through either path.

It covers what most small decoders are: fused (`model.fuse`) and float16 (`model.halve`) pre-norm decoders
with RMS norms, rotary keys (all pairs or the kept ones) or none, and a gated SiLU feed-forward, dense or
factorised; one sequence at a time (batch 1). `attach` says why it does not apply to another model, which
then decodes through torch as before. It equals that path but for the order of float32 sums (tests/test_native.py).

Build: `cc -O3 -march=native -fopenmp -shared -fPIC` ($CC, else gcc, else cc) into the user cache
(`generate.cache_dir()`), named by a hash of the source, the command and the CPU's model name and flags,
so a second process loads it at once. No compiler, or a failed build, means the torch path (`status` says why).
"""
from __future__ import annotations

import ctypes
import hashlib
import os
import platform
import shutil
import subprocess
import tempfile
import weakref
from pathlib import Path

import torch

SOURCE = Path(__file__).resolve().parent / "kernels" / "decode_step.c"
FLAGS = ("-O3", "-march=native", "-fopenmp", "-shared", "-fPIC")

_LIB: dict = {}  # "lib": the loaded library or None, "why": the reason when None


class Mat(ctypes.Structure):
    _fields_ = [("w", ctypes.c_void_p), ("bias", ctypes.c_void_p), ("rows", ctypes.c_int32),
                ("cols", ctypes.c_int32)]


class Layer(ctypes.Structure):
    _fields_ = [("attn_norm", ctypes.c_void_p), ("ff_norm", ctypes.c_void_p),
                ("qkv", Mat), ("qkv_sizes", ctypes.c_int32 * 3), ("qkv_second", Mat * 3),
                ("o", Mat), ("o_second", Mat),
                ("inv_freq", ctypes.c_void_p), ("k_cache", ctypes.c_void_p), ("v_cache", ctypes.c_void_p),
                ("w_qk", ctypes.c_int32), ("w_vo", ctypes.c_int32), ("cache_len", ctypes.c_int32),
                ("gu", Mat), ("gu_sizes", ctypes.c_int32 * 2), ("gu_second", Mat * 2),
                ("down", Mat), ("down_second", Mat)]


class Model(ctypes.Structure):
    _fields_ = [("n_layers", ctypes.c_int32), ("d", ctypes.c_int32), ("heads", ctypes.c_int32),
                ("kv_heads", ctypes.c_int32), ("vocab", ctypes.c_int32), ("threads", ctypes.c_int32),
                ("eps", ctypes.c_float), ("scale", ctypes.c_float),
                ("tokens_half", ctypes.c_void_p), ("tokens_float", ctypes.c_void_p),
                ("final_norm", ctypes.c_void_p), ("head", Mat), ("layers", ctypes.POINTER(Layer)),
                ("work", ctypes.c_void_p), ("width", ctypes.c_int32), ("own", ctypes.c_int32),
                ("part", ctypes.c_int32), ("w_qk", ctypes.c_int32), ("w_vo", ctypes.c_int32)]


def _cpu_identity() -> str:
    try:
        info = Path("/proc/cpuinfo").read_text(encoding="utf-8", errors="replace")
    except OSError:
        return platform.processor() or platform.machine()
    keep = [ln for ln in info.splitlines() if ln.startswith(("model name", "flags"))][:2]
    return "\n".join(keep) or platform.machine()


def _compiler() -> str | None:
    for cc in (os.environ.get("CC"), "gcc", "cc"):
        if cc and shutil.which(cc):
            return cc
    return None


def library():
    """The loaded kernel library, built on first use; None when it cannot be (see `status`)."""
    if "lib" not in _LIB:
        _LIB["lib"], _LIB["why"] = build(FLAGS)
    return _LIB["lib"]


def build(flags: tuple[str, ...]):
    """(the library built from SOURCE with `flags`, ""), or (None, why not); cached by source, flags and CPU."""
    from .generate import cache_dir
    cc = _compiler()
    if cc is None:
        return None, "no C compiler found ($CC, gcc or cc)"
    try:
        src = SOURCE.read_bytes()
        key = hashlib.sha256(src + " ".join((cc,) + flags).encode() + _cpu_identity().encode()).hexdigest()[:16]
        out = cache_dir() / f"decode_step-{key}.so"
        if not out.exists():
            out.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(suffix=".so", dir=out.parent)
            os.close(fd)
            run = subprocess.run([cc, *flags, str(SOURCE), "-o", tmp, "-lm"], capture_output=True, text=True)
            if run.returncode != 0:
                os.unlink(tmp)
                last = (run.stderr.strip().splitlines() or ["no message"])[-1]
                return None, f"building {SOURCE.name} with {cc} failed: {last}"
            os.replace(tmp, out)  # atomic: a concurrent process sees the whole library or none
        lib = ctypes.CDLL(str(out))
    except OSError as e:  # an unreadable source, an unwritable cache, a library that does not load
        return None, f"the compiled decode step is unavailable: {e}"
    lib.decode_step.argtypes = [ctypes.POINTER(Model), ctypes.c_int32, ctypes.c_int32, ctypes.c_void_p]
    lib.decode_step.restype = None
    lib.work_floats.argtypes = [ctypes.POINTER(Model)]
    lib.work_floats.restype = ctypes.c_int64
    return lib, ""


def status() -> str:
    """Why the library is unavailable, or "" when it is loaded."""
    library()
    return _LIB["why"]


def _ptr(t: torch.Tensor | None) -> int | None:
    return None if t is None else t.data_ptr()


def _mat(w: torch.Tensor | None, bias: torch.Tensor | None = None) -> Mat:
    if w is None:
        return Mat()
    return Mat(_ptr(w), _ptr(bias), w.shape[0], w.shape[1])


def unsupported(model) -> str | None:
    """Why the kernel cannot run this model's decode step, or None when it can."""
    from .model import GatedMLP, Linear, LowRankLinear, RMSNorm
    if not model.is_decoder:
        return "not a decoder"
    if not model.halved:
        return "product weights are not float16 (model.halve)"
    if model.positions is not None or model.types is not None or model.embed_norm is not None:
        return "learned position or type tables, or an embedding norm"
    if not isinstance(model.final_norm, RMSNorm):
        return "no final RMS norm"
    if model.lm_head is not None and model.lm_head.bias is not None:
        return "an output head with a bias"
    for i, blk in enumerate(model.blocks):
        a, ff = blk.attn, blk.ff
        if not blk.pre_norm or not isinstance(blk.attn_norm, RMSNorm) or not isinstance(blk.ff_norm, RMSNorm):
            return f"layer {i}: not a pre-norm block with RMS norms"
        if a.qkv is None or not isinstance(ff, GatedMLP) or ff.gate_up is None:
            return f"layer {i}: not fused (model.fuse) or no gated feed-forward"
        if ff.act is not torch.nn.functional.silu or not a.causal:
            return f"layer {i}: the activation is not SiLU, or attention is not causal"
        if a.pairs is not None and 2 * a.inv_freq.shape[1] != a.w_qk:
            return f"layer {i}: rotary pairs do not fill the key width"
        for mod in (a.o, ff.down):
            if not isinstance(mod, (Linear, LowRankLinear)):
                return f"layer {i}: an unknown projection"
    return None


class DecodeKernel:
    """The compiled decode step bound to one model (its tensors are read in place, not copied)."""

    def __init__(self, model, lib):
        self.lib = lib  # the tensors are held in self._keep, not the model (no reference cycle)
        sh = model.shape
        self.layers = (Layer * len(model.blocks))()
        self._keep = []  # tensors whose addresses the structs hold
        for i, blk in enumerate(model.blocks):
            a, ff = blk.attn, blk.ff
            L = self.layers[i]
            L.attn_norm, L.ff_norm = _ptr(blk.attn_norm.weight), _ptr(blk.ff_norm.weight)
            self._shared(a.qkv, L, "qkv", 3)
            self._shared(ff.gate_up, L, "gu", 2)
            L.o, L.o_second = self._proj(a.o)
            L.down, L.down_second = self._proj(ff.down)
            L.inv_freq = _ptr(self._contig(a.inv_freq)) if a.pairs is not None else None
            L.w_qk, L.w_vo = a.w_qk, a.w_vo
        head = model.lm_head.weight if model.lm_head is not None else model.tokens
        tied = model.lm_head is None
        self.m = Model(n_layers=len(model.blocks), d=sh.d_model, heads=sh.n_heads, kv_heads=sh.n_kv_heads,
                       vocab=head.shape[0], threads=1, eps=float(model.final_norm.eps),
                       scale=float(model.blocks[0].attn.scale),
                       tokens_half=_ptr(self._contig(model.tokens)) if tied else None,
                       tokens_float=None if tied else _ptr(self._contig(model.tokens.float())),
                       final_norm=_ptr(model.final_norm.weight), head=_mat(self._contig(head)),
                       layers=self.layers)
        self._cache = None
        self._work = None

    def _contig(self, t: torch.Tensor) -> torch.Tensor:
        t = t.detach()
        t = t if t.is_contiguous() else t.contiguous()
        self._keep.append(t)
        return t

    def _proj(self, mod) -> tuple[Mat, Mat]:
        from .model import Linear
        if isinstance(mod, Linear):
            return _mat(self._contig(mod.weight), self._bias(mod.bias)), Mat()
        return _mat(self._contig(mod.bt)), _mat(self._contig(mod.a), self._bias(mod.bias))

    def _bias(self, b):
        return None if b is None else self._contig(b.float())

    def _shared(self, si, L: Layer, name: str, parts: int) -> None:
        setattr(L, name, _mat(self._contig(si.first), self._bias(si.bias)))
        getattr(L, name + "_sizes")[:] = list(si.sizes)
        seconds = getattr(L, name + "_second")
        for j, second in enumerate(si.seconds):
            seconds[j] = Mat() if second is None else _mat(self._contig(second.weight), self._bias(second.bias))

    def _bind(self, cache) -> None:
        """Point every layer at sequence 0 of `cache` and size the work buffer for its length."""
        for i in range(len(self.layers)):
            k, v = cache.k[i], cache.v[i]  # (B, g, T, w)
            if not (k.is_contiguous() and v.is_contiguous() and k.dtype == v.dtype == torch.float32):
                raise ValueError("the kernel needs a contiguous float32 KV cache")
            self.layers[i].k_cache, self.layers[i].v_cache = k.data_ptr(), v.data_ptr()
            self.layers[i].cache_len = k.shape[2]
        self._work = torch.empty(int(self.lib.work_floats(ctypes.byref(self.m))))
        self.m.work = self._work.data_ptr()
        self._cache = weakref.ref(cache)

    def step(self, token: int, pos: int, cache) -> torch.Tensor:
        """Logits (1, 1, V) of `token` at position `pos`, its keys and values written into `cache`."""
        if self._cache is None or self._cache() is not cache:
            self._bind(cache)
        if not 0 <= pos < self.layers[0].cache_len:
            raise IndexError(f"position {pos} is outside the cache ({self.layers[0].cache_len} positions)")
        self.m.threads = torch.get_num_threads()
        logits = torch.empty(1, 1, self.m.vocab)
        self.lib.decode_step(ctypes.byref(self.m), int(token), int(pos), logits.data_ptr())
        return logits


def attach(model) -> str:
    """Give a fused, halved decoder the compiled decode step (`model.native`) when it applies; returns what
    its decode steps will run: "compiled kernel", or "torch (REASON)"."""
    model.native = None
    why = unsupported(model)
    if why is None:
        lib = library()
        if lib is None:
            why = status()
        else:
            model.native = DecodeKernel(model, lib)
            return "compiled kernel"
    return f"torch ({why})"
