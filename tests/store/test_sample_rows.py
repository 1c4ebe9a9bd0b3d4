"""The ingest write (``Repository.insert_samples``): one statement a run of samples (an
executemany on SQLite, a COPY on PostgreSQL, whose text the repository builds itself), read
back column for column as written, on both stores: text with COPY's escape characters,
nulls, the extremes of the numbers the API takes, times in several offsets."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import numpy as np
from curvekeeper.actions import channels
from curvekeeper.actions.unit import Work
from curvekeeper.store import Store
from curvekeeper.store.repository import SampleRows

from tests.conftest import LINEAR

ODD_TEXT = "gw\t3 \\N \\\\ a\nb\rc é"


def test_a_run_of_samples_reads_back_as_written(database_url: str) -> None:
    store = Store(database_url)
    try:
        with Work(store).unit(write=True) as unit:
            channels.create(unit.repo, {"id": "site-a.p1", **LINEAR}, "k_test")
            st = unit.repo.learning_state("site-a.p1")
            assert st is not None
            pk = st.channel_pk
        received = datetime(2026, 12, 1, 10, 0, 0, 123456, tzinfo=UTC)
        east, west = timezone(timedelta(hours=2)), timezone(timedelta(hours=-5))
        times = [datetime(2026, 12, 1, 9, 0, tzinfo=UTC), datetime(2026, 12, 1, 11, 30, tzinfo=east),
                 datetime(1970, 1, 1, tzinfo=UTC), datetime(2026, 12, 1, 4, 0, 0, 1, tzinfo=west)]
        x = np.array([[1.5], [-0.0], [9.9e37], [1e-300]])
        rows = SampleRows(
            channel_pk=pk, first_seq=41, first_version=7, source=ODD_TEXT, source_seqs=[5, None, 2**62, 0],
            times=times, received_at=received, x=x, y=[0.1, -1e15, 1e15, 2.0 / 3.0],
            residual=[0.25, None, -1e-300, 1e300], drift_statistic=[0.0, 1.5, float("inf"), -2.75],
            status=["accepted", "outlier", "out_of_range", "accepted"], references=[None, ODD_TEXT, "ref.1", None])
        with Work(store).unit(write=True) as unit:
            unit.repo.insert_samples(rows)
        with store.transaction(write=False) as repo:
            got = repo.list_samples(pk, after_seq=None, limit=10)
        assert [r.seq for r in got] == [41, 42, 43, 44]
        assert [r.version for r in got] == [7, 8, 9, 10]
        assert [r.source for r in got] == [ODD_TEXT] * 4
        assert [r.source_seq for r in got] == [5, None, 2**62, 0]
        assert [r.t for r in got] == times  # the same instants (stored in UTC)
        assert all(r.t.utcoffset() == timedelta(0) and r.received_at == received for r in got)
        assert [r.x for r in got] == x.tolist()
        assert [r.y for r in got] == rows.y
        assert [r.residual for r in got] == rows.residual
        assert [r.drift_statistic for r in got] == rows.drift_statistic
        assert [r.accepted for r in got] == [True, False, False, True]
        assert [r.reason for r in got] == [None, "outlier", "out_of_range", None]
        assert [r.reference for r in got] == [None, ODD_TEXT, "ref.1", None]
    finally:
        store.dispose()


def test_a_run_without_source_numbers_or_references(database_url: str) -> None:
    store = Store(database_url)
    try:
        with Work(store).unit(write=True) as unit:
            channels.create(unit.repo, {"id": "site-a.p2", **LINEAR}, "k_test")
            st = unit.repo.learning_state("site-a.p2")
            assert st is not None
        now = datetime(2026, 12, 1, 10, 0, tzinfo=UTC)
        n = 2_500
        rows = SampleRows(channel_pk=st.channel_pk, first_seq=1, first_version=1, source=None, source_seqs=None,
                          times=[now] * n, received_at=now, x=np.linspace(0.0, 100.0, 2 * n).reshape(n, 2),
                          y=[float(i) for i in range(n)], residual=[None] * n, drift_statistic=[0.5] * n,
                          status=["accepted"] * n, references=None)
        with Work(store).unit(write=True) as unit:
            unit.repo.insert_samples(rows)
        with store.transaction(write=False) as repo:
            got = repo.list_samples(st.channel_pk, after_seq=None, limit=n + 1)
        assert len(got) == n
        assert [r.x for r in got] == rows.x.tolist()
        assert {(r.source, r.source_seq, r.reference, r.residual) for r in got} == {(None, None, None, None)}
    finally:
        store.dispose()
