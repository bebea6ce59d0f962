"""Where every benchmark writes its figures: benchmarks/results/NAME.json, with how and where they were measured."""
import json
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

import torch

RESULTS = Path(__file__).resolve().parent / "results"


def _commit() -> str:
    try:
        out = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=RESULTS.parent, capture_output=True,
                             text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=RESULTS.parent,
                               capture_output=True, text=True).stdout.strip()
        return out + ("+changes" if dirty else "")
    except (OSError, subprocess.CalledProcessError):
        return "unknown"


def machine() -> dict:
    """The facts a reader needs to judge a timing: cores, threads, load average now, Python and torch."""
    return {"cores": os.cpu_count(), "torch_threads": torch.get_num_threads(), "load_average": os.getloadavg(),
            "python": platform.python_version(), "torch": torch.__version__, "platform": platform.platform()}


def write_results(name: str, figures: dict, started: float | None = None) -> Path:
    """Write benchmarks/results/NAME.json: the command, the commit, the machine (with its load) and the figures."""
    RESULTS.mkdir(exist_ok=True)
    out = {"command": " ".join([Path(sys.executable).name, *sys.argv]), "commit": _commit(),
           "date": time.strftime("%Y-%m-%d %H:%M:%S %Z"), "machine": machine(), "figures": figures}
    if started is not None:
        out["seconds"] = round(time.perf_counter() - started, 1)
    path = RESULTS / f"{name}.json"
    path.write_text(json.dumps(out, indent=2) + "\n", encoding="utf-8")
    return path
