"""Tests for seamscan.flows: roles, stream offsets, reassembly, flow ends, caps, counters.

The data is an invented smart-building lab: controllers and sensors in the
documentation ranges 192.0.2.0/24, 198.51.100.0/24, 203.0.113.0/24 and
2001:db8::/32.
"""

import random
from collections import namedtuple
from itertools import count

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seamscan.flows import (
    ACK,
    CLIENT,
    COUNTERS,
    FIN,
    HELD_CHUNK_COST,
    PSH,
    RST,
    SERVER,
    SYN,
    FlowTracker,
)

MOD = 2**32

# Stand-in for a decoded packet: the attribute names seamscan.decode provides.
Pkt = namedtuple("Pkt", "proto src dst sport dport seq ack flags payload frame ts cut sum_ok",
                 defaults=(0, None))

CONTROLLER = bytes([192, 0, 2, 10])  # building controller
GATEWAY = bytes([198, 51, 100, 20])  # BACnet/HTTP gateway
SENSOR = bytes([203, 0, 113, 7])  # air-quality sensor
SENSOR6 = bytes.fromhex("20010db8000000000000000000000042")
HVAC6 = bytes.fromhex("20010db80000000000000000000000a1")

_frames = count(1)


def pkt(proto, src, sport, dst, dport, seq=0, flags=0, payload=b"", ts=0.0, frame=None):
    return Pkt(
        proto,
        src,
        dst,
        sport,
        dport,
        seq,
        0,
        flags,
        payload,
        next(_frames) if frame is None else frame,
        ts,
    )


def udp(src, sport, dst, dport, payload, ts=0.0):
    return pkt(17, src, sport, dst, dport, payload=payload, ts=ts)


class Conv:
    """A TCP conversation; segments are addressed by stream offset of a side."""

    def __init__(self, cisn=1000, sisn=500_000, c=(CONTROLLER, 49152), s=(GATEWAY, 8443)):
        self.isn = [cisn % MOD, sisn % MOD]
        self.ep = [c, s]

    def raw(self, side, seq, flags, payload=b"", ts=0.0):
        (src, sport), (dst, dport) = self.ep[side], self.ep[1 - side]
        return pkt(6, src, sport, dst, dport, seq % MOD, flags, payload, ts)

    def syn(self, ts=0.0, payload=b""):
        return self.raw(CLIENT, self.isn[CLIENT], SYN, payload, ts)

    def synack(self, ts=0.0):
        return self.raw(SERVER, self.isn[SERVER], SYN | ACK, b"", ts)

    def seg(self, side, off, data=b"", flags=ACK | PSH, ts=0.0):
        return self.raw(side, self.isn[side] + 1 + off, flags, data, ts)

    def fin(self, side, off, ts=0.0, data=b""):
        return self.seg(side, off, data, FIN | ACK, ts)

    def open(self):
        return [self.syn(), self.synack(), self.seg(CLIENT, 0, flags=ACK)]


class Recorder:
    """Recording sink; checks the event-order contract as events arrive."""

    def __init__(self):
        self.events = []
        self.ended = set()
        self.live_slots = {}

    def _check(self, flow):
        assert id(flow) not in self.ended, "event after end"
        other = self.live_slots.setdefault(flow.slot, flow)
        assert other is flow, "slot shared by two live flows"

    def data(self, flow, side, offset, payload, frame, ts, datagram):
        self._check(flow)
        self.events.append(("data", flow, side, offset, bytes(payload), frame, datagram))

    def gap(self, flow, side, offset, length, frame, ts, reason):
        self._check(flow)
        assert length > 0
        self.events.append(("gap", flow, side, offset, length, frame))

    def overlap(self, flow, side, offset, length, frame, ts):
        self._check(flow)
        assert length > 0
        self.events.append(("overlap", flow, side, offset, length, frame))

    def end(self, flow):
        self._check(flow)
        assert flow.end_reason is not None
        self.ended.add(id(flow))
        del self.live_slots[flow.slot]
        self.events.append(("end", flow, flow.end_reason))

    # -- views --
    def flows(self):
        seen = []
        for e in self.events:
            if all(e[1] is not f for f in seen):
                seen.append(e[1])
        return seen

    def of(self, kind, flow=None):
        return [e for e in self.events if e[0] == kind and (flow is None or e[1] is flow)]

    def pieces(self, flow, side):
        """[(offset, bytes | int)] of data (bytes) and gaps (length), checked contiguous."""
        out = []
        pos = None
        for e in self.events:
            if e[1] is flow and e[0] in ("data", "gap") and e[2] == side:
                off = e[3]
                assert pos is None or off == pos, f"offset {off}, expected {pos}"
                val = e[4]
                out.append((off, val))
                pos = off + (val if isinstance(val, int) else len(val))
        return out

    def stream(self, flow, side):
        """Delivered bytes of a side; gaps shown as None markers are not allowed here."""
        ps = self.pieces(flow, side)
        assert all(not isinstance(v, int) for _, v in ps), "unexpected gap"
        return b"".join(v for _, v in ps)


