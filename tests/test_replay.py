"""End-to-end replay: scapy-crafted captures through ``replay_file`` and the CLI.

Every capture is written by ``tools/craft.py`` (scapy) into ``tmp_path`` and
replayed whole; the expected matches come from brute force on the stream
each side meant to send (``seamscan.reference.reference_matches``), with
the frame of each byte taken from the crafted packets themselves.

Outside oracles: scapy's own reader ``rdpcap`` (frame count, ports and
payload of every TCP/UDP frame, see ``assert_scapy_agrees``) and scapy's
``defragment`` / ``fragment6`` for IP fragments; the semantics checked are
those of RFC 9293 (sequence numbers modulo 2**32, SYN occupies one sequence
number), RFC 791 (IPv4 fragments) and RFC 8200 (IPv6 extension headers).

The data is an invented smart-building lab in the documentation address
ranges (192.0.2.0/24, 198.51.100.0/24, 203.0.113.0/24, 2001:db8::/32).
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import os
import random
import subprocess
import sys
import tempfile
from functools import partial
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scapy.layers.inet import IP, TCP, UDP, defragment
from scapy.layers.inet6 import (
    IPv6,
    IPv6ExtHdrDestOpt,
    IPv6ExtHdrFragment,
    IPv6ExtHdrHopByHop,
    PadN,
    defragment6,
    fragment6,
)
from scapy.layers.l2 import Ether
from scapy.packet import Padding
from scapy.utils import EDecimal, rdpcap

import seamscan
from seamscan.capture import open_capture
from seamscan.decode import Decoder
from seamscan.reference import reference_matches
from seamscan.replay import ReplayOptions, replay_file

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tools"))

import craft  # noqa: E402
from craft import Clock, Conversation, Datagrams  # noqa: E402

MOD = 2**32
MATCH_FIELDS = ["sig", "transport", "client_ip", "client_port", "server_ip", "server_port",
                "side", "start", "end", "file", "frame", "ts", "ts_ns"]
TIMING_FIELDS = ("elapsed_s", "frames_per_s", "mb_per_s")


# --- helpers ------------------------------------------------------------------

def compiled(*entries):
    """(signature set, table) for signature dicts in TOML field names."""
    sigset = seamscan.signature_set(list(entries))
    return sigset, seamscan.compile(sigset)


def write(tmp_path, packets, name="lab.pcap", **kw):
    path = tmp_path / name
    craft.write_pcap(path, packets, **kw)
    return path


def replay(path, table, **options):
    """The replay's result; every replay here also runs with the C front end
    and fast lane off (SEAMSCAN_FASTPATH=0, the pure-Python reference) and
    must give the same records and counters."""
    result = replay_file(path, table, ReplayOptions(**options))
    assert result.error is None, result.error
    assert result.records[-1]["type"] == "flow"
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SEAMSCAN_FASTPATH", "0")
        python = replay_file(path, table, ReplayOptions(**options))
    assert python.records == result.records
    assert python.counters == result.counters
    return result


def of_type(result, kind):
    return [r for r in result.records if r["type"] == kind]


def hits(result, **where):
    """(sig, side, start, end, frame) of the match records whose fields equal ``where``."""
    return [(r["sig"], r["side"], r["start"], r["end"], r["frame"]) for r in of_type(result, "match")
            if all(r[k] == v for k, v in where.items())]


def frame_numbers(packets):
    """id(packet) -> its 1-based record number in a capture written in this order."""
    return {id(p): n for n, p in enumerate(packets, 1)}


def tcp_payload(pkt) -> bytes:
    """A crafted packet's TCP payload, per scapy's dissection (link padding excluded)."""
    data = bytes(pkt[TCP].payload)
    if Padding in pkt:
        data = data[: len(data) - len(pkt[Padding].load)]
    return data


def intended(conv, packets):
    """Per side of ``conv``: (stream, frame of each byte), first-received bytes winning.

    A brute-force reassembly from the crafted packets in capture order, by
    RFC 9293 sequence arithmetic against the conversation's ISNs; every side
    must end up contiguous from offset 0.
    """
    mine = {id(p) for p in conv.packets}
    got = {"client": {}, "server": {}}
    for frame, pkt in enumerate(packets, 1):
        if id(pkt) not in mine or TCP not in pkt:
            continue
        ip = pkt[IP] if IP in pkt else pkt[IPv6]
        s = 0 if (ip.src, pkt[TCP].sport) == conv.client else 1
        rel = (pkt[TCP].seq - conv.isn[s] - 1) % MOD
        for i, b in enumerate(tcp_payload(pkt)):
            got[("client", "server")[s]].setdefault(rel + i, (b, frame))
    out = {}
    for side, bytemap in got.items():
        assert sorted(bytemap) == list(range(len(bytemap))), f"{side} stream has holes"
        out[side] = (bytes(bytemap[i][0] for i in range(len(bytemap))),
                     [bytemap[i][1] for i in range(len(bytemap))])
    return out


def expected_tcp(sigset, conv, packets, server_port=None):
    """The match tuples brute force finds on each side's intended stream."""
    port = conv.server[1] if server_port is None else server_port
    ids = [s.id for s in sigset]
    want = []
    for side, (stream, frames) in intended(conv, packets).items():
        for idx, start, end in reference_matches(sigset, stream, side=side, transport="tcp",
                                                 server_port=port):
            want.append((ids[idx], side, start, end, frames[end - 1]))
    return sorted(want)


def assert_in_stream_order(result):
    """Within each flow side, match records come in stream order (by end offset)."""
    last = {}
    for r in of_type(result, "match"):
        key = (r["client_ip"], r["client_port"], r["server_ip"], r["server_port"], r["side"])
        assert r["end"] >= last.get(key, 0), r
        last[key] = r["end"]


def assert_times(result, packets):
    """Each record with a frame carries that frame's capture time; flows their first and last."""
    for r in result.records:
        if "frame" in r:
            assert r["ts"] == pytest.approx(float(packets[r["frame"] - 1].time), abs=1e-6), r
    for f in of_type(result, "flow"):
        assert min(float(p.time) for p in packets) <= f["first_ts"] <= f["last_ts"]


def is_fragment(pkt) -> bool:
    if IP in pkt:
        return bool(pkt[IP].flags.MF) or pkt[IP].frag > 0
    return IPv6ExtHdrFragment in pkt


def assert_scapy_agrees(path):
    """Outside oracle: scapy's ``rdpcap`` and our reader + decoder see the same
    frames, and, per TCP/UDP frame that is not an IP fragment, the same
    protocol, ports and payload (padding excluded, per scapy's dissection)."""
    theirs = {}
    fragments = 0
    scapy_frames = rdpcap(str(path))
    for n, pkt in enumerate(scapy_frames, 1):
        if is_fragment(pkt):
            fragments += 1
        elif TCP in pkt:
            theirs[n] = (6, pkt[TCP].sport, pkt[TCP].dport, tcp_payload(pkt))
        elif UDP in pkt:
            data = bytes(pkt[UDP].payload)
            if Padding in pkt:
                data = data[: len(data) - len(pkt[Padding].load)]
            theirs[n] = (17, pkt[UDP].sport, pkt[UDP].dport, data)
    ours = {}
    decoder = Decoder()
    with open_capture(path) as reader:
        for frame_no, ts, linktype, buf in reader:
            pkt = decoder.decode(frame_no, ts, linktype, buf)
            if is_fragment(scapy_frames[frame_no - 1]):
                continue  # held, or a reassembled datagram: checked against scapy's defragment
            if pkt is not None:
                ours[frame_no] = (pkt.proto, pkt.sport, pkt.dport, bytes(pkt.payload))
    counters = decoder.counters
    assert counters["frames"] == len(scapy_frames)
    # a frame that completed a datagram counts as that datagram's fate, not as a fragment
    assert counters["fragments"] + counters["frag_reassembled"] == fragments
    assert ours == theirs


