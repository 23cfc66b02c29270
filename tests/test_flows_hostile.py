"""FlowTracker under forged control segments and held-segment floods.

Hand-built packets (the `test_flows` stand-ins, with `sum_ok` set by hand as
`seamscan.decode` would set it) straight into a `FlowTracker`.

Outside references: RFC 9293 §3.4 (a segment's sequence space: SYN and FIN
occupy one sequence number each), §3.10.7.3 (SYN-SENT: a RST counts only
with an ACK of our SYN) and §3.10.7.4 (synchronized states: a RST counts
only in the receive window; text before RCV.NXT is old); RFC 5961 §3.2 (a
RST exactly at RCV.NXT resets, elsewhere in the window it is answered, out
of the window dropped). The data is an invented smart-building lab in the
documentation address ranges.
"""

import tracemalloc

import pytest

from seamscan.flows import (
    ACK,
    CLIENT,
    COUNTERS,
    HELD_CHUNK_COST,
    RST,
    SERVER,
    FlowTracker,
)
from test_flows import (
    CONTROLLER,
    GATEWAY,
    MOD,
    Conv,
    Recorder,
    only_flow,
)

NEW = ("ignored_rst", "ignored_rst_checksum", "ignored_fin", "ignored_fin_checksum",
       "roles_kept", "held_memory_peak")


def bad_sum(p):
    """The packet as the decoder gives it when its TCP checksum is wrong."""
    return p._replace(sum_ok=False)


def rst(cv, side, off, *, ack=None, flags=RST | ACK, data=b""):
    """A RST of `side` at stream offset `off` (its seq), acking `ack` (a peer offset)."""
    p = cv.raw(side, cv.isn[side] + 1 + off, flags, data)
    if ack is not None:
        p = p._replace(ack=(cv.isn[1 - side] + 1 + ack) % MOD)
    return p


def feed(packets, **kw):
    t = FlowTracker(rec := Recorder(), **kw)
    for p in packets:
        t.packet(p)
    return t, rec


def test_new_counters_are_documented():
    assert set(NEW) <= set(COUNTERS)


# -- RST ------------------------------------------------------------------


def test_rst_half_the_sequence_space_away_is_ignored_and_the_stream_goes_on():
    # the case: a RST 2**31 from the window between two halves of a signature
    cv = Conv()
    t, rec = feed(cv.open() + [
        cv.seg(CLIENT, 0, b"mode=ov"),
        rst(cv, CLIENT, 7 + 2**31),
        cv.seg(CLIENT, 7, b"erride"),
    ])
    t.finish()
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"mode=override" and f.end_reason == "capture_end"
    assert t.counters["ignored_rst"] == 1 and t.counters["ended_rst"] == 0
    assert t.counters["out_of_window_segments"] == 0


@pytest.mark.parametrize("off, obeyed", [(-1, False), (0, True), (1, False)])
def test_rst_at_the_next_byte_only_when_nothing_is_held(off, obeyed):
    # RFC 5961 §3.2: RCV.NXT resets; one before it is old (RFC 9293 §3.10.7.4)
    cv = Conv()
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"temp"), rst(cv, CLIENT, 4 + off)])
    assert (t.counters["ended_rst"], t.counters["ignored_rst"]) == ((1, 0) if obeyed else (0, 1))
    assert [e[0] for e in rec.events][-1:] == (["end"] if obeyed else ["data"])


@pytest.mark.parametrize("off, obeyed", [(3, False), (4, True), (7, True), (12, True),
                                         (13, False)])
def test_rst_window_runs_to_the_highest_byte_seen(off, obeyed):
    # 0..4 delivered, 8..12 held: the sender's SND.NXT is somewhere in 4..12
    cv = Conv()
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"temp"), cv.seg(CLIENT, 8, b"21.5"),
                               rst(cv, CLIENT, off)])
    assert t.counters["ended_rst"] == int(obeyed) and t.counters["ignored_rst"] == int(not obeyed)
    if obeyed:  # the hole is a gap, the held bytes are delivered
        f = only_flow(rec)
        assert rec.pieces(f, CLIENT) == [(0, b"temp"), (4, 4), (8, b"21.5")]


