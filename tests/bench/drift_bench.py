"""Drift benchmark: cost per update, false alarms in control, and delay to an alarm after a
1 s.d. step, for the service's detectors (page_hinkley, cusum, ewma at their defaults) next
to river's ADWIN and PageHinkley; then the channel as a whole through the HTTP API
(``channel_drift.py``), where the learner, the gate and the watch on the reference curve act
together.

Every stream is seeded standard normal z (the standardised residuals the detectors see).

* cost: ns per update of each detector, from a Python loop of single calls (ours go through
  numba's dispatcher each call) and, for ours, the compiled batch path (``first_reach`` over
  one array, the way the service's compiled learning loop calls ``detector_update``);
* in control: alarms per 10,000 samples over many seeded streams; our detectors latch an
  alarm in the service, so here they restart after each alarm (``run_lengths``: statistics
  and state cleared, Page-Hinkley's running mean kept); river's reset themselves after
  ``drift_detected``; our warnings are counted the same way (runs to a warning, restart);
* step: the same seeded streams for every detector, z + 1 (sign alternating by stream) from
  sample ``STEP_AT`` on; an alarm before the step counts as a false alarm and the stream
  is left out of the delays; delay = samples from the step to the alarm, the first shifted
  sample counting 1.

river's rows: its defaults (the main rows; z fed raw, as to ours); ADWIN testing every sample
(``clock=1``) as ours do; Page-Hinkley with our allowance (0.5), alarm threshold (11), two sides
and no fading (``alpha=1``); its mean stays the mean since its last reset, and it has no clip.

Run on its own: ``python -m tests.bench.drift_bench [--size smoke|quick|full] [--out DIR]``.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import numpy as np
from curvekeeper.core.drift import (
    DETECTOR_DEFAULTS,
    detector_params,
    detector_update,
    first_reach,
    new_detector_state,
    run_lengths,
)

from . import channel_drift
from .report import Table, figure, percentile, save, section_main, timed

STEP_AT = 1000  # index of the first shifted sample in a step stream
WITHIN = 1000  # "detected within" this many samples after the step
SEED = 20240601

# per size: in-control streams for ours (count, length), how many of them each of river's detectors
# also runs (first river_len samples of each; in the order of river_detectors(): river's detectors are
# slower per sample and their alarm rates differ), how many count our warnings, step streams, samples
# after the step, timed calls, repeats
PLAN: dict[str, dict[str, Any]] = {
    "smoke": {"ic_streams": 2, "ic_len": 20_000, "river_streams": (1, 1, 1, 1), "river_len": 5_000,
              "warn_streams": 1,
              "step_streams": 20, "horizon": 500, "calls": 2_000, "repeats": 1},
    "quick": {"ic_streams": 20, "ic_len": 1_000_000, "river_streams": (4, 2, 1, 2),
              "river_len": 1_000_000, "warn_streams": 3,
              "step_streams": 750, "horizon": 4_000, "calls": 50_000, "repeats": 3},
    "full": {"ic_streams": 80, "ic_len": 1_000_000, "river_streams": (15, 6, 2, 8),
             "river_len": 1_000_000, "warn_streams": 10,
             "step_streams": 3_000, "horizon": 4_000, "calls": 200_000, "repeats": 5},
}

# what the module docstring of curvekeeper.core.drift gives at the defaults: in-control samples to an
# alarm and to a warning, and samples to an alarm after a sustained 1 s.d. shift
DOCUMENTED = {"page_hinkley": (162_000, 1_000, 24.4), "cusum": (192_000, 1_280, 22.4),
              "ewma": (207_000, 1_380, 23.8)}


def stream(kind: str, i: int, n: int) -> np.ndarray:
    """Seeded standard normal stream number ``i`` of family ``kind`` ("ic" or "step"), shape (n,)."""
    return np.random.default_rng([SEED, 0 if kind == "ic" else 1, i]).standard_normal(n)


def ours() -> dict[str, tuple[int, np.ndarray]]:
    """(kind code, dp) of each of our detectors at its defaults, compiled and warmed."""
    out = {}
    z = np.zeros(16)
    for name, defaults in DETECTOR_DEFAULTS.items():
        kind, dp = detector_params({"detector": name, "tolerance": None, **defaults})
        first_reach(kind, dp, new_detector_state(), z, 3)
        run_lengths(kind, dp, z, 2, 4)
        detector_update(kind, dp, new_detector_state(), 0.0)
        out[name] = (kind, dp)
    return out


def river_detectors() -> dict[str, Any]:
    """name -> factory of river's detectors (empty without river): defaults; ADWIN testing at every
    sample as ours do; Page-Hinkley with our default allowance, alarm threshold and two sides, without
    fading."""
    try:
        from river import drift
    except ImportError:
        return {}
    ph = drift.PageHinkley()
    adwin = drift.ADWIN()
    return {
        f"river ADWIN (delta {adwin.delta:g}, clock {adwin.clock})": drift.ADWIN,
        f"river ADWIN clock 1 (delta {adwin.delta:g})": lambda: drift.ADWIN(clock=1),
        f"river PageHinkley (delta {ph.delta:g}, threshold {ph.threshold:g}, alpha {ph.alpha:g}, "
        f"mode {ph.mode})": drift.PageHinkley,
        "river PageHinkley matched (delta 0.5, threshold 11, alpha 1, mode both)":
            lambda: drift.PageHinkley(delta=0.5, threshold=11.0, alpha=1.0, mode="both"),
    }


def short(name: str) -> str:
    """A detector's label without its settings, for figures."""
    if name.startswith("river"):
        return name.split(" (")[0].replace("PageHinkley matched", "PageHinkley (matched)").replace(
            "ADWIN clock 1", "ADWIN (clock 1)")
    return name


