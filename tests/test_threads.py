"""The start-up choice of threads and OpenMP waiting (attncompress.threads)."""
import os
import subprocess
import sys

import pytest

from attncompress import threads
from attncompress.errors import CompressError


@pytest.mark.parametrize("load, cores, expect", [
    (0.0, 2, (2, "active")), (0.4, 2, (2, "active")),  # idle: every core, spinning
    (0.6, 2, (1, "passive")), (1.0, 2, (1, "passive")), (2.9, 2, (1, "passive")),  # busy: what is free, sleeping
    (1.2, 4, (3, "active")), (9.0, 8, (1, "passive")), (0.0, 1, (1, "passive")),
])
def test_decide_uses_the_free_cores(load, cores, expect):
    # common practice, no source: spin only when each thread has a core to itself; one thread never waits
    c = threads.decide(load, cores)
    assert (c.threads, c.wait) == expect
    assert c.load == load and c.cores == cores and f"load {load:.2f} on {cores} cores" in c.reason


def test_decide_keeps_what_is_requested():
    assert (threads.decide(2.9, 2, threads=2).threads, threads.decide(2.9, 2, threads=2).wait) == (2, "passive")
    assert threads.decide(2.9, 2, threads=2, wait="active").wait == "active"
    assert threads.decide(0.0, 2, wait="passive").wait == "passive"
    assert "requested" in threads.decide(0.0, 2, threads=1).reason


@pytest.mark.parametrize("spec, expect", [("auto", (None, None)), ("3", (3, None)), ("2:active", (2, "active")),
                                          (" 1:PASSIVE ", (1, "passive"))])
def test_parse_spec(spec, expect):
    assert threads.parse_spec(spec) == expect


@pytest.mark.parametrize("spec", ["0", "two", "2:spin", "-1", ""])
def test_parse_spec_refuses(spec):
    with pytest.raises(CompressError, match=r"^--threads: expected auto, a thread count N ≥ 1, or N:active / N:passive; got"):
        threads.parse_spec(spec)


def test_configure_order_of_overrides(monkeypatch):
    monkeypatch.setattr(threads, "_CHOICE", None)
    env = {"ATTNCOMPRESS_THREADS": "1", "OMP_WAIT_POLICY": "passive"}
    c = threads.configure(["attncompress", "compare", "--threads", "2:active"], env)  # the option wins
    assert (c.threads, c.wait) == (2, "active") and env["OMP_WAIT_POLICY"] == "ACTIVE" and env["OMP_NUM_THREADS"] == "2"
    env = {"ATTNCOMPRESS_THREADS": "2", "OMP_WAIT_POLICY": "passive"}
    c = threads.configure(["attncompress", "compare"], env)  # then the variable, with the user's own wait policy
    assert (c.threads, c.wait) == (2, "passive") and env["OMP_WAIT_POLICY"] == "PASSIVE"
    env = {"OMP_NUM_THREADS": "1"}
    assert threads.configure(["x", "--threads=bad"], env).threads == 1  # a bad spec is left to the option check


def test_cli_sets_the_choice_before_torch_starts():
    # the OpenMP runtime reads OMP_WAIT_POLICY when torch is imported (libgomp documentation): check in a fresh
    # process that the command line's start-up choice is what torch runs with
    code = ("import sys; sys.argv = ['attncompress', 'compare', '--threads', '1:passive']; import attncompress.cli; "
            "import os, torch; print(torch.get_num_threads(), os.environ['OMP_WAIT_POLICY'])")
    env = {k: v for k, v in os.environ.items() if k not in ("OMP_NUM_THREADS", "OMP_WAIT_POLICY", threads.ENV)}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True).stdout
    assert out.split() == ["1", "PASSIVE"]


def _stat(busy: int, idle: int, cpus: int = 2) -> str:
    # the layout of /proc/stat (proc(5)): user nice system idle iowait irq softirq steal guest guest_nice
    lines = [f"cpu  {busy} 0 0 {idle} 0 0 0 0 0 0"] + [f"cpu{i} 0 0 0 0 0 0 0 0 0 0" for i in range(cpus)]
    return "\n".join(lines + ["intr 1 2 3", "ctxt 5"]) + "\n"


def test_busy_cores_counts_the_ticks_used_while_it_sleeps():
    # arithmetic on proc(5)'s fields: 30 busy of 200 ticks over 2 CPUs in the window is 0.3 cores busy
    readings = iter([_stat(1000, 5000), _stat(1030, 5170)])
    assert threads.busy_cores(0.0, read=lambda: next(readings)) == pytest.approx(0.3)
    readings = iter([_stat(1000, 5000), _stat(1200, 5000)])  # every tick busy: both cores
    assert threads.busy_cores(0.0, read=lambda: next(readings)) == pytest.approx(2.0)
    assert threads.busy_cores(0.0, read=lambda: "garbage") is None


def test_configure_decides_from_what_is_busy_now_not_the_load_average(monkeypatch):
    monkeypatch.setattr(threads, "_CHOICE", None)
    monkeypatch.setattr(threads, "_cores", lambda: 2)
    monkeypatch.setattr(os, "getloadavg", lambda: (1.9, 1.5, 1.0))  # a job that just ended
    monkeypatch.setattr(threads, "busy_cores", lambda: 0.1)  # the machine now
    c = threads.configure(["attncompress", "compare"], {})
    assert (c.threads, c.wait) == (2, "active") and "load 0.10 on 2 cores" in c.reason
    monkeypatch.setattr(threads, "busy_cores", lambda: None)  # nothing to read: the load average
    c = threads.configure(["attncompress", "compare"], {})
    assert (c.threads, c.wait) == (1, "passive") and "load average 1.90" in c.reason
