"""Tests for seamscan.ipfrag: IPv4 (RFC 791) and IPv6 (RFC 8200 section 4.5)
fragment reassembly, first-received-wins overlaps, limits and timeouts.

Outside source: scapy's ``fragment`` writes the RFC 791 offset field (in
8-octet units), which we convert exactly as the decoder does. Our own
reference: a brute-force byte-by-byte model of the same rules.
"""

import math
import random

import pytest
from scapy.layers.inet import IP, UDP, fragment
from scapy.packet import raw

from seamscan.ipfrag import COUNTERS, Defragmenter

CTRL, VALVE = bytes([192, 0, 2, 10]), bytes([192, 0, 2, 41])
NODE6, HUB6 = bytes.fromhex("20010db8001000000000000000000021"), bytes.fromhex(
    "20010db8001000000000000000000005")
UDP_P = 17


def add(defrag, offset, more, data, ts=0.0, ident=7, src=CTRL):
    return defrag.add_v4(src, VALVE, UDP_P, ident, offset, more, data, ts)


def test_counters_present_from_the_start():
    assert Defragmenter().counters == dict.fromkeys(
        ["reassembled", "overlaps", "timeouts", "evicted", "too_big", "too_many", "bad"], 0)
    assert tuple(Defragmenter().counters) == COUNTERS


@pytest.mark.parametrize("order", ["in order", "reversed", "shuffled"])
def test_scapy_fragments_in_any_order(order):
    payload = b"valve 3F-east position=40%;" * 120
    whole = IP(src="192.0.2.10", dst="192.0.2.41", id=0x0F0F) / UDP(sport=47808,
                                                                     dport=47808) / payload
    pieces = [IP(raw(p)) for p in fragment(whole, fragsize=512)]
    if order == "reversed":
        pieces.reverse()
    elif order == "shuffled":
        random.Random(5).shuffle(pieces)
    defrag = Defragmenter()
    results = []
    for p in pieces:
        # RFC 791: Fragment Offset counts 8-octet units; MF is flag bit 0x1 of scapy's flags
        results.append(defrag.add_v4(CTRL, VALVE, p.proto, p.id, p.frag * 8, bool(p.flags.MF),
                                     raw(p.payload), 1.0))
    assert results[:-1] == [None] * (len(pieces) - 1)
    assert results[-1] == raw(whole)[20:]
    assert defrag.counters["reassembled"] == 1 and defrag.held_bytes == 0


def test_overlap_first_received_wins_both_orders():
    a = (0, True, b"A" * 16)  # bytes [0, 16)
    b = (8, False, b"B" * 16)  # bytes [8, 24), the last fragment
    d1 = Defragmenter()
    assert add(d1, *a) is None
    assert add(d1, *b) == b"A" * 16 + b"B" * 8
    d2 = Defragmenter()
    assert add(d2, *b) is None
    assert add(d2, *a) == b"A" * 8 + b"B" * 16
    assert d1.counters["overlaps"] == d2.counters["overlaps"] == 1


def test_late_fragment_only_fills_holes():
    d = Defragmenter()
    assert add(d, 0, True, b"a" * 8) is None
    assert add(d, 16, True, b"c" * 8) is None
    assert add(d, 32, False, b"e" * 8) is None
    # covers everything: only the holes [8, 16) and [24, 32) are taken from it
    got = add(d, 0, True, bytes(range(40)))
    assert got == b"a" * 8 + bytes(range(8, 16)) + b"c" * 8 + bytes(range(24, 32)) + b"e" * 8
    assert d.counters["overlaps"] == 1


def test_duplicates_counted_and_harmless():
    d = Defragmenter()
    assert add(d, 8, False, b"tail1234") is None
    assert add(d, 8, False, b"tail1234") is None
    assert add(d, 0, True, b"head5678") == b"head5678tail1234"
    assert d.counters["overlaps"] == 1 and d.counters["reassembled"] == 1
    # a duplicate after completion starts a new datagram, which later times out
    assert add(d, 0, True, b"head5678") is None
    d.expire(math.inf)
    assert d.counters["timeouts"] == 1


