"""How glibc's allocator hands out and takes back large blocks, set per stage (elsewhere than glibc: nothing).

Two stages want opposite things:
- `compress` walks a model layer by layer and must stay flat in memory however many layers there are:
  `release_large_frees` gives every block of 1 MiB or more its own mapping, returned to the system when
  freed. By default glibc raises that threshold each time a large block is freed; after that, layer-sized
  tensors come from the main heap, and the small tensors kept from layer to layer (the spectra) pin it, so
  the heap grows by about a layer per layer though nothing stays alive (measured on a 668-layer model: 5 MB
  more per layer, 4 GB resident after 600 layers, against a flat 0.3 GB with this setting).
- The tune allocates and frees the same activation-sized tensors at every step. A block that gets its own
  mapping is faulted in page by page each time it is touched anew, which costs as much as a pass of
  arithmetic over it.
  `keep_freed_memory` serves blocks up to glibc's largest threshold (32 MiB) from the heap and keeps freed
  heap memory for reuse (up to `KEPT_BYTES`). One tuning step of SmolLM2 at 4 × 128 tokens in bfloat16
  products (`python benchmarks/tune_step.py DIR --allocator …`, benchmarks/results/tune_step.json): 1.02 s
  with this setting, 1.18 s with glibc's defaults, 1.67 s with `compress`'s (which `run` would otherwise
  carry into its tune); the teacher's targets of 4 blocks 0.55 / 0.54 / 0.75 s.
"""
from __future__ import annotations

import ctypes

# glibc's <malloc.h>
M_TRIM_THRESHOLD = -1
M_MMAP_THRESHOLD = -3
LARGEST_MMAP_THRESHOLD = 32 << 20  # glibc's upper limit on 64-bit systems (4 MiB · sizeof(long))
KEPT_BYTES = 1 << 30  # freed heap memory kept for reuse before glibc returns it
DEFAULT_TRIM_THRESHOLD = 128 << 10  # glibc's default


def _mallopt(param: int, value: int) -> bool:
    try:
        return bool(ctypes.CDLL(None).mallopt(param, value))
    except (OSError, AttributeError):
        return False


def release_large_frees() -> None:
    """Every allocation of 1 MiB or more in its own mapping, returned to the system when freed (`compress`)."""
    _mallopt(M_MMAP_THRESHOLD, 1 << 20)
    _mallopt(M_TRIM_THRESHOLD, DEFAULT_TRIM_THRESHOLD)


def keep_freed_memory() -> None:
    """Blocks up to 32 MiB from the heap, and up to `KEPT_BYTES` of freed heap memory kept (the tune)."""
    _mallopt(M_MMAP_THRESHOLD, LARGEST_MMAP_THRESHOLD)
    _mallopt(M_TRIM_THRESHOLD, KEPT_BYTES)
