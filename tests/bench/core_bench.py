"""Core benchmark: our learners against general-purpose online learners on one stream.

Every learner sees the same seeded stream (raw input 0..100, Chebyshev basis with
M = 4 and M = 11 terms, a known smooth truth curve plus Gaussian noise) and the same
features, one sample at a time. For each we report the per-sample learning cost
(microseconds, median of repeats) and the accuracy of the curve after the stream:
RMSE on a 201-point grid over the input range against the noise-free truth and
against the closed-form least-squares optimum of the whole stream.

Also: our cost with one sample per ``learn()`` call, and the cost of ``predict``.
The learning runs with numpy's BLAS limited to one thread (threadpoolctl), as its default
threads stall on two shared cores; ``predict`` is timed both ways.

Run: ``python -m tests.bench.core_bench [--size smoke|quick|full] [--out DIR]``.
The machine is shared and noisy: read the ratios, measured side by side in one run.
"""

from __future__ import annotations

import statistics
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from curvekeeper.channel_config import NormalizedSchedule, channel_config
from curvekeeper.core import ChannelModel

from . import report
from .report import Table


def model_of(body: dict[str, Any]) -> ChannelModel:
    """A fresh model for a channel body, validated as the service validates it."""
    return ChannelModel.from_config(channel_config(body))


LO, HI = 0.0, 100.0  # declared input range, raw units
NOISE_SD = 0.01  # s.d. of the reference noise, output units
GRID = np.linspace(LO, HI, 201)  # where curves are compared, raw units
MS = (4, 11)  # basis sizes compared

PLAN: dict[str, dict[str, int]] = {
    # n: stream length; n_sk: samples for scikit-learn (one partial_fit call each);
    # reps / peer_reps: timing repeats; singles: one-sample learn() calls timed; pred: predict batch
    "smoke": {"n": 2_000, "n_sk": 100, "reps": 1, "peer_reps": 1, "singles": 200, "pred": 1_000},
    "quick": {"n": 25_000, "n_sk": 500, "reps": 3, "peer_reps": 2, "singles": 1_000, "pred": 10_000},
    "full": {"n": 100_000, "n_sk": 2_000, "reps": 7, "peer_reps": 3, "singles": 2_000, "pred": 10_000},
}

# our learners, schedule settings at their defaults (service/curvekeeper/channel_config.py)
OURS: dict[str, dict[str, Any]] = {
    "sgd normalized": {"kind": "sgd", "schedule": {"kind": "normalized"}},
    "sgd constant": {"kind": "sgd", "schedule": {"kind": "constant"}},
    "sgd inverse_time": {"kind": "sgd", "schedule": {"kind": "inverse_time"}},
    "sgd step": {"kind": "sgd", "schedule": {"kind": "step"}},
    "rls": {"kind": "rls"},
    "rls, forgetting 1": {"kind": "rls", "forgetting": 1.0},
}
RLS_FORGET, RLS_P0 = 0.999, 1e3  # our rls defaults, also given to the numpy RLS loop
MU = NormalizedSchedule().mu  # peers' LMS rate: the average step of our default


def truth(x: np.ndarray) -> np.ndarray:
    """Noise-free calibration curve, output units, for raw inputs x (n,)."""
    s = (x - LO) / (HI - LO) * 2.0 - 1.0
    return 1.0 + 0.5 * s - 0.2 * s**2 + 0.1 * s**3 + 0.03 * np.tanh(4.0 * s)