def test_keys_separate_datagrams():
    d = Defragmenter()
    assert d.add_v4(CTRL, VALVE, 17, 7, 0, True, b"u" * 8, 0.0) is None
    assert d.add_v4(CTRL, VALVE, 6, 7, 8, False, b"t" * 8, 0.0) is None  # other protocol
    assert d.add_v4(VALVE, CTRL, 17, 7, 8, False, b"r" * 8, 0.0) is None  # other direction
    assert d.add_v6(CTRL + bytes(12), VALVE + bytes(12), 7, 17, 8, False, b"6" * 8, 0.0) is None
    assert d.add_v4(CTRL, VALVE, 17, 7, 8, False, b"U" * 8, 0.0) == b"u" * 8 + b"U" * 8


def test_ipv6_protocol_from_offset_zero_fragment():
    # RFC 8200 section 4.5: only the offset-zero fragment's Next Header counts
    for first_arrival in (0, 1):
        d = Defragmenter()
        frags = [(17, 0, True, b"coap-hdr"), (6, 8, False, b"payload!")]
        if first_arrival:
            frags.reverse()
        out = [d.add_v6(NODE6, HUB6, 0xB111D1, nh, off, more, data, 0.0)
               for nh, off, more, data in frags]
        assert out == [None, (17, b"coap-hdrpayload!")]


def test_timeouts_by_capture_time():
    d = Defragmenter(timeout=30.0)
    assert add(d, 0, True, b"x" * 8, ts=0.0, ident=1) is None
    assert add(d, 0, True, b"y" * 8, ts=20.0, ident=2) is None
    assert add(d, 0, True, b"z" * 8, ts=30.0, ident=3) is None
    assert d.counters["timeouts"] == 0  # exactly the timeout is not yet too old
    assert add(d, 0, True, b"z" * 8, ts=30.5, ident=4) is None
    assert d.counters["timeouts"] == 1  # ident 1 expired
    # ident 1's last fragment is too late: it starts a new datagram
    assert add(d, 8, False, b"X" * 8, ts=31.0, ident=1) is None
    d.expire(51.0)
    assert d.counters["timeouts"] == 2  # ident 2
    assert add(d, 8, False, b"Z" * 8, ts=51.0, ident=3) == b"z" * 8 + b"Z" * 8
    d.expire(math.inf)
    assert d.counters["timeouts"] == 4 and d.held_bytes == 0


def test_too_many_fragments():
    d = Defragmenter(max_fragments=4, timeout=10.0)
    for i in range(4):
        assert add(d, 8 * i, True, bytes([65 + i]) * 8) is None
    assert add(d, 32, True, b"E" * 8) is None
    assert d.counters["too_many"] == 1 and d.held_bytes == 0
    # the rest of the dropped datagram is discarded, not counted again
    assert add(d, 40, False, b"F" * 8, ts=5.0) is None
    assert d.counters == dict(d.counters, too_many=1, timeouts=0, reassembled=0)
    d.expire(math.inf)
    assert d.counters["timeouts"] == 0
    # once forgotten, the key is free again
    assert add(d, 0, True, b"n" * 8, ts=20.0) is None
    assert add(d, 8, False, b"N" * 8, ts=20.0) == b"n" * 8 + b"N" * 8


def test_too_big():
    d = Defragmenter(max_datagram=1000)
    assert add(d, 0, True, b"h" * 8) is None
    assert add(d, 992, False, b"t" * 8) is None  # ends at 1000: allowed
    assert add(d, 992, True, b"t" * 16) is None  # ends at 1008
    assert d.counters["too_big"] == 1 and d.held_bytes == 0
    assert add(d, 8, True, b"m" * 984) is None  # swallowed
    assert d.counters["reassembled"] == 0 and d.held_bytes == 0


def test_total_bytes_cap_evicts_oldest_first():
    d = Defragmenter(max_bytes=100)
    assert add(d, 0, True, b"a" * 48, ident=1) is None
    assert add(d, 0, True, b"b" * 48, ident=2) is None
    assert d.held_bytes == 96
    assert add(d, 0, True, b"c" * 16, ident=3) is None
    assert d.counters["evicted"] == 1 and d.held_bytes == 64
    assert add(d, 48, False, b"A" * 8, ident=1) is None  # ident 1 was evicted
    assert add(d, 48, False, b"B" * 8, ident=2) == b"b" * 48 + b"B" * 8
    # a fragment bigger than the cap evicts everything, itself included
    assert add(d, 0, True, b"d" * 104, ident=4) is None
    assert d.counters["evicted"] == 3 and d.held_bytes == 0