@pytest.mark.parametrize("off, obeyed", [(4, True), (5, True), (6, False)])
def test_rst_after_a_fin_counts_the_fins_sequence_number(off, obeyed):
    # RFC 9293 §3.4: the FIN at offset 4 occupies one sequence number: SND.NXT is 5
    cv = Conv()
    t, _ = feed(cv.open() + [cv.seg(CLIENT, 0, b"temp"), cv.fin(CLIENT, 4),
                             rst(cv, CLIENT, off)])
    assert t.counters["ended_rst"] == int(obeyed)


@pytest.mark.parametrize("ack, flags, obeyed", [(0, RST | ACK, True), (1, RST | ACK, False),
                                                (-1, RST | ACK, False), (0, RST, False)])
def test_rst_answering_a_syn_must_ack_it(ack, flags, obeyed):
    # RFC 9293 §3.10.7.3 (SYN-SENT): a RST counts if its ACK acknowledges the SYN
    cv = Conv()
    t, _ = feed([cv.syn(), rst(cv, SERVER, 0, ack=ack, flags=flags)])
    assert t.counters["ended_rst"] == int(obeyed) and t.counters["ignored_rst"] == int(not obeyed)


def test_rst_of_a_silent_side_acking_bytes_seen():
    # one direction captured: the server never sent; its RST acks client bytes
    cv = Conv()
    base = [cv.seg(CLIENT, 0, b"GET /co2 HTTP/1.1")]
    for ack, obeyed in ((17, True), (10, True), (18, False)):
        t, _ = feed(base + [rst(cv, SERVER, 0, ack=ack)])
        assert t.counters["ended_rst"] == int(obeyed), ack


def test_rst_first_packet_of_a_flow_is_obeyed_but_moves_no_sequence_space():
    # nothing known of the flow: the RST ends it, and does not make the
    # sender's later segments "old" (a forged RST with any seq could otherwise
    # hide half the sequence space behind it)
    cv = Conv()
    t, rec = feed([rst(cv, CLIENT, 1000), cv.seg(CLIENT, 0, b"temp=21.5", ts=1.0)])
    t.finish()
    assert t.counters["ended_rst"] == 1 and t.counters["ignored_after_close"] == 0
    assert rec.stream(rec.flows()[1], CLIENT) == b"temp=21.5"


def test_rst_with_a_wrong_checksum_is_ignored_its_payload_kept():
    cv = Conv()
    t, rec = feed(cv.open() + [
        cv.seg(CLIENT, 0, b"mode="),
        bad_sum(rst(cv, CLIENT, 5)),  # right place, wrong checksum
        bad_sum(rst(cv, CLIENT, 5, data=b"over")),  # payload taken as data
        cv.seg(CLIENT, 9, b"ride"),
    ])
    f = only_flow(rec)
    assert f.end_reason is None and rec.stream(f, CLIENT) == b"mode=override"
    assert t.counters["ignored_rst_checksum"] == 2 and t.counters["ignored_rst"] == 0
    t.packet(rst(cv, CLIENT, 13)._replace(sum_ok=True))
    assert f.end_reason == "rst"


def test_rst_with_a_wrong_checksum_starts_no_side():
    cv = Conv()
    t, rec = feed([cv.syn(), bad_sum(rst(cv, SERVER, 0, ack=0))])
    f = only_flow(rec) if rec.events else None
    assert f is None and t.counters["ignored_rst_checksum"] == 1
    (side,) = [s for s in t._sides.values() if s.side == SERVER]
    assert not side.started


# -- roles after a close ----------------------------------------------------


def test_resumed_after_rst_keeps_its_roles():
    # client port 1023 < server port 8080: by the port rule the roles would swap
    cv = Conv(c=(CONTROLLER, 1023), s=(GATEWAY, 8080))
    t, rec = feed(cv.open() + [
        cv.seg(CLIENT, 0, b"GET /zone"),
        rst(cv, CLIENT, 9),  # in the window: obeyed
        cv.seg(CLIENT, 9, b"/4 setpoint=19", ts=1.0),  # goes on
        cv.seg(SERVER, 0, b"HTTP/1.1 200", ts=1.0),
    ])
    t.finish()
    first, second = rec.flows()
    assert first.end_reason == "rst"
    assert second.client == (CONTROLLER, 1023) and second.server == (GATEWAY, 8080)
    assert rec.stream(second, CLIENT) == b"/4 setpoint=19"
    assert rec.stream(second, SERVER) == b"HTTP/1.1 200"
    assert t.counters["roles_kept"] == 1