def cli(*args):
    """Run ``python -m seamscan`` as a user would; returns the CompletedProcess."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    return subprocess.run([sys.executable, "-m", "seamscan", *map(str, args)], env=env,
                          capture_output=True, text=True, timeout=300)


def jsonl(text):
    return [json.loads(line) for line in text.splitlines()]


# --- TCP reassembly ------------------------------------------------------------

OVERRIDE = b"relay/7/override"


@pytest.mark.parametrize("arrival", ["in_order", "second_first"])
def test_signature_cut_at_every_position_across_two_segments(tmp_path, arrival):
    sigset, table = compiled({"id": "ovr", "text": OVERRIDE.decode()})
    data = b"PUT /api/" + OVERRIDE + b" HTTP/1.1"
    at = data.index(OVERRIDE)
    clock = Clock()
    convs, packets = [], []
    for cut in range(1, len(data)):
        c = Conversation(client=("192.0.2.10", 41000 + cut), clock=clock)
        c.handshake()
        c.send("client", data, segments=[cut, len(data) - cut],
               order=[0, 1] if arrival == "in_order" else [1, 0])
        c.close()
        convs.append((cut, c))
        packets += c.packets
    path = write(tmp_path, packets)
    result = replay(path, table)
    frames = frame_numbers(packets)
    for cut, c in convs:
        # pieces 0 and 1 as emitted after the handshake's three packets
        pieces = c.packets[3:5] if arrival == "in_order" else c.packets[4:2:-1]
        # the frame reported is the one that brought the match's last byte
        carrier = pieces[0] if cut >= at + len(OVERRIDE) else pieces[1]
        assert hits(result, client_port=41000 + cut) == [
            ("ovr", "client", at, at + len(OVERRIDE), frames[id(carrier)])]
    assert_times(result, packets)
    flows = of_type(result, "flow")
    assert len(flows) == len(data) - 1
    assert {f["end"] for f in flows} == {"fin"}
    assert all(f["client_bytes"] == len(data) and f["gaps"] == 0 for f in flows)
    assert_scapy_agrees(path)


LAB_SIGS = (
    {"id": "zone", "text": "zone=4"},
    {"id": "aba", "text": "aba"},  # overlaps itself: "ababa" holds two
    {"id": "sp", "text": "SetPoint", "fold_case": True},
    {"id": "magic", "hex": "00 ff 00"},
)
LAB_STREAM = (b"GET /hvac?zone=4&setpoint=21 ababa\x00\xff\x00\xff\x00 "
              b"SETPOINT zone=4 SetPoint=19")


@pytest.mark.parametrize("segments,order", [
    (1, None),  # 1-byte segments, in order
    (1, "reverse"),  # 1-byte segments, last first
    (7, "reverse"),
    ([3, 11, 2, 30, 1, 9, 11], [4, 0, 6, 5, 2, 1, 3]),
])
def test_small_and_reordered_segments(tmp_path, segments, order):
    sigset, table = compiled(*LAB_SIGS)
    c = Conversation()
    c.handshake()
    n = len(segments) if isinstance(segments, list) else -(-len(LAB_STREAM) // segments)
    c.send("client", LAB_STREAM, segments=segments,
           order=list(range(n))[::-1] if order == "reverse" else order)
    c.send("server", b"HTTP/1.1 200 OK zone=4 ababab", segments=3)
    c.close()
    path = write(tmp_path, c.packets)
    result = replay(path, table)
    want = expected_tcp(sigset, c, c.packets)
    assert sorted(hits(result)) == want
    assert len([w for w in want if w[0] == "aba" and w[1] == "client"]) == 2
    assert_in_stream_order(result)
    (flow,) = of_type(result, "flow")
    assert (flow["end"], flow["gaps"], flow["overlaps"]) == ("fin", 0, 0)
    assert flow["matches"] == len(want)
    assert_scapy_agrees(path)


def test_retransmissions_never_match_twice(tmp_path):
    sigset, table = compiled(*LAB_SIGS)
    c = Conversation()
    c.handshake()
    c.send("client", LAB_STREAM, segments=10, dup=[0, 1, 2, 3, 4, 5])
    # a retransmission cut differently: the same bytes in other segment sizes
    c.send("client", LAB_STREAM[5:40], segments=[4, 31], seq_offset=-(len(LAB_STREAM) - 5))
    c.send("server", b"OK zone=4", dup=[0, 0])
    c.close()
    c.close()  # the FIN exchange retransmitted too
    path = write(tmp_path, c.packets)
    result = replay(path, table)
    want = expected_tcp(sigset, c, c.packets)
    assert sorted(hits(result)) == want
    assert len(want) == len(set(want))
    assert result.counters["retransmitted_bytes"] >= 60 + 35 + 18
    assert result.counters["overlap_conflicts"] == 0
    assert not of_type(result, "overlap")
    assert_scapy_agrees(path)


@pytest.mark.parametrize("where", ["delivered", "held"])
@pytest.mark.parametrize("first", ["OPEN", "SHUT"])
def test_conflicting_overlap_first_received_wins(tmp_path, first, where):
    sigset, table = compiled({"id": "open", "text": "cmd=OPEN"}, {"id": "shut", "text": "cmd=SHUT"},
                             {"id": "tail", "text": "end!ext"})
    second = "SHUT" if first == "OPEN" else "OPEN"
    head = b"valve"  # stream bytes [0, 5)
    earlier = f"zone=4;cmd={first};end".encode()  # at offset 5
    later = f"zone=4;cmd={second};end!ext".encode()  # same range, disagreeing, 4 bytes longer
    c = Conversation()
    c.handshake()
    if where == "delivered":
        c.segment("client", 0, head)
        c.segment("client", 5, earlier)
        conflict = c.segment("client", 5, later)
    else:  # both copies held behind a hole that fills last
        c.segment("client", 5, earlier)
        conflict = c.segment("client", 5, later)
        c.segment("client", 0, head)
    c.close()
    path = write(tmp_path, c.packets)
    result = replay(path, table)
    frames = frame_numbers(c.packets)
    winner = "open" if first == "OPEN" else "shut"
    sig_at = 5 + earlier.index(b"cmd=")
    got = hits(result)
    assert [h[:4] for h in got if h[0] in ("open", "shut")] == [
        (winner, "client", sig_at, sig_at + 8)]
    # the 4 bytes past the first copy are new: they complete a match with its tail
    assert ("tail", "client", 5 + len(earlier) - 3, 5 + len(later), frames[id(conflict)]) in got
    (ov,) = of_type(result, "overlap")
    # O/S, P/H, E/U, N/T all differ: the disagreeing span is exactly the 4 command letters
    assert (ov["side"], ov["start"], ov["end"], ov["frame"]) == (
        "client", sig_at + 4, sig_at + 8, frames[id(conflict)])
    (flow,) = of_type(result, "flow")
    assert (flow["overlaps"], flow["client_bytes"]) == (1, 5 + len(later))
    assert result.counters["overlap_bytes"] == 4
    assert_scapy_agrees(path)


@pytest.mark.parametrize("order", ["in_order", "reverse"])
def test_sequence_wraparound(tmp_path, order):
    sigset, table = compiled({"id": "wrap", "text": "fan-coil/3:on"}, {"id": "ack", "text": "ok!"})
    client = b"SET " + b"fan-coil/3:on" + b" please, now and then"
    server = b"ok! done"
    # client: first payload byte has seq 2**32 - 11, so stream byte 11 has seq 0
    # and the signature at [4, 17) straddles the wrap (RFC 9293 section 3.4,
    # section number recalled from memory)
    c = Conversation(isn_c=MOD - 12, isn_s=MOD - 1)  # server's SYN takes the last number
    c.handshake()
    pieces = -(-len(client) // 5)
    c.send("client", client, segments=5,
           order=None if order == "in_order" else list(range(pieces))[::-1])
    c.send("server", server, segments=2)
    c.close()
    seqs = {p[TCP].seq for p in c.packets[3:3 + pieces]}
    assert MOD - 11 in seqs and min(seqs) < 100  # both sides of the wrap were sent
    path = write(tmp_path, c.packets)
    result = replay(path, table)
    want = expected_tcp(sigset, c, c.packets)
    assert {w[:4] for w in want} == {("wrap", "client", 4, 17), ("ack", "server", 0, 3)}
    assert sorted(hits(result)) == want
    assert of_type(result, "flow")[0]["end"] == "fin"
    assert_scapy_agrees(path)


def test_mid_stream_pickup_roles_by_port_and_offsets_from_first_seq(tmp_path):
    sigset, table = compiled({"id": "temp", "text": "temp=21.5"})
    clock = Clock()
    # A: no SYN; the server (port 80) sends first, yet the larger port is the client
    a = Conversation(client=("192.0.2.10", 40001), server=("198.51.100.20", 80), isn_c=7000,
                     isn_s=90000, clock=clock)
    a.segment("server", 50, b"..temp=21.5..")  # the first seq seen: offset 0 of that side
    a.segment("client", 200, b"GET temp=21.5")
    a.segment("server", 63, b"temp=21.5")  # follows on: offset 13
    a.segment("server", 0, b"temp=21.5, before the first byte seen!" + b"." * 12)  # dropped
    # B: the crafted "client" has the smaller port: by port it is the server
    b = Conversation(client=("192.0.2.11", 502), server=("198.51.100.21", 49500), clock=clock)
    b.segment("client", 0, b"xtemp=21.5")
    # C: equal ports: the sender of the first packet is the client, whatever the addresses
    c = Conversation(client=("203.0.113.5", 47808), server=("192.0.2.9", 47808), clock=clock)
    c.segment("client", 0, b"temp=21.5")
    c.segment("server", 0, b"..temp=21.5")
    packets = craft.merge(a, b, c)
    path = write(tmp_path, packets)
    result = replay(path, table)
    frames = frame_numbers(packets)
    assert hits(result, client_port=40001) == [
        ("temp", "server", 2, 11, frames[id(a.packets[0])]),
        ("temp", "client", 4, 13, frames[id(a.packets[1])]),
        ("temp", "server", 13, 22, frames[id(a.packets[2])]),
    ]
    assert result.counters["before_start_bytes"] == 50
    assert hits(result, client_ip="198.51.100.21") == [
        ("temp", "server", 1, 10, frames[id(b.packets[0])])]
    got_c = of_type(result, "match")[-2:]
    assert [(m["client_ip"], m["side"], m["start"]) for m in got_c] == [
        ("203.0.113.5", "client", 0), ("203.0.113.5", "server", 2)]
    flows = {f["client_port"]: f for f in of_type(result, "flow")}
    assert flows[49500]["server_port"] == 502 and flows[49500]["server_bytes"] == 10
    assert flows[40001]["server_bytes"] == 22 and flows[40001]["gaps"] == 0
    assert {f["end"] for f in flows.values()} == {"capture_end"}
    assert_scapy_agrees(path)


def test_syn_and_fin_carrying_data_and_a_new_connection_after_rst(tmp_path):
    sigset, table = compiled({"id": "temp", "text": "temp=21.5"}, {"id": "bye", "text": "bye!"})
    c = Conversation()
    c.segment("client", -1, b"temp=21", flags="S")  # data on the SYN: seq ISN + 1 onwards
    c.segment("server", -1, b"", flags="SA")
    c.segment("client", 7, b".5;temp=21.5")
    c.segment("server", 0, b"by")
    c.segment("server", 2, b"e!", flags="FPA")  # the FIN carries the match's last bytes
    c.segment("client", 19, b"", flags="FA")
    # the same 5-tuple again after a RST: a new flow, offsets from its own SYN
    c.segment("client", 19, b"", flags="R")
    again = Conversation(isn_c=77, isn_s=88, clock=c.clock)
    again.handshake()
    again.send("client", b"temp=21.5")
    again.close("rst")
    packets = craft.merge(c, again)
    path = write(tmp_path, packets)
    result = replay(path, table)
    f = frame_numbers(packets)
    assert hits(result) == [
        ("temp", "client", 0, 9, f[id(c.packets[2])]),
        ("temp", "client", 10, 19, f[id(c.packets[2])]),
        ("bye", "server", 0, 4, f[id(c.packets[4])]),
        ("temp", "client", 0, 9, f[id(again.packets[3])]),
    ]
    assert [(r["end"], r["matches"]) for r in of_type(result, "flow")] == [("fin", 3),
                                                                           ("rst", 1)]
    assert result.counters["ignored_after_close"] == 1  # the RST of the ended flow
    assert_scapy_agrees(path)


def test_max_flows_evicts_the_longest_idle_flow(tmp_path):
    sigset, table = compiled({"id": "eco", "text": "mode=eco"})
    clock = Clock()
    a, b, d = (Conversation(client=(f"192.0.2.{n}", 40001), clock=clock) for n in (1, 2, 3))
    a.handshake()
    a.send("client", b"mode=eco")
    b.handshake()
    d.handshake()  # a third flow with max_flows=2: a, idle longest, is evicted
    a.send("client", b"..mode=eco")  # a again: picked up mid-stream, evicting b
    packets = craft.merge(a, b, d)
    path = write(tmp_path, packets)
    result = replay(path, table, max_flows=2)
    f = frame_numbers(packets)
    assert hits(result) == [("eco", "client", 0, 8, f[id(a.packets[3])]),
                            ("eco", "client", 2, 10, f[id(a.packets[4])])]
    ends = [(r["client_ip"], r["end"], r["matches"]) for r in of_type(result, "flow")]
    assert ends == [("192.0.2.1", "evicted", 1), ("192.0.2.2", "evicted", 0),
                    ("192.0.2.3", "capture_end", 0), ("192.0.2.1", "capture_end", 1)]
    assert result.counters["ended_evicted"] == 2


# A stream with a hole at [40, 60): a match before it, one that the hole cuts
# ("damper=" before, "closed" after: a scanner that joined the two would find
# it), and matches after it at their sequence-based offsets.
GAP_SIGS = ({"id": "fan", "text": "fan=auto"}, {"id": "damper", "text": "damper=closed"})


def gap_stream(after_len):
    """(bytes [0, 40), the 20 lost bytes, ``after_len`` bytes from offset 60)."""
    before = b"hello fan=auto; ahu-2 report".ljust(33, b".") + b"damper="
    lost = b"?" * 20  # never captured
    after = b"closed; " + b"-" * (after_len - 24) + b"fan=auto" + b"!" * 8
    assert (len(before), len(after)) == (40, after_len) and b"damper=" + b"closed" in before + after
    return before, lost, after


def test_gap_from_hold_cap(tmp_path):
    # "late": its window holds the sequence-based offset of the match after the
    # gap (184), not the offset counted from where scanning resumed (124)
    sigset, table = compiled(*GAP_SIGS, {"id": "late", "text": "fan=auto", "window": [150, 200]})
    part1, lost, part3 = gap_stream(140)
    c = Conversation()
    c.handshake()
    c.send("client", part1)
    c.next[0] += len(lost)  # those bytes are lost
    after = c.send("client", part3, segments=14)
    c.send("server", b"fan=auto")
    c.close()
    path = write(tmp_path, c.packets)
    result = replay(path, table, hold_bytes=64)
    frames = frame_numbers(c.packets)
    fan_after = 60 + part3.index(b"fan=auto")
    assert hits(result) == [
        ("fan", "client", 6, 14, frames[id(c.packets[3])]),
        ("fan", "client", fan_after, fan_after + 8, frames[id(after[(fan_after + 7 - 60) // 14])]),
        ("late", "client", fan_after, fan_after + 8, frames[id(after[(fan_after + 7 - 60) // 14])]),
        ("fan", "server", 0, 8, frames[id(c.packets[-4])]),
    ]
    (gap,) = of_type(result, "gap")
    assert (gap["side"], gap["start"], gap["end"], gap["frame"]) == (
        "client", 40, 60, frames[id(after[0])])
    # the gap record comes before the records of the bytes after it
    kinds = [r["type"] for r in result.records]
    assert kinds.index("gap") < [i for i, k in enumerate(kinds) if k == "match"][1]
    (flow,) = of_type(result, "flow")
    # everything after the gap was delivered before both FINs: a normal end
    assert (flow["gaps"], flow["client_bytes"], flow["end"]) == (1, 40 + 140, "fin")
    assert result.counters["hold_cap_gaps"] == 1 and result.counters["gap_bytes"] == 20
    assert fan_after == 184
    assert_scapy_agrees(path)


@pytest.mark.parametrize("end", ["capture_end", "rst", "idle"])
def test_gap_given_up_at_flow_end(tmp_path, end):
    sigset, table = compiled(*GAP_SIGS)
    part1, lost, part3 = gap_stream(40)
    c = Conversation()
    c.handshake()
    c.send("client", part1)
    c.next[0] += len(lost)
    after = c.send("client", part3, segments=[30, 10])
    packets = list(c.packets)
    if end == "rst":
        c.close("rst", side="server")
        packets = list(c.packets)
    elif end == "idle":  # a packet of another flow, past tcp_idle, ends this one
        c.clock.advance(400)
        other = Conversation(client=("192.0.2.77", 40100), clock=c.clock)
        other.handshake()
        packets += other.packets
    path = write(tmp_path, packets)
    result = replay(path, table)
    frames = frame_numbers(packets)
    fan_after = 60 + part3.index(b"fan=auto")
    assert hits(result, client_port=40001) == [
        ("fan", "client", 6, 14, frames[id(c.packets[3])]),
        ("fan", "client", fan_after, fan_after + 8, frames[id(after[1])]),
    ]
    (gap,) = of_type(result, "gap")
    assert (gap["start"], gap["end"], gap["frame"]) == (40, 60, frames[id(after[0])])
    flow = of_type(result, "flow")[0]
    assert (flow["end"], flow["gaps"], flow["client_bytes"]) == (end, 1, 80)
    assert_scapy_agrees(path)


def test_gap_before_fin(tmp_path):
    sigset, table = compiled(*GAP_SIGS)
    c = Conversation()
    c.handshake()
    c.send("client", b"fan=auto damper=")
    c.next[0] += 10  # the last data segment before the FIN is lost
    c.send("server", b"damper=closed")
    c.close()
    path = write(tmp_path, c.packets)
    result = replay(path, table)
    assert [h[:4] for h in hits(result)] == [("fan", "client", 0, 8),
                                            ("damper", "server", 0, 13)]
    (gap,) = of_type(result, "gap")
    client_fin = c.packets[-3]
    assert "F" in client_fin[TCP].flags
    # reported with the frame of the FIN, when the flow ends without the bytes
    assert (gap["side"], gap["start"], gap["end"], gap["frame"]) == (
        "client", 16, 26, frame_numbers(c.packets)[id(client_fin)])
    (flow,) = of_type(result, "flow")
    assert (flow["gaps"], flow["end"]) == (1, "capture_end")


# --- signature filters ---------------------------------------------------------

FILTER_SIGS = (
    {"id": "cli", "text": "mode=eco", "side": "client"},
    {"id": "srv", "text": "mode=eco", "side": "server"},
    {"id": "any", "text": "mode=eco"},
    {"id": "win", "text": "mode=eco", "window": [0, 24]},
    {"id": "p8080", "text": "mode=eco", "ports": [8080, 9000]},
    {"id": "tcp", "text": "mode=eco", "transport": "tcp"},
    {"id": "udp", "text": "mode=eco", "transport": "udp"},
)


def test_side_window_port_and_transport_filters(tmp_path):
    sigset, table = compiled(*FILTER_SIGS)
    data = b"...mode=eco.........mode=eco" + b"." * 30 + b"mode=eco"  # at 3, 20 (ends 28), 58
    clock = Clock()
    convs = []
    for port in (80, 8080):
        c = Conversation(server=("198.51.100.20", port), clock=clock)
        c.handshake()
        c.send("client", data, segments=9)
        c.send("server", data, segments=[4, 60, 2])
        c.close()
        convs.append(c)
    u = Datagrams(clock=clock)
    u.send("client", data)
    u.send("server", data)
    packets = craft.merge(*convs, u)
    path = write(tmp_path, packets)
    result = replay(path, table)
    ids = [s.id for s in sigset]
    for c in convs:
        got = hits(result, transport="tcp", server_port=c.server[1])
        assert sorted(got) == expected_tcp(sigset, c, packets)
    for side in ("client", "server"):
        want = sorted((ids[i], s, e) for i, s, e in reference_matches(
            sigset, data, side=side, transport="udp", server_port=u.server[1]))
        assert sorted((h[0], h[2], h[3]) for h in hits(result, transport="udp", side=side)) == want
    # spelled out for one flow side: the window keeps the first occurrence only
    # (the second ends at 28 > 24), the ports list excludes port 80
    got80 = sorted({(h[0], h[2]) for h in hits(result, server_port=80, side="client")})
    assert got80 == [("any", 3), ("any", 20), ("any", 58), ("cli", 3), ("cli", 20), ("cli", 58),
                     ("tcp", 3), ("tcp", 20), ("tcp", 58), ("win", 3)]
    assert {h[0] for h in hits(result, server_port=8080, side="server")} == {
        "srv", "any", "win", "p8080", "tcp"}
    assert {h[0] for h in hits(result, transport="udp")} == {"cli", "srv", "any", "win", "udp"}
    assert_scapy_agrees(path)


# --- link layers, IP versions, fragments, file formats --------------------------

VLAN_SIGS = ({"id": "bacnet", "hex": "81 0a 00 11"}, {"id": "lights", "text": "lights=off"})


@pytest.mark.parametrize("vlan", [10, [100, 10], [300, 200, 10]])
def test_vlan_tagged_and_stacked(tmp_path, vlan):
    sigset, table = compiled(*VLAN_SIGS)
    c = Conversation(vlan=vlan)
    c.handshake()
    c.send("client", b"floor 3 lights=off \x81\x0a\x00\x11 end", segments=6)
    c.send("server", b"lights=off ok")
    c.close()
    path = write(tmp_path, c.packets)
    assert bytes(c.packets[0])[12:14] == (b"\x81\x00" if vlan == 10 else b"\x88\xa8")
    result = replay(path, table)
    assert sorted(hits(result)) == expected_tcp(sigset, c, c.packets)
    assert len(hits(result)) == 3
    assert_scapy_agrees(path)


def with_extension_headers(pkt):
    """The IPv6 packet with Hop-by-Hop and Destination Options headers (RFC 8200
    section 4, recalled from memory: Hop-by-Hop must come first) between the
    IPv6 header and TCP/UDP; checksums recomputed by scapy."""
    ip6 = pkt[IPv6]
    l4 = ip6.payload.copy()
    del l4.chksum
    new = (Ether(src=pkt[Ether].src, dst=pkt[Ether].dst)
           / IPv6(src=ip6.src, dst=ip6.dst, hlim=ip6.hlim)
           / IPv6ExtHdrHopByHop(options=[PadN(optdata=b"\0" * 4)])
           / IPv6ExtHdrDestOpt(options=[PadN(optdata=b"\0" * 12)])
           / l4)
    new = Ether(bytes(new))
    new.time = pkt.time
    return new


def test_ipv6_with_extension_headers_and_fragments(tmp_path):
    sigset, table = compiled(*VLAN_SIGS, {"id": "co2", "text": "co2=812ppm"})
    clock = Clock()
    c = Conversation(ipv6=True, clock=clock)
    c.handshake()
    c.send("client", b"lights=off; lights=off", segments=[5, 14, 3])
    c.send("server", b"ok \x81\x0a\x00\x11")
    c.close()
    packets = [with_extension_headers(p) for p in c.packets]
    assert IPv6ExtHdrDestOpt in packets[4] and packets[4][IPv6].nh == 0  # Hop-by-Hop first
    # a UDP datagram cut by scapy's own fragment6 (RFC 8200 section 4.5, recalled
    # from memory), sent last first
    u = Datagrams(ipv6=True, clock=clock)
    (whole,) = u.send("client", b"sensor 12: " + b"." * 80 + b"co2=812ppm" + b"." * 60)
    frags = fragment6(Ether(src=whole[Ether].src, dst=whole[Ether].dst)
                      / IPv6(src=whole[IPv6].src, dst=whole[IPv6].dst)
                      / IPv6ExtHdrFragment(id=0x5EA1) / whole[UDP], 100)
    assert len(frags) >= 2
    frags = frags[::-1]
    for f in frags:
        f.time = EDecimal(clock.tick())
    path = write(tmp_path, packets + frags)
    result = replay(path, table)
    frames = frame_numbers(packets + frags)
    tcp = hits(result, transport="tcp")
    assert sorted(tcp) == expected_tcp(sigset, c, c.packets) and len(tcp) == 3
    match = of_type(result, "match")[0]
    assert (match["client_ip"], match["server_ip"]) == ("2001:db8::10", "2001:db8::20")
    at = 11 + 80
    assert hits(result, transport="udp") == [("co2", "client", at, at + 10, frames[id(frags[-1])])]
    assert result.counters["frag_reassembled"] == 1
    # scapy's own IPv6 reassembly (outside oracle) gives the same datagram
    assert bytes(defragment6([f[IPv6] for f in frags]).payload) == bytes(whole[UDP])
    assert_scapy_agrees(path)


def test_ipv4_fragments_out_of_order(tmp_path):
    sigset, table = compiled({"id": "hvac", "text": "HVAC-UNIT-22:FAULT"})
    clock = Clock()
    # UDP header + 38 bytes; the signature is IP payload [24, 42): fragments 2, 3 and 4
    udp_data = b"report " + b"." * 9 + b"HVAC-UNIT-22:FAULT" + b" end"
    u = Datagrams(clock=clock)
    ufrags = u.send("client", udp_data, fragments=[16, 8, 8, 14], order=[2, 0, 3, 1])
    c = Conversation(clock=clock)
    c.handshake()
    seg = c.segment("client", 0, b"x" * 20 + b"HVAC-UNIT-22:FAULT" + b"y" * 30)
    c.packets.remove(seg)
    # 20 + 68 bytes: fragments of 24, 24, 24, 16; the TCP header is in fragment 0, last
    tfrags = craft.ipv4_fragments(seg, 24, order=[2, 3, 1, 0])
    for f in tfrags:
        f.time = EDecimal(clock.tick())
    c.packets += tfrags
    c.close()
    packets = craft.merge(u, c)
    path = write(tmp_path, packets)
    result = replay(path, table)
    frames = frame_numbers(packets)
    assert hits(result) == [
        ("hvac", "client", 16, 34, frames[id(ufrags[-1])]),  # fragment 1 completes it
        ("hvac", "client", 20, 38, frames[id(tfrags[-1])]),
    ]
    # scapy's own reassembly (outside oracle; it wants fragments in offset order)
    # gives the same transport payloads
    frags = sorted((p for p in rdpcap(str(path)) if is_fragment(p)),
                   key=lambda p: (p[IP].id, p[IP].frag))
    whole = defragment(frags)
    assert [bytes(p[UDP].payload) for p in whole if UDP in p] == [udp_data]
    assert [tcp_payload(p) for p in whole if TCP in p] == [tcp_payload(seg)]
    assert result.counters["frag_reassembled"] == 2
    assert_scapy_agrees(path)


def test_pcapng_two_interfaces_and_gzip(tmp_path):
    sigset, table = compiled(*VLAN_SIGS, {"id": "co2", "text": "co2="})
    clock = Clock(step="0.000250")
    c = Conversation(vlan=20, clock=clock)
    u = Datagrams(link="raw", clock=clock)  # bare IP: LINKTYPE_RAW on the second interface
    c.handshake()
    u.send("client", b"co2=640 lights=off")
    c.send("client", b"lights=off", segments=3)
    u.send("server", b"co2=? \x81\x0a\x00\x11")
    c.close()
    path = tmp_path / "lab.pcapng"
    craft.write_pcapng(path, {"lab0": c.packets, "trunk1": u.packets}, nano=True)
    packets = craft.merge(c, u)
    result = replay(path, table)
    frames = frame_numbers(packets)
    want = [("lights", "client", 8, 18, frames[id(u.packets[0])]),
            ("co2", "client", 0, 4, frames[id(u.packets[0])]),
            ("co2", "server", 0, 4, frames[id(u.packets[1])]),
            ("bacnet", "server", 6, 10, frames[id(u.packets[1])])]
    assert sorted(hits(result, transport="udp")) == sorted(want)
    assert hits(result, transport="tcp") == expected_tcp(sigset, c, packets)
    for m in of_type(result, "match"):  # nanosecond timestamps of the frame
        assert m["ts"] == pytest.approx(float(packets[m["frame"] - 1].time), abs=1e-6)
    assert_scapy_agrees(path)
    # gzip-compressed pcapng and pcap give the same records
    for name, src in (("lab.pcapng.gz", path), ("plain.pcap.gz", None)):
        if src is None:
            src = write(tmp_path, c.packets, name="plain.pcap")
        gz = tmp_path / name
        gz.write_bytes(gzip.compress(src.read_bytes()))
        plain, packed = replay(src, table), replay(gz, table)
        strip = [{k: v for k, v in r.items() if k != "file"} for r in plain.records]
        assert [{k: v for k, v in r.items() if k != "file"} for r in packed.records] == strip
        assert {r["file"] for r in packed.records} == {str(gz)}
        assert_scapy_agrees(gz)  # scapy reads gzip-compressed captures too


@pytest.mark.parametrize("variant", [{"nano": True}, {"big_endian": True},
                                     {"nano": True, "big_endian": True}, {"link": "raw"}])
def test_pcap_variants_give_the_same_records(tmp_path, variant):
    sigset, table = compiled(*VLAN_SIGS)
    link = variant.pop("link", "ether")
    c = Conversation(link=link)
    c.handshake()
    c.send("client", b"lights=off \x81\x0a\x00\x11", segments=4)
    c.close()
    plain = replay(write(tmp_path, c.packets, name="plain.pcap"), table)
    other = replay(write(tmp_path, c.packets, name="other.pcap", **variant), table)
    assert [dict(r, file=None) for r in other.records] == [dict(r, file=None)
                                                           for r in plain.records]
    assert sorted(hits(plain)) == expected_tcp(sigset, c, c.packets) and len(hits(plain)) == 2
    assert_scapy_agrees(tmp_path / "other.pcap")


# --- UDP ------------------------------------------------------------------------

def test_udp_datagram_and_stream_scope(tmp_path):
    sigset, table = compiled(
        {"id": "dgram", "text": "ZONE-7:ON"},
        {"id": "stream", "text": "ZONE-7:ON", "scope": "stream"},
        {"id": "head", "text": "ZONE-7", "window": [0, 6]},  # datagram scope: its own start
        {"id": "shead", "text": "ZONE-7", "window": [0, 6], "scope": "stream"},
    )
    u = Datagrams()
    grams = [b"hello ZONE-", b"7:ON and ", b"ZONE-7:ON", b"ZONE-7:ON"]
    for g in grams[:3]:
        u.send("client", g)
    u.send("server", grams[3])
    path = write(tmp_path, u.packets)
    result = replay(path, table)
    f = frame_numbers(u.packets)
    p = u.packets
    assert sorted(hits(result)) == sorted([
        ("stream", "client", 6, 15, f[id(p[1])]),  # split across datagrams 1 and 2
        ("dgram", "client", 20, 29, f[id(p[2])]),  # offsets sum the earlier datagrams
        ("stream", "client", 20, 29, f[id(p[2])]),
        ("head", "client", 20, 26, f[id(p[2])]),  # datagram offset 0: inside the window
        ("dgram", "server", 0, 9, f[id(p[3])]),
        ("stream", "server", 0, 9, f[id(p[3])]),
        ("head", "server", 0, 6, f[id(p[3])]),
        ("shead", "server", 0, 6, f[id(p[3])]),
    ])
    assert_times(result, u.packets)
    (flow,) = of_type(result, "flow")
    assert (flow["first_ts"], flow["last_ts"]) == (float(p[0].time), float(p[3].time))
    assert (flow["client_bytes"], flow["server_bytes"], flow["client_packets"]) == (29, 9, 3)
    assert flow["end"] == "capture_end"
    assert_scapy_agrees(path)


# --- many flows -------------------------------------------------------------------

def test_300_interleaved_flows(tmp_path):
    sigset, table = compiled(*LAB_SIGS, *FILTER_SIGS[:3])
    rng = random.Random(20240304)
    clock = Clock(step="0.0001")
    flows = []
    for i in range(300):
        words = [b"zone=4", b"aba", b"setPOINT", b"\x00\xff\x00", b"mode=eco", b"ab", b"-"]
        cdata = b"".join(rng.choice(words) for _ in range(rng.randint(3, 12)))
        sdata = b"".join(rng.choice(words) for _ in range(rng.randint(1, 8)))
        c = Conversation(client=(f"192.0.2.{10 + i % 200}", 42000 + i),
                         server=("198.51.100.20", (80, 8080)[i % 2]), clock=clock,
                         isn_c=rng.randrange(MOD), isn_s=rng.randrange(MOD))
        csizes = cut_sizes(len(cdata), rng.randint(1, 9))
        ssizes = cut_sizes(len(sdata), rng.randint(1, 9))
        corder = list(range(len(csizes)))
        if i % 3 == 0:  # every third flow's client segments arrive shuffled
            rng.shuffle(corder)
        flows.append((c, cdata, csizes, corder, sdata, ssizes))
    packets = _round_robin(flows)
    path = write(tmp_path, packets)
    result = replay(path, table)
    by_flow = {}
    for m in of_type(result, "match"):
        by_flow.setdefault(m["client_port"], []).append(
            (m["sig"], m["side"], m["start"], m["end"], m["frame"]))
    frames_total = 0
    for c, *_ in flows:
        want = expected_tcp(sigset, c, packets)
        assert sorted(by_flow.get(c.client[1], [])) == want, c.client
        frames_total += len(c.packets)
    done = of_type(result, "flow")
    assert len(done) == 300 and {f["end"] for f in done} == {"fin"}
    assert sum(f["matches"] for f in done) == len(of_type(result, "match"))
    assert result.counters["frames"] == frames_total == len(packets)
    assert_in_stream_order(result)
    assert_scapy_agrees(path)


def cut_sizes(total, size):
    """Sizes of ``total`` bytes cut into pieces of ``size`` (the last one shorter)."""
    return [min(size, total - k) for k in range(0, total, size)]


def _round_robin(flows):
    """Interleave the flows packet by packet: flow i starts in round i // 4, so
    early flows have ended (and their slots are reused) while later ones run."""
    plans = []
    for c, cdata, csizes, corder, sdata, ssizes in flows:
        steps = [c.handshake]
        for side, data, sizes, order in (("client", cdata, csizes, corder),
                                         ("server", sdata, ssizes, range(len(ssizes)))):
            starts = [sum(sizes[:k]) for k in range(len(sizes))]
            steps += [partial(c.segment, side, starts[k], data[starts[k]:starts[k] + sizes[k]])
                      for k in order]
        steps.append(c.close)
        plans.append(steps)
    rounds = 0
    while any(plans):
        for i, steps in enumerate(plans):
            if steps and i // 4 <= rounds:
                steps.pop(0)()
        rounds += 1
    return craft.merge(*(f[0] for f in flows))


# --- what must not be scanned ---------------------------------------------------

def padded(pkt, extra: bytes):
    """The frame with ``extra`` bytes after the IP packet (Ethernet padding)."""
    new = pkt.__class__(bytes(pkt) + extra)
    new.time = pkt.time
    return new


def test_ethernet_padding_is_not_scanned(tmp_path):
    sigset, table = compiled({"id": "pad", "text": "ON!\0\0\0"}, {"id": "on", "text": "ON!"},
                             {"id": "ulen", "text": "relay3=ON"})
    clock = Clock()
    c = Conversation(clock=clock)
    c.handshake()
    # 57 bytes: padded to the 60-byte Ethernet minimum (64 with the frame check
    # sequence, which some captures keep: 4 more bytes) (common practice)
    seg = c.segment("client", 0, b"ON!")
    c.packets[-1] = padded(seg, b"\0" * 3 + b"\0\0\0\0")
    c.segment("client", 3, b"ab")
    c.close()
    # a UDP datagram whose UDP length ends 5 bytes before the IP payload does
    u = Datagrams(clock=clock)
    (gram,) = u.send("client", b"relay3")
    ip = gram[IP]
    short = (Ether(src=gram[Ether].src, dst=gram[Ether].dst) / IP(src=ip.src, dst=ip.dst, id=ip.id)
             / UDP(sport=gram[UDP].sport, dport=gram[UDP].dport, len=8 + 6) / b"relay3=ON")
    u.packets[-1] = Ether(bytes(short))
    u.packets[-1].time = gram.time
    packets = craft.merge(c, u)
    assert len(bytes(packets[3])) == 64 and Padding in packets[3]
    path = write(tmp_path, packets)
    result = replay(path, table)
    assert [h[:4] for h in hits(result)] == [("on", "client", 0, 3)]
    flows = of_type(result, "flow")
    assert sorted((f["transport"], f["client_bytes"]) for f in flows) == [("tcp", 5), ("udp", 6)]
    assert_scapy_agrees(path)


# --- damaged input and the command line ------------------------------------------

RULES_TOML = """\
[set]
name = "bldg-lab-e2e"
version = "1"

