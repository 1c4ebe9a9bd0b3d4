"""The README's curl examples, run in order against the app: each must succeed."""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path
from typing import Any

from fastapi.testclient import TestClient

ROOT = Path(__file__).parents[1]


def curl_commands(text: str) -> list[list[str]]:
    block = re.search(r"```sh\nK=.*?\n(.*?)```", text, re.S)
    assert block, "the README has a curl example block"
    commands, current = [], ""
    for line in block.group(1).splitlines():
        if not current and (not line.strip() or line.lstrip().startswith("#")):
            continue
        current += line + "\n"
        try:
            words = shlex.split(current)
        except ValueError:  # a quote still open: the command goes on
            continue
        commands.append(words)
        current = ""
    return commands


def run(client: TestClient, words: list[str], headers: dict[str, str]) -> Any:
    assert words[0] == "curl"
    method, body, url = "GET", None, None
    sent: dict[str, str] = {}
    it = iter(words[1:])
    for w in it:
        if w == "-X":
            method = next(it)
        elif w == "-d":
            body = next(it)
        elif w == "-H":
            h = next(it)
            if h == "$K":
                sent.update(headers)
            elif h == "$J":
                sent["content-type"] = "application/json"
        elif w != "-s":
            url = w
    assert url is not None and url.startswith("$U")
    if body is not None:
        assert "content-type" in sent, f"{url}: a POST needs the JSON content type"
    r = client.request(method, url[2:], content=body, headers=sent)
    assert r.status_code in (200, 201), f"{method} {url}: {r.status_code} {r.text}"
    return r.json()


def test_readme_curl_examples_work(client: TestClient, admin: dict[str, str]) -> None:
    commands = curl_commands((ROOT / "README.md").read_text())
    assert len(commands) >= 8
    answers = [run(client, words, admin) for words in commands]
    # the bench points of the example are on the Steinhart-Hart curve of a 10 kohm NTC
    calibration = answers[1]
    assert calibration["rmse_output"] < 0.01
    predicted = answers[3]
    assert 24.0 < predicted["y"][0] < 25.0


def test_sample_bench_points_calibrate_the_readme_channel(client: TestClient, admin: dict[str, str]) -> None:
    create = curl_commands((ROOT / "README.md").read_text())[0]
    run(client, create, admin)
    body = json.loads((ROOT / "samples" / "thermistor_bench_points.json").read_text())
    r = client.post("/v1/channels/coldroom2.probe07/calibrate", json=body, headers=admin)
    assert r.status_code == 200, r.text
    # the reference thermometer reads to 0.01 degC: the fit is at that level
    assert r.json()["rmse_output"] < 0.02
    assert r.json()["r_squared"] > 0.9999