def test_server_first_after_rst_keeps_roles_too():
    cv = Conv(c=(CONTROLLER, 1023), s=(GATEWAY, 8080))
    t, rec = feed(cv.open() + [rst(cv, CLIENT, 0), cv.seg(SERVER, 0, b"late", ts=1.0)])
    assert rec.flows() and t._sides[(GATEWAY, 8080, CONTROLLER, 1023, 6)].side == SERVER
    assert t.counters["roles_kept"] == 1


def test_roles_by_port_once_the_closed_record_expired_or_with_a_syn():
    cv = Conv(c=(CONTROLLER, 1023), s=(GATEWAY, 8080))
    late = cv.seg(CLIENT, 9, b"x", ts=61.0)  # closed_window is 60 s
    t, _ = feed(cv.open() + [rst(cv, CLIENT, 0), late])
    assert t._sides[(CONTROLLER, 1023, GATEWAY, 8080, 6)].side == SERVER
    assert t.counters["roles_kept"] == 0
    again = Conv(cisn=9, sisn=99, c=(GATEWAY, 8080), s=(CONTROLLER, 1023))
    t, _ = feed(cv.open() + [rst(cv, CLIENT, 0), again.syn(ts=1.0)])
    assert t._sides[(GATEWAY, 8080, CONTROLLER, 1023, 6)].side == CLIENT
    assert t.counters["roles_kept"] == 0


# -- FIN ------------------------------------------------------------------


def test_stale_fin_is_ignored_and_later_bytes_kept():
    # the case: a FIN with an old sequence number (valid checksum)
    cv = Conv()
    t, rec = feed(cv.open() + [
        cv.seg(CLIENT, 0, b"mode=ov"),
        cv.fin(CLIENT, 3),  # sequence number 3 was data: old
        cv.seg(CLIENT, 7, b"erride"),
        cv.fin(CLIENT, 13),
        cv.fin(SERVER, 0),
    ])
    f = only_flow(rec)
    assert rec.stream(f, CLIENT) == b"mode=override" and f.end_reason == "fin"
    assert t.counters["ignored_fin"] == 1 and t.counters["beyond_fin_bytes"] == 0


@pytest.mark.parametrize("at, taken", [(6, False), (7, True)])
def test_fin_at_the_next_byte_is_taken_one_before_is_not(at, taken):
    cv = Conv()
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"mode=ov"), cv.fin(CLIENT, at),
                               cv.fin(SERVER, 0)])
    assert (only_flow(rec).end_reason == "fin") if taken else not rec.events[-1][0] == "end"
    assert t.counters["ignored_fin"] == int(not taken)


def test_fin_with_a_wrong_checksum_is_ignored():
    cv = Conv()
    t, rec = feed(cv.open() + [
        cv.seg(CLIENT, 0, b"mode=ov"),
        bad_sum(cv.fin(CLIENT, 7)),
        bad_sum(cv.fin(CLIENT, 7, data=b"err")),  # payload taken as data
        cv.seg(CLIENT, 10, b"ide"),
        cv.fin(SERVER, 0),
    ])
    f = only_flow(rec)
    assert f.end_reason is None and rec.stream(f, CLIENT) == b"mode=override"
    assert t.counters["ignored_fin_checksum"] == 2 and t.counters["beyond_fin_bytes"] == 0
    t.packet(cv.fin(CLIENT, 13))
    assert f.end_reason == "fin"


def test_a_second_fin_elsewhere_is_ignored_a_retransmitted_one_is_not_counted():
    cv = Conv()
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"abcd"), cv.fin(CLIENT, 4), cv.fin(CLIENT, 4),
                               cv.fin(CLIENT, 9)])
    assert t.counters["ignored_fin"] == 1


def test_fin_drops_held_bytes_beyond_it_before_its_payload_fills_the_hole():
    # 5..10 held, then data 0..5 with a FIN at 5: the FIN's own place wins (a
    # receiver drops what it holds beyond a FIN: Linux tcp_fin purges its
    # out-of-order queue, recalled from memory), the flow ends "fin"
    cv = Conv()
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 5, b"XXXXX"), cv.fin(CLIENT, 0, data=b"abcde"),
                               cv.fin(SERVER, 0)])
    f = only_flow(rec)
    assert f.end_reason == "fin" and rec.stream(f, CLIENT) == b"abcde"
    assert t.counters["beyond_fin_bytes"] == 5


# -- held memory -------------------------------------------------------------


class _Null:
    def data(self, *a):
        pass

    def gap(self, *a, **k):
        pass

    def overlap(self, *a):
        pass

    def end(self, *a):
        pass


