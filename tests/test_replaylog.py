"""Replay log: round trip, damage reporting with offsets, truncation anywhere, rotation,
write-failure policy, and a real kill -9 of a recording process."""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from wingwatch.daemon import recorder as recmod
from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.errors import LogFormatError
from wingwatch.daemon.recorder import LogWriter


def _write(path: Path, n: int, **kw) -> list[bytes]:
    payloads = [f"payload-{i:05d}".encode() * (1 + i % 7) for i in range(n)]
    with LogWriter(path=path, header={"config": {"x": 1}}, start_unix=0.0, **kw) as w:
        for i, p in enumerate(payloads):
            w.append(rl.KIND_INBOUND if i % 3 else rl.KIND_REJECTED, b"sensor.rig", p, float(i),
                     aux=i % 3)
    return payloads


def test_round_trip(tmp_path):
    p = tmp_path / "a.wwlog"
    payloads = _write(p, 200)
    r = rl.LogReader.open(p)
    recs = list(r)
    assert [x.payload for x in recs] == payloads
    assert [x.t_recv for x in recs] == [float(i) for i in range(200)]
    assert r.header["config"] == {"x": 1} and r.header["software"] == "wingwatch"
    assert not r.damage


def test_fixed_start_gives_identical_bytes(tmp_path):
    _write(tmp_path / "a.wwlog", 50)
    _write(tmp_path / "b.wwlog", 50)
    assert (tmp_path / "a.wwlog").read_bytes() == (tmp_path / "b.wwlog").read_bytes()


def test_flipped_byte_is_reported_with_offset_and_reading_carries_on(tmp_path):
    p = tmp_path / "a.wwlog"
    payloads = _write(p, 100)
    offsets = [x.offset for x in rl.LogReader.open(p)]
    data = bytearray(p.read_bytes())
    victim = 40
    data[offsets[victim] + 30] ^= 0xFF  # inside record 40's body
    r = rl.LogReader.from_bytes(bytes(data))
    recs = list(r)
    assert [x.payload for x in recs] == payloads[:victim] + payloads[victim + 1:]
    assert len(r.corrupt) == 1 and r.corrupt[0].offset == offsets[victim]
    assert r.corrupt[0].length == offsets[victim + 1] - offsets[victim]
    assert not r.truncated_tail


def test_corrupt_length_field_resyncs(tmp_path):
    p = tmp_path / "a.wwlog"
    payloads = _write(p, 30)
    offsets = [x.offset for x in rl.LogReader.open(p)]
    data = bytearray(p.read_bytes())
    data[offsets[10] + 8:offsets[10] + 12] = (10**8).to_bytes(4, "little")  # absurd length
    r = rl.LogReader.from_bytes(bytes(data))
    assert [x.payload for x in r] == payloads[:10] + payloads[11:]
    assert [d.offset for d in r.corrupt] == [offsets[10]]


def test_cut_at_every_byte_of_the_tail_keeps_every_complete_record(tmp_path):
    p = tmp_path / "a.wwlog"
    payloads = _write(p, 12)
    data = p.read_bytes()
    offsets = [x.offset for x in rl.LogReader.open(p)] + [len(data)]
    for cut in range(offsets[8], len(data)):
        r = rl.LogReader.from_bytes(data[:cut])
        recs = list(r)
        complete = sum(1 for i in range(12) if offsets[i + 1] <= cut)
        assert [x.payload for x in recs] == payloads[:complete], cut
        assert r.truncated_tail == (cut not in offsets), cut
        assert not r.corrupt, cut


def test_bad_magic_version_header(tmp_path):
    p = tmp_path / "x.wwlog"
    p.write_bytes(b"not a log at all")
    with pytest.raises(LogFormatError, match="bad magic"):
        list(rl.LogReader.open(p))
    good = tmp_path / "g.wwlog"
    _write(good, 1)
    data = bytearray(good.read_bytes())
    data[8] = 9  # format version 9
    p.write_bytes(bytes(data))
    with pytest.raises(LogFormatError, match="version 9"):
        list(rl.LogReader.open(p))
    data = bytearray(good.read_bytes())
    data[20] ^= 0x55  # inside the header map
    p.write_bytes(bytes(data))
    with pytest.raises(LogFormatError, match="checksum"):
        list(rl.LogReader.open(p))
    with pytest.raises(LogFormatError, match="not found"):
        rl.LogReader.open(tmp_path / "missing.wwlog")