def coalesce(pieces):
    """Merge adjacent data pieces, so that segmentations compare equal."""
    out = []
    for off, v in pieces:
        if out and isinstance(v, bytes) and isinstance(out[-1][1], bytes):
            out[-1] = (out[-1][0], out[-1][1] + v)
        else:
            out.append((off, v))
    return out


def run(packets, *, finish=True, **kw):
    rec = Recorder()
    t = FlowTracker(rec, **kw)
    for p in packets:
        t.packet(p)
    if finish:
        t.finish()
    return t, rec


def only_flow(rec):
    (flow,) = rec.flows()
    return flow


# -- roles ----------------------------------------------------------------


def test_role_sender_of_syn_is_client():
    cv = Conv(c=(CONTROLLER, 80), s=(GATEWAY, 50000))  # client has the smaller port
    _, rec = run([cv.syn(), cv.synack(), cv.seg(CLIENT, 0, b"GET /zone/4")])
    f = only_flow(rec)
    assert f.client == (CONTROLLER, 80) and f.server == (GATEWAY, 50000)
    assert rec.stream(f, CLIENT) == b"GET /zone/4"


def test_role_synack_seen_first_receiver_is_client():
    cv = Conv()
    _, rec = run([cv.synack(), cv.syn(), cv.seg(CLIENT, 0, b"hi"), cv.seg(SERVER, 0, b"ok")])
    f = only_flow(rec)
    assert f.client == cv.ep[CLIENT]
    assert rec.stream(f, CLIENT) == b"hi" and rec.stream(f, SERVER) == b"ok"


def test_role_mid_stream_larger_port_is_client():
    cv = Conv(c=(CONTROLLER, 47808), s=(GATEWAY, 443))
    # first packet seen is from the server (smaller port)
    _, rec = run([cv.seg(SERVER, 100, b"status: ok"), cv.seg(CLIENT, 7, b"poll")])
    f = only_flow(rec)
    assert f.client == (CONTROLLER, 47808)
    assert rec.of("data")[0][2] == SERVER


def test_role_mid_stream_equal_ports_first_sender_is_client():
    cv = Conv(c=(SENSOR, 5683), s=(GATEWAY, 5683))
    _, rec = run([cv.seg(SERVER, 0, b"x"), cv.seg(CLIENT, 0, b"y")])
    f = only_flow(rec)
    assert f.client == (GATEWAY, 5683)  # the sender of the first packet


def test_role_udp_first_sender_is_client():
    _, rec = run(
        [udp(GATEWAY, 53, SENSOR, 40000, b"reply first"), udp(SENSOR, 40000, GATEWAY, 53, b"query")]
    )
    f = only_flow(rec)
    assert f.client == (GATEWAY, 53) and f.proto == 17
    assert f.key == (17, (GATEWAY, 53), (SENSOR, 40000))


def test_key_is_direction_independent():
    a = udp(SENSOR, 40000, GATEWAY, 53, b"q")
    b = udp(GATEWAY, 53, SENSOR, 40000, b"r")
    _, r1 = run([a])
    _, r2 = run([b])
    assert only_flow(r1).key == only_flow(r2).key


# -- offsets ----------------------------------------------------------------


def test_offsets_with_syn_seen():
    # RFC 9293 §3.4 (section recalled from memory): the SYN occupies the sequence number ISN, the first data
    # octet is ISN+1; a FIN occupies one sequence number after the last octet.
    cv = Conv(cisn=7777, sisn=123)
    pk = [
        cv.syn(),
        cv.synack(),
        cv.raw(CLIENT, 7778, ACK | PSH, b"setpoint=21.5"),
        cv.raw(SERVER, 124, ACK | PSH, b"ack"),
        cv.raw(CLIENT, 7778 + 13, FIN | ACK),
        cv.raw(SERVER, 127, FIN | ACK),
    ]
    _, rec = run(pk)
    f = only_flow(rec)
    assert [(e[2], e[3], e[4]) for e in rec.of("data")] == [
        (CLIENT, 0, b"setpoint=21.5"),
        (SERVER, 0, b"ack"),
    ]
    assert f.end_reason == "fin" and f.gaps == 0


