"""Durable state of the live service without a broker: the input journal, checkpoints and the outbox."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from streamguard.journal import HEADER, JournalWriter, Position, read_journal, segments
from streamguard.pipeline import Pipeline
from streamguard.sinks.outbox import Outbox
from streamguard.state import CheckpointStore
from streamguard.types import Batch

from .helpers import SECOND, make_config

START = Position(1, 0)


def _records(directory: Path, start: Position = START, end: Position | None = None) -> list[tuple]:
    return [(r.topic, r.payload, r.received_ns, r.retained) for r in read_journal(directory, start, end)]


def test_journal_round_trip_across_segments(tmp_path: Path) -> None:
    writer = JournalWriter(tmp_path, segment_bytes=4096)
    written = [(f"plant/a/T{i % 7}", os.urandom(i % 300), 1_000 + i, i % 5 == 0) for i in range(400)]
    ends = [writer.append(t.encode(), p, r, k) for t, p, r, k in written]
    assert len(segments(tmp_path)) > 5
    assert _records(tmp_path) == written
    # Reading from a middle position gives exactly the records after it, up to an end position.
    assert _records(tmp_path, ends[99], ends[249]) == written[100:250]
    assert ends == sorted(ends)
    writer.close()


def test_journal_reopens_after_the_last_intact_record(tmp_path: Path) -> None:
    writer = JournalWriter(tmp_path)
    for i in range(10):
        writer.append(b"t/x", b"payload-%d" % i, i, False)
    end = writer.end
    writer.close()
    # A crash while writing the 11th record: its bytes land, its header (written last) does not.
    path = tmp_path / f"{end.segment:012d}.journal"
    with path.open("r+b") as handle:
        handle.seek(end.offset + HEADER.size)
        handle.write(b"t/xpartial payload")
    reopened = JournalWriter(tmp_path)
    assert reopened.end == end
    reopened.append(b"t/x", b"after", 99, True)
    records = _records(tmp_path)
    assert len(records) == 11 and records[-1] == ("t/x", b"after", 99, True)
    # A corrupted record (bad checksum) ends the journal there.
    reopened.close()
    with path.open("r+b") as handle:
        handle.seek(HEADER.size + 2)
        handle.write(b"X")
    assert _records(tmp_path) == []


def test_journal_drops_only_segments_before_a_position(tmp_path: Path) -> None:
    writer = JournalWriter(tmp_path, segment_bytes=2048)
    ends = [writer.append(b"t/x", bytes(200), i, False) for i in range(60)]
    keep_from = ends[30]
    writer.drop_before(keep_from)
    assert min(segments(tmp_path)) == keep_from.segment
    assert [r[2] for r in _records(tmp_path, keep_from)] == list(range(31, 60))
    writer.close()


def _stream(seed: int, n: int) -> Batch:
    rng = np.random.default_rng(seed)
    tag = rng.integers(0, 3, n).astype(np.int32)
    ts = (1_800_000_000 + np.arange(n)) * SECOND
    value = rng.normal(0, 1, n) + np.where(np.arange(n) > n // 3, 0.8, 0.0)  # a shift CUSUM builds up to
    return Batch.of(tag, ts, value)


def test_checkpoint_round_trip_resumes_exactly(tmp_path: Path) -> None:
    """A CUSUM halfway to h stays halfway: events after a save/load equal those of an uninterrupted run."""
    config = make_config({"cusum": {"k": 0.5, "h": 5.0}, "ewma": {"lambda": 0.2, "L": 2.7},
                          "shewhart": {"rules": ["we1", "we2"]}}, {"max_gap": "30s"})  # fmt: skip
    batch = _stream(5, 3000)
    whole = Pipeline(config)
    whole.tags.lookup(["T0", "T1", "T2"])
    expected = [e.to_dict() for e in whole.process(batch)]

    first = Pipeline(config)
    first.tags.lookup(["T0", "T1", "T2"])
    cut = 1234
    events = [e.to_dict() for e in first.process(batch.slice(0, cut))]
    store = CheckpointStore(tmp_path / "checkpoint.sqlite")
    store.save(first.snapshot(), Position(3, 77), extra_arrays={"recent": np.arange(6).reshape(3, 2)},
               extra={"board": {"T1": {"detectors": {}}}})  # fmt: skip
    store.close()

    loaded = CheckpointStore(tmp_path / "checkpoint.sqlite").load()
    assert loaded is not None
    assert loaded.position == Position(3, 77)
    assert loaded.extra == {"board": {"T1": {"detectors": {}}}}
    assert loaded.extra_arrays["recent"].tolist() == [[0, 1], [2, 3], [4, 5]]
    second = Pipeline(config)
    assert second.restore(loaded.snapshot) == []
    events += [e.to_dict() for e in second.process(batch.slice(cut, len(batch)))]
    assert any(e["detector"] == "cusum" for e in expected)
    assert sorted(events, key=lambda e: (e["ts"], e["id"])) == sorted(expected, key=lambda e: (e["ts"], e["id"]))


def test_checkpoint_from_other_settings_restarts_statistics_and_says_which(tmp_path: Path) -> None:
    first = Pipeline(make_config({"cusum": {"h": 5.0}}))
    first.tags.lookup(["T0", "T1"])
    first.process(_stream(1, 200).slice(0, 200))
    store = CheckpointStore(tmp_path / "c.sqlite")
    store.save(first.snapshot(), Position(1, 0))
    loaded = store.load()
    assert loaded is not None
    other = Pipeline(make_config({"cusum": {"h": 6.0}}))
    assert sorted(other.restore(loaded.snapshot)) == ["T0", "T1"]
    # Counters are kept (nothing counted is lost); detector state starts over.
    assert other.counters.samples[:2].sum() == first.counters.samples[:2].sum()


def test_only_the_newest_checkpoint_is_kept(tmp_path: Path) -> None:
    pipeline = Pipeline(make_config())
    store = CheckpointStore(tmp_path / "c.sqlite")
    for k in range(3):
        store.save(pipeline.snapshot(), Position(1, k))
    loaded = store.load()
    assert loaded is not None and loaded.position == Position(1, 2)
    count = store._db.execute("SELECT COUNT(*) FROM checkpoint").fetchone()[0]
    assert count == 1


def test_outbox_keeps_order_ignores_repeated_keys_and_counts_the_backlog(tmp_path: Path) -> None:
    outbox = Outbox(tmp_path / "outbox.sqlite")
    new = outbox.add([("e1", "a/1", b"1", False), ("e2", "a/2", b"2", False), ("s1", "s/1", b"s", True)])
    assert new == [True, True, True] and outbox.backlog == 3
    assert outbox.add([("e2", "a/2", b"2", False), ("e3", "a/3", b"3", False)]) == [False, True]
    rows = outbox.pending(0, 10)
    assert [r.topic for r in rows] == ["a/1", "a/2", "s/1", "a/3"]
    assert [r.seq for r in rows] == sorted(r.seq for r in rows) and rows[2].retain
    outbox.mark_acked([rows[0].seq, rows[2].seq])
    assert outbox.backlog == 2
    assert [r.topic for r in outbox.pending(0, 10)] == ["a/2", "a/3"]
    assert [r.topic for r in outbox.pending(rows[1].seq, 10)] == ["a/3"]
    assert outbox.known(["e1", "e9", "s1"]) == {"e1", "s1"}
    outbox.close()
    # A restart finds the same backlog, in the same order.
    again = Outbox(tmp_path / "outbox.sqlite")
    assert again.backlog == 2 and [r.topic for r in again.pending(0, 10)] == ["a/2", "a/3"]
    assert again.prune(acked_before_ns=2**62) == 2  # acknowledged rows only
    assert again.backlog == 2