def stream(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Raw inputs x (n,) uniform over the range and references y (n,) = truth + noise."""
    rng = np.random.default_rng(seed)
    x = rng.uniform(LO, HI, n)
    return x, truth(x) + rng.normal(0.0, NOISE_SD, n)


def config(m: int, learner: dict[str, Any]) -> dict[str, Any]:
    return {"inputs": [{"name": "raw", "min": LO, "max": HI}],
            "basis": {"kind": "poly", "degree": m - 1}, "learner": learner}


def rmse(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.sqrt(np.mean((np.asarray(a) - np.asarray(b)) ** 2)))


Job = tuple[Callable[[], Any], Callable[[Any], Any], int]  # (make, run, repeats)


def interleaved(jobs: dict[Any, Job]) -> dict[Any, tuple[float, Any]]:
    """Time ``run(make())`` for every job (``make`` untimed), in rounds over all jobs so that
    a busy spell on the shared machine hits them alike; a job takes part in its first
    ``repeats`` rounds. Returns key -> (median seconds, the learner of the last round)."""
    times: dict[Any, list[float]] = {k: [] for k in jobs}
    last: dict[Any, Any] = {}
    for r in range(max(max(1, j[2]) for j in jobs.values())):
        for key, (make, run_, repeats) in jobs.items():
            if r >= max(1, repeats):
                continue
            obj = make()
            t0 = time.perf_counter()
            run_(obj)
            times[key].append(time.perf_counter() - t0)
            last[key] = obj
    return {k: (statistics.median(v), last[k]) for k, v in times.items()}


def one_at_a_time(model: ChannelModel, X: np.ndarray, y: np.ndarray, calls: int) -> float:
    """Median seconds of one ``learn()`` call with a single sample, over ``calls`` calls in stream order."""
    times = []
    for i in range(min(calls, len(y))):
        a, b = X[i:i + 1], y[i:i + 1]
        t0 = time.perf_counter()
        model.learn(a, b)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


@dataclass
class Peer:
    """A learner fed the features one sample at a time: build, learn over (Phi, y), curve on the grid."""

    name: str
    rls_type: bool
    make: Callable[[], Any]
    run: Callable[[Any], Any]
    curve: Callable[[Any], np.ndarray]
    n: int


def peers(Phi: np.ndarray, y: np.ndarray, G: np.ndarray, n_sk: int) -> list[Peer]:
    """Peers on features Phi (n, M), references y (n,); G (g, M) are the grid's features."""
    M = Phi.shape[1]
    lr = MU / float(np.mean(np.sum(Phi * Phi, axis=1)))  # the same average step as our normalized default
    rows, ys = Phi.tolist(), y.tolist()
    out = []

    def np_lms(w: np.ndarray) -> None:
        for phi, t in zip(Phi, y, strict=True):
            w += lr * (t - w @ phi) * phi

    def np_rls(st: dict[str, np.ndarray]) -> None:
        w, P = st["w"], st["P"]
        for phi, t in zip(Phi, y, strict=True):
            Pphi = P @ phi
            k = Pphi / (RLS_FORGET + phi @ Pphi)
            w += k * (t - w @ phi)
            P = P - np.outer(k, Pphi)
            P = (P + P.T) * (0.5 / RLS_FORGET)  # kept symmetric: without this P blows up after ~25k samples
        st["P"] = P

    def lstsq(st: dict[str, np.ndarray]) -> None:
        st["w"] = np.linalg.lstsq(Phi, y, rcond=None)[0]

    out.append(Peer("numpy LMS loop", False, lambda: np.zeros(M), np_lms, lambda w: G @ w, len(y)))
    out.append(Peer("numpy RLS loop", True, lambda: {"w": np.zeros(M), "P": np.eye(M) * RLS_P0}, np_rls,
                    lambda st: G @ st["w"], len(y)))
    out.append(Peer("numpy lstsq, whole stream", True, dict, lstsq, lambda st: G @ st["w"], len(y)))

    from river import linear_model, optim

    feats = [{f"c{j}": v for j, v in enumerate(r)} for r in rows]
    gfeats = [{f"c{j}": v for j, v in enumerate(r)} for r in G.tolist()]

    def river_run(model: Any) -> None:
        for f, t in zip(feats, ys, strict=True):
            model.learn_one(f, t)

    def river_sgd_curve(model: Any) -> np.ndarray:
        return G @ np.array([model.weights.get(f"c{j}", 0.0) for j in range(M)]) + model.intercept

    # river's squared loss has gradient 2 (p - y): half the rate gives the same LMS step
    out.append(Peer("river LinearRegression (SGD)", False,
                    lambda: linear_model.LinearRegression(optimizer=optim.SGD(lr / 2.0), intercept_lr=0.0, l2=0.0),
                    river_run, river_sgd_curve, len(y)))
    # posterior mean equals RLS without forgetting with P0 = beta / alpha
    beta = 1.0 / NOISE_SD**2
    out.append(Peer("river BayesianLinearRegression", True,
                    lambda: linear_model.BayesianLinearRegression(alpha=beta / RLS_P0, beta=beta),
                    river_run, lambda model: np.array([model.predict_one(f) for f in gfeats]), len(y)))

    from sklearn.linear_model import SGDRegressor

    k = min(n_sk, len(y))

    def sk_run(model: Any) -> None:
        for i in range(k):
            model.partial_fit(Phi[i:i + 1], y[i:i + 1])

    out.append(Peer("scikit-learn SGDRegressor.partial_fit", False,
                    lambda: SGDRegressor(penalty=None, fit_intercept=False, learning_rate="constant", eta0=lr,
                                         shuffle=False),
                    sk_run, lambda model: G @ model.coef_, k))
    return out


def run(size: str, out: Path) -> dict[str, Any]:
    """Run the section at ``size``; figures into ``out``; returns tables, figures and headline."""
    p = PLAN[size]
    n = p["n"]
    x, y = stream(n)
    X = x.reshape(-1, 1)
    f_true = truth(GRID)
    title = (f"Learning one stream of {n:,} samples (truth + N(0, {NOISE_SD}) noise, Chebyshev basis; BLAS 1 "
             "thread): us per sample (median) and curve RMSE on a 201-point grid")
    learn_t = Table(title, ["learner", "M", "samples", "us/sample", "x our sgd", "x our rls", "RMSE vs truth",
                            "RMSE vs lstsq"])
    singles = Table(f"Our cost with one sample per learn() call (median of {p['singles']:,} calls)",
                    ["learner", "M", "us/call", "x one call over the stream"])
    from threadpoolctl import ThreadpoolController

    controller = ThreadpoolController()  # the BLAS numpy uses
    cost: dict[tuple[str, int], float] = {}
    acc: dict[tuple[str, int], float] = {}
    rates: list[str] = []
    for M in MS:
        probe = model_of(config(M, OURS["rls"]))
        Phi, G = probe.basis.expand(X), probe.basis.expand(GRID.reshape(-1, 1))
        f_opt = G @ np.linalg.lstsq(Phi, y, rcond=None)[0]
        jobs: dict[str, Job] = {}
        for name, learner in OURS.items():
            cfg = config(M, learner)
            model_of(cfg).learn(X[:10], y[:10])  # compile or load the compiled loop
            jobs[name] = (lambda cfg=cfg: model_of(cfg), lambda m: m.learn(X, y), p["reps"])
        peer_list = peers(Phi, y, G, p["n_sk"])
        for peer in peer_list:
            one_call = peer.name.startswith("numpy lstsq")  # one cheap call: more repeats
            jobs[peer.name] = (peer.make, peer.run, 2 * p["reps"] + 1 if one_call else p["peer_reps"])
        with controller.limit(limits=1):  # the BLAS at its default threads stalls when the cores are shared
            timed_jobs = interleaved(jobs)
        rows: list[tuple[str, int, float, np.ndarray, bool]] = []  # name, samples, us, curve, rls-type
        for name in OURS:
            sec, model = timed_jobs[name]
            rows.append((f"ours {name}", n, sec / n * 1e6, model.predict(GRID)[0], name.startswith("rls")))
            sec1 = one_at_a_time(model_of(config(M, OURS[name])), X, y, p["singles"])
            singles.add(name, M, sec1 * 1e6, sec1 / (sec / n))
        for peer in peer_list:
            sec, model = timed_jobs[peer.name]
            rows.append((peer.name, peer.n, sec / peer.n * 1e6, peer.curve(model), peer.rls_type))
        lr = MU / float(np.mean(np.sum(Phi * Phi, axis=1)))
        rates.append(f"M = {M}: LMS rate {lr:.4f} (river SGD lr {lr / 2:.4f})")
        ref_sgd = rows[0][2]
        ref_rls = next(r[2] for r in rows if r[0] == "ours rls")
        for name, samples, us, curve, rls_type in rows:
            learn_t.add(name, M, samples, us, us / ref_sgd, us / ref_rls if rls_type else "-",
                     rmse(curve, f_true), rmse(curve, f_opt))
            cost[name, M] = us
            acc[name, M] = rmse(curve, f_true)

    pred = Table("predict(): calibrated values and uncertainties, after learning the stream",
                 ["learner", "M", "1 value (us)", f"{p['pred']:,} values (ms)", "us/value in batch",
                  f"{p['pred']:,} values, BLAS 1 thread (ms)"])
    for M in MS:
        for name in ("sgd normalized", "rls"):
            m = model_of(config(M, OURS[name]))
            m.learn(X, y)
            batch = GRID[np.arange(p["pred"]) % GRID.size]
            one = GRID[:1]
            t1 = report.timed(lambda m=m: m.predict(one), 20 * p["reps"] ** 2)
            tb = report.timed(lambda m=m: m.predict(batch), 4 * p["reps"])
            with controller.limit(limits=1):
                tb1 = report.timed(lambda m=m: m.predict(batch), 4 * p["reps"])
            pred.add(name, M, t1 * 1e6, tb * 1e3, tb / p["pred"] * 1e6, tb1 * 1e3)

    tables = [learn_t, singles, pred]
    for t in tables:
        t.show()
    print("\nPeers' learning rates: " + "; ".join(rates) + f" (mu = {MU} over the mean |phi|^2 of the stream).")
    print(f"scikit-learn sees only the first {min(p['n_sk'], n):,} samples (one partial_fit call each, slow).")

    figures = [_cost_figure(cost, out), _accuracy_figure(acc, out)]
    headline: dict[str, Any] = {}
    keys = {"river_sgd_over_ours": ("river LinearRegression (SGD)", "ours sgd normalized"),
            "sklearn_sgd_over_ours": ("scikit-learn SGDRegressor.partial_fit", "ours sgd normalized"),
            "numpy_lms_over_ours": ("numpy LMS loop", "ours sgd normalized"),
            "river_bayes_over_ours": ("river BayesianLinearRegression", "ours sgd normalized"),
            "river_bayes_over_ours_rls": ("river BayesianLinearRegression", "ours rls"),
            "numpy_rls_over_ours_rls": ("numpy RLS loop", "ours rls"),
            "lstsq_over_ours": ("numpy lstsq, whole stream", "ours sgd normalized")}
    for M in MS:
        headline[f"ours_sgd_us_per_sample_m{M}"] = cost["ours sgd normalized", M]
        headline[f"ours_rls_us_per_sample_m{M}"] = cost["ours rls", M]
        for key, (peer, ours) in keys.items():
            headline[f"{key}_m{M}"] = cost[peer, M] / cost[ours, M]
        headline[f"rmse_truth_ours_sgd_m{M}"] = acc["ours sgd normalized", M]
        headline[f"rmse_truth_lstsq_m{M}"] = acc["numpy lstsq, whole stream", M]
    return {"tables": [t.to_json() for t in tables], "figures": figures, "headline": headline,
            "notes": {"peer_rates": rates, "sklearn_samples": min(p["n_sk"], n), "stream": n}}


def _names(d: dict[tuple[str, int], float]) -> list[str]:
    return list(dict.fromkeys(k[0] for k in d))


def _cost_figure(cost: dict[tuple[str, int], float], out: Path) -> str:
    names = _names(cost)
    fig, ax = report.figure("Per-sample learning cost, same stream and features", "us per sample (log)", "")
    ax.set_xscale("log")
    pos = np.arange(len(names))
    h = 0.38
    for i, M in enumerate(MS):
        ax.barh(pos + (i - 0.5) * h, [cost[nm, M] for nm in names], height=h, label=f"M = {M}")
    ax.set_yticks(pos, names, fontsize=8)
    ax.invert_yaxis()
    ax.legend()
    return report.save(fig, out, "core_cost")


def _accuracy_figure(acc: dict[tuple[str, int], float], out: Path) -> str:
    names = _names(acc)
    fig, ax = report.figure("Curve RMSE against the noise-free truth, after the stream", "RMSE (log)", "")
    ax.set_xscale("log")
    pos = np.arange(len(names))
    for (M, marker), dy in zip(((MS[0], "o"), (MS[1], "s")), (-0.15, 0.15), strict=True):
        ax.plot([acc[nm, M] for nm in names], pos + dy, marker, label=f"M = {M}")
        ax.axvline(acc["numpy lstsq, whole stream", M], ls=":", lw=1, color=ax.lines[-1].get_color())
    from matplotlib.ticker import NullFormatter

    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_yticks(pos, names, fontsize=8)
    ax.set_ylim(len(names) - 0.5, -2.4)  # free rows on top for the legend
    ax.legend(loc="upper center", ncol=2, fontsize=8, title="dotted line: least squares on the whole stream",
              title_fontsize=8)
    return report.save(fig, out, "core_accuracy")


if __name__ == "__main__":
    report.section_main(run, __doc__)