def test_syn_payload_is_offset_zero():
    cv = Conv()
    _, rec = run([cv.syn(payload=b"early"), cv.seg(CLIENT, 5, b"-data")])
    assert rec.stream(only_flow(rec), CLIENT) == b"early-data"


def test_offsets_without_syn_start_at_first_segment():
    cv = Conv(c=(CONTROLLER, 50000), s=(GATEWAY, 80))
    first = cv.raw(CLIENT, 777_777, ACK, b"zone")
    later = cv.raw(CLIENT, 777_777 + 4, ACK, b"-7")
    before = cv.raw(CLIENT, 777_770, ACK, b"1234567")  # ends where the stream began
    t, rec = run([first, later, before])
    f = only_flow(rec)
    assert rec.pieces(f, CLIENT) == [(0, b"zone"), (4, b"-7")]
    assert f.gaps == 0 and t.counters["before_start_bytes"] == 7


def test_sequence_wraparound():
    # RFC 9293 §3.4 (section recalled from memory): sequence numbers are compared modulo 2**32, so a stream
    # whose ISN is just below 2**32 continues across zero.
    cv = Conv(cisn=MOD - 3)
    a, b, c = b"AHU-1 ", b"fan=on ", b"damper=40%"
    segs = [cv.seg(CLIENT, 0, a), cv.seg(CLIENT, 6, b), cv.seg(CLIENT, 13, c)]
    assert segs[1].seq < segs[0].seq  # the sequence number wrapped
    _, rec = run([cv.syn(), segs[2], segs[0], segs[1]])
    f = only_flow(rec)
    assert rec.pieces(f, CLIENT) == [(0, a), (6, b), (13, c)]


def test_offsets_keep_counting_past_4gib():
    # hold_bytes=0: every hole is given up at once, so 1-byte segments 2**30
    # apart walk the stream past 2**32 without sending 4 GiB.
    cv = Conv(cisn=MOD - 100)
    step = 2**30
    pk = [cv.syn(), cv.seg(CLIENT, 0, b"a")] + [
        cv.seg(CLIENT, k * step, bytes([97 + k])) for k in range(1, 6)
    ]
    t, rec = run(pk, hold_bytes=0)
    f = only_flow(rec)
    ps = rec.pieces(f, CLIENT)
    want = [(0, b"a")]
    for k in range(1, 6):
        want += [(want[-1][0] + 1, k * step - want[-1][0] - 1), (k * step, bytes([97 + k]))]
    assert ps == want and ps[-1][0] == 5 * 2**30 > MOD
    assert t.counters["hold_cap_gaps"] == 5


def test_segment_beyond_window_is_dropped():
    cv = Conv()
    t, rec = run([cv.syn(), cv.seg(CLIENT, 2**30 + 1, b"junk"), cv.seg(CLIENT, 0, b"ok")])
    assert rec.pieces(only_flow(rec), CLIENT) == [(0, b"ok")]
    assert t.counters["out_of_window_segments"] == 1


# -- reassembly -------------------------------------------------------------

MSG = b"BACnet ReadProperty zone-4 present-value"


@pytest.mark.parametrize("order", ["forward", "reverse", "shuffled"])
def test_one_byte_segments(order):
    cv = Conv()
    segs = [cv.seg(CLIENT, i, MSG[i : i + 1]) for i in range(len(MSG))]
    if order == "reverse":
        segs.reverse()
    elif order == "shuffled":
        random.Random(4).shuffle(segs)
    _, rec = run([cv.syn()] + segs)
    f = only_flow(rec)
    ps = rec.pieces(f, CLIENT)
    assert b"".join(v for _, v in ps) == MSG
    # each byte is delivered with the frame that brought it
    frame_of = {p.seq: p.frame for p in segs}
    assert [e[5] for e in rec.of("data")] == [frame_of[cv.isn[0] + 1 + i] for i in range(len(MSG))]


