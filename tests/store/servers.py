"""Helpers for store tests that run real ``curvekeeper serve`` processes: a server that
can be killed and restarted on the same port and store, a fresh store on each backend,
``curvekeeper replay --check`` for a set of channels, and what the ``sample`` table holds."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import IO

import httpx
import pytest
from curvekeeper.store.tables import Channel, ChannelState, Sample
from sqlalchemy import create_engine, func, select

ADMIN = "ck_store-test-admin-0123456789abcdef"
START_S = 60.0  # at most this long for a server to answer /healthz


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Server:
    """One ``curvekeeper serve`` process on a fixed loopback port; ``kill`` (SIGKILL) and
    ``start`` again keep the port and the store, so clients reconnect to the same URL."""

    def __init__(self, db_url: str, log_dir: Path, *, name: str = "server",
                 env: Mapping[str, str] | None = None) -> None:
        self.db_url = db_url
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_path = log_dir / f"{name}.log"
        self.env = {**os.environ, "CURVEKEEPER_ADMIN_KEY": ADMIN, "CURVEKEEPER_LOG_LEVEL": "warning",
                    **(env or {})}
        self.proc: subprocess.Popen[bytes] | None = None
        self._log: IO[bytes] | None = None
        self.starts = 0

    def start(self) -> None:
        assert self.proc is None or self.proc.poll() is not None, "already running"
        self._log = self._log or open(self.log_path, "ab")  # noqa: SIM115 (closed in stop)
        self._log.write(f"--- start {self.starts}\n".encode())
        self._log.flush()
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "curvekeeper.cli", "serve", "--port", str(self.port), "--db", self.db_url],
            env=self.env, stdout=self._log, stderr=subprocess.STDOUT)
        self.starts += 1
        deadline = time.monotonic() + START_S
        while True:
            try:
                if httpx.get(self.url + "/healthz", timeout=1.0).status_code == 200:
                    return
            except httpx.TransportError:
                pass
            if self.proc.poll() is not None or time.monotonic() > deadline:
                self.stop()
                pytest.fail(f"server did not start (exit {self.proc.returncode}):\n{self.log_tail()}")
            time.sleep(0.05)

    def kill(self) -> None:
        """SIGKILL: no shutdown, no rollback by the process itself; the store recovers."""
        assert self.proc is not None
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=30)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=10)
        if self._log is not None:
            self._log.close()
            self._log = None

    def log_tail(self, n: int = 4000) -> str:
        return self.log_path.read_text(errors="replace")[-n:] if self.log_path.exists() else ""

    def internal_errors(self) -> list[str]:
        """Log lines of unexpected errors (what a 500 logs)."""
        return [line for line in self.log_tail(10**7).splitlines()
                if "unexpected error" in line or "Traceback" in line]


def replay_check(db_url: str, channels: Iterable[str]) -> dict[str, subprocess.CompletedProcess[str]]:
    """``curvekeeper replay CHANNEL --check --quiet --db URL`` for each channel, in parallel."""
    procs = {ch: subprocess.Popen([sys.executable, "-m", "curvekeeper.cli", "replay", ch, "--check", "--quiet",
                                   "--db", db_url], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for ch in channels}
    out = {}
    for ch, p in procs.items():
        stdout, stderr = p.communicate(timeout=120)
        out[ch] = subprocess.CompletedProcess(p.args, p.returncode, stdout, stderr)
    return out


def assert_replays(db_url: str, channels: Iterable[str]) -> None:
    bad = {ch: f"exit {r.returncode}: {r.stdout.strip()} {r.stderr.strip()}"
           for ch, r in replay_check(db_url, channels).items() if r.returncode != 0}
    assert not bad, f"replay --check failed: {bad}"


Triple = tuple[str, str | None, int | None]


def stored_samples(db_url: str) -> tuple[list[Triple], dict[str, tuple[int, int, list[int]]]]:
    """Every stored sample as (channel, source, source_seq), and per channel the state's
    (n_samples, version) with the sorted server ``seq`` numbers of its samples."""
    engine = create_engine(db_url)
    try:
        with engine.connect() as conn:
            rows = [(c, s, q) for c, s, q in conn.execute(
                select(Channel.id, Sample.source, Sample.source_seq).join(Channel, Channel.pk == Sample.channel_pk))]
            states = {c: (int(n), int(v)) for c, n, v in conn.execute(
                select(Channel.id, ChannelState.n_samples, ChannelState.version)
                .join(ChannelState, ChannelState.channel_pk == Channel.pk))}
            seqs: dict[str, list[int]] = {c: [] for c in states}
            for c, q in conn.execute(select(Channel.id, Sample.seq).join(Channel, Channel.pk == Sample.channel_pk)
                                     .order_by(Channel.id, Sample.seq)):
                seqs[c].append(int(q))
            assert conn.scalar(select(func.count()).select_from(Sample)) == len(rows)
    finally:
        engine.dispose()
    return rows, {c: (n, v, seqs[c]) for c, (n, v) in states.items()}


def assert_exactly_once(db_url: str, acked: set[Triple], sent: set[Triple]) -> dict[str, int]:
    """Every acknowledged sample stored exactly once, nothing stored that was not sent,
    and each channel's count, server seq numbers and state agree. Returns counts per channel."""
    rows, states = stored_samples(db_url)
    triples = set(rows)
    assert len(rows) == len(triples), f"{len(rows) - len(triples)} samples stored twice"
    missing = acked - triples
    assert not missing, f"{len(missing)} acknowledged samples are not stored, e.g. {sorted(missing)[:5]}"
    extra = triples - sent
    assert not extra, f"{len(extra)} stored samples were never sent, e.g. {sorted(extra)[:5]}"
    counts: dict[str, int] = {}
    for ch, (n, _version, seqs) in states.items():
        pairs = {(s, q) for c, s, q in rows if c == ch}
        assert n == len(seqs) == len(pairs), f"{ch}: state n_samples {n}, {len(seqs)} rows, {len(pairs)} pairs"
        assert seqs == list(range(1, n + 1)), f"{ch}: server seq numbers are not 1..{n}"
        counts[ch] = n
    return counts
