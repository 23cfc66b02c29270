"""Match records are streamed: memory stays bounded however dense the matches.

A stream of one repeated byte under nested signatures (``a``, ``aa``, ...)
completes a match of every signature at almost every byte.  The replay must
hand each record to its output as it is made, never holding a batch's
matches: peak memory is measured with ``tracemalloc`` (never time), and the
records are checked against a count by arithmetic (a run of n equal bytes
holds n - k + 1 occurrences of k of them, overlapping: common practice).
"""

from __future__ import annotations

import sys
import tracemalloc
from pathlib import Path

import pytest

import seamscan
from seamscan.replay import replay_file

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from test_fastpath import pcap_bytes, raw_frame  # noqa: E402

NESTED = 8


@pytest.mark.parametrize("fast", ["0", "1"])
def test_dense_matches_are_streamed(tmp_path, monkeypatch, fast):
    monkeypatch.setenv("SEAMSCAN_FASTPATH", fast)
    sigset = seamscan.signature_set([{"id": f"a{k}", "text": "a" * k}
                                     for k in range(1, NESTED + 1)])
    table = seamscan.compile(sigset)
    src, dst = bytes([192, 0, 2, 10]), bytes([198, 51, 100, 21])
    seg, nseg = 1400, 100
    frames = [raw_frame(False, 6, src, dst, 40100, 80, 999, 0x02, b"")]
    frames += [raw_frame(False, 6, src, dst, 40100, 80, 1000 + i * seg, 0x18, b"a" * seg)
               for i in range(nseg)]
    path = tmp_path / "dense.pcap"
    path.write_bytes(pcap_bytes([(1_700_000_000, i, f) for i, f in enumerate(frames)]))
    n = seg * nseg
    want = sum(n - k + 1 for k in range(1, NESTED + 1))
    seen = [0, -1]

    def emit(rec):
        if rec["type"] == "match":
            seen[0] += 1
            assert rec["end"] >= seen[1]  # in stream order
            seen[1] = rec["end"]

    tracemalloc.start()
    try:
        result = replay_file(path, table, emit=emit)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert seen[0] == want == result.counters["matches"]
    # 1.1 million matches; holding them as tuples would take hundreds of MB
    assert peak < 40 * 2**20, peak