def test_reverse_order_is_held_then_delivered():
    cv = Conv()
    parts = [MSG[i : i + 8] for i in range(0, len(MSG), 8)]
    segs = [cv.seg(CLIENT, i * 8, p) for i, p in enumerate(parts)]
    rec = Recorder()
    t = FlowTracker(rec)
    for p in [cv.syn()] + segs[:0:-1]:
        t.packet(p)
    assert rec.of("data") == []  # all held: the first segment is missing
    t.packet(segs[0])
    f = only_flow(rec)
    assert rec.pieces(f, CLIENT) == [(i * 8, p) for i, p in enumerate(parts)]


def test_retransmission_is_not_delivered_twice():
    cv = Conv()
    pk = [
        cv.syn(),
        cv.seg(CLIENT, 0, MSG[:10]),
        cv.seg(CLIENT, 0, MSG[:10]),
        cv.seg(CLIENT, 5, MSG[5:15]),
        cv.seg(CLIENT, 20, MSG[20:30]),
        cv.seg(CLIENT, 20, MSG[20:30]),
    ]
    t, rec = run(pk)
    f = only_flow(rec)
    assert rec.pieces(f, CLIENT) == [(0, MSG[:10]), (10, MSG[10:15]), (15, 5), (20, MSG[20:30])]
    assert t.counters["retransmitted_bytes"] == 10 + 5 + 10
    assert rec.of("overlap") == [] and f.bytes[CLIENT] == 25


def test_conflict_with_delivered_bytes_first_wins():
    cv = Conv()
    first = cv.seg(CLIENT, 0, b"0123456789")
    second = cv.seg(CLIENT, 4, b"45ab89CDEF")  # disagrees at offsets 6 and 7
    t, rec = run([cv.syn(), first, second])
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"0123456789CDEF"
    assert rec.of("overlap") == [("overlap", f, CLIENT, 6, 2, second.frame)]
    assert (
        t.counters["overlap_conflicts"],
        t.counters["overlap_bytes"],
        t.counters["retransmitted_bytes"],
    ) == (1, 2, 4)
    assert f.overlaps == 1


@pytest.mark.parametrize("upper_first", [True, False])
def test_conflict_with_held_bytes_both_orders(upper_first):
    cv = Conv()
    upper = cv.seg(CLIENT, 10, b"KLMNOPQRST")
    lower = cv.seg(CLIENT, 5, b"56789klmNO")  # disagrees at offsets 10..12
    pk = [cv.syn()] + ([upper, lower] if upper_first else [lower, upper])
    pk.append(cv.seg(CLIENT, 0, b"01234"))
    t, rec = run(pk)
    f = only_flow(rec)
    if upper_first:
        assert rec.stream(f, CLIENT) == b"0123456789KLMNOPQRST"
        assert rec.of("overlap") == [("overlap", f, CLIENT, 10, 3, lower.frame)]
    else:
        assert rec.stream(f, CLIENT) == b"0123456789klmNOPQRST"
        assert rec.of("overlap") == [("overlap", f, CLIENT, 10, 3, upper.frame)]
    assert t.counters["retransmitted_bytes"] == 2


def test_conflict_spanning_tail_and_held_is_merged_when_adjacent():
    cv = Conv()
    pk = [
        cv.syn(),
        cv.seg(CLIENT, 0, b"abcd"),
        cv.seg(CLIENT, 6, b"ghij"),
        cv.seg(CLIENT, 2, b"cDEFGhij"),
    ]  # [3,4) delivered, [4,6) new, [6,7) held
    _, rec = run(pk)
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"abcdEFghij"
    # two spans, not adjacent (the new bytes EF lie between them)
    assert [(e[3], e[4]) for e in rec.of("overlap")] == [(3, 1), (6, 1)]
    pk = [
        cv.syn(),
        cv.seg(CLIENT, 0, b"ab"),
        cv.seg(CLIENT, 4, b"ef"),
        cv.seg(CLIENT, 2, b"cd"),
        cv.seg(CLIENT, 1, b"BCDE"),
    ]
    _, rec = run(pk)
    assert [(e[3], e[4]) for e in rec.of("overlap")] == [(1, 4)]


def test_old_conflict_beyond_kept_tail_counts_as_retransmission():
    cv = Conv()
    pk = [
        cv.syn(),
        cv.seg(CLIENT, 0, b"abcdefghijklmnopqrst"),
        cv.seg(CLIENT, 0, b"ABCDEFGHIJ"),  # too old to compare: keep_bytes=4
        cv.seg(CLIENT, 16, b"qrsT"),
    ]  # inside the kept tail: detected
    t, rec = run(pk, keep_bytes=4)
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"abcdefghijklmnopqrst"
    assert [(e[3], e[4]) for e in rec.of("overlap")] == [(19, 1)]
    assert t.counters["retransmitted_bytes"] == 10 + 3


