"""How many threads to compute with and how idle ones wait, chosen once at start-up from what the machine does.

Why it matters (measured on this project's 2-core machine, SmolLM2-135M decode): a decode step is a few
hundred small matrix products, and between two of them OpenMP's worker threads either spin (active waiting)
or sleep (passive). On an idle machine spinning halves the time of a step (27.7 ms against 53.2 ms with two
threads); on a machine whose cores are busy with other jobs, spinning threads steal each other's time slices
and everything slows several-fold. So: use the free cores, spin only when the threads have cores to
themselves, and sleep otherwise. What is busy is measured at start-up (`busy_cores`: 0.2 s of /proc/stat),
not read from the load average, which still counts a job that ended a minute ago.

The wait policy is read by the OpenMP runtime when torch is imported: `configure` must run before that
(the command line imports this module first; it does not import torch itself).

Overrides, strongest first: `--threads SPEC` on the command line, the environment variable
ATTNCOMPRESS_THREADS=SPEC, then OMP_NUM_THREADS / OMP_WAIT_POLICY as the user set them. SPEC is `auto`,
`N` (N threads, waiting decided as below) or `N:active` / `N:passive`. On a shared machine,
`ATTNCOMPRESS_THREADS=1` or `OMP_WAIT_POLICY=PASSIVE` keeps the tool from spinning.
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path

from .errors import CompressError

ENV = "ATTNCOMPRESS_THREADS"
WAIT_POLICIES = ("active", "passive")


@dataclass(frozen=True)
class Choice:
    """The decision: `threads` intra-op threads, OpenMP `wait` policy, and why."""
    threads: int
    wait: str  # "active" | "passive"
    reason: str
    load: float | None = None  # busy cores when decided (`busy_cores`), else the 1-minute load average
    cores: int | None = None

    def describe(self) -> str:
        """One line for reports. Example: '2 threads, active waiting (idle: load 0.1 on 2 cores)'."""
        return f"{self.threads} thread{'s' if self.threads != 1 else ''}, {self.wait} waiting ({self.reason})"

    def to_json(self) -> dict:
        return {"threads": self.threads, "wait_policy": self.wait, "reason": self.reason,
                "load_average": self.load, "cores": self.cores}


def parse_spec(spec: str, where: str = "--threads") -> tuple[int | None, str | None]:
    """(threads or None, wait or None) from a SPEC. Example: '2:active' → (2, 'active'); 'auto' → (None, None).

    Raises:
        CompressError: not `auto`, `N`, or `N:active|passive` with N ≥ 1.
    """
    m = re.fullmatch(r"\s*(?:(auto)|(\d+)(?::(active|passive))?)\s*", str(spec).lower())
    if m is None or (m.group(2) is not None and int(m.group(2)) < 1):
        raise CompressError(f"{where}: expected auto, a thread count N ≥ 1, or N:active / N:passive; got {spec!r}")
    if m.group(1):
        return None, None
    return int(m.group(2)), m.group(3)


def decide(load: float, cores: int, threads: int | None = None, wait: str | None = None,
           measure: str = "load") -> Choice:
    """The thread count and wait policy for a machine with `cores` cores whose load average is `load`.

    Free cores are those the load does not take: `cores - load`. Without a request, use the free cores
    rounded (at least one); spin only when every thread has a free core (threads ≤ free + 0.5) and there is
    more than one thread; otherwise sleep. A requested count or policy is kept as given.
    Examples: decide(0.1, 2) → 2 threads, active; decide(1.0, 2) → 1 thread, passive;
    decide(2.9, 2) → 1 thread, passive; decide(2.9, 2, threads=2) → 2 threads, passive.
    """
    free = max(0.0, cores - load)
    n = threads if threads is not None else max(1, min(cores, int(free + 0.5)))
    why = [f"{threads} threads requested"] if threads is not None else []
    busy = f"{measure} {load:.2f} on {cores} cores"
    if wait is not None:
        why.append(f"{wait} waiting requested")
    elif n > 1 and n <= free + 0.5:
        wait = "active"
        why.append("cores free")
    else:
        wait = "passive"
        why.append("one thread" if n == 1 else "cores shared")
    return Choice(n, wait, "; ".join(why) + f": {busy}", round(load, 2), cores)


SAMPLE_SECONDS = 0.2  # how long `busy_cores` watches the machine at start-up


def _cpu_times(stat: str) -> tuple[int, int]:
    """(busy, total) clock ticks of all CPUs from the text of /proc/stat (its first, aggregate `cpu` line).

    Fields (proc(5)): user nice system idle iowait irq softirq steal guest guest_nice; idle and iowait are
    not busy, and guest time is already counted in user time.
    """
    f = [int(x) for x in stat.split("\n", 1)[0].split()[1:9]]
    total = sum(f)
    return total - f[3] - f[4], total


def busy_cores(seconds: float = SAMPLE_SECONDS, read=None) -> float | None:
    """How many cores other processes keep busy now: CPU time used while this process sleeps `seconds`,
    from two readings of /proc/stat. None where it cannot be read (not Linux).

    Why not the load average alone: it follows the last minute, so a job that has just ended (a set-up, a
    previous benchmark) still counts, and the tool would run on one sleeping thread on an idle machine.
    """
    import time
    read = read or (lambda: Path("/proc/stat").read_text())
    try:
        first = read()
        b0, t0 = _cpu_times(first)
        time.sleep(seconds)
        b1, t1 = _cpu_times(read())
    except (OSError, ValueError, IndexError):
        return None
    if t1 <= t0:
        return None
    n = len([ln for ln in first.splitlines() if re.match(r"cpu\d+ ", ln)]) or os.cpu_count() or 1
    return n * (b1 - b0) / (t1 - t0)


def _cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _argv_spec(argv: list[str]) -> str | None:
    """The value of the last `--threads SPEC` or `--threads=SPEC` in argv, or None."""
    spec = None
    for i, a in enumerate(argv):
        if a == "--threads" and i + 1 < len(argv):
            spec = argv[i + 1]
        elif a.startswith("--threads="):
            spec = a.split("=", 1)[1]
    return spec


_CHOICE: Choice | None = None


def configure(argv: list[str] | None = None, environ=os.environ) -> Choice:
    """Decide (see `decide`) and set OMP_WAIT_POLICY and OMP_NUM_THREADS in `environ` before torch starts.

    A bad SPEC is left to the command's own option check (a usage error there); here it counts as `auto`.
    """
    global _CHOICE
    threads, wait = None, None
    try:
        threads, wait = parse_spec(_argv_spec(argv or []) or environ.get(ENV) or "auto")
    except CompressError:
        pass
    if threads is None and environ.get("OMP_NUM_THREADS", "").isdigit() and int(environ["OMP_NUM_THREADS"]) > 0:
        threads = int(environ["OMP_NUM_THREADS"])
    if wait is None and environ.get("OMP_WAIT_POLICY", "").lower() in WAIT_POLICIES:
        wait = environ["OMP_WAIT_POLICY"].lower()
    load = None
    if threads is None or wait is None:  # something to decide: look at what the machine does now
        load = busy_cores()
    if load is None:
        _CHOICE = decide(os.getloadavg()[0], _cores(), threads, wait, "load average")
    else:
        _CHOICE = decide(load, _cores(), threads, wait, "load")
    environ["OMP_WAIT_POLICY"] = _CHOICE.wait.upper()
    environ["OMP_NUM_THREADS"] = str(_CHOICE.threads)
    return _CHOICE


def current() -> Choice:
    """The choice in force: the one `configure` made, unless the thread count changed since (library use)."""
    import torch
    n = torch.get_num_threads()
    if _CHOICE is not None and _CHOICE.threads == n:
        return _CHOICE
    wait = os.environ.get("OMP_WAIT_POLICY", "").lower()
    return Choice(n, wait if wait in WAIT_POLICIES else "default", "set outside the start-up choice",
                  round(os.getloadavg()[0], 2), _cores())
