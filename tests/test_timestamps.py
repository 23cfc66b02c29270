"""Capture times kept exact: the integer nanosecond fields beside the float
seconds, and out-of-range fraction fields counted.

A float holds about 16 significant digits: an epoch time in nanoseconds has
19, so ``1709542800.369999999`` as a float reads back as ``...370.0``.
Records carry ``ts_ns`` (match, gap, overlap) and ``first_ts_ns`` /
``last_ts_ns`` (flow), integers, exact.

Outside references: scapy's ``rdpcap`` reads each record's time as an exact
decimal (``EDecimal``), the pcap and pcapng layouts are those of
draft-ietf-opsawg-pcap / draft-ietf-opsawg-pcapng (a classic record header
is seconds, fraction, captured length, original length; the fraction is
below 10**6 for microsecond files and 10**9 for nanosecond files).
"""

from __future__ import annotations

import json
import struct
import sys
from decimal import Decimal
from pathlib import Path

import pytest
from scapy.utils import rdpcap

import seamscan
from seamscan.capture import open_capture
from seamscan.replay import ReplayOptions, replay_file

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tools"))

import craft  # noqa: E402
from craft import Clock, Conversation  # noqa: E402

START = Decimal("1709542800.369999999")
TABLE = seamscan.compile(seamscan.signature_set([
    {"id": "zone", "text": "zone="}, {"id": "ok", "text": "ok"}]))


def replay_both(path):
    fast = replay_file(path, TABLE, ReplayOptions())
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SEAMSCAN_FASTPATH", "0")
        python = replay_file(path, TABLE, ReplayOptions())
    assert fast.records == python.records
    assert fast.counters == python.counters
    return fast


def conversation(start=START, step="0.000000001"):
    # many in-order segments, so that the fast lane delivers most of them
    # (of a microsecond file: C computes a nanosecond file's times in Python)
    c = Conversation(clock=Clock(start, step))
    c.handshake()
    c.send("client", b"zone=3F-east;" * 40, segments=13)
    c.send("server", b"ok;" * 30, segments=3)
    c.segment("client", 10_000, b"zone=gap")  # leaves a hole: a gap record at the end
    c.close()
    return c


def exact_ns(pkt):
    return int(Decimal(pkt.time) * 10**9)


@pytest.mark.parametrize("fmt", ["pcap", "pcapng", "pcap_usec"])
def test_nanosecond_times_are_kept_exact(tmp_path, fmt):
    usec = fmt == "pcap_usec"
    c = conversation(START.quantize(Decimal("0.000001")), "0.000001") if usec else conversation()
    path = tmp_path / f"ns.{fmt}"
    if fmt.startswith("pcap") and fmt != "pcapng":
        craft.write_pcap(path, c.packets, nano=not usec)
        theirs = [exact_ns(p) for p in rdpcap(str(path))]  # scapy's reading of the file
        assert theirs == [exact_ns(p) for p in c.packets]
    else:
        craft.write_pcapng(path, {"lab0": c.packets}, nano=True)
    want = [exact_ns(p) for p in c.packets]
    assert want[0] == (1709542800370000000 if usec else 1709542800369999999)
    result = replay_both(path)
    records = [r for r in result.records if r["type"] in ("match", "gap", "overlap")]
    assert {r["type"] for r in records} == {"match", "gap"}
    for r in records:
        assert r["ts_ns"] == want[r["frame"] - 1]
        assert r["ts"] == r["ts_ns"] / 10**9  # the float: the same time rounded once
        keys = list(r)
        assert keys[keys.index("ts") + 1] == "ts_ns"
    (flow,) = [r for r in result.records if r["type"] == "flow"]
    assert (flow["first_ts_ns"], flow["last_ts_ns"]) == (want[0], want[-1])
    line = json.dumps(records[0])
    assert json.loads(line)["ts_ns"] == records[0]["ts_ns"]  # JSON keeps an integer exact
    # the float alone would not: 1709542800.369999999 rounds to ...370.0 (the case)
    assert float(START) == 1709542800.37


def write_with_fractions(path, packets, nano, fractions):
    """A classic pcap whose record k carries fraction field fractions[k] (when given)."""
    craft.write_pcap(path, packets, nano=nano)
    data = bytearray(path.read_bytes())
    pos, k = 24, 0
    while pos < len(data):
        caplen = struct.unpack_from("<I", data, pos + 8)[0]
        if k in fractions:
            struct.pack_into("<I", data, pos + 4, fractions[k])
        pos += 16 + caplen
        k += 1
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("nano", [False, True], ids=["usec", "nsec"])
def test_out_of_range_fractions_are_counted(tmp_path, nano):
    units = 10**9 if nano else 10**6
    c = conversation()
    bad = {3: units, 5: units + 7, 20: 2**32 - 1}  # at least one second's worth: out of range
    path = tmp_path / "bad.pcap"
    write_with_fractions(path, c.packets, nano, bad)
    with open_capture(path) as reader:
        stamps = [(n, ts) for n, ts, _, _ in reader]
    for k, frac in bad.items():
        n, ts = stamps[k]
        sec = int(Decimal(c.packets[k].time))
        assert ts.ns == sec * 10**9 + frac * (10**9 // units)  # kept as sec + frac / units
    result = replay_both(path)
    assert result.counters["invalid_timestamps"] == len(bad)
    clean = tmp_path / "clean.pcap"
    craft.write_pcap(clean, c.packets, nano=nano)
    assert replay_both(clean).counters["invalid_timestamps"] == 0
    summary_from_cli(path, len(bad))


def summary_from_cli(path, invalid):
    import os
    import subprocess
    rules = path.parent / "r.toml"
    rules.write_text('[[signature]]\nid = "zone"\ntext = "zone="\n')
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    out = subprocess.run([sys.executable, "-m", "seamscan", "scan", str(path), "--rules",
                          str(rules), "--format", "jsonl"], env=env, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    summary = json.loads(out.stdout.splitlines()[-1])
    assert summary["other"]["invalid_timestamps"] == invalid