# cost --------------------------------------------------------------------------------------------
def cost(det: dict[str, tuple[int, np.ndarray]], rivers: dict[str, Any], calls: int, repeats: int) -> Table:
    z = stream("ic", 0, max(calls, 1_000_000 if calls >= 50_000 else calls))
    zl = z[:calls].tolist()
    t = Table(f"Cost per update, ns (median of {repeats}; in-control z; {calls:,} Python calls, "
              f"{len(z):,} samples in one batch)", ["detector", "path", "ns/update", "x compiled ours"])
    rows: list[tuple[str, str, float]] = []

    def noop(x: float) -> float:
        return x

    def loop_noop() -> None:
        for x in zl:
            noop(x)

    rows.append(("(reference) no-op Python function", "Python loop of calls", timed(loop_noop, repeats) / calls))
    for name, (kind, dp) in det.items():
        def batch() -> None:
            first_reach(kind, dp, new_detector_state(), z, 3)  # level 3 is never reached: the whole array

        def singles() -> None:
            ds = new_detector_state()
            for x in zl:
                detector_update(kind, dp, ds, x)

        rows.append((name, "compiled batch (first_reach)", timed(batch, repeats) / len(z)))
        rows.append((name, "Python loop of detector_update", timed(singles, repeats) / calls))
    for name, factory in rivers.items():
        def river_loop() -> None:
            d = factory()
            for x in zl:
                d.update(x)

        rows.append((short(name), "Python loop of .update(x)", timed(river_loop, repeats) / calls))
    ref = float(np.median([r[2] for r in rows if r[1].startswith("compiled")]))
    for name, path, sec in rows:
        t.add(name, path, sec * 1e9, sec / ref)
    return t


# in control --------------------------------------------------------------------------------------
def poisson_ci(n: int, exposure: float) -> tuple[float, float]:
    """Exact 95% interval of a Poisson rate, events per unit of ``exposure``."""
    from scipy.stats import chi2

    lo = 0.0 if n == 0 else chi2.ppf(0.025, 2 * n) / 2
    hi = chi2.ppf(0.975, 2 * n + 2) / 2
    return float(lo / exposure), float(hi / exposure)


def river_alarms(factory: Any, zl: list[float]) -> int:
    """Drift flags of a river detector fed zl (it resets itself after each)."""
    d = factory()
    n = 0
    for x in zl:
        d.update(x)
        if d.drift_detected:
            n += 1
    return n


def in_control(det: dict[str, tuple[int, np.ndarray]], rivers: dict[str, Any], p: dict[str, Any]) -> dict[str, Any]:
    """Alarm (and, for ours, warning) counts and samples seen, per detector."""
    res: dict[str, dict[str, Any]] = {name: {"alarms": 0, "samples": 0, "warnings": 0, "warn_samples": 0,
                                             "streams": 0} for name in [*det, *rivers]}
    for i in range(p["ic_streams"]):
        z = stream("ic", i, p["ic_len"])
        for name, (kind, dp) in det.items():
            r = res[name]
            r["alarms"] += len(run_lengths(kind, dp, z, 2, len(z))[0])
            r["samples"] += len(z)
            r["streams"] += 1
            if i < p["warn_streams"]:
                r["warnings"] += len(run_lengths(kind, dp, z, 1, len(z))[0])
                r["warn_samples"] += len(z)
        active = [(name, f) for (name, f), count in zip(rivers.items(), p["river_streams"], strict=False) if i < count]
        zl = z[:p["river_len"]].tolist() if active else []
        for name, factory in active:
            r = res[name]
            r["alarms"] += river_alarms(factory, zl)
            r["samples"] += len(zl)
            r["streams"] += 1
    return res


