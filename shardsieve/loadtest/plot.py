"""The optional figure: probes per lookup (measured vs predicted) and latency over the run.

matplotlib is an optional extra (`pip install 'shardsieve[plot]'`); without it `draw` raises a
RuntimeError that says how to install it.
"""

from __future__ import annotations

import importlib.util
import os
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np


def latency_over_time(times_s: Sequence[float], latency_ms: Sequence[float], bucket_s: float = 1.0
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-bucket (start, p50, p99) of latency; empty buckets are skipped."""
    t = np.asarray(times_s, dtype=float)
    lat = np.asarray(latency_ms, dtype=float)
    if t.size == 0:
        return np.empty(0), np.empty(0), np.empty(0)
    buckets = np.floor(t / bucket_s).astype(int)
    starts, p50, p99 = [], [], []
    for b in np.unique(buckets):
        sel = lat[buckets == b]
        starts.append(b * bucket_s)
        p50.append(float(np.percentile(sel, 50)))
        p99.append(float(np.percentile(sel, 99)))
    return np.array(starts), np.array(p50), np.array(p99)


def check_target(path: str | Path) -> Path:
    """Refuse a plot path that cannot be written, before a run spends minutes: its folder must
    exist (it is never created silently: a typo in it would hide the plot) and be writable, the
    path must not be a folder, and matplotlib must be installed. ValueError says which."""
    path = Path(path)
    parent = path.parent if str(path.parent) else Path(".")
    if path.is_dir():
        raise ValueError(f"--plot {path} is a folder; give a file name such as {path / 'report.png'}")
    if not parent.is_dir():
        raise ValueError(f"--plot {path}: the folder {parent} does not exist; create it or choose another path")
    if not os.access(parent, os.W_OK | os.X_OK) or (path.exists() and not os.access(path, os.W_OK)):
        raise ValueError(f"--plot {path}: not writable by this user; choose another path")
    if importlib.util.find_spec("matplotlib") is None:
        raise ValueError("--plot needs matplotlib: pip install 'shardsieve[plot]'")
    return path


def draw(path: str | Path, report: Mapping[str, Any], times_s: Sequence[float],
         latency_ms: Sequence[float]) -> Path:
    """Write a two-panel PNG and return its path."""
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise RuntimeError("--plot needs matplotlib: pip install 'shardsieve[plot]'") from None
    path = Path(path)
    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.2))
    labels = ["existing keys", "absent keys"]
    measured = [report.get("probes_per_hit") or 0.0, report.get("probes_per_miss") or 0.0]
    predicted = [report["predicted_probes_per_hit"], report["predicted_probes_per_miss"]]
    x = np.arange(2)
    ax1.bar(x - 0.2, measured, 0.4, label="measured")
    ax1.bar(x + 0.2, predicted, 0.4, label="predicted from filters")
    iv = report.get("interval", {})
    for i, side in enumerate(("hit", "miss")):
        part = iv.get(side) or {}
        if part.get("low") is not None:
            # The interval is built around the distinct-key prediction (repeated reads of a popular
            # key are not independent trials), which can differ from the popularity-weighted bar.
            centre = part.get("predicted", predicted[i])
            below, above = max(0.0, centre - part["low"]), max(0.0, part["high"] - centre)
            ax1.errorbar([i + 0.2], [centre], yerr=[[below], [above]], fmt="none", ecolor="black", capsize=4)
    ax1.axhline(report["nodes"], linestyle=":", color="grey", label=f"full fan-out ({report['nodes']} nodes)")
    ax1.set_xticks(x, labels)
    ax1.set_ylabel("probes per lookup")
    ax1.set_title(f"Probes per lookup (avoided fan-out {report['avoided_fanout']:.1%})")
    ax1.legend(fontsize=8)
    starts, p50, p99 = latency_over_time(times_s, latency_ms)
    ax2.plot(starts, p50, marker=".", label="p50")
    ax2.plot(starts, p99, marker=".", label="p99")
    ax2.set_xlabel("seconds into the run")
    ax2.set_ylabel("latency (ms)")
    ax2.set_title("Lookup latency over the run")
    ax2.legend(fontsize=8)
    fig.tight_layout()
    try:
        fig.savefig(path, dpi=110)
    except OSError as exc:
        raise RuntimeError(f"could not write the plot to {path}: {exc.strerror or exc}") from None
    finally:
        plt.close(fig)
    return path