[[signature]]
id = "bldg-relay"
text = "POST /relay/"
side = "client"
label = "relay override request"

[[signature]]
id = "bldg-co2"
text = "co2="
label = "air quality report"

[[signature]]
id = "bldg-magic"
hex = "de ad be ef"
transport = "udp"
scope = "stream"
"""


def lab_capture(path, seed, flows=3):
    """A small capture: TCP flows posting relay commands and a UDP sensor flow."""
    rng = random.Random(seed)
    clock = Clock(start=1709542800 + seed * 1000)
    convs = []
    for i in range(flows):
        c = Conversation(client=(f"192.0.2.{20 + i}", 40100 + i), clock=clock,
                         isn_c=rng.randrange(MOD))
        c.handshake()
        body = b"POST /relay/%d HTTP/1.1\r\nco2=%d\r\n" % (i, rng.randrange(400, 900))
        c.send("client", body, segments=rng.randint(3, 12))
        c.send("server", b"HTTP/1.1 204 co2=ok\r\n")
        c.close()
        convs.append(c)
    u = Datagrams(clock=clock)
    u.send("client", b"co2=700 \xde\xad")
    u.send("client", b"\xbe\xef tail")
    craft.write_pcap(path, craft.merge(*convs, u))
    return path


@pytest.fixture
def rules(tmp_path):
    path = tmp_path / "lab-rules.toml"
    path.write_text(RULES_TOML, encoding="utf-8")
    return path


def test_cli_formats_agree(tmp_path, rules):
    cap = lab_capture(tmp_path / "lab.pcap", 1)
    table = seamscan.compile(seamscan.load_signatures(rules))
    direct = replay(cap, table).records
    out = cli("scan", cap, "--rules", rules, "--format", "jsonl")
    assert out.returncode == 0, out.stderr
    recs = jsonl(out.stdout)  # every line parses
    assert recs[-1]["type"] == "summary" and [r["type"] for r in recs].count("summary") == 1
    assert recs[:-1] == direct
    matches = [r for r in recs if r["type"] == "match"]
    assert len(matches) == 3 * 3 + 2 and recs[-1]["matches"] == len(matches)
    assert {m["sig"] for m in matches} == {"bldg-relay", "bldg-co2", "bldg-magic"}
    assert recs[-1]["flows"] == 4 and recs[-1]["frames"] == len(rdpcap(str(cap)))

    out = cli("scan", cap, "--rules", rules, "--format", "csv")
    assert out.returncode == 0, out.stderr
    rows = list(csv.reader(io.StringIO(out.stdout)))
    assert rows[0] == MATCH_FIELDS
    assert rows[1:] == [[str(m[k]) for k in MATCH_FIELDS] for m in matches]

    out = cli("scan", cap, "--rules", rules, "--format", "table")
    assert out.returncode == 0, out.stderr
    for m in matches:
        assert f"{m['client_ip']}:{m['client_port']}" in out.stdout
        assert f"{m['server_ip']}:{m['server_port']}" in out.stdout
    for sig in ("bldg-relay", "bldg-co2", "bldg-magic", "relay override request"):
        assert sig in out.stdout
    assert not out.stdout.lstrip().startswith("{")


def test_cli_flow_limits_reach_the_replay(tmp_path):
    sigset, table = compiled(*GAP_SIGS)
    part1, _, part3 = gap_stream(140)
    c = Conversation()
    c.handshake()
    c.send("client", part1)
    c.next[0] += 20
    c.send("client", part3, segments=14)
    c.close()
    path = write(tmp_path, c.packets)
    rules = tmp_path / "gap.toml"
    rules.write_text('[[signature]]\nid = "fan"\ntext = "fan=auto"\n\n'
                     '[[signature]]\nid = "damper"\ntext = "damper=closed"\n', encoding="utf-8")
    out = cli("scan", path, "--rules", rules, "--format", "jsonl", "--hold-bytes", "64B")
    assert out.returncode == 0, out.stderr
    recs = jsonl(out.stdout)
    assert recs[:-1] == replay(path, table, hold_bytes=64).records
    assert [(r["start"], r["end"]) for r in recs if r["type"] == "gap"] == [(40, 60)]
    assert recs[-1]["flow_events"]["hold_cap_gaps"] == 1
    out = cli("scan", path, "--rules", rules, "--format", "table", "--hold-bytes", "64")
    assert out.returncode == 0, out.stderr
    assert "gap" in out.stdout and "40..60" in out.stdout and "fan" in out.stdout


@pytest.mark.parametrize("damaged", [False, True])
def test_cli_jobs_two_equals_jobs_one(tmp_path, rules, damaged):
    caps = [lab_capture(tmp_path / f"lab{k}.pcap", k, flows=2 + k) for k in range(3)]
    if damaged:  # the middle file loses its last 30 bytes
        caps[1].write_bytes(caps[1].read_bytes()[:-30])
    runs = []
    for jobs in (1, 2):
        out = cli("scan", *caps, "--rules", rules, "--format", "jsonl", "--each-file", "--jobs", jobs,
                  "-o", tmp_path / f"out{jobs}.jsonl")
        assert out.returncode == (3 if damaged else 0), out.stderr
        assert out.stderr.count("damaged capture") == damaged
        recs = jsonl((tmp_path / f"out{jobs}.jsonl").read_text(encoding="utf-8"))
        for k in TIMING_FIELDS:
            recs[-1].pop(k)
        runs.append(recs)
    assert runs[0] == runs[1]
    files = [r["file"] for r in runs[0] if "file" in r]
    assert list(dict.fromkeys(files)) == [str(p) for p in caps]  # output in file order
    assert runs[0][-1]["files"] == 3 and runs[0][-1]["flows"] == 3 + 4 + 5
    assert [r["file"] for r in runs[0] if r["type"] == "error"] == [str(caps[1])] * damaged


def test_cli_damaged_capture_keeps_what_was_found(tmp_path, rules):
    cap = lab_capture(tmp_path / "lab.pcap", 2)
    whole = cap.read_bytes()
    frames = len(rdpcap(str(cap)))
    cut = tmp_path / "cut.pcap"
    cut.write_bytes(whole[:-7])  # the last record loses 7 of its bytes
    table = seamscan.compile(seamscan.load_signatures(rules))
    found = [r for r in replay(cap, table).records if r["type"] == "match"]
    lost = [m for m in found if m["frame"] == frames]  # completed by the damaged record
    assert len(lost) == 1
    out = cli("scan", cut, cap, "--rules", rules, "--each-file")  # not a terminal: jsonl
    assert out.returncode == 3
    recs = jsonl(out.stdout)
    errors = [r for r in recs if r["type"] == "error"]
    assert len(errors) == 1 and errors[0]["file"] == str(cut)
    before = recs[:recs.index(errors[0])]
    assert [r for r in before if r["type"] == "match"] == [dict(m, file=str(cut)) for m in found
                                                           if m not in lost]
    assert {r["end"] for r in before if r["type"] == "flow"} <= {"fin", "capture_end"}
    assert len([r for r in before if r["type"] == "flow"]) == 4
    after = recs[recs.index(errors[0]) + 1:]
    assert [r for r in after if r["type"] == "match"] == found  # the next file still scanned
    assert recs[-1]["type"] == "summary" and recs[-1]["damaged_files"] == 1
    assert str(cut) in out.stderr and f"after frame {frames - 1}" in out.stderr
    assert "offset" in out.stderr and "Traceback" not in out.stderr
    assert f"record {frames}" in errors[0]["message"]
    table_out = cli("scan", cut, "--rules", rules, "--format", "table").stdout
    damage = [line for line in table_out.splitlines() if line.startswith("!! ")]
    assert len(damage) == 1 and damage[0].count(str(cut)) == 1  # the path said once


@pytest.mark.parametrize("kind", ["pcapng_cut", "gzip_cut", "header_cut"])
def test_damaged_capture_variants(tmp_path, kind):
    sigset, table = compiled({"id": "co2", "text": "co2="})
    clock = Clock()
    u = Datagrams(clock=clock)
    for k in range(40):
        u.send("client", b"co2=%d" % (500 + k) + bytes(range(256)) * 4)
    if kind == "pcapng_cut":
        path = tmp_path / "lab.pcapng"
        craft.write_pcapng(path, {"eth0": u.packets})
        path.write_bytes(path.read_bytes()[:-500])
    elif kind == "gzip_cut":
        plain = write(tmp_path, u.packets)
        path = tmp_path / "lab.pcap.gz"
        packed = gzip.compress(plain.read_bytes())
        path.write_bytes(packed[: len(packed) * 2 // 3])
    else:
        path = write(tmp_path, u.packets)
        data = path.read_bytes()
        path.write_bytes(data[: 24 + 20 * (16 + len(bytes(u.packets[0]))) + 9])
    result = replay_file(path, table)
    assert result.error is not None and str(path) in result.error
    got = [r["start"] for r in result.records if r["type"] == "match"]
    size = len(b"co2=500") + 1024  # every datagram's length
    # every datagram before the damage was scanned, in order, nothing invented
    assert got == [k * size for k in range(len(got))] and 0 < len(got) < 40
    if kind == "header_cut":
        assert len(got) == 20 and "record 21 header is truncated" in result.error
    assert result.records[-1]["type"] == "flow" and result.records[-1]["end"] == "capture_end"
    assert result.counters["damaged_files"] == 1


def test_cli_bad_inputs(tmp_path, rules):
    notcap = tmp_path / "notes.txt"
    notcap.write_text("building B, floor 3: replace filter\n", encoding="utf-8")
    out = cli("scan", notcap, "--rules", rules, "--format", "jsonl")
    assert out.returncode == 3
    assert str(notcap) in out.stderr and "not a pcap or pcapng capture" in out.stderr
    recs = jsonl(out.stdout)
    assert [r["type"] for r in recs] == ["error", "summary"]

    missing = tmp_path / "missing.pcap"
    out = cli("scan", missing, "--rules", rules)
    assert out.returncode == 2
    assert str(missing) in out.stderr and "no such capture file" in out.stderr
    assert out.stdout == ""

    cap = lab_capture(tmp_path / "lab.pcap", 3, flows=1)
    bad = tmp_path / "bad-rules.toml"
    bad.write_text('[[signature]]\nid = "b1"\nhex = "de ad b"\n\n'
                   '[[signature]]\nid = "b2"\ntext = "x"\nside = "both"\n', encoding="utf-8")
    out = cli("scan", cap, "--rules", bad)
    assert out.returncode == 2 and out.stdout == ""
    assert str(bad) in out.stderr and "2 problem(s)" in out.stderr
    # each problem names the line of its [[signature]] table and the field
    assert "line 1: signature 'b1' (#1): field 'hex'" in out.stderr
    assert "line 5: signature 'b2' (#2): field 'side'" in out.stderr
    assert "Traceback" not in out.stderr

    out = cli("scan", cap, "--rules", tmp_path / "no-such-rules.toml")
    assert out.returncode == 2 and "no-such-rules.toml" in out.stderr
    assert "Traceback" not in out.stderr

    empty = tmp_path / "empty.pcap"
    empty.write_bytes(b"")
    out = cli("scan", empty, "--rules", rules, "--format", "jsonl")
    assert out.returncode == 3 and f"{empty}: empty file" in out.stderr


def test_cli_unwritable_output_is_a_usage_error(tmp_path, rules):
    cap = lab_capture(tmp_path / "lab.pcap", 4, flows=1)
    target = tmp_path / "no-such-dir" / "out.jsonl"
    out = cli("scan", cap, "--rules", rules, "-o", target)
    assert "Traceback" not in out.stderr
    assert out.returncode == 2 and str(target) in out.stderr


# --- property: any segmentation, order and duplication ---------------------------

PROP_SIGS = seamscan.signature_set([
    {"id": "relay", "text": "relay"},
    {"id": "lay", "text": "lay"},
    {"id": "relayon", "text": "relay/on"},
    {"id": "bin", "hex": "00 ff 00"},
    {"id": "fold", "text": "SetPt", "fold_case": True},
    {"id": "cli", "text": "ack", "side": "client"},
    {"id": "srv", "text": "ack", "side": "server"},
    {"id": "win", "text": "on", "window": [0, 40]},
    {"id": "p80", "text": "ye", "ports": [80]},
])
PROP_TABLE = seamscan.compile(PROP_SIGS)
PLANTS = [s.data for s in PROP_SIGS] + [b"setpt", b"relay/on/relay", b"\x00\xff\x00\xff\x00"]


@st.composite
def side_plan(draw):
    """A stream with planted signatures, cut into pieces, emitted in some order with repeats."""
    parts = draw(st.lists(st.one_of(st.sampled_from(PLANTS),
                                    st.binary(min_size=1, max_size=12),
                                    st.text("relayonckSsetP/ \0", min_size=1, max_size=10)
                                    .map(str.encode)), min_size=1, max_size=14))
    data = b"".join(parts)
    cuts = sorted(draw(st.sets(st.integers(1, len(data) - 1), max_size=12))) if len(data) > 1 else []
    bounds = [0, *cuts, len(data)]
    pieces = [(bounds[k], data[bounds[k]:bounds[k + 1]]) for k in range(len(bounds) - 1)]
    order = draw(st.permutations(range(len(pieces))))
    dups = draw(st.lists(st.integers(0, len(pieces) - 1), max_size=4))
    emits = list(order)
    for d in dups:  # a retransmission, at some later point
        emits.insert(draw(st.integers(emits.index(d) + 1, len(emits))), d)
    # re-sent ranges cut differently (same bytes): overlaps that agree
    resend = draw(st.lists(st.tuples(st.integers(0, len(data) - 1), st.integers(1, 8)),
                           max_size=2))
    return data, [pieces[k] for k in emits] + [(o, data[o:o + n]) for o, n in resend]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(client=side_plan(), server=side_plan(), isn=st.tuples(st.integers(0, MOD - 1),
                                                              st.integers(0, MOD - 1)),
       mix=st.randoms(use_true_random=False), port=st.sampled_from([80, 8080]),
       ipv6=st.booleans(), vlan=st.sampled_from([None, 5, [40, 5]]),
       early_fin=st.tuples(st.integers(0, 3), st.integers(0, 3)))
def test_property_matches_equal_reference_on_intended_streams(client, server, isn, mix, port,
                                                              ipv6, vlan, early_fin):
    c = Conversation(server=("2001:db8::20" if ipv6 else "198.51.100.20", port),
                     client=("2001:db8::10" if ipv6 else "192.0.2.10", 40001), ipv6=ipv6,
                     vlan=vlan, isn_c=isn[0], isn_s=isn[1])
    c.handshake()
    plans = {}
    for side, (data, pieces), early in (("client", client, early_fin[0]),
                                        ("server", server, early_fin[1])):
        pieces = list(pieces)
        if early:  # a FIN overtaking the last few segments (they come after it)
            pieces.insert(max(0, len(pieces) - early), (len(data), b""))
        plans[side] = pieces
    # interleave the two sides, each side's own order kept
    emits = [side for side, pieces in plans.items() for _ in pieces]
    mix.shuffle(emits)
    queues = {side: iter(pieces) for side, pieces in plans.items()}
    for side in emits:
        rel, data = next(queues[side])
        c.segment(side, rel, data, flags="PA" if data else "FA")
    c.close()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "prop.pcap"
        craft.write_pcap(path, c.packets)
        result = replay(path, PROP_TABLE)
    streams = intended(c, c.packets)
    assert streams["client"][0] == client[0] and streams["server"][0] == server[0]
    assert sorted(hits(result)) == expected_tcp(PROP_SIGS, c, c.packets)
    assert_in_stream_order(result)
    assert_times(result, c.packets)
    (flow,) = of_type(result, "flow")
    assert (flow["end"], flow["gaps"], flow["overlaps"]) == ("fin", 0, 0)
    assert (flow["client_bytes"], flow["server_bytes"]) == (len(client[0]), len(server[0]))


@st.composite
def lossy_plan(draw):
    """A side plan with some pieces never sent (capture losses)."""
    data, pieces = draw(side_plan())
    lost = draw(st.sets(st.integers(0, len(pieces) - 1), max_size=3))
    return data, [p for k, p in enumerate(pieces) if k not in lost]


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(client=lossy_plan(), server=lossy_plan(), mix=st.randoms(use_true_random=False),
       hold=st.integers(0, 48))
def test_property_gaps_cut_the_streams_and_nothing_spans_them(client, server, mix, hold):
    """Losses and a tiny hold cap: matches equal brute force on each run of
    bytes between the gaps (sequence-based offsets, windows included); every
    byte never sent before the side's end lies in a gap."""
    c = Conversation(isn_c=MOD - 40, isn_s=123)
    c.handshake()
    emits = ["client"] * len(client[1]) + ["server"] * len(server[1])
    mix.shuffle(emits)
    queues = {"client": iter(client[1]), "server": iter(server[1])}
    for side in emits:
        c.segment(side, *next(queues[side]))
    ends = {"client": c.next[0], "server": c.next[1]}
    c.close()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "lossy.pcap"
        craft.write_pcap(path, c.packets)
        result = replay(path, PROP_TABLE, hold_bytes=hold)
    ids = [s.id for s in PROP_SIGS]
    for side, (data, pieces) in (("client", client), ("server", server)):
        gaps = [(g["start"], g["end"]) for g in of_type(result, "gap") if g["side"] == side]
        sent = set()
        for off, chunk in pieces:
            sent.update(range(off, off + len(chunk)))
        runs, at = [], 0
        for start, end in gaps:
            assert at <= start < end <= ends[side]
            runs.append((at, start))
            at = end
        runs.append((at, ends[side]))
        for start, end in runs:
            assert set(range(start, end)) <= sent, "a byte never sent was not a gap"
        want = sorted((ids[i], s, e) for start, end in runs
                      for i, s, e in reference_matches(PROP_SIGS, data[:end], side=side,
                                                       transport="tcp", server_port=80)
                      if s >= start)
        assert sorted(h[:1] + h[2:4] for h in hits(result, side=side)) == want
    assert_in_stream_order(result)
