"""Core benchmark: per-sample learning cost, prediction cost, closed-form fit cost.

Run: ``python -m tests.bench.core_bench`` (add ``--quick`` for a short run). With the
``bench`` extra installed (river, scikit-learn) the same stream is also fed to
general-purpose online learners in the same process, and the ratios are printed.
Figures are medians of several repeats; the machine is shared, so read ratios.
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable
from typing import Any

import numpy as np

from service.core import ChannelModel


def timed(fn: Callable[[], Any], repeats: int) -> float:
    """Median wall time of ``fn`` over ``repeats`` runs, seconds."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def stream(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.0, 100.0, n)
    s = x / 50.0 - 1.0
    return x, 1.0 + 0.5 * s - 0.2 * s**2 + 0.1 * s**3 + rng.normal(0, 0.01, n)


def config(degree: int, learner: dict[str, Any]) -> dict[str, Any]:
    return {"inputs": [{"name": "raw", "min": 0.0, "max": 100.0}],
            "basis": {"kind": "poly", "degree": degree}, "learner": learner}


LEARNERS: dict[str, dict[str, Any]] = {
    "sgd normalized": {"kind": "sgd", "schedule": {"kind": "normalized", "mu": 0.1}},
    "sgd constant": {"kind": "sgd", "schedule": {"kind": "constant", "eta0": 0.05}},
    "sgd inverse_time": {"kind": "sgd", "schedule": {"kind": "inverse_time", "eta0": 0.5}},
    "sgd step": {"kind": "sgd", "schedule": {"kind": "step", "eta0": 0.1}},
    "rls": {"kind": "rls", "forgetting": 0.999},
}