def in_control_table(res: dict[str, Any]) -> Table:
    t = Table("In control: alarms per 10,000 samples (ours restart after each alarm; river resets itself); "
              "ARL = samples / alarms",
              ["detector", "streams", "samples", "alarms", "per 10k", "95% CI", "ARL", "documented ARL",
               "warnings", "warnings per 10k", "ARL to warning", "documented"])
    for name, r in res.items():
        rate = 1e4 * r["alarms"] / r["samples"]
        lo, hi = poisson_ci(r["alarms"], r["samples"] / 1e4)
        arl: Any = r["samples"] / r["alarms"] if r["alarms"] else "-"
        doc = DOCUMENTED.get(name)
        if doc:
            wrate = 1e4 * r["warnings"] / r["warn_samples"]
            warl = r["warn_samples"] / r["warnings"] if r["warnings"] else "-"
            wcells: list[Any] = [r["warnings"], wrate, warl, doc[1]]
        else:
            wcells = ["-", "-", "-", "-"]
        t.add(short(name) if not doc else name, r["streams"], r["samples"], r["alarms"], rate,
              f"{lo:.3g}-{hi:.3g}", arl, doc[0] if doc else "-", *wcells)
        r.update(per_10k=rate, ci=[lo, hi])
    return t


# step --------------------------------------------------------------------------------------------
def river_first(factory: Any, zl: list[float]) -> int:
    """Index of the first drift flag of a fresh river detector on zl, or -1."""
    d = factory()
    for i, x in enumerate(zl):
        d.update(x)
        if d.drift_detected:
            return i
    return -1


def step(det: dict[str, tuple[int, np.ndarray]], rivers: dict[str, Any], p: dict[str, Any]) -> dict[str, np.ndarray]:
    """First alarm index per detector and step stream, shape (step_streams,), -1 when none."""
    n = p["step_streams"]
    first = {name: np.full(n, -1, dtype=np.int64) for name in [*det, *rivers]}
    for i in range(n):
        z = stream("step", i, STEP_AT + p["horizon"])
        z[STEP_AT:] += 1.0 if i % 2 == 0 else -1.0
        for name, (kind, dp) in det.items():
            first[name][i] = first_reach(kind, dp, new_detector_state(), z, 2)
        zl = z.tolist()
        for name, factory in rivers.items():
            first[name][i] = river_first(factory, zl)
    return first


def step_table(first: dict[str, np.ndarray], p: dict[str, Any]) -> tuple[Table, dict[str, np.ndarray]]:
    within = min(WITHIN, p["horizon"])
    t = Table(f"1 s.d. step at sample {STEP_AT:,} (sign alternating), {p['step_streams']:,} streams, "
              f"{p['horizon']:,} samples after it; delays over streams without an alarm before the step",
              ["detector", "alarm before step", "detected", f"within {within:,}", "mean delay", "median",
               "p10", "p90", "documented"])
    delays = {}
    for name, f in first.items():
        pre = int(np.sum((f >= 0) & (f < STEP_AT)))
        clean = f[(f < 0) | (f >= STEP_AT)]
        d = clean[clean >= STEP_AT] - STEP_AT + 1
        delays[name] = d
        m = len(clean)
        doc = DOCUMENTED.get(name)
        stats: list[Any] = ["-"] * 4
        if len(d):
            stats = [float(np.mean(d)), float(np.median(d)), percentile(d, 10), percentile(d, 90)]
        t.add(name if doc else short(name), f"{pre:,} ({100 * pre / len(f):.1f}%)", f"{len(d):,}/{m:,}",
              f"{100 * np.sum(d <= within) / max(m, 1):.1f}%", *stats, doc[2] if doc else "-")
    return t, delays


