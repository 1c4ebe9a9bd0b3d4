"""Cost benchmark: how learning and calibration costs grow with the basis size M and the
number of samples N.

- Per-sample cost of one ``learn()`` call over a stream of fixed length, for ``sgd``
  (expected O(M)) and ``rls`` (expected O(M^2)). A poly basis allows at most degree 15
  (M = 16, service/curvekeeper/channel_config.py), so the curve is also measured with an rbf basis of M
  centres (no intercept), which allows M up to 64 (measured up to 64 in the full run); the
  power laws are fitted over all M and over M >= 8 (the per-sample cost includes a fixed
  overhead that flattens the small-M end), and as a + b M^p to separate the overhead.
- Cost of one closed-form fit (``fit_closed_form``, SVD, expected O(N M^2)) for N from
  1e3 to 1e6 and M from 2 to 32 (poly up to 16, rbf for 32).
- When to stream and when to calibrate in one go: N samples learned online against one
  closed-form fit over the same N.
- Fits run with numpy's BLAS limited to one thread (threadpoolctl): on two shared cores its
  default threads stall, by up to 20x on small fits; the last table measures that effect.

Run: ``python -m tests.bench.cost_bench [--size smoke|quick|full] [--out DIR]``.
The machine is shared and noisy: times are medians of repeats, in one run.
"""

from __future__ import annotations

import contextlib
import statistics
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
from curvekeeper.channel_config import channel_config
from curvekeeper.core import ChannelModel

from . import report
from .core_bench import Job, interleaved
from .report import Table


def model_of(body: dict[str, Any]) -> ChannelModel:
    """A fresh model for a channel body, validated as the service validates it."""
    return ChannelModel.from_config(channel_config(body))


LO, HI = 0.0, 100.0  # declared input range, raw units
MAX_POLY_M = 16  # degree 15 is the largest a poly basis allows
LARGE_M = 8  # the "large-M" part of the per-sample slope fit starts here
LARGE_N = 100_000  # the "large-N" part of the fit-cost slope starts here

PLAN: dict[str, dict[str, Any]] = {
    # n: stream length for per-sample costs; ms: basis sizes; reps: timing repeats;
    # fit_ns, fit_ms: closed-form grid; when: (N, M) pairs for the stream-or-calibrate table
    "smoke": {"n": 2_000, "ms": (2, 4, 8, 16, 24), "reps": 1, "fit_ns": (1_000, 10_000), "fit_ms": (2, 4, 16, 32),
              "fit_reps": 1, "when": ((1_000, 4), (10_000, 16)), "blas": ((1_000, 4),)},
    "quick": {"n": 25_000, "ms": (2, 3, 4, 6, 8, 11, 16, 24, 32, 48, 64), "reps": 5, "fit_ns": (1_000, 10_000, 100_000),
              "fit_ms": (2, 4, 8, 16, 32), "fit_reps": 3,
              "when": ((1_000, 4), (10_000, 4), (100_000, 4), (1_000, 16), (10_000, 16), (100_000, 16)),
              "blas": ((10_000, 4), (10_000, 16), (100_000, 16))},
    "full": {"n": 50_000, "ms": (2, 3, 4, 6, 8, 11, 16, 24, 32, 48, 64), "reps": 9,
             "fit_ns": (1_000, 10_000, 100_000, 1_000_000), "fit_ms": (2, 4, 8, 16, 32), "fit_reps": 3,
             "when": ((1_000, 4), (10_000, 4), (100_000, 4), (1_000_000, 4),
                      (1_000, 16), (10_000, 16), (100_000, 16), (1_000_000, 16)),
             "blas": ((10_000, 4), (10_000, 16), (100_000, 16), (1_000_000, 16))},
}
LEARNERS = {"sgd": {"kind": "sgd"}, "rls": {"kind": "rls"}}  # defaults: normalized schedule; forgetting 0.999


