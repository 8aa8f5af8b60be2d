"""What the benchmark scripts share: timing, rows of ratios, peak memory, machine facts."""

from __future__ import annotations

import os
import platform
import statistics
import threading
import time


def timed(fn, repeat: int = 3, warm: bool = True, pick=statistics.median) -> float:
    """``pick`` (median, or min) of the seconds of ``repeat`` calls, after one untimed call
    (compiles, first touch)."""
    if warm:
        fn()
    times = []
    for _ in range(max(1, repeat)):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return pick(times)


def in_turn(fn, base, repeat: int = 3, warm: bool = True, pick=statistics.median) -> tuple[float, float]:
    """``pick`` (median, or min) of the seconds of ``fn`` and of ``base``, timed alternately.

    Run in turn, a change in machine load hits both sides alike. ``warm``: one
    untimed call of each first (compiles, first touch of memory).
    """
    if warm:
        fn()
        base()
    a, b = [], []
    for _ in range(max(1, repeat)):
        for f, out in ((fn, a), (base, b)):
            t = time.perf_counter()
            f()
            out.append(time.perf_counter() - t)
    return pick(a), pick(b)


def row(measurement, seconds, baseline, baseline_seconds, target: str = "", note: str = "") -> dict:
    """One line of a table: ours against a baseline measured in the same run.

    ``target`` is ``"<= 1.5"`` (ratio at most) or ``">= 20x faster"`` (the
    baseline at least that many times slower); ``met`` says whether it holds.
    """
    ratio = seconds / baseline_seconds if baseline_seconds else float("nan")
    return {"measurement": measurement, "seconds": float(seconds), "baseline": baseline,
            "baseline_seconds": float(baseline_seconds), "ratio": ratio, "target": target,
            "met": meets(ratio, target), "note": note}


def meets(ratio: float, target: str):
    """True/False for a target like ``<= 1.3`` or ``>= 20x faster``; None when there is none."""
    t = (target or "").strip()
    if not t:
        return None
    try:
        if t.startswith("<="):
            return ratio <= float(t[2:].split()[0])
        if t.startswith(">="):
            factor = float(t[2:].split()[0].rstrip("x×"))
            return ratio <= 1.0 / factor
    except ValueError:
        return None
    return None


class PeakRSS:
    """Peak resident memory of this process and its children, sampled in the background.

    Children matter: a process-based dask cluster does its reading in worker
    processes, whose memory this process's own peak would not show.
    """

    def __init__(self, interval: float = 0.02):
        import psutil
        self._proc = psutil.Process()
        self.interval = interval
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _sample(self) -> int:
        import psutil
        total = 0
        for p in [self._proc, *self._proc.children(recursive=True)]:
            try:
                total += p.memory_info().rss
            except psutil.Error:
                pass
        return total

    def _run(self):
        while not self._stop.is_set():
            self.peak = max(self.peak, self._sample())
            self._stop.wait(self.interval)

    def __enter__(self):
        self.peak = self._sample()
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, self._sample())


def machine_facts() -> dict:
    import datashader
    import numpy
    import pandas
    import psutil
    cpu = platform.processor() or ""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        import dask
        dask_v = dask.__version__
    except ImportError:
        dask_v = "-"
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return {"cpu": cpu or "unknown", "cores": os.cpu_count(),
            "ram_gib": round(psutil.virtual_memory().total / 2**30, 1),
            "python": platform.python_version(), "numpy": numpy.__version__,
            "pandas": pandas.__version__, "datashader": datashader.__version__, "dask": dask_v,
            "load_average": " ".join(f"{v:.1f}" for v in load)}


def format_table(rows: list[dict]) -> list[str]:
    """A markdown table of rows (ratio < 1: faster than the baseline)."""
    out = ["| measurement | seconds | baseline | seconds | ratio | target | met |",
           "|---|---:|---|---:|---:|---|---|"]
    for r in rows:
        met = {True: "yes", False: "**no**", None: ""}[r.get("met")]
        note = f" ({r['note']})" if r.get("note") else ""
        out.append(f"| {r['measurement']}{note} | {r['seconds']:.3f} | {r['baseline']} | "
                   f"{r['baseline_seconds']:.3f} | {r['ratio']:.2f} | {r.get('target', '')} | {met} |")
    return out
