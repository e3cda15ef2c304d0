"""Inputs shared by tests/test_heads.py and tests/test_report.py (not collected by pytest).

* ``random_gpt2``: a small random GPT-2-layout checkpoint (from tests/small_checkpoint.py).
* ``demo_scan``: the invented demo model, scanned once per test session over the planted
  writers and the layers of the planted responders, for the recovery tests.
"""

from __future__ import annotations

import atexit
import functools
import shutil
import tempfile
from pathlib import Path


from .small_checkpoint import random_gpt2  # noqa: F401  (re-exported for test_heads, test_report)


def planted_selection() -> tuple[str, str]:
    """(--writers, --responders) covering every planted circuit: the planted writer heads (and
    every other planted head of layer 1), and every head of the planted responders' layers."""
    from composition.demo import PLANTED_CIRCUITS, PLANTED_HEADS

    writers = sorted({c[0] for c in PLANTED_CIRCUITS.values()} | {h for h in PLANTED_HEADS if h[0] == 1})
    layers = sorted({c[1][0] for c in PLANTED_CIRCUITS.values()})
    return ",".join(f"{l}.{h}" for l, h in writers), ",".join(str(l) for l in layers)


@functools.lru_cache(maxsize=None)
def demo_scan() -> Path:
    """Directory holding ``model/`` (the demo checkpoint) and ``scan.h5`` (with /heads)."""
    from composition.demo import build_demo
    from composition.run.scan import ScanOptions, run_scan

    root = Path(tempfile.mkdtemp(prefix="composition-demo-scan-"))
    atexit.register(shutil.rmtree, root, True)
    model = build_demo(root / "model")
    writers, responders = planted_selection()
    run_scan(model, root / "scan.h5", ScanOptions(writers=writers, responders=responders))
    return root
