"""Channel configuration: rules, defaults and normalisation.

``normalize_config(cfg)`` checks a channel body (the JSON of ``POST /v1/channels``)
and returns a new dict with every default filled in. Each rule says why a value
is wrong, and names the field, so the HTTP layer can answer 422 with a reason.
The result is what the model stores and what ``GET /v1/channels/{id}`` shows.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

from .drift import DETECTOR_DEFAULTS
from .errors import ConfigError

CHANNEL_ID = re.compile(r"^[a-z0-9._-]{1,128}$")
MAX_INPUTS = 8
MAX_DEGREE = 15
MAX_BASIS = 128
MAX_CENTERS = 64
MAX_KNOTS = 64
MAX_TEXT = 256

TOP_KEYS = {
    "id", "description", "inputs", "output", "basis", "learner", "drift",
    "outlier_sd", "snapshot_every", "coverage_factor",
}

SCHEDULE_DEFAULTS: dict[str, dict[str, Any]] = {
    "constant": {"eta0": 0.05},
    "inverse_time": {"eta0": 0.5, "tau": 100.0, "power": 0.6},
    "step": {"eta0": 0.1, "gamma": 0.5, "every": 1000},
    "normalized": {"mu": 0.1, "eps": 1e-6},
}


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _mapping(v: Any, field: str) -> Mapping[str, Any]:
    if not isinstance(v, Mapping):
        raise ConfigError(f"{field} must be an object", field=field)
    return v


def _no_extra(m: Mapping[str, Any], allowed: set[str], field: str) -> None:
    extra = sorted(set(m) - allowed)
    if extra:
        raise ConfigError(
            f"{field} has unknown field(s) {', '.join(extra)}; allowed: {', '.join(sorted(allowed))}",
            field=field,
        )


def _number(
    v: Any,
    field: str,
    *,
    gt: float | None = None,
    ge: float | None = None,
    lt: float | None = None,
    le: float | None = None,
) -> float:
    if not _is_number(v):
        raise ConfigError(f"{field} must be a number", field=field)
    x = float(v)
    if not math.isfinite(x) or abs(x) > 1e300:
        raise ConfigError(f"{field} must be a finite number", field=field)
    if gt is not None and not x > gt:
        raise ConfigError(f"{field} must be greater than {gt:g}, got {x:g}", field=field)
    if ge is not None and not x >= ge:
        raise ConfigError(f"{field} must be at least {ge:g}, got {x:g}", field=field)
    if lt is not None and not x < lt:
        raise ConfigError(f"{field} must be less than {lt:g}, got {x:g}", field=field)
    if le is not None and not x <= le:
        raise ConfigError(f"{field} must be at most {le:g}, got {x:g}", field=field)
    return x


def _integer(v: Any, field: str, *, ge: int, le: int) -> int:
    if isinstance(v, bool) or not (isinstance(v, int) or (isinstance(v, float) and v.is_integer())):
        raise ConfigError(f"{field} must be an integer", field=field)
    i = int(v)
    if not ge <= i <= le:
        raise ConfigError(f"{field} must be between {ge} and {le}, got {i}", field=field)
    return i


def _text(v: Any, field: str, default: str) -> str:
    if v is None:
        return default
    if not isinstance(v, str) or len(v) > MAX_TEXT:
        raise ConfigError(f"{field} must be a string of at most {MAX_TEXT} characters", field=field)
    return v


def _bool(v: Any, field: str) -> bool:
    if not isinstance(v, bool):
        raise ConfigError(f"{field} must be true or false", field=field)
    return v


def _inputs(v: Any) -> list[dict[str, Any]]:
    if not isinstance(v, list) or not 1 <= len(v) <= MAX_INPUTS:
        raise ConfigError(f"inputs must be a list of 1 to {MAX_INPUTS} inputs", field="inputs")
    out = []
    names = set()
    for i, item in enumerate(v):
        f = f"inputs[{i}]"
        m = _mapping(item, f)
        _no_extra(m, {"name", "unit", "min", "max"}, f)
        if "min" not in m or "max" not in m:
            raise ConfigError(f"{f} needs min and max (the declared input range)", field=f)
        lo = _number(m["min"], f"{f}.min")
        hi = _number(m["max"], f"{f}.max")
        if not hi > lo:
            raise ConfigError(f"{f}: min must be less than max ({lo:g} >= {hi:g})", field=f)
        name = _text(m.get("name"), f"{f}.name", f"x{i}")
        if name in names:
            raise ConfigError(f"{f}.name {name!r} is used twice", field=f"{f}.name")
        names.add(name)
        out.append({"name": name, "unit": _text(m.get("unit"), f"{f}.unit", ""), "min": lo, "max": hi})
    return out


def _output(v: Any) -> dict[str, Any]:
    m = _mapping({} if v is None else v, "output")
    _no_extra(m, {"name", "unit", "transform", "offset"}, "output")
    transform = m.get("transform", "none")
    if transform not in ("none", "reciprocal", "log"):
        raise ConfigError(
            f"output.transform must be none, reciprocal or log, got {transform!r}", field="output.transform"
        )
    return {
        "name": _text(m.get("name"), "output.name", "value"),
        "unit": _text(m.get("unit"), "output.unit", ""),
        "transform": transform,
        "offset": _number(m.get("offset", 0.0), "output.offset"),
    }


def _basis(v: Any, inputs: list[dict[str, Any]]) -> dict[str, Any]:
    m = _mapping({"kind": "poly", "degree": 1} if v is None else v, "basis")
    kind = m.get("kind", "poly")
    d = len(inputs)
    if kind == "poly":
        _no_extra(m, {"kind", "degree", "intercept"}, "basis")
        degree = _integer(m.get("degree", 1), "basis.degree", ge=0, le=MAX_DEGREE)
        intercept = _bool(m.get("intercept", True), "basis.intercept")
        if not intercept and degree < 1:
            raise ConfigError("basis.degree must be at least 1 when intercept is false", field="basis.degree")
        size = math.comb(degree + d, d) - (0 if intercept else 1)
        if size > MAX_BASIS:
            raise ConfigError(
                f"basis has {size} terms ({d} inputs, degree {degree}); at most {MAX_BASIS} are allowed",
                field="basis.degree",
            )
        if not intercept and d > 1:
            raise ConfigError("basis.intercept false needs a single input", field="basis.intercept")
        return {"kind": "poly", "degree": degree, "intercept": intercept}
    if kind == "rbf":
        _no_extra(m, {"kind", "centers", "width", "intercept"}, "basis")
        centers_raw = m.get("centers", 8)
        if _is_number(centers_raw):
            if d != 1:
                raise ConfigError(
                    "basis.centers must list the centre points when there are several inputs",
                    field="basis.centers",
                )
            n = _integer(centers_raw, "basis.centers", ge=2, le=MAX_CENTERS)
            lo, hi = inputs[0]["min"], inputs[0]["max"]
            centers = [[lo + (hi - lo) * i / (n - 1)] for i in range(n)]
        elif isinstance(centers_raw, list) and 1 <= len(centers_raw) <= MAX_CENTERS:
            centers = []
            for i, c in enumerate(centers_raw):
                f = f"basis.centers[{i}]"
                point = c if isinstance(c, list) else [c]
                if len(point) != d:
                    raise ConfigError(f"{f} must have {d} coordinate(s), one per input", field=f)
                centers.append([_number(p, f) for p in point])
        else:
            raise ConfigError(
                f"basis.centers must be a count (2 to {MAX_CENTERS}) or a list of centre points",
                field="basis.centers",
            )
        default_width = 2.0 / max(len(centers) - 1, 1)
        width = _number(m.get("width", default_width), "basis.width", gt=0.0, le=100.0)
        intercept = _bool(m.get("intercept", True), "basis.intercept")
        return {"kind": "rbf", "centers": centers, "width": width, "intercept": intercept}
    if kind == "log_poly":
        _no_extra(m, {"kind", "powers"}, "basis")
        if d != 1:
            raise ConfigError("basis log_poly takes a single input", field="basis.kind")
        if inputs[0]["min"] <= 0.0:
            raise ConfigError("basis log_poly needs an input range above zero (ln x)", field="inputs[0].min")
        powers_raw = m.get("powers", [0, 1, 3])
        if not isinstance(powers_raw, list) or not 1 <= len(powers_raw) <= 8:
            raise ConfigError("basis.powers must be a list of 1 to 8 integers", field="basis.powers")
        powers = [_integer(p, f"basis.powers[{i}]", ge=0, le=7) for i, p in enumerate(powers_raw)]
        if len(set(powers)) != len(powers):
            raise ConfigError("basis.powers must not repeat a power", field="basis.powers")
        return {"kind": "log_poly", "powers": powers}
    if kind == "hinge":
        _no_extra(m, {"kind", "knots", "intercept"}, "basis")
        if d != 1:
            raise ConfigError("basis hinge takes a single input", field="basis.kind")
        knots_raw = m.get("knots")
        if not isinstance(knots_raw, list) or not 1 <= len(knots_raw) <= MAX_KNOTS:
            raise ConfigError(f"basis.knots must be a list of 1 to {MAX_KNOTS} numbers", field="basis.knots")
        knots = [_number(k, f"basis.knots[{i}]") for i, k in enumerate(knots_raw)]
        lo, hi = inputs[0]["min"], inputs[0]["max"]
        if any(b <= a for a, b in zip(knots, knots[1:], strict=False)):
            raise ConfigError("basis.knots must be strictly increasing", field="basis.knots")
        if knots[0] <= lo or knots[-1] >= hi:
            raise ConfigError("basis.knots must lie inside the input range (min, max)", field="basis.knots")
        intercept = _bool(m.get("intercept", True), "basis.intercept")
        return {"kind": "hinge", "knots": knots, "intercept": intercept}
    raise ConfigError(f"basis.kind must be poly, rbf, log_poly or hinge, got {kind!r}", field="basis.kind")


def _schedule(v: Any) -> dict[str, Any]:
    m = _mapping({"kind": "normalized"} if v is None else v, "learner.schedule")
    kind = m.get("kind", "normalized")
    if kind not in SCHEDULE_DEFAULTS:
        raise ConfigError(
            f"learner.schedule.kind must be one of {', '.join(SCHEDULE_DEFAULTS)}, got {kind!r}",
            field="learner.schedule.kind",
        )
    defaults = SCHEDULE_DEFAULTS[kind]
    _no_extra(m, {"kind", *defaults}, "learner.schedule")
    f = "learner.schedule."
    out: dict[str, Any] = {"kind": kind}
    if kind == "normalized":
        out["mu"] = _number(m.get("mu", defaults["mu"]), f + "mu", gt=0.0, lt=2.0)
        out["eps"] = _number(m.get("eps", defaults["eps"]), f + "eps", gt=0.0)
        return out
    out["eta0"] = _number(m.get("eta0", defaults["eta0"]), f + "eta0", gt=0.0, le=1e6)
    if kind == "inverse_time":
        out["tau"] = _number(m.get("tau", defaults["tau"]), f + "tau", gt=0.0)
        out["power"] = _number(m.get("power", defaults["power"]), f + "power", gt=0.0, le=2.0)
    elif kind == "step":
        out["gamma"] = _number(m.get("gamma", defaults["gamma"]), f + "gamma", gt=0.0, le=1.0)
        out["every"] = _integer(m.get("every", defaults["every"]), f + "every", ge=1, le=10**9)
    return out


def _learner(v: Any) -> dict[str, Any]:
    m = _mapping({"kind": "sgd"} if v is None else v, "learner")
    kind = m.get("kind", "sgd")
    if kind == "sgd":
        _no_extra(m, {"kind", "schedule", "l2", "huber"}, "learner")
        huber = m.get("huber")
        return {
            "kind": "sgd",
            "schedule": _schedule(m.get("schedule")),
            "l2": _number(m.get("l2", 0.0), "learner.l2", ge=0.0, le=1e6),
            "huber": None if huber is None else _number(huber, "learner.huber", gt=0.0, le=1e3),
        }
    if kind == "rls":
        _no_extra(m, {"kind", "forgetting", "initial_covariance"}, "learner")
        return {
            "kind": "rls",
            "forgetting": _number(m.get("forgetting", 0.999), "learner.forgetting", gt=0.0, le=1.0),
            "initial_covariance": _number(
                m.get("initial_covariance", 1e3), "learner.initial_covariance", gt=0.0, le=1e12
            ),
        }
    raise ConfigError(f"learner.kind must be sgd or rls, got {kind!r}", field="learner.kind")


def _drift(v: Any) -> dict[str, Any]:
    m = _mapping({} if v is None else v, "drift")
    detector = m.get("detector", "page_hinkley")
    if detector not in DETECTOR_DEFAULTS:
        raise ConfigError(
            f"drift.detector must be one of {', '.join(DETECTOR_DEFAULTS)}, got {detector!r}",
            field="drift.detector",
        )
    defaults = DETECTOR_DEFAULTS[detector]
    _no_extra(m, {"detector", "tolerance", *defaults}, "drift")
    out: dict[str, Any] = {"detector": detector}
    tol = m.get("tolerance")
    out["tolerance"] = None if tol is None else _number(tol, "drift.tolerance", gt=0.0)
    for key, default in defaults.items():
        value = m.get(key, default)
        if key == "mean_window":
            out[key] = _integer(value, "drift.mean_window", ge=10, le=10**7)
        elif key == "lambda":
            out[key] = _number(value, "drift.lambda", gt=0.0, le=1.0)
        elif key == "clip":
            out[key] = _number(value, "drift.clip", ge=0.0, le=1e3)
        else:
            out[key] = _number(value, f"drift.{key}", ge=0.0, le=1e6)
    if not out["alarm"] > out["warning"]:
        raise ConfigError("drift.alarm must be greater than drift.warning", field="drift.alarm")
    return out


def normalize_config(cfg: Any) -> dict[str, Any]:
    """Validate a channel configuration and fill in defaults.

    Raises ``ConfigError`` (with ``field``) on the first rule broken.
    """
    m = _mapping(cfg, "channel")
    _no_extra(m, TOP_KEYS, "channel")
    out: dict[str, Any] = {}
    if "id" in m:
        cid = m["id"]
        if not isinstance(cid, str) or not CHANNEL_ID.match(cid):
            raise ConfigError(
                "id must be 1 to 128 characters of lower-case letters, digits, '.', '_' or '-'",
                field="id",
            )
        out["id"] = cid
    out["description"] = _text(m.get("description"), "description", "")
    if "inputs" not in m:
        raise ConfigError("inputs is required: each input's name, unit, min and max", field="inputs")
    inputs = _inputs(m["inputs"])
    out["inputs"] = inputs
    out["output"] = _output(m.get("output"))
    out["basis"] = _basis(m.get("basis"), inputs)
    out["learner"] = _learner(m.get("learner"))
    out["drift"] = _drift(m.get("drift"))
    osd = m.get("outlier_sd", 6.0)
    out["outlier_sd"] = None if osd is None else _number(osd, "outlier_sd", gt=0.0, le=1e6)
    se = m.get("snapshot_every", 1000)
    out["snapshot_every"] = None if se is None else _integer(se, "snapshot_every", ge=1, le=10**9)
    out["coverage_factor"] = _number(m.get("coverage_factor", 2.0), "coverage_factor", gt=0.0, le=10.0)
    return out
