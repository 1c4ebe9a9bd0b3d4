"""Request metrics keep a bounded set of label values whatever clients send: a method
outside the standard ones counts as ``other``, a path no route matches as ``unmatched``."""

from __future__ import annotations

import random
import re
import string

from curvekeeper.metrics import METHODS
from fastapi.testclient import TestClient

SERIES = re.compile(r'^curvekeeper_http_requests_total\{method="([^"]*)",route="([^"]*)",status="([^"]*)"\}',
                    re.M)


def _label_sets(client: TestClient, headers: dict[str, str]) -> set[tuple[str, str, str]]:
    r = client.get("/metrics", headers=headers)
    assert r.status_code == 200, r.text
    return {m.groups() for m in SERIES.finditer(r.text)}


def test_random_methods_and_paths_keep_the_label_sets_bounded(client: TestClient,
                                                              keys: dict[str, dict[str, str]]) -> None:
    rnd = random.Random(7)
    sent: list[str] = []

    def word(n: int) -> str:
        w = "".join(rnd.choice(string.ascii_letters) for _ in range(n))
        sent.append(w)
        return w

    for i in range(300):
        method = word(rnd.randint(3, 12)).upper() if i % 3 else rnd.choice(["GET", "POST", "DELETE"])
        path = rnd.choice([f"/{word(8)}", f"/v1/{word(5)}/{word(9)}", f"/v1/channels/{word(6)}",
                           f"/ui/static/{word(7)}.js"])
        client.request(method, path, headers=keys["technician"] if i % 2 else {})
    labels = _label_sets(client, keys["technician"])
    assert {m for m, _, _ in labels} <= set(METHODS) | {"other"}
    assert "other" in {m for m, _, _ in labels}
    # a route label is a template or "unmatched": none holds a word a client sent
    routes = {p for _, p, _ in labels}
    assert "unmatched" in routes and "/v1/channels/{channel_id}" in routes
    assert not [p for p in routes for w in sent if w in p or w.upper() in p]
    assert all(s.isdigit() and 100 <= int(s) < 600 for _, _, s in labels)
    # 300 random requests fall into a handful of series, not one each
    assert len(labels) < 40, sorted(labels)