def _flood(t, flows, per_flow):
    """1-byte segments at every other offset (nothing ever in order), round robin."""
    convs = [Conv(c=(CONTROLLER, 40000 + i)) for i in range(flows)]
    for cv in convs:
        t.packet(cv.seg(CLIENT, 0, b"a"))
    for k in range(per_flow):
        for cv in convs:
            t.packet(cv.seg(CLIENT, 2 + 2 * k, b"b"))


def test_held_memory_is_bounded_by_hold_total_under_a_one_byte_flood():
    # 40,000 held 1-byte segments would take ~8 MB; the total cap says 256 KiB
    cap = 256 * 1024
    t = FlowTracker(_Null(), hold_bytes=2**40, hold_total=cap)
    _flood(t, 4, 50)  # warm up: flows, dicts and lists at their size
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        _flood(t, 4, 10_000)
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    assert t.counters["hold_total_gaps"] > 0
    assert t.counters["held_memory_peak"] <= cap
    # what the cap counts covers what is really held (tracemalloc), within a
    # few KiB of per-packet garbage
    assert peak <= cap + 16 * 1024, peak


def test_held_chunk_cost_matches_what_python_allocates():
    # the constant is what tracemalloc sees per held chunk (within 10%)
    t = FlowTracker(_Null(), hold_bytes=2**40, hold_total=2**40)
    cv = Conv()
    t.packet(cv.seg(CLIENT, 0, b"a"))
    n = 20_000
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        for k in range(n):
            # fresh payload and time objects, as a decoded capture has them
            t.packet(cv.seg(CLIENT, 2 + 10 * k, bytes([k % 256]) * 8, ts=1.0 + k / 1e6))
        used = tracemalloc.get_traced_memory()[0] - base
    finally:
        tracemalloc.stop()
    per_chunk = used / n - 8
    assert 0.9 * HELD_CHUNK_COST <= per_chunk <= HELD_CHUNK_COST, per_chunk


# -- a new connection on a live flow's 5-tuple ----------------------------------


def synack_of(cv, syn_conv, ts=0.0):
    """The server's SYN-ACK of `cv`, acknowledging the SYN of `syn_conv` (RFC 9293 §3.5)."""
    return cv.synack(ts)._replace(ack=(syn_conv.isn[CLIENT] + 1) % MOD)


def test_new_connection_after_a_rst_the_tracker_could_not_place():
    # the RST's sequence number is beyond every byte seen (the capture lost
    # the sender's last segment): ignored; the next connection on the same
    # 5-tuple must not land in the old flow
    cv = Conv()
    again = Conv(cisn=cv.isn[CLIENT] + 2**31, sisn=77)
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"abc"), rst(cv, CLIENT, 500),
                               again.syn(ts=1.0), synack_of(again, again, ts=1.0),
                               again.seg(CLIENT, 0, b"temp=21.5", ts=1.0),
                               again.seg(SERVER, 0, b"ok", ts=1.0)])
    t.finish()
    old, new = rec.flows()
    assert old.end_reason == "reused" and old.packets == [4, 1]  # the ignored RST too
    assert rec.stream(new, CLIENT) == b"temp=21.5" and rec.stream(new, SERVER) == b"ok"
    assert new.packets == [2, 2] and new.client == old.client
    assert t.counters["ended_reused"] == 1 and t.counters["syn_on_live_flow"] == 1


def test_a_syn_nobody_answers_changes_nothing():
    cv = Conv()
    forged = Conv(cisn=cv.isn[CLIENT] + 12345)
    t, rec = feed(cv.open() + [cv.seg(CLIENT, 0, b"mode=ov"), forged.syn(),
                               synack_of(cv, cv),  # a SYN-ACK acking the old SYN: not it
                               cv.seg(CLIENT, 7, b"erride")])
    t.finish()
    (f,) = rec.flows()
    assert rec.stream(f, CLIENT) == b"mode=override" and f.end_reason == "capture_end"
    assert t.counters["syn_on_live_flow"] == 1 and t.counters["ended_reused"] == 0


def test_a_retransmitted_syn_is_not_a_new_connection():
    cv = Conv()
    t, rec = feed(cv.open() + [cv.syn(), synack_of(cv, cv), cv.seg(CLIENT, 0, b"abc")])
    t.finish()
    assert len(rec.flows()) == 1 and t.counters["syn_on_live_flow"] == 0