def test_gap_when_hold_cap_exceeded():
    cv = Conv()
    s10, s20 = cv.seg(CLIENT, 10, b"VAV-2"), cv.seg(CLIENT, 20, b"flow!")
    late, mid = cv.seg(CLIENT, 0, b"0123456789"), cv.seg(CLIENT, 15, b"*****")
    t, rec = run([cv.syn(), s10, s20, late, mid], hold_bytes=8)
    f = only_flow(rec)
    assert rec.of("gap") == [("gap", f, CLIENT, 0, 10, s10.frame)]
    assert rec.pieces(f, CLIENT) == [(0, 10), (10, b"VAV-2"), (15, b"*****"), (20, b"flow!")]
    c = t.counters
    got = [c[k] for k in ("gaps", "gap_bytes", "hold_cap_gaps", "retransmitted_bytes")]
    assert got == [1, 10, 1, 10]
    assert f.gaps == 1


def test_hole_at_flow_end_becomes_gap_then_held_delivered():
    cv = Conv()
    s5 = cv.seg(CLIENT, 5, b"tail")
    fin = cv.fin(SERVER, 9)  # server stream ends at 9: bytes [3, 9) never seen
    _, rec = run([cv.syn(), cv.synack(), cv.seg(SERVER, 0, b"abc"), s5, fin])
    f = only_flow(rec)
    assert rec.pieces(f, CLIENT) == [(0, 5), (5, b"tail")]
    assert rec.pieces(f, SERVER) == [(0, b"abc"), (3, 6)]
    assert rec.of("gap", f)[0][5] == s5.frame and rec.of("gap", f)[1][5] == fin.frame
    assert f.end_reason == "capture_end" and rec.events[-1][0] == "end"


def test_rst_ends_flow_at_once():
    cv = Conv()
    pk = [
        cv.syn(),
        cv.synack(),
        cv.seg(CLIENT, 0, b"ab"),
        cv.seg(CLIENT, 4, b"ef"),
        cv.raw(SERVER, cv.isn[1] + 1, RST | ACK),
    ]
    rec = Recorder()
    t = FlowTracker(rec)
    for p in pk:
        t.packet(p)
    f = only_flow(rec)
    assert f.end_reason == "rst" and rec.events[-1] == ("end", f, "rst")
    assert rec.pieces(f, CLIENT) == [(0, b"ab"), (2, 2), (4, b"ef")]
    t.packet(cv.seg(CLIENT, 6, flags=ACK))  # no payload: ignored
    t.packet(cv.raw(SERVER, cv.isn[1] + 1, RST))  # repeated RST: ignored
    t.packet(cv.seg(CLIENT, 0, b"ab"))  # old payload: ignored
    assert t.counters["ignored_after_close"] == 3 and t.counters["flows"] == 1
    t.packet(cv.syn(ts=1.0))  # a SYN starts a new flow
    t.finish()
    assert t.counters["flows"] == 2 and t.counters["ended_rst"] == 1


def test_fin_both_sides_ends_flow():
    cv = Conv()
    pk = cv.open() + [
        cv.seg(CLIENT, 0, b"GET /co2"),
        cv.seg(SERVER, 0, b"612ppm"),
        cv.fin(CLIENT, 8),
        cv.fin(SERVER, 6),
    ]
    rec = Recorder()
    t = FlowTracker(rec)
    for p in pk:
        t.packet(p)
    f = only_flow(rec)
    assert f.end_reason == "fin" and t.counters["ended_fin"] == 1
    assert f.packets == [4, 3] and f.bytes == [8, 6]
    t.packet(cv.seg(CLIENT, 9, flags=ACK))  # the last ACK
    t.packet(cv.fin(SERVER, 6))  # a retransmitted FIN
    t.packet(cv.fin(CLIENT, 0, data=b"GET /co2"))  # retransmitted data with FIN
    assert t.counters["ignored_after_close"] == 3
    t.packet(cv.seg(CLIENT, 8, b"more"))  # new payload: a mid-stream flow
    t.finish()
    assert t.counters["flows"] == 2


def test_fin_waits_for_hole_before_it():
    cv = Conv()
    rec = Recorder()
    t = FlowTracker(rec)
    for p in cv.open() + [cv.seg(CLIENT, 4, b"4567"), cv.fin(CLIENT, 8), cv.fin(SERVER, 0)]:
        t.packet(p)
    assert rec.events == []  # 4567 is held behind the hole, no end yet
    t.packet(cv.seg(CLIENT, 0, b"0123"))
    f = only_flow(rec)
    assert f.end_reason == "fin" and rec.stream(f, CLIENT) == b"01234567"