def test_held_bytes_never_exceed_cap_under_flood():
    rng = random.Random(11)
    d = Defragmenter(max_bytes=4096, max_fragments=8)
    for n in range(3000):
        add(d, 8 * rng.randrange(64), rng.random() < 0.9, rng.randbytes(8 * rng.randrange(1, 9)),
            ts=n * 0.01, ident=rng.randrange(200))
        assert 0 <= d.held_bytes <= 4096
    c = d.counters
    assert c["evicted"] > 0 and c["too_many"] > 0


@pytest.mark.parametrize("name,frags,result", [
    ("middle fragment not a multiple of 8", [(0, True, b"x" * 12), (0, True, b"y" * 8),
                                             (8, False, b"z" * 4)], b"y" * 8 + b"z" * 4),
    ("empty middle fragment", [(8, True, b""), (8, False, b"z" * 8), (0, True, b"y" * 8)],
     b"y" * 8 + b"z" * 8),
    ("second last fragment disagrees", [(8, False, b"z" * 8), (16, False, b"w" * 8),
                                        (0, True, b"y" * 8)], b"y" * 8 + b"z" * 8),
    ("last fragment before bytes held", [(16, True, b"w" * 8), (8, False, b"z" * 8),
                                         (0, True, b"y" * 8), (8, True, b"z" * 8),
                                         (24, False, b"v" * 8)],
     b"y" * 8 + b"z" * 8 + b"w" * 8 + b"v" * 8),
    ("fragment beyond the known end", [(8, False, b"z" * 8), (16, True, b"w" * 8),
                                       (0, True, b"y" * 8)], b"y" * 8 + b"z" * 8),
])
def test_bad_fragments_dropped_alone(name, frags, result):
    d = Defragmenter()
    out = [add(d, *f) for f in frags]
    assert out[-1] == result and out[:-1] == [None] * (len(out) - 1)
    assert d.counters["bad"] == 1


class Reference:
    """Brute-force model of the same rules: a byte map per datagram, the
    first byte received at each position wins."""

    def __init__(self):
        self.datagrams = {}
        self.overlaps = 0

    def add(self, key, offset, more, data):
        if more and (len(data) % 8 or not data):
            return None
        got, total = self.datagrams.get(key, ({}, None))
        end = offset + len(data)
        if total is not None and (end > total or (not more and end != total)):
            return None
        if total is None and not more and got and max(got) >= end:
            return None
        if any(i in got for i in range(offset, end)):
            self.overlaps += 1
        for i, byte in enumerate(data, offset):
            got.setdefault(i, byte)
        if not more:
            total = end
        if total is not None and all(i in got for i in range(total)):
            self.datagrams.pop(key, None)
            return bytes(got[i] for i in range(total))
        self.datagrams[key] = (got, total)
        return None


def test_matches_brute_force_reference():
    rng = random.Random(1234)
    for trial in range(300):
        length = rng.randrange(1, 200)
        d, ref = Defragmenter(), Reference()
        frags = []
        for _ in range(rng.randrange(1, 10)):
            start = 8 * rng.randrange(length // 8 + 1)
            stop = min(length, start + 8 * rng.randrange(0, 6))
            frags.append((start, stop))
        # make sure the set can complete: a clean cover in 8-byte steps
        frags += [(s, min(s + 8, length)) for s in range(0, length, 8)]
        rng.shuffle(frags)
        for start, stop in frags:
            more = stop < length
            if not more and rng.random() < 0.1:
                stop = start  # an inconsistent or empty last fragment now and then
            data = rng.randbytes(stop - start)
            ours = add(d, start, more, data, ident=trial)
            theirs = ref.add(trial, start, more, data)
            assert ours == theirs, (trial, start, stop)
        assert d.counters["overlaps"] == ref.overlaps