def ours(n: int, repeats: int) -> list[tuple[str, int, float, float]]:
    """(learner, M, us per sample in one batch of n, us per call with one sample)."""
    x, y = stream(n)
    rows = []
    for degree in (3, 10):
        for name, learner in LEARNERS.items():
            cfg = config(degree, learner)
            ChannelModel.from_config(cfg).learn(x[:10], y[:10])  # compile / warm

            def batch() -> None:
                ChannelModel.from_config(cfg).learn(x, y)

            per_sample = timed(batch, repeats) / n * 1e6
            m = ChannelModel.from_config(cfg)
            k = min(n, 2000)

            def singles() -> None:
                for i in range(k):
                    m.learn(x[i:i + 1], y[i:i + 1])

            per_call = timed(singles, max(1, repeats // 2)) / k * 1e6
            rows.append((name, degree + 1, per_sample, per_call))
    return rows


def peers(n: int, repeats: int) -> list[tuple[str, int, float]]:
    """Other ways to do the same job on the same stream and features, us per sample."""
    x, y = stream(n)
    rows: list[tuple[str, int, float]] = []
    for degree in (3, 10):
        M = degree + 1
        Phi = np.polynomial.chebyshev.chebvander(x / 50.0 - 1.0, degree)
        rows_list = Phi.tolist()

        def numpy_lms() -> None:
            w = np.zeros(M)
            for phi, t in zip(Phi, y, strict=True):
                w += 0.05 * (t - w @ phi) * phi

        def python_lms() -> None:
            w = [0.0] * M
            for phi, t in zip(rows_list, y.tolist(), strict=True):
                e = t - sum(a * b for a, b in zip(w, phi, strict=True))
                g = 0.05 * e
                w = [a + g * b for a, b in zip(w, phi, strict=True)]

        def numpy_rls() -> None:
            w = np.zeros(M)
            P = np.eye(M) * 1e3
            for phi, t in zip(Phi, y, strict=True):
                Pphi = P @ phi
                k = Pphi / (0.999 + phi @ Pphi)
                w += k * (t - w @ phi)
                P = (P - np.outer(k, Pphi)) / 0.999

        k = min(n, 20000)
        for name, fn in (("numpy LMS loop", numpy_lms), ("pure-Python LMS loop", python_lms),
                         ("numpy RLS loop", numpy_rls)):
            rows.append((name, M, timed(fn, repeats) / len(y) * 1e6))
        try:
            from river import linear_model, optim
        except ImportError:
            pass
        else:
            feats = [{f"c{j}": v for j, v in enumerate(r)} for r in rows_list[:k]]

            def river_sgd() -> None:
                lr = linear_model.LinearRegression(optimizer=optim.SGD(0.05), intercept_lr=0.0)
                for f, t in zip(feats, y[:k].tolist(), strict=False):
                    lr.learn_one(f, t)

            def river_bayes() -> None:
                br = linear_model.BayesianLinearRegression()
                for f, t in zip(feats, y[:k].tolist(), strict=False):
                    br.learn_one(f, t)

            rows.append(("river LinearRegression.learn_one", M, timed(river_sgd, repeats) / k * 1e6))
            rows.append(("river BayesianLinearRegression", M, timed(river_bayes, repeats) / k * 1e6))
        try:
            from sklearn.linear_model import SGDRegressor
        except ImportError:
            pass
        else:
            kk = min(k, 2000)

            def sk_sgd() -> None:
                reg = SGDRegressor(learning_rate="constant", eta0=0.05)
                for i in range(kk):
                    reg.partial_fit(Phi[i:i + 1], y[i:i + 1])

            rows.append(("scikit-learn SGDRegressor.partial_fit", M, timed(sk_sgd, 1) / kk * 1e6))
    return rows


def predict_cost(repeats: int) -> list[tuple[str, float]]:
    x, y = stream(20000)
    out = []
    for name, learner in (("sgd", LEARNERS["sgd normalized"]), ("rls", LEARNERS["rls"])):
        m = ChannelModel.from_config(config(10, learner))
        m.learn(x, y)
        X = x[:10000]
        out.append((f"predict 10,000 values, {name}, M = 11 (ms)", timed(lambda m=m: m.predict(X), repeats) * 1e3))
        out.append((f"predict 1 value, {name}, M = 11 (us)", timed(lambda m=m: m.predict(X[:1]), repeats) * 1e6))
    return out


def fit_cost(repeats: int, quick: bool) -> list[tuple[int, int, float]]:
    """(N, M, ms) for one closed-form fit."""
    rows = []
    ns = (1_000, 10_000, 100_000) if quick else (1_000, 10_000, 100_000, 1_000_000)
    for n in ns:
        x, y = stream(n)
        for degree in (1, 3, 10, 15):
            m = ChannelModel.from_config(config(degree, LEARNERS["sgd normalized"]))
            rows.append((n, degree + 1, timed(lambda m=m, x=x, y=y: m.fit_closed_form(x, y), repeats) * 1e3))
    return rows


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__)
    p.add_argument("--quick", action="store_true", help="fewer samples and repeats")
    args = p.parse_args()
    n = 20_000 if args.quick else 100_000
    repeats = 3 if args.quick else 5
    print(f"stream of {n} samples, median of {repeats} runs\n")
    mine = ours(n, repeats)
    print(f"{'curvekeeper learner':24} {'M':>3} {'us/sample (batch)':>18} {'us/call (1 sample)':>19}")
    for name, M, per_sample, per_call in mine:
        print(f"{name:24} {M:>3} {per_sample:>18.3f} {per_call:>19.1f}")
    others = peers(n, repeats)
    print(f"\n{'peer (same stream and features)':40} {'M':>3} {'us/sample':>10} {'ratio to our sgd':>17}")
    ours_sgd = {M: ps for name, M, ps, _ in mine if name == "sgd normalized"}
    ours_rls = {M: ps for name, M, ps, _ in mine if name == "rls"}
    for name, M, us in others:
        ref = ours_rls[M] if "RLS" in name or "Bayesian" in name else ours_sgd[M]
        print(f"{name:40} {M:>3} {us:>10.3f} {us / ref:>16.1f}x")
    print()
    for name, value in predict_cost(repeats):
        print(f"{name:45} {value:10.3f}")
    print(f"\n{'closed-form fit':16} {'N':>9} {'M':>3} {'ms':>10}")
    for n_, M, ms in fit_cost(max(1, repeats // 2), args.quick):
        print(f"{'':16} {n_:>9} {M:>3} {ms:>10.2f}")


if __name__ == "__main__":
    main()
