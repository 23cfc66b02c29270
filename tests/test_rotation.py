"""Rotated captures are one capture; the replay's memory does not grow with files.

The captures given in one run are read as one continuous capture, in the
order given (``replay.replay_files``, the CLI's default): a flow that goes
on from one file into the next is one flow, its stream continuous, and a
signature whose bytes straddle the cut is found.  The oracle is the same
packets written as one file and replayed whole (itself checked against
scapy and brute force in ``test_replay.py``): every record must be the same
once its (file, frame) is mapped back to the frame of the uncut capture.

Data: random interleaved conversations (``test_fastpath.lane_capture``:
reordering, repeats, disagreeing overlaps, losses, VLAN tags, IPv6, flows
from an endpoint to itself), some IPv4 segments cut into fragments by hand
(RFC 791 §3.2: offsets in 8-byte units, MF on all but the last), all in the
documentation address ranges.
"""

from __future__ import annotations

import gc
import gzip
import json
import os
import random
import struct
import subprocess
import sys
from pathlib import Path

import pytest

import seamscan
from seamscan import fastpath
from seamscan.replay import ReplayOptions, replay_file, replay_files

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from test_fastpath import LANE_SIGS, lane_capture, pcap_bytes  # noqa: E402

LIMITS = [{}, {"tcp_idle": 2, "udp_idle": 1}, {"max_flows": 3},
          {"keep_bytes": 0, "hold_bytes": 4, "hold_total": 9}]