def test_bytes_beyond_fin_are_dropped():
    cv = Conv()
    pk = [
        cv.syn(),
        cv.seg(CLIENT, 6, b"ghij"),
        cv.fin(CLIENT, 3, data=b"de"),
        cv.seg(CLIENT, 0, b"abcXYZ"),
    ]
    t, rec = run(pk)
    assert rec.stream(only_flow(rec), CLIENT) == b"abcde"
    assert t.counters["beyond_fin_bytes"] == 4 + 1


def test_one_fin_then_idle_ends_idle():
    cv = Conv()
    t, rec = run(cv.open() + [cv.fin(CLIENT, 0), udp(SENSOR, 1, GATEWAY, 2, b"x", ts=400.0)])
    assert rec.flows()[0].end_reason == "idle"


# -- idle, eviction, slots, caps ---------------------------------------------


def test_idle_expiry_by_capture_time():
    cv = Conv()
    rec = Recorder()
    t = FlowTracker(rec, tcp_idle=300.0, udp_idle=60.0)
    t.packet(cv.syn(ts=0.0))
    t.packet(udp(SENSOR6, 5683, HVAC6, 5683, b"temp=22.1", ts=0.0))
    t.packet(udp(SENSOR, 40000, GATEWAY, 53, b"q", ts=61.0))
    assert rec.of("end") == [("end", rec.of("data")[0][1], "idle")]
    assert rec.of("data")[0][1].proto == 17
    t.packet(udp(SENSOR, 40000, GATEWAY, 53, b"q", ts=302.0))
    reasons = [(e[1].proto, e[2]) for e in rec.of("end")]
    assert reasons == [(17, "idle"), (6, "idle"), (17, "idle")]  # oldest first
    assert t.counters["ended_idle"] == 3 and t.counters["flows"] == 4


def test_max_flows_evicts_longest_idle():
    rec = Recorder()
    t = FlowTracker(rec, max_flows=2)
    a = udp(SENSOR, 1001, GATEWAY, 53, b"a", ts=0.0)
    b = udp(SENSOR, 1002, GATEWAY, 53, b"b", ts=0.1)
    for p in (a, b, a._replace(ts=0.2, frame=99), udp(SENSOR, 1003, GATEWAY, 53, b"c", ts=0.3)):
        t.packet(p)
    (end,) = rec.of("end")
    assert end[1].client == (SENSOR, 1002) and end[2] == "evicted"
    assert t.counters["ended_evicted"] == 1
    flow_c = rec.of("data")[-1][1]
    assert flow_c.slot == end[1].slot  # the freed slot is reused


def test_slots_unique_among_live_flows_and_reused():
    rec = Recorder()  # the recorder asserts no two live flows share a slot
    t = FlowTracker(rec, max_flows=3)
    rnd = random.Random(7)
    for i in range(300):
        port = 1000 + rnd.randrange(6)
        t.packet(udp(SENSOR, port, GATEWAY, 53, b"d", ts=i * 0.01))
    t.finish()
    slots = {e[1].slot for e in rec.of("end")}
    assert slots <= {0, 1, 2} and t.counters["ended_evicted"] > 0


def test_global_hold_cap_relieves_the_flow_that_exceeds_it():
    one, two = Conv(c=(CONTROLLER, 50001)), Conv(c=(CONTROLLER, 50002))
    pk = [one.syn(), two.syn(), one.seg(CLIENT, 4, b"held"), two.seg(CLIENT, 4, b"HELD!")]
    # the total cap counts HELD_CHUNK_COST per held chunk beside its bytes
    t, rec = run(pk, hold_total=HELD_CHUNK_COST + 8, finish=False)
    (gap,) = rec.of("gap")
    assert gap[1].client == two.ep[CLIENT] and gap[3:5] == (0, 4)
    assert t.counters["hold_total_gaps"] == 1 and t.counters["held_bytes_peak"] == 4
    assert t.counters["held_memory_peak"] == 4 + HELD_CHUNK_COST
    t.finish()
    assert t.counters["gaps"] == 2 and t.counters["hold_total_gaps"] == 1