def test_rotation_segments_each_read_alone_and_together(tmp_path):
    w = LogWriter(directory=tmp_path, header={"config": {}}, rotate_bytes=4096, start_unix=0.0)
    payloads = [bytes([i % 256]) * 300 for i in range(60)]
    for i, p in enumerate(payloads):
        w.append(rl.KIND_INBOUND, b"sensor.rig", p, float(i))
    w.close()
    segs = sorted(w.run_dir.glob("segment-*.wwlog"))
    assert len(segs) >= 4 and segs == w.paths
    assert w.run_dir.name == "ww-19700101T000000Z"
    heads = []
    for s in segs:
        r = rl.LogReader.open(s)
        list(r)
        heads.append(r.header["segment"])
        assert s.stat().st_size <= 4096 + 400
    assert heads == list(range(len(segs)))
    assert [x.payload for x in rl.LogReader.open(w.run_dir)] == payloads


def test_write_failure_is_queued_loudly_and_recovered(tmp_path, monkeypatch):
    w = LogWriter(path=tmp_path / "a.wwlog", header={}, start_unix=0.0, backlog_bytes=2000)
    w.append(rl.KIND_INBOUND, b"t", b"first", 0.0)
    real_write = os.write
    full = {"on": True}

    def fake_write(fd, data):
        if full["on"] and fd == w.fd:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_write(fd, data)

    monkeypatch.setattr(recmod.os, "write", fake_write)
    assert w.append(rl.KIND_INBOUND, b"t", b"second", 1.0) is False
    assert w.failing and "No space" in w.stats().last_error
    for i in range(100):  # more than the backlog holds: counted as dropped, never silently
        w.append(rl.KIND_INBOUND, b"t", b"x" * 50, 2.0 + i)
    st = w.stats()
    assert st.backlog_records > 0 and st.dropped_records > 0
    assert st.backlog_records + st.dropped_records == 101
    full["on"] = False
    w.append(rl.KIND_INBOUND, b"t", b"after", 200.0)
    assert not w.failing
    w.close()
    got = [x.payload for x in rl.LogReader.open(tmp_path / "a.wwlog")]
    assert got[:2] == [b"first", b"second"] and got[-1] == b"after"
    assert len(got) == 2 + (st.backlog_records - 1) + 1


WRITER_SCRIPT = textwrap.dedent(
    """
    import sys
    from wingwatch.daemon import replaylog as rl
    from wingwatch.daemon.recorder import LogWriter
    w = LogWriter(path=sys.argv[1], header={"config": {}}, fsync_interval_s=10.0)
    i = 0
    while True:
        w.append(rl.KIND_INBOUND, b"sensor.rig", i.to_bytes(8, "little") * 40, float(i))
        i += 1
        if i % 2000 == 0:
            print(i, flush=True)
    """
)


@pytest.mark.parametrize("after", [2000, 6000])
def test_kill_9_mid_write_leaves_a_readable_log(tmp_path, after):
    p = tmp_path / "killed.wwlog"
    proc = subprocess.Popen([sys.executable, "-c", WRITER_SCRIPT, str(p)], stdout=subprocess.PIPE,
                            text=True)
    try:
        deadline = time.monotonic() + 60
        reported = 0
        while reported < after and time.monotonic() < deadline:
            line = proc.stdout.readline()
            if not line:
                break
            reported = int(line)
        os.kill(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=10)
    assert proc.returncode == -signal.SIGKILL
    assert reported >= after
    r = rl.LogReader.open(p)
    recs = list(r)
    # Every record the writer had appended before it said so reads back, in order, intact.
    assert len(recs) >= reported
    assert [int.from_bytes(x.payload[:8], "little") for x in recs] == list(range(len(recs)))
    assert all(x.payload == x.payload[:8] * 40 for x in recs)
    assert not r.corrupt
