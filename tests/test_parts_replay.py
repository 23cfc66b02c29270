"""Multi-part signatures through a capture replay: parts cut across TCP
segments, segments out of order, and a gap (bytes never captured) in the
middle of a chain.  Captures are crafted with scapy (``tools/craft.py``);
the expected matches come from the brute force on each side's stream,
``tests/re_oracle.py`` (Python's ``re``, the contract's own definition).
Every replay runs with the C fast lane and again with it off
(``SEAMSCAN_FASTPATH=0``, the pure-Python reference): same records.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

import re_oracle
import seamscan
from seamscan.replay import ReplayOptions, replay_file

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tools"))
import craft  # noqa: E402
from craft import Conversation  # noqa: E402

SIGS = [
    {"id": "force-commit", "fold_case": True,
     "part": [{"hex": "a5 5a ?? 06"}, {"text": "FORCE", "spacing": [0, 40]},
              {"text": "COMMIT", "spacing": [0, "any"], "fold_case": False}]},
    {"id": "set-then-ok", "part": [{"text": "set="}, {"hex": "6f 6b <0d 0a>", "spacing": [1, 8]}]},
    {"id": "zone-digit", "hex": "7a 3d <30-39> <30-39>"},
]
STREAM = (b"hello \xa5\x5a\x11\x06 write force=1 then COMMIT; set=21 ok\n"
          b"\xa5\x5a\x12\x06" + b"." * 50 + b"FORCE COMMIT z=42 set=1ok\r zone z=7x")


def _replay(path, table):
    result = replay_file(path, table, ReplayOptions())
    assert result.error is None, result.error
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SEAMSCAN_FASTPATH", "0")
        python = replay_file(path, table, ReplayOptions())
    assert python.records == result.records
    assert python.counters == result.counters
    return result


def _hits(result):
    return [(r["sig"], r["start"], r["end"]) for r in result.records
            if r["type"] == "match" and r["side"] == "client"]


def test_expected_stream_has_every_kind():
    # the oracle finds each signature, and one chain that misses its bound
    want = re_oracle.matches(SIGS, STREAM)
    assert {m[0] for m in want} == {"force-commit", "set-then-ok", "zone-digit"}
    # the second header's FORCE is 50 bytes on (over 40): the last COMMIT
    # extends the first chain, which still starts at the first header
    assert [m for m in want if m[0] == "force-commit"] == [("force-commit", 6, 36),
                                                           ("force-commit", 6, 114)]


@pytest.mark.parametrize("segments,order", [
    (1, None),
    (3, "reverse"),
    ([7, 5, 30, 2, 9, 40, len(STREAM) - 93], [3, 0, 6, 1, 5, 2, 4]),
])
def test_parts_across_segments_and_reordering(tmp_path, segments, order):
    table = seamscan.compile(seamscan.signature_set(SIGS))
    c = Conversation()
    c.handshake()
    n = len(segments) if isinstance(segments, list) else -(-len(STREAM) // segments)
    c.send("client", STREAM, segments=segments,
           order=list(range(n))[::-1] if order == "reverse" else order)
    c.close()
    path = tmp_path / "parts.pcap"
    craft.write_pcap(path, c.packets)
    assert _hits(_replay(path, table)) == re_oracle.matches(SIGS, STREAM)


def test_no_chain_spans_a_gap(tmp_path):
    # Part 1 and 2 before the lost bytes, part 3 after: no match; a whole
    # chain after the gap matches at its sequence-based offsets.
    before = b"\xa5\x5a\x01\x06 FORCE "
    lost = b"?" * 10
    after = b"COMMIT " + b"\xa5\x5a\x02\x06FORCE COMMIT"
    table = seamscan.compile(seamscan.signature_set(SIGS))
    c = Conversation()
    c.handshake()
    c.send("client", before)
    c.next[0] += len(lost)  # never captured
    c.send("client", after, segments=5)
    c.close()
    path = tmp_path / "gap.pcap"
    craft.write_pcap(path, c.packets)
    result = _replay(path, table)
    base = len(before) + len(lost)
    want = [(sid, s + base, e + base) for sid, s, e in re_oracle.matches(SIGS, after)]
    assert want == [("force-commit", base + 7, base + len(after))]
    assert _hits(result) == want
    # without the gap the first chain would have matched
    assert re_oracle.matches(SIGS[:1], before + after)[0] == ("force-commit", 0, len(before) + 6)


def test_rate_counts_parts_and_near_misses(tmp_path):
    # Each part's occurrences, the chains that reached it and those that got
    # no further, from a capture; the expected counts are the oracle's on
    # the client stream (Python's re), probe by probe.
    from seamscan import evaluate, report

    sigs = [{"id": "three", "part": [{"text": "AB"}, {"text": "CD", "spacing": [0, 3]},
                                     {"hex": "45 <30-39>", "spacing": [0, "any"]}]},
            {"id": "plain", "text": "CD"}]
    stream = b"AB xx CD AB CD E1 AB CD ABCD E AB"
    c = Conversation()
    c.handshake()
    c.send("client", stream, segments=4)
    c.close()
    path = tmp_path / "rate.pcap"
    craft.write_pcap(path, c.packets)
    rep = evaluate.rate([path], seamscan.signature_set(sigs))
    (three, plain) = rep["signatures"]
    assert plain["parts"] is None
    count = lambda *s: len(re_oracle.matches(list(s), stream))  # noqa: E731
    ab, cd, e = ({"id": "x", "text": "AB"}, {"id": "x", "text": "CD"},
                 {"id": "x", "hex": "45 <30-39>"})
    to_cd = {"id": "x", "part": sigs[0]["part"][:2]}
    want_reached = [count(ab), count(to_cd), count(sigs[0])]
    assert [p["occurred"] for p in three["parts"]] == [count(ab), count(cd), count(e)]
    assert [p["reached"] for p in three["parts"]] == want_reached
    assert [p["near_misses"] for p in three["parts"]] == [
        want_reached[0] - want_reached[1], want_reached[1] - want_reached[2], 0]
    assert want_reached == [5, 3, 1] and three["matches"] == 1
    assert [p["pattern"] for p in three["parts"]] == ['"AB"', '"CD"', "hex 45 <30-39>"]
    text = report.format_tables(rep)
    assert "multi-part signatures:" in text and "near misses" in text
    assert '"AB" [0,3] "CD" [0,any] hex 45 <30-39>' in text  # the signature table's pattern
    page = report.render_html(rep, {})
    assert "<h3>Multi-part signatures</h3>" in page and "hex 45 &lt;30-39&gt;" in page
    assert '"near_misses": 2' in report.to_json(rep)