# figures -----------------------------------------------------------------------------------------
def fig_false_alarms(res: dict[str, Any], out: Path) -> str:
    names = list(res)
    fig, ax = figure("In control: false alarms per 10,000 samples (whiskers: exact 95% CI)", "",
                     "per 10,000 samples (log)")
    fig.set_size_inches(8.5, 4.8)
    ax.set_yscale("log")
    floor = min(1e4 / r["samples"] for r in res.values()) / 2  # where a detector with no alarm is drawn
    x = np.arange(len(names))
    top = floor
    for xi, n in zip(x, names, strict=True):
        r = res[n]
        rate, (lo, hi) = r["per_10k"], r["ci"]
        ours_ = n in DOCUMENTED
        ax.bar(xi - 0.2, max(rate, floor), 0.4, color="tab:blue" if ours_ else "tab:orange",
               hatch="//" if rate == 0 else None, alpha=1.0 if rate else 0.4)
        ax.errorbar(xi - 0.2, max(rate, floor), yerr=[[max(rate, floor) - max(lo, floor)], [hi - max(rate, floor)]],
                    color="black", capsize=3, lw=1)
        ax.annotate(f"{rate:.2g}\n{r['alarms']:,} in\n{r['samples'] / 1e6:g}M", (xi - 0.2, hi), ha="center",
                    va="bottom", fontsize=7)
        top = max(top, hi)
        if ours_ and r["warn_samples"]:
            ax.bar(xi + 0.2, 1e4 * r["warnings"] / r["warn_samples"], 0.4, color="tab:blue", alpha=0.35)
            top = max(top, 1e4 * r["warnings"] / r["warn_samples"])
    labels = [short(n).replace("river ", "river\n").replace("PageHinkley (matched)", "PageHinkley\nmatched")
              for n in names]
    ax.set_xticks(x, labels, fontsize=8)
    ax.set_ylim(floor / 2, top * 20)
    ax.axhline(floor, color="grey", lw=0.8, ls=":")
    from matplotlib.patches import Patch

    ax.legend(handles=[Patch(color="tab:blue", label="alarms, ours"), Patch(color="tab:orange", label="alarms, river"),
                       Patch(color="tab:blue", alpha=0.35, label="warnings, ours"),
                       Patch(facecolor="white", edgecolor="black", hatch="//", label="no alarm (drawn at floor)")],
              fontsize=8, loc="upper left", ncol=4)
    return save(fig, out, "drift_false_alarms")


def fig_delays(delays: dict[str, np.ndarray], first: dict[str, np.ndarray], p: dict[str, Any], out: Path) -> str:
    fig, ax = figure(f"Delay to an alarm after a 1 s.d. step ({p['step_streams']:,} streams)",
                     "samples after the step", "fraction of streams with an alarm by then")
    ax.set_xscale("log")
    for name, d in delays.items():
        f = first[name]
        m = int(np.sum((f < 0) | (f >= STEP_AT)))
        if not m:
            continue
        xs = np.sort(d)
        ax.step(np.r_[1, xs, p["horizon"]], np.r_[0, np.arange(1, len(xs) + 1), len(xs)] / m, where="post",
                label=short(name), ls="-" if name in DOCUMENTED else "--", lw=2.2 if name in DOCUMENTED else 1.3)
    longest = max((int(d.max()) for d in delays.values() if len(d)), default=p["horizon"])
    ax.set_xlim(1, min(p["horizon"], 2 * longest))
    ax.set_ylim(0, 1.02)
    ax.legend(fontsize=8, loc="upper left")
    return save(fig, out, "drift_delay_ecdf")


# -------------------------------------------------------------------------------------------------
def run(size: str, out: Path) -> dict[str, Any]:
    """Print the drift tables, write the figures into ``out``; returns the section's dict."""
    p = PLAN[size]
    det = ours()
    rivers = river_detectors()
    t0 = time.perf_counter()
    t_cost = cost(det, rivers, p["calls"], p["repeats"])
    t_cost.show()
    print(f"  ({time.perf_counter() - t0:.1f} s)", flush=True)
    t0 = time.perf_counter()
    res = in_control(det, rivers, p)
    t_ic = in_control_table(res)
    t_ic.show()
    print(f"  ({time.perf_counter() - t0:.1f} s)", flush=True)
    t0 = time.perf_counter()
    first = step(det, rivers, p)
    t_step, delays = step_table(first, p)
    t_step.show()
    print(f"  ({time.perf_counter() - t0:.1f} s)", flush=True)
    figures = [fig_false_alarms(res, out), fig_delays(delays, first, p, out)]
    t0 = time.perf_counter()
    t_channel, channel = channel_drift.run(size, SEED)
    t_channel.show()
    print(f"  ({time.perf_counter() - t0:.1f} s)", flush=True)

    ns = {(r[0], r[1].startswith("compiled")): r[2] for r in t_cost.rows}
    headline = {}
    for name in res:
        key = name if name in DOCUMENTED else short(name)
        d = delays[name]
        h = {"false_alarms_per_10k": res[name]["per_10k"], "alarms": res[name]["alarms"],
             "samples": res[name]["samples"],
             "mean_delay": float(np.mean(d)) if len(d) else None,
             "median_delay": float(np.median(d)) if len(d) else None}
        if name in DOCUMENTED:
            h["ns_per_update"] = ns[(name, True)]
            h["ns_per_python_call"] = ns[(name, False)]
            h["warnings_per_10k"] = 1e4 * res[name]["warnings"] / res[name]["warn_samples"]
        else:
            h["ns_per_update"] = ns[(key, False)]
        headline[key] = h
    return {"tables": [t.to_json() for t in (t_cost, t_ic, t_step, t_channel)], "figures": figures,
            "headline": headline, "channel": channel}


if __name__ == "__main__":
    section_main(run, __doc__)
