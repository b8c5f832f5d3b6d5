"""Facts every benchmark prints at the top of its output: the checkout, the CPU, the load.

Imported by the scripts in this folder (run as ``python benchmarks/<script>.py``, so this
folder is on sys.path).
"""
from __future__ import annotations

import contextlib
import os
import platform
import subprocess
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def tree_state() -> str:
    """git commit of the checkout, and whether metricc/ or templates/ have local changes."""
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                              capture_output=True, text=True, timeout=30).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "metricc", "templates"],
                               cwd=ROOT, capture_output=True, text=True, timeout=30).stdout
    except (OSError, subprocess.SubprocessError):
        return "not a git checkout"
    if not head:
        return "not a git checkout"
    return head + (" + uncommitted changes in metricc/ or templates/" if dirty.strip() else "")


def cpu_model() -> str:
    with contextlib.suppress(OSError):
        for line in open("/proc/cpuinfo", encoding="utf-8"):
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    return platform.processor() or platform.machine()


def load_average() -> str:
    try:
        return "load average %.2f %.2f %.2f" % os.getloadavg()
    except (OSError, AttributeError):
        return "load average unknown"