def test_udp_datagrams_offsets_and_empty_payload():
    pk = [
        udp(SENSOR6, 5683, HVAC6, 5683, b"GET temp"),
        udp(SENSOR6, 5683, HVAC6, 5683, b""),
        udp(HVAC6, 5683, SENSOR6, 5683, b"22.4C"),
        udp(SENSOR6, 5683, HVAC6, 5683, b"GET rh"),
    ]
    t, rec = run(pk)
    f = only_flow(rec)
    assert [(e[2], e[3], e[4], e[6]) for e in rec.of("data")] == [
        (CLIENT, 0, b"GET temp", True),
        (SERVER, 0, b"22.4C", True),
        (CLIENT, 8, b"GET rh", True),
    ]
    assert f.packets == [3, 1] and f.bytes == [14, 5] and f.end_reason == "capture_end"


def test_other_protocols_are_ignored():
    t, rec = run([pkt(1, SENSOR, 0, GATEWAY, 0, payload=b"ping")])
    assert rec.events == [] and t.counters["ignored_protocol"] == 1


def test_counters_all_present_from_start():
    t = FlowTracker(Recorder())
    required = {
        "flows",
        "tcp_flows",
        "udp_flows",
        "ended_fin",
        "ended_rst",
        "ended_idle",
        "ended_evicted",
        "ended_capture_end",
        "retransmitted_bytes",
        "overlap_conflicts",
        "gaps",
        "gap_bytes",
        "hold_cap_gaps",
        "hold_total_gaps",
        "ignored_after_close",
    }
    assert required <= set(t.counters) == set(COUNTERS)
    assert all(v == 0 for v in t.counters.values())


def test_counters_after_a_mixed_capture():
    cv = Conv()
    pk = cv.open() + [
        cv.seg(CLIENT, 0, b"abc"),
        cv.seg(CLIENT, 0, b"abc"),
        cv.seg(CLIENT, 5, b"fg"),
        cv.fin(CLIENT, 7),
        cv.fin(SERVER, 0),
        udp(SENSOR, 1, GATEWAY, 2, b"u"),
    ]
    t, _ = run(pk)
    c = t.counters
    assert {k: v for k, v in c.items() if v} == {
        "flows": 2,
        "tcp_flows": 1,
        "udp_flows": 1,
        "ended_capture_end": 2,
        "retransmitted_bytes": 3,
        "gaps": 1,
        "gap_bytes": 2,
        "flow_end_gaps": 1,
        "held_bytes_peak": 2,
        "held_memory_peak": 2 + HELD_CHUNK_COST,
    }


def test_keep_bytes_zero_detects_no_delivered_conflict():
    cv = Conv()
    t, rec = run(
        [cv.syn(), cv.seg(CLIENT, 0, b"lux=300"), cv.seg(CLIENT, 0, b"lux=999")], keep_bytes=0
    )
    assert rec.stream(only_flow(rec), CLIENT) == b"lux=300" and rec.of("overlap") == []
    assert t.counters["retransmitted_bytes"] == 7


def test_tcp_over_ipv6():
    cv = Conv(c=(SENSOR6, 50123), s=(HVAC6, 47808))
    pk = cv.open() + [
        cv.seg(CLIENT, 3, b"def"),
        cv.seg(CLIENT, 0, b"abc"),
        cv.seg(SERVER, 0, b"ok"),
        cv.fin(CLIENT, 6),
        cv.fin(SERVER, 2),
    ]
    _, rec = run(pk, finish=False)
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"abcdef" and f.end_reason == "fin"
    assert f.client == (SENSOR6, 50123)


def test_flow_from_an_endpoint_to_itself_does_not_crash():
    me = (CONTROLLER, 5000)
    cv = Conv(c=me, s=me)
    _, rec = run([cv.syn(), cv.seg(CLIENT, 0, b"loop")])
    assert rec.stream(only_flow(rec), CLIENT) == b"loop"


@pytest.mark.parametrize("kw", [{"max_flows": 0}, {"hold_bytes": -1}, {"tcp_idle": -5.0}])
def test_bad_parameters_are_named(kw):
    with pytest.raises(ValueError, match=next(iter(kw))):
        FlowTracker(Recorder(), **kw)


# -- properties -------------------------------------------------------------