def fragment(frame: bytes, rng) -> list[bytes]:
    """An untagged Ethernet + IPv4 frame (no options) cut into fragments at
    random multiples of 8 bytes of its IP payload (RFC 791 §3.2), DF cleared,
    header checksum left 0 (the replay does not verify it); other frames as
    they are."""
    if frame[12:14] != b"\x08\x00" or frame[14] != 0x45:
        return [frame]
    total = struct.unpack_from("!H", frame, 16)[0]
    payload = frame[34:14 + total]
    if len(payload) < 16:
        return [frame]
    cuts = sorted({8 * rng.randrange(1, (len(payload) - 1) // 8 + 1)
                   for _ in range(rng.randrange(1, 3))})
    out = []
    for lo, hi in zip([0, *cuts], [*cuts, len(payload)], strict=True):
        hdr = bytearray(frame[14:34])
        struct.pack_into("!H", hdr, 2, 20 + hi - lo)
        struct.pack_into("!H", hdr, 6, (0x2000 if hi < len(payload) else 0) | lo // 8)
        struct.pack_into("!H", hdr, 10, 0)
        out.append(frame[:14] + bytes(hdr) + payload[lo:hi])
    if rng.random() < 0.3:
        out.reverse()
    return out


def messy_records(rng):
    recs = []
    for sec, usec, frame in lane_capture(rng, rng.randrange(2, 10)):
        pieces = fragment(frame, rng) if rng.random() < 0.15 else [frame]
        recs += [(sec, usec, p) for p in pieces]
    return recs


def write_piece(path: Path, recs, rng):
    """One file of the ring: classic pcap, either byte order, sometimes gzipped."""
    data = pcap_bytes(recs, big=rng.random() < 0.5)
    if rng.random() < 0.25:
        path = path.with_name(path.name + ".gz")
        data = gzip.compress(data, compresslevel=1)
    path.write_bytes(data)
    return path


def global_frames(records, bases):
    """Records with (file, frame) replaced by the frame of the uncut capture;
    flow records lose ``file`` (the file being read when the flow ended)."""
    out = []
    for r in records:
        r = dict(r)
        if r["type"] == "flow":
            del r["file"]
        elif "frame" in r:
            r["frame"] += bases[r.pop("file")]
        out.append(r)
    return out


def rings(tmp_path, rng, trial):
    recs = messy_records(rng)
    whole = tmp_path / f"whole{trial}.pcap"
    whole.write_bytes(pcap_bytes(recs))
    cuts = sorted(rng.sample(range(len(recs) + 1), min(len(recs) + 1, rng.randrange(1, 5))))
    pieces, bases, lo = [], {}, 0
    for k, hi in enumerate([*cuts, len(recs)]):
        if hi < lo:
            continue
        path = write_piece(tmp_path / f"ring{trial}.pcap{k}", recs[lo:hi], rng)
        pieces.append(path)
        bases[str(path)] = lo
        lo = hi
    return whole, pieces, bases


@pytest.mark.parametrize("fast", ["0", "1"])
def test_a_ring_cut_anywhere_gives_the_records_of_the_uncut_capture(tmp_path, monkeypatch, fast):
    monkeypatch.setenv("SEAMSCAN_FASTPATH", fast)
    table = seamscan.compile(LANE_SIGS)
    rng = random.Random(20261205)
    crossing = 0
    for trial in range(60):
        whole, pieces, bases = rings(tmp_path, rng, trial)
        options = ReplayOptions(**LIMITS[trial % len(LIMITS)])
        one = replay_file(whole, table, options)
        results = list(replay_files(pieces, table, options))
        got = global_frames([r for res in results for r in res.records], bases)
        want = global_frames(one.records, {str(whole): 0})
        assert got == want, trial
        total = seamscan.replay.Counter()
        for res in results:
            seamscan.replay.add_counters(total, res.counters)
            assert res.error is None
        for key, value in one.counters.items():
            assert total[key] == (len(pieces) if key == "files" else value), (trial, key)
        # matches that straddle a cut: bytes before it, completed after it
        starts = sorted(bases.values())
        crossing += sum(1 for r in want if r["type"] == "match"
                        and any(r["frame"] > s for s in starts[1:]))
    assert crossing > 100  # the cuts did fall inside flows and signatures


def test_each_file_still_replays_files_apart(tmp_path):
    table = seamscan.compile(LANE_SIGS)
    rng = random.Random(5)
    whole, pieces, bases = rings(tmp_path, rng, 0)
    apart = [r for p in pieces for r in replay_file(p, table).records]
    files = {r["file"] for r in apart if "file" in r}
    assert files <= {str(p) for p in pieces}
    # each file's frames count from 1
    for p in pieces:
        frames = [r["frame"] for r in apart if r.get("file") == str(p) and "frame" in r]
        assert not frames or min(frames) >= 1


def test_a_damaged_file_in_the_ring_ends_there_and_the_next_carries_on(tmp_path):
    # one HTTP-like conversation over three files; the middle one is cut
    # inside a record: the replay reports the damage, keeps what came
    # before, and the flow goes on in the third file after a gap
    from test_fastpath import raw_frame

    src, dst = bytes([192, 0, 2, 10]), bytes([198, 51, 100, 21])
    seq = 1000
    frames = [raw_frame(False, 6, src, dst, 40100, 80, seq, 0x02, b"")]
    seq += 1
    body = [b"PUT /zone", b"/3 HTTP/1.1\r\n", b"X: 1\r\n", b"COMMIT\r\n"]
    for chunk in body:
        frames.append(raw_frame(False, 6, src, dst, 40100, 80, seq, 0x18, chunk))
        seq += len(chunk)
    frames.append(raw_frame(False, 6, src, dst, 40100, 80, seq, 0x11, b""))
    recs = [(1_700_000_000, i, f) for i, f in enumerate(frames)]
    a = tmp_path / "ring.pcap1"
    b = tmp_path / "ring.pcap2"
    c = tmp_path / "ring.pcap3"
    a.write_bytes(pcap_bytes(recs[:2]))
    b.write_bytes(pcap_bytes(recs[2:4])[:-3])  # the record of b"X: 1\r\n" is cut
    c.write_bytes(pcap_bytes(recs[4:]))
    out = subprocess.run([sys.executable, "-m", "seamscan", "scan", str(a), str(b), str(c),
                          "--rules", str(write_rules(tmp_path))],
                         capture_output=True, text=True)
    assert out.returncode == 3, out.stderr
    recs_out = [json.loads(line) for line in out.stdout.splitlines()]
    kinds = [r["type"] for r in recs_out]
    assert kinds.count("error") == 1
    matches = {r["sig"]: r for r in recs_out if r["type"] == "match"}
    assert matches["head-sig"]["file"] == str(a) and matches["head-sig"]["start"] == 0
    assert matches["tail-sig"]["file"] == str(c) and matches["tail-sig"]["frame"] == 1
    # its offset is that of the one stream: PUT /zone/3 HTTP/1.1\r\nX: 1\r\n is 28 bytes
    assert matches["tail-sig"]["start"] == 28
    gaps = [r for r in recs_out if r["type"] == "gap"]
    assert [(g["start"], g["end"]) for g in gaps] == [(22, 28)]
    flows = [r for r in recs_out if r["type"] == "flow"]
    # only the client's FIN was sent: the flow is live at the end of the ring
    assert len(flows) == 1 and flows[0]["end"] == "capture_end"


def write_rules(tmp_path):
    path = tmp_path / "ring-rules.toml"
    path.write_text('[[signature]]\nid = "tail-sig"\ntext = "COMMIT"\n\n'
                    '[[signature]]\nid = "head-sig"\ntext = "PUT /zone"\n', encoding="utf-8")
    return path


def test_jobs_needs_each_file(tmp_path):
    cap = tmp_path / "a.pcap"
    cap.write_bytes(pcap_bytes([]))
    out = subprocess.run([sys.executable, "-m", "seamscan", "scan", str(cap), str(cap),
                          "--rules", str(write_rules(tmp_path)), "--jobs", "2"],
                         capture_output=True, text=True)
    assert out.returncode == 2 and "--each-file" in out.stderr
    assert "Traceback" not in out.stderr


# --- memory -------------------------------------------------------------------

def test_a_replay_frees_its_fast_lane_without_the_cycle_collector(tmp_path, monkeypatch):
    # The lane and the tracker refer to each other; the replay must free the
    # lane's C tables when it ends, not when the cyclic collector runs.
    monkeypatch.setenv("SEAMSCAN_FASTPATH", "1")
    table = seamscan.compile(LANE_SIGS)
    rng = random.Random(3)
    path = tmp_path / "a.pcap"
    path.write_bytes(pcap_bytes(lane_capture(rng, 4)))
    assert fastpath.live_lanes() == 0
    gc.disable()
    try:
        for _ in range(20):
            replay_file(path, table)
            assert fastpath.live_lanes() == 0
        for _ in replay_files([path] * 5, table):
            assert fastpath.live_lanes() == 1  # one lane for the whole ring
        assert fastpath.live_lanes() == 0
    finally:
        gc.enable()


MEMORY_RUN = r"""
import resource, sys
from seamscan.cli import main
code = main(sys.argv[2:])
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, file=sys.stderr)
sys.exit(code)
"""


@pytest.mark.parametrize("each_file", [False, True])
def test_two_thousand_files_peak_like_one(tmp_path, each_file):
    # Peak resident memory (getrusage, kilobytes on Linux) of a run over
    # 2,000 small files stays within 1.5x of a run over one of them.
    rng = random.Random(11)
    path = tmp_path / "small.pcap"
    path.write_bytes(pcap_bytes(lane_capture(rng, 2)))
    rules = tmp_path / "r.toml"
    rules.write_text('[[signature]]\nid = "ab"\ntext = "ab"\n', encoding="utf-8")
    extra = ["--each-file"] if each_file else []

    def peak(n):
        args = ["scan", *[str(path)] * n, "--rules", str(rules), "-o", os.devnull,
                "--quiet", *extra]
        done = subprocess.run([sys.executable, "-c", MEMORY_RUN, "x", *args],
                              capture_output=True, text=True, timeout=600)
        assert done.returncode == 0, done.stderr[-2000:]
        return int(done.stderr.strip().splitlines()[-1])

    one, many = peak(1), peak(2000)
    assert many <= 1.5 * one, (one, many)