def stream(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Raw inputs x (n,) uniform over the range, references y (n,): a smooth curve plus noise."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(LO, HI, n)
    s = (x - LO) / (HI - LO) * 2.0 - 1.0
    return x, 1.0 + 0.5 * s - 0.2 * s**2 + 0.1 * s**3 + 0.03 * np.tanh(4.0 * s) + rng.normal(0.0, 0.01, n)


def basis(m: int, kind: str) -> dict[str, Any]:
    """A one-input basis with m terms: poly of degree m - 1, or rbf with m centres and no intercept."""
    if kind == "poly":
        return {"kind": "poly", "degree": m - 1}
    return {"kind": "rbf", "centers": m, "intercept": False}


def config(m: int, kind: str, learner: str) -> dict[str, Any]:
    return {"inputs": [{"name": "raw", "min": LO, "max": HI}], "basis": basis(m, kind), "learner": LEARNERS[learner]}


def new_model(cfg: dict[str, Any]) -> Callable[[], ChannelModel]:
    return lambda: model_of(cfg)


def blas_threads(cases: tuple[tuple[int, int], ...], x: np.ndarray, y: np.ndarray,
                 repeats: int) -> dict[tuple[int, int], tuple[float, float]]:
    """(N, M) -> median seconds of one closed-form fit over the first N samples with the BLAS
    at its default number of threads and limited to one, in alternating rounds."""
    from threadpoolctl import ThreadpoolController

    controller = ThreadpoolController()  # the BLAS numpy uses (OpenBLAS here)
    times: dict[tuple[int, int, bool], list[float]] = {(N, M, one): [] for N, M in cases for one in (False, True)}
    for _ in range(max(1, repeats)):
        for N, M in cases:
            for one in (False, True):
                m = model_of(config(M, "poly", "sgd"))
                with controller.limit(limits=1) if one else contextlib.nullcontext():
                    t0 = time.perf_counter()
                    m.fit_closed_form(x[:N], y[:N])
                    times[N, M, one].append(time.perf_counter() - t0)
    return {(N, M): (statistics.median(times[N, M, False]), statistics.median(times[N, M, True])) for N, M in cases}


def run(size: str, out: Path) -> dict[str, Any]:
    """Run the section at ``size``; figures into ``out``; returns tables, figures and headline."""
    p = PLAN[size]
    n = p["n"]
    x, y = stream(n)
    for learner in LEARNERS:  # compile or load the compiled loop
        model_of(config(4, "poly", learner)).learn(x[:10], y[:10])

    # per-sample learning cost against M --------------------------------------------------
    X = x.reshape(-1, 1)
    jobs: dict[Any, Job] = {}
    for M in p["ms"]:
        for kind in ("poly", "rbf"):
            for learner in LEARNERS:
                if kind == "poly" and M > MAX_POLY_M:
                    continue
                jobs[learner, kind, M] = (new_model(config(M, kind, learner)), lambda m: m.learn(x, y), p["reps"])
            if kind == "rbf" or M <= MAX_POLY_M:  # the basis expansion alone, part of every learn() call
                model = new_model(config(M, kind, "sgd"))
                jobs["expand", kind, M] = (lambda model=model: model().basis, lambda b: b.expand(X), p["reps"])
    per: dict[tuple[str, str], dict[int, float]] = {(lr, k): {} for lr in (*LEARNERS, "expand")
                                                    for k in ("poly", "rbf")}
    for (learner, kind, M), (sec, _) in interleaved(jobs).items():
        per[learner, kind][M] = sec / n * 1e6
    per_t = Table(f"Per-sample learning cost, us (one learn() call over {n:,} samples, median of {p['reps']}; "
                  f"poly only up to M = {MAX_POLY_M}); the basis expansion alone, part of it",
                  ["M", "sgd poly", "rls poly", "sgd rbf", "rls rbf", "rls / sgd (rbf)", "poly expansion",
                   "rbf expansion"])
    for M in p["ms"]:
        row = [per[lr, kind].get(M, "-") for kind in ("poly", "rbf") for lr in LEARNERS]
        per_t.add(M, *row, per["rls", "rbf"][M] / per["sgd", "rbf"][M], per["expand", "poly"].get(M, "-"),
                  per["expand", "rbf"][M])
    expansion = {k: per.pop(("expand", k)) for k in ("poly", "rbf")}

    slope_t = Table("Per-sample cost ~ M^k (log-log slopes), and ~ a + b M^p (least squares, p = 1 sgd, 2 rls)",
                    ["learner", "basis", "M range", "k, all M", f"k, M >= {LARGE_M}", "expected k", "a (us)",
                     "b (ns)"])
    slopes: dict[str, float] = {}
    for (learner, kind), d in per.items():
        ms = sorted(d)
        big = [m for m in ms if m >= LARGE_M]
        k_all = report.loglog_slope(ms, [d[m] for m in ms])
        k_big = report.loglog_slope(big, [d[m] for m in big]) if len(big) >= 2 else float("nan")
        power = 1 if learner == "sgd" else 2
        A = np.column_stack([np.ones(len(ms)), np.asarray(ms, float) ** power])
        a, b = np.linalg.lstsq(A, np.array([d[m] for m in ms]), rcond=None)[0]
        slopes[f"{learner}_{kind}_all"], slopes[f"{learner}_{kind}_large"] = k_all, k_big
        slopes[f"{learner}_{kind}_a"], slopes[f"{learner}_{kind}_b"] = float(a), float(b)
        slope_t.add(learner, kind, f"{ms[0]}-{ms[-1]}", k_all, k_big, power, float(a), float(b) * 1e3)

    # closed-form fit cost against N and M ------------------------------------------------
    # with the BLAS at one thread: its default threads stall when the cores are shared (see the last table)
    from threadpoolctl import ThreadpoolController

    blas = ThreadpoolController()
    fit_series = [(M, "poly" if M <= MAX_POLY_M else "rbf") for M in p["fit_ms"]]
    big_x, big_y = stream(max(p["fit_ns"]), seed=1)
    jobs = {}
    for N in p["fit_ns"]:
        xs, ys = big_x[:N], big_y[:N]
        for M, kind in fit_series:
            jobs[N, M] = (new_model(config(M, kind, "sgd")), lambda m, xs=xs, ys=ys: m.fit_closed_form(xs, ys),
                          p["fit_reps"])
    for M, kind in fit_series:
        jobs["raw", M] = (new_model(config(M, kind, "sgd")), lambda m: m.raw_coefficients(), 5 * p["fit_reps"])
    with blas.limit(limits=1):
        fit = {key: sec for key, (sec, _) in interleaved(jobs).items()}  # (N, M) or ("raw", M) -> seconds
    rbf_note = f"; M = {p['fit_ms'][-1]} is an rbf basis" if p["fit_ms"][-1] > MAX_POLY_M else ""
    fit_t = Table(f"One closed-form fit, ms (BLAS 1 thread, median of {p['fit_reps']}{rbf_note}); log-log slopes k "
                  "(vs M: poly only); last row: the raw-unit coefficients every fit reports, whatever N",
                  ["N"] + [f"M = {M}" for M, _ in fit_series] + ["k vs M"])
    ms = [M for M, _ in fit_series]
    poly_ms = [M for M, kind in fit_series if kind == "poly"]
    for N in p["fit_ns"]:
        fit_t.add(N, *[fit[N, M] * 1e3 for M in ms], report.loglog_slope(poly_ms, [fit[N, M] for M in poly_ms]))
    ns = list(p["fit_ns"])
    fit_t.add("k vs N", *[report.loglog_slope(ns, [fit[N, M] for N in ns]) for M in ms], "-")
    big_ns = [N for N in ns if N >= LARGE_N] if len([N for N in ns if N >= LARGE_N]) >= 2 else ns[-2:]
    fit_t.add(f"k vs N, N >= {big_ns[0]:,}", *[report.loglog_slope(big_ns, [fit[N, M] for N in big_ns]) for M in ms],
              "-")
    fit_t.add("raw coefficients", *[fit["raw", M] * 1e3 for M in ms], "-")

    # stream or calibrate --------------------------------------------------------------
    jobs = {}
    for N, M in p["when"]:
        xs, ys = big_x[:N], big_y[:N]
        for learner in LEARNERS:
            jobs[N, M, learner] = (new_model(config(M, "poly", learner)), lambda m, xs=xs, ys=ys: m.learn(xs, ys),
                                   p["fit_reps"])
        if (N, M) not in fit:
            jobs[N, M, "fit"] = (new_model(config(M, "poly", "sgd")),
                                 lambda m, xs=xs, ys=ys: m.fit_closed_form(xs, ys), p["fit_reps"])
    with blas.limit(limits=1):
        when = {key: sec for key, (sec, _) in interleaved(jobs).items()}
    when_t = Table("Stream or calibrate in one go: N samples learned online (one learn() call) vs one closed-form "
                   "fit over the same N (poly basis, BLAS 1 thread)",
                   ["N", "M", "sgd online (ms)", "rls online (ms)", "one fit (ms)", "fit / rls online",
                    "one refit = rls updates"])
    for N, M in p["when"]:
        sgd, rls = when[N, M, "sgd"], when[N, M, "rls"]
        one = fit[N, M] if (N, M) in fit else when[N, M, "fit"]
        when_t.add(N, M, sgd * 1e3, rls * 1e3, one * 1e3, one / rls, int(round(one / (rls / N))))

    # BLAS threads ---------------------------------------------------------------------
    blas_t = Table("One closed-form fit with numpy's BLAS at its default threads and limited to 1 thread "
                   f"(threadpoolctl), ms, median of {p['fit_reps']} (poly basis)",
                   ["N", "M", "default threads", "1 thread", "default / 1 thread"])
    for (N, M), (default, one) in blas_threads(p["blas"], big_x, big_y, p["fit_reps"]).items():
        blas_t.add(N, M, default * 1e3, one * 1e3, default / one)

    tables = [per_t, slope_t, fit_t, when_t, blas_t]
    for t in tables:
        t.show()
    figures = [_per_sample_figure(per, expansion, out), _fit_vs_n_figure(fit, p, out), _fit_vs_m_figure(fit, p, out)]
    top = max(p["fit_ns"])
    headline: dict[str, Any] = {
        "sgd_slope_m": slopes["sgd_rbf_all"], "sgd_slope_m_large": slopes["sgd_rbf_large"],
        "rls_slope_m": slopes["rls_rbf_all"], "rls_slope_m_large": slopes["rls_rbf_large"],
        "sgd_poly_slope_m_large": slopes["sgd_poly_large"], "rls_poly_slope_m_large": slopes["rls_poly_large"],
        "sgd_us_per_sample_m4": per["sgd", "poly"].get(4), "rls_us_per_sample_m4": per["rls", "poly"].get(4),
        "sgd_us_per_sample_m32": per["sgd", "rbf"].get(32), "rls_us_per_sample_m32": per["rls", "rbf"].get(32),
        "sgd_overhead_us": slopes["sgd_rbf_a"], "sgd_ns_per_term": slopes["sgd_rbf_b"] * 1e3,
        "rls_overhead_us": slopes["rls_rbf_a"], "rls_ns_per_term_squared": slopes["rls_rbf_b"] * 1e3,
        f"fit_slope_n_m{p['fit_ms'][-1]}": report.loglog_slope(ns, [fit[N, p["fit_ms"][-1]] for N in ns]),
        "fit_slope_n_large_m16": report.loglog_slope(big_ns, [fit[N, 16] for N in big_ns]),
        f"fit_slope_m_poly_n{top}": report.loglog_slope(poly_ms, [fit[top, M] for M in poly_ms]),
        f"fit_ms_n{top}_m{p['fit_ms'][-1]}": fit[top, p["fit_ms"][-1]] * 1e3,
    }
    return {"tables": [t.to_json() for t in tables], "figures": figures, "headline": headline}


def _power_line(ax: Any, ms: list[int], us: list[float], color: str, label: str) -> None:
    """Draw the least-squares power law through the points (ms, us) with M >= LARGE_M."""
    big = [(m, u) for m, u in zip(ms, us, strict=True) if m >= LARGE_M]
    if len(big) < 2:
        return
    bm, bu = zip(*big, strict=True)
    k, c = np.polyfit(np.log10(bm), np.log10(bu), 1)
    grid = np.geomspace(min(ms), max(ms), 50)
    ax.plot(grid, 10 ** c * grid**k, "--", color=color, lw=1, label=f"{label} fit M>={LARGE_M}: ~M^{k:.2f}")


def _m_ticks(ax: Any, ms: list[int]) -> None:
    """Label the log M axis with the measured M values."""
    from matplotlib.ticker import NullFormatter

    ax.set_xticks(ms, [str(m) for m in ms])
    ax.xaxis.set_minor_formatter(NullFormatter())


def _per_sample_figure(per: dict[tuple[str, str], dict[int, float]], expansion: dict[str, dict[int, float]],
                       out: Path) -> str:
    fig, ax = report.figure("Per-sample learning cost vs basis size", "M (basis terms)", "us per sample", log=True)
    for learner, color in (("sgd", "C0"), ("rls", "C3")):
        for kind, marker, fill in (("rbf", "o", "full"), ("poly", "s", "none")):
            d = per[learner, kind]
            ms = sorted(d)
            ax.plot(ms, [d[m] for m in ms], marker, color=color, fillstyle=fill, ls="-" if kind == "rbf" else ":",
                    label=f"{learner}, {kind}")
        d = per[learner, "rbf"]
        ms = sorted(d)
        _power_line(ax, ms, [d[m] for m in ms], color, learner)
    d = expansion["rbf"]
    ax.plot(sorted(d), [d[m] for m in sorted(d)], "x:", color="gray", label="rbf expansion alone")
    _m_ticks(ax, sorted(per["rls", "rbf"]))
    ax.legend(fontsize=8)
    return report.save(fig, out, "cost_per_sample")


def _fit_vs_n_figure(fit: dict[Any, float], p: dict[str, Any], out: Path) -> str:
    fig, ax = report.figure("One closed-form fit vs number of points", "N (points)", "ms", log=True)
    ns = list(p["fit_ns"])
    for M in p["fit_ms"]:
        k = report.loglog_slope(ns, [fit[N, M] for N in ns])
        kind = "poly" if M <= MAX_POLY_M else "rbf"
        ax.plot(ns, [fit[N, M] * 1e3 for N in ns], "o-", label=f"M = {M}, {kind} (~N^{k:.2f})")
    ax.legend(fontsize=8)
    return report.save(fig, out, "cost_fit_vs_n")


def _fit_vs_m_figure(fit: dict[Any, float], p: dict[str, Any], out: Path) -> str:
    fig, ax = report.figure("One closed-form fit vs basis size (open marker: rbf)", "M (basis terms)", "ms",
                            log=True)
    ms = list(p["fit_ms"])
    poly = [M for M in ms if M <= MAX_POLY_M]
    rbf = [M for M in ms if M > MAX_POLY_M]
    for N in p["fit_ns"]:
        k = report.loglog_slope(poly, [fit[N, M] for M in poly])
        line = ax.plot(poly, [fit[N, M] * 1e3 for M in poly], "o-", label=f"N = {N:,} (poly ~M^{k:.2f})")[0]
        if rbf:
            ax.plot([poly[-1], *rbf], [fit[N, M] * 1e3 for M in (poly[-1], *rbf)], ":", color=line.get_color())
            ax.plot(rbf, [fit[N, M] * 1e3 for M in rbf], "o", fillstyle="none", color=line.get_color())
    _m_ticks(ax, ms)
    ax.legend(fontsize=8)
    return report.save(fig, out, "cost_fit_vs_m")


if __name__ == "__main__":
    report.section_main(run, __doc__)