@st.composite
def conversations(draw, drops):
    """Two side streams, cut, duplicated (re-cut retransmissions), shuffled, maybe dropped."""
    cv = Conv(cisn=draw(st.integers(0, MOD - 1)), sisn=draw(st.integers(0, MOD - 1)))
    streams = [draw(st.binary(max_size=300)), draw(st.binary(max_size=300))]
    segs = []  # (side, offset, length, fin)
    for side, data in enumerate(streams):
        cuts = sorted(draw(st.sets(st.integers(1, max(1, len(data) - 1)), max_size=20)))
        bounds = [0] + [c for c in cuts if c < len(data)] + [len(data)]
        for a, b in zip(bounds, bounds[1:], strict=False):
            segs.append((side, a, b - a, b == len(data)))
        for _ in range(draw(st.integers(0, 8))):
            a = draw(st.integers(0, len(data)))
            b = draw(st.integers(a, len(data)))
            segs.append((side, a, b - a, False))
    order = draw(st.permutations(range(len(segs))))
    kept = [segs[i] for i in order]
    if drops:
        kept = [s for s in kept if not draw(st.integers(0, 3)) == 0]
    use_fin = draw(st.booleans())
    packets = [cv.syn(), cv.synack()]
    for side, a, n, last in kept:
        flags = FIN | ACK if (last and use_fin) else ACK | PSH
        packets.append(cv.seg(side, a, streams[side][a : a + n], flags))
    return streams, kept, use_fin, packets


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(conversations(drops=False))
def test_property_reordered_duplicated_stream_is_exact(conv):
    streams, _, _, packets = conv
    t, rec = run(packets)
    f = only_flow(rec)
    for side in (CLIENT, SERVER):
        ps = rec.pieces(f, side)  # contiguous offsets, checked inside
        assert all(isinstance(v, bytes) for _, v in ps)
        assert b"".join(v for _, v in ps) == streams[side]
        assert not ps or ps[0][0] == 0
    assert rec.of("overlap") == [] and t.counters["gaps"] == 0


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(conversations(drops=True))
def test_property_gaps_cover_exactly_the_missing_ranges(conv):
    streams, kept, use_fin, packets = conv
    _, rec = run(packets)
    f = only_flow(rec)
    for side in (CLIENT, SERVER):
        got = [0] * (len(streams[side]) + 1)
        fin_seen = False
        for s, a, n, last in kept:
            if s == side:
                for i in range(a, a + n):
                    got[i] = 1
                fin_seen |= last and use_fin
        last_got = max((i + 1 for i, g in enumerate(got) if g), default=0)
        end = len(streams[side]) if fin_seen else last_got
        want = []  # brute force: maximal runs of received / missing offsets below end
        i = 0
        while i < end:
            j = i
            while j < end and got[j] == got[i]:
                j += 1
            want.append((i, streams[side][i:j] if got[i] else j - i))
            i = j
        assert coalesce(rec.pieces(f, side)) == want


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_property_conflicting_overlaps_first_received_wins(data):
    length = data.draw(st.integers(1, 120))
    cv = Conv(cisn=data.draw(st.integers(0, MOD - 1)))

    def content(n):  # a small alphabet makes agreements common
        return bytes(data.draw(st.lists(st.sampled_from(b"ab"), min_size=n, max_size=n)))

    segs = [(a, content(min(10, length - a))) for a in range(0, length, 10)]  # no hole remains
    for _ in range(data.draw(st.integers(0, 12))):
        a = data.draw(st.integers(0, length - 1))
        segs.append((a, content(data.draw(st.integers(1, length - a)))))
    segs = data.draw(st.permutations(segs))
    packets = [cv.syn()] + [cv.seg(CLIENT, a, p) for a, p in segs]
    t, rec = run(packets, keep_bytes=length)
    f = only_flow(rec)
    # brute-force reference: the first byte received at each offset
    first = {}
    overlaps = {}
    for e in rec.of("overlap"):
        overlaps.setdefault(e[5], []).append((e[3], e[3] + e[4]))
    dup = 0
    for p, (a, payload) in zip(packets[1:], segs, strict=True):
        differ = {a + i for i, b in enumerate(payload) if a + i in first and first[a + i] != b}
        dup += sum(1 for i in range(len(payload)) if a + i in first)
        covered = set()
        for lo, hi in overlaps.get(p.frame, []):
            assert all(o in first for o in range(lo, hi))  # only earlier-received bytes
            assert lo in differ and hi - 1 in differ  # tight at both ends
            covered |= set(range(lo, hi))
        assert differ <= covered
        for i, b in enumerate(payload):
            first.setdefault(a + i, b)
    assert rec.stream(f, CLIENT) == bytes(first[i] for i in range(length))
    assert t.counters["overlap_bytes"] + t.counters["retransmitted_bytes"] == dup
