"""The C front end (``seamscan.fastpath``) against the pure-Python path.

``fastpath.feed`` must hand the flow tracker exactly the packets that
``replay._feed`` does (same tuples, same float timestamps, same frame
numbers), leave the decoder's counters the same and stop with the same
error text on damage; with it on (the default; ``SEAMSCAN_FASTPATH=0`` is off) a
replay's records and counters must not change.  Captures are written
here byte by byte (classic pcap layout per draft-ietf-opsawg-pcap: a
24-byte file header, then per record a 16-byte header of seconds,
fraction, captured length and original length), with frames built by
scapy; random captures mutate and cut those frames.

Outside oracle: scapy's ``rdpcap`` and its dissection give the frame count
and every TCP/UDP frame's ports and payload.

The data is an invented smart-building lab in the documentation address
ranges (192.0.2.0/24, 198.51.100.0/24, 203.0.113.0/24, 2001:db8::/32).
"""

from __future__ import annotations

import gzip
import os
import random
import struct
from pathlib import Path

import pytest
from scapy.layers.inet import ICMP, IP, TCP, UDP
from scapy.layers.inet6 import IPv6, IPv6ExtHdrHopByHop
from scapy.layers.l2 import ARP, Dot1Q, Ether
from scapy.packet import Padding
from scapy.utils import rdpcap

import seamscan
from seamscan import capture, fastpath, replay
from seamscan.decode import Decoder
from seamscan.replay import ReplayOptions, replay_file
from toolchains import skip_message

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "pcaps_demo"
ETH = dict(src="02:00:00:00:00:0a", dst="02:00:00:00:00:15")
HVAC, CONSOLE, LIGHTS = "198.51.100.21", "192.0.2.10", "198.51.100.22"
V6_CONSOLE, V6_LIGHTS = "2001:db8:7e::10", "2001:db8:7e:2::22"


# --- writing captures -------------------------------------------------------------

def pcap_bytes(records, *, big=False, nano=False, linktype=1, snaplen=65535) -> bytes:
    """A classic pcap file: ``records`` are (seconds, fraction, frame[, original length])."""
    e = ">" if big else "<"
    magic = 0xA1B23C4D if nano else 0xA1B2C3D4
    out = [struct.pack(e + "IHHiIII", magic, 2, 4, 0, 0, snaplen, linktype)]
    for rec in records:
        sec, frac, frame = rec[:3]
        orig = rec[3] if len(rec) > 3 else len(frame)
        out.append(struct.pack(e + "IIII", sec, frac, len(frame), orig) + frame)
    return b"".join(out)


def lab_frames() -> list[bytes]:
    """One frame of each kind the decoder tells apart, fast path or not."""
    http = b"POST /hvac/v2/setpoint HTTP/1.1\r\nHost: hvac\r\n\r\n{\"zone\":3}"
    tele = b"\x81\x0a\x00\x11meter=42"
    v4 = IP(src=CONSOLE, dst=HVAC)
    v6 = IPv6(src=V6_CONSOLE, dst=V6_LIGHTS)
    pkts = [
        Ether(**ETH) / v4 / TCP(sport=40100, dport=80, seq=1001, ack=5001, flags="PA") / http,
        Ether(**ETH) / v4 / TCP(sport=40100, dport=80, seq=1001, flags="S"),
        Ether(**ETH) / v4 / TCP(sport=40100, dport=80, flags="A", options=[("NOP", None)] * 4)
        / b"opts",
        Ether(**ETH) / IP(src="198.51.100.30", dst="192.0.2.40") / UDP(sport=47100, dport=47100)
        / tele,
        Ether(**ETH) / IP(src="198.51.100.30", dst="192.0.2.40") / UDP(sport=47110, dport=47110)
        / b"hb" / Padding(load=b"\x00" * 12),  # short frame: Ethernet padding
        Ether(**ETH) / v6 / TCP(sport=40200, dport=8080, seq=7, flags="PA") / b"GET /lights/1",
        Ether(**ETH) / v6 / UDP(sport=47100, dport=47100) / tele,
        Ether(**ETH) / v6 / IPv6ExtHdrHopByHop() / UDP(sport=47100, dport=47100) / tele,
        Ether(**ETH) / IP(src=CONSOLE, dst=HVAC, options=b"\x01\x01\x01\x00")
        / TCP(sport=40101, dport=80, flags="PA") / b"with ip options",
        Ether(**ETH) / IP(src="198.51.100.21", dst="192.0.2.10", flags="MF", frag=0)
        / UDP(sport=47200, dport=47200) / (b"firmware" * 4),
        Ether(**ETH) / Dot1Q(vlan=30) / IP(src=CONSOLE, dst="198.51.100.23")
        / TCP(sport=40300, dport=80, flags="PA") / b"GET /door/state",
        Ether(**ETH) / v4 / ICMP() / b"ping",
        Ether(**ETH) / ARP(psrc=CONSOLE, pdst=HVAC),
        Ether(**ETH) / v4 / UDP(sport=1, dport=2, len=4) / b"bad udp length",
        Ether(**ETH) / v4 / TCP(sport=40100, dport=80, dataofs=15, flags="PA") / b"x",
    ]
    return [bytes(p) for p in pkts]


def write(tmp_path, data: bytes, name="lab.pcap") -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    return path


# --- running both paths -----------------------------------------------------------

class CountingLib:
    """``fastpath.lib`` with its record calls counted."""

    def __init__(self, lib):
        self.lib = lib
        self.calls = 0

    def __getattr__(self, name):
        return getattr(self.lib, name)

    def sf_pcap_records(self, *args):
        self.calls += 1
        return self.lib.sf_pcap_records(*args)


def both(path, monkeypatch=None):
    """(packets, counters, error) of the Python path, then of the C path;
    with ``monkeypatch``, also that C framed at least one buffer."""
    got = []
    for use_c in (False, True):
        decoder = Decoder()
        packets = []
        if use_c:
            counting = CountingLib(fastpath.lib)
            if monkeypatch is not None:
                monkeypatch.setattr(fastpath, "lib", counting)
            error = fastpath.feed(path, decoder, packets.append, None)
            if monkeypatch is not None:
                assert counting.calls > 0
        else:
            error = replay._feed(path, decoder.decode, packets.append, None)
        got.append((packets, decoder.counters, error))
    return got


def assert_same(path, monkeypatch=None):
    py, c = both(path, monkeypatch)
    assert c[2] == py[2]
    assert c[1] == py[1]
    assert len(c[0]) == len(py[0])
    for a, b in zip(c[0], py[0], strict=True):
        assert tuple(a) == tuple(b)
        assert type(a) is type(b)
    return py


# --- crafted captures ---------------------------------------------------------------

@pytest.mark.parametrize("big", [False, True])
@pytest.mark.parametrize("nano", [False, True])
def test_every_frame_kind_both_byte_orders_and_resolutions(tmp_path, monkeypatch, big, nano):
    frames = lab_frames()
    recs = [(1_700_000_000 + i, (i * 123_457) % (10**9 if nano else 10**6), f)
            for i, f in enumerate(frames)]
    path = write(tmp_path, pcap_bytes(recs, big=big, nano=nano))
    packets, counters, error = assert_same(path, monkeypatch)
    assert error is None and counters["frames"] == len(frames)
    # scapy's own reader and dissection (outside oracle): frame count, and
    # ports and payload of every fast-path TCP/UDP frame (first seven kinds
    # but the padded one, whose payload scapy reports apart from the padding)
    scapy_pkts = rdpcap(str(path))
    assert len(scapy_pkts) == len(frames)
    by_frame = {p.frame: p for p in packets}
    for n, sp in enumerate(scapy_pkts, 1):
        l4 = sp[TCP] if TCP in sp else sp[UDP] if UDP in sp else None
        if l4 is None or n not in by_frame:
            continue
        pkt = by_frame[n]
        assert (pkt.sport, pkt.dport) == (l4.sport, l4.dport)
        data = bytes(l4.payload)
        if Padding in sp:
            data = data[: len(data) - len(sp[Padding].load)]
        if n in (1, 3, 4, 5, 6, 7):
            assert pkt.payload == data


def test_c_decodes_exactly_the_fast_path_kinds(tmp_path):
    # the first seven kinds of lab_frames are the decoder's fast path
    # (untagged Ethernet, IPv4 without options / IPv6 without extension
    # headers, not a fragment, TCP or UDP, lengths consistent); C decodes
    # those and leaves the rest to the decoder
    data = pcap_bytes([(1, 0, f) for f in lab_frames()])
    rec = fastpath._REC
    out = bytearray(64 * rec.size)
    end, fast = fastpath.ffi.new("size_t *"), fastpath.ffi.new("size_t *")
    n = fastpath.lib.sf_pcap_records(fastpath.ffi.from_buffer(data), len(data), 24, 0, 10**6,
                                     capture.MAX_RECORD, 1, fastpath.ffi.from_buffer(out), 64,
                                     end, fast)
    assert n == len(lab_frames()) and end[0] == len(data) and fast[0] == 7
    kinds = [r[0] for r in rec.iter_unpack(out[: n * rec.size])]
    assert kinds == [0] * 7 + [1] * (n - 7)


def test_large_nanosecond_timestamps_round_like_python(tmp_path):
    # sec * 10**9 + frac reaches past 2**53, beyond which a binary64 double
    # (IEEE 754: 53-bit significand) no longer holds every integer: the C
    # side leaves the division to Python, whose int / int is correctly
    # rounded (recalled from memory).
    frame = lab_frames()[0]
    recs = [(sec, frac, frame) for sec in (0, 1, 2**23, 9_007_199, 2**32 - 1)
            for frac in (0, 1, 999_999_999, 2**32 - 1)]
    assert_same(write(tmp_path, pcap_bytes(recs, nano=True)))
    assert_same(write(tmp_path, pcap_bytes(recs), "micro.pcap"))


def test_other_link_types_go_through_the_decoder(tmp_path, monkeypatch):
    raw = [bytes(IP(src=CONSOLE, dst=HVAC) / TCP(sport=40100, dport=80, flags="PA") / b"raw ip")]
    path = write(tmp_path, pcap_bytes([(1, 2, raw[0])] * 5, linktype=101))
    packets, counters, _ = assert_same(path, monkeypatch)
    assert counters["decoded"] == 5 and packets[0].payload == b"raw ip"


def test_many_records_across_buffer_refills(tmp_path, monkeypatch):
    # more records than one C call writes and more bytes than the reader's
    # chunk, with a few records longer than a chunk's remainder
    rng = random.Random(7)
    frames = lab_frames()
    big = bytes(Ether(**ETH) / IP(src=CONSOLE, dst=HVAC)
                / TCP(sport=40100, dport=80, flags="PA") / bytes(60_000))
    recs = []
    for i in range(12_000):
        frame = big if i % 997 == 0 else rng.choice(frames)
        recs.append((1_700_000_000 + i // 100, i % 100 * 10_000, frame))
    data = pcap_bytes(recs)
    assert len(data) > 4 * capture.CHUNK
    packets, counters, _ = assert_same(write(tmp_path, data), monkeypatch)
    assert counters["frames"] == 12_000
    gz = tmp_path / "lab.pcap.gz"
    gz.write_bytes(gzip.compress(data, compresslevel=1))
    assert_same(gz, monkeypatch)


@pytest.mark.parametrize("cut", ["mid_header", "mid_frame", "file_header", "too_long"])
def test_damage_gives_the_same_error_and_keeps_the_packets(tmp_path, cut):
    frames = lab_frames()
    data = pcap_bytes([(5, i, f) for i, f in enumerate(frames * 3)])
    if cut == "mid_header":
        data = data[: len(data) - len(frames[-1]) - 7]
    elif cut == "mid_frame":
        data = data[:-5]
    elif cut == "file_header":
        data = data[:20]
    else:
        data += struct.pack("<IIII", 9, 0, 1 << 27, 1 << 27) + b"tail"
    path = write(tmp_path, data)
    packets, _, error = assert_same(path)
    assert error is not None and str(path) in error
    if cut != "file_header":
        assert len(packets) > 0


def test_every_cut_of_a_short_capture(tmp_path):
    frames = lab_frames()[:4]
    data = pcap_bytes([(5, i, f) for i, f in enumerate(frames)], big=True)
    for end in range(24, len(data) + 1):
        assert_same(write(tmp_path, data[:end]))


def test_pcapng_and_gzip_stay_on_the_reader(tmp_path):
    for name in ("lab-trunk.pcapng", "lab-http.pcap", "lab-udp.pcap"):
        assert_same(DEMO / name)
    gz = tmp_path / "lab-http.pcap.gz"
    gz.write_bytes(gzip.compress((DEMO / "lab-http.pcap").read_bytes()))
    assert_same(gz)


def test_random_captures(tmp_path):
    rng = random.Random(20261201)
    frames = lab_frames()
    for trial in range(60):
        recs = []
        for _ in range(rng.randrange(1, 40)):
            frame = bytearray(rng.choice(frames))
            for _ in range(rng.randrange(0, 4)):  # damage a header byte
                frame[rng.randrange(min(70, len(frame)))] = rng.randrange(256)
            if rng.random() < 0.2:
                frame = frame[: rng.randrange(len(frame) + 1)]
            recs.append((rng.randrange(2**32), rng.randrange(2**32), bytes(frame)))
        data = pcap_bytes(recs, big=rng.random() < 0.5, nano=rng.random() < 0.5,
                          linktype=rng.choice((1, 1, 1, 101, 113)))
        if rng.random() < 0.3:
            data = data[: rng.randrange(24, len(data) + 1)]
        assert_same(write(tmp_path, data, f"r{trial}.pcap"))


# --- whole replays -----------------------------------------------------------------

def replay_both(path, table, monkeypatch, **options):
    out = []
    for flag in ("0", "1"):
        monkeypatch.setenv("SEAMSCAN_FASTPATH", flag)
        result = replay_file(path, table, ReplayOptions(**options))
        out.append((result.records, dict(result.counters), result.error))
    monkeypatch.delenv("SEAMSCAN_FASTPATH")
    return out


@pytest.mark.parametrize("limits", [{}, {"max_flows": 3, "hold_bytes": 64, "tcp_idle": 1}])
def test_replay_records_and_counters_unchanged(tmp_path, monkeypatch, limits):
    table = seamscan.compile(seamscan.load_signatures(DEMO / "demo-signatures.toml"))
    for name in ("lab-http.pcap", "lab-udp.pcap", "lab-trunk.pcapng"):
        py, c = replay_both(DEMO / name, table, monkeypatch, **limits)
        assert c == py
    rng = random.Random(3)
    frames = lab_frames()
    recs = [(1_700_000_000 + i, 0, rng.choice(frames)) for i in range(2000)]
    py, c = replay_both(write(tmp_path, pcap_bytes(recs)), table, monkeypatch, **limits)
    assert c == py


def test_switch_is_on_by_default_and_0_selects_python(monkeypatch):
    monkeypatch.delenv("SEAMSCAN_FASTPATH", raising=False)
    assert replay.fastpath_enabled()
    monkeypatch.setenv("SEAMSCAN_FASTPATH", "0")
    assert not replay.fastpath_enabled()


# --- the fast lane against the pure-Python tracker ---------------------------------
#
# The lane (csrc/host/lane.c) repeats FlowTracker's fast path for flow sides
# the tracker lends it; every other packet stops it.  Random conversations
# that keep crossing between the two (SYN/FIN/RST, reordering,
# retransmissions, disagreeing overlaps, lost segments, VLAN-tagged frames
# of the same flows that only the Python decoder takes, idle timeouts,
# eviction, a flow from an endpoint to itself, timestamps that go back,
# both byte orders and timestamp resolutions, captures cut short) must give
# exactly the records, counters and errors of SEAMSCAN_FASTPATH=0.

LANE_SIGS = seamscan.signature_set([
    {"id": "lane-ab", "text": "ab"},
    {"id": "lane-abca", "text": "abca"},
    {"id": "lane-cc-client", "text": "cc", "side": "client"},
    {"id": "lane-bcb-server", "text": "bcb", "side": "server"},
    {"id": "lane-aaa-head", "text": "aaa", "window": [0, 40]},
    {"id": "lane-udp-acb", "text": "acb", "transport": "udp", "scope": "stream"},
    {"id": "lane-dgram-ba", "text": "ba", "transport": "udp"},
])
LANE_HOSTS = {"v4": ["192.0.2.10", "198.51.100.21", "203.0.113.5"],
              "v6": ["2001:db8:7e::10", "2001:db8:7e:2::22"]}


def raw_frame(v6, proto, src, dst, sport, dport, seq, flags, payload, vlan=False):
    """Ethernet (optionally 802.1Q-tagged) + IPv4/IPv6 + TCP/UDP, by hand
    (RFC 791, RFC 8200, RFC 9293, RFC 768 header layouts; checksums 0:
    the replay does not verify them)."""
    if proto == 6:
        l4 = struct.pack("!HHIIBBHHH", sport, dport, seq, 1, 5 << 4, flags, 65535, 0, 0)
    else:
        l4 = struct.pack("!HHHH", sport, dport, 8 + len(payload), 0)
    l4 += payload
    if v6:
        ip = struct.pack("!IHBB", 6 << 28, len(l4), proto, 64) + src + dst
        etype = 0x86DD
    else:
        ip = struct.pack("!BBHHHBBH", 0x45, 0, 20 + len(l4), 0, 0x4000, 64, proto, 0) + src + dst
        etype = 0x0800
    eth = bytes.fromhex("020000000015020000000a")  # dst, then src minus its last byte
    eth += b"\x0a"
    tag = struct.pack("!HH", 0x8100, 7) if vlan else b""
    return eth + tag + struct.pack("!H", etype) + ip + l4


def lane_capture(rng, nflows):
    """Records (sec, usec, frame) of random interleaved conversations."""
    import ipaddress

    convs = []
    for f in range(nflows):
        fam = rng.choice(("v4", "v6"))
        a, b = rng.sample(LANE_HOSTS[fam], 2)
        src, dst = ipaddress.ip_address(a).packed, ipaddress.ip_address(b).packed
        v6 = fam == "v6"
        sport, dport = rng.choice([(40000 + f, 80), (80, 40000 + f), (5000, 5000)])
        if rng.random() < 0.1:
            dst, dport = src, sport  # a flow from an endpoint to itself
        proto = 17 if rng.random() < 0.25 else 6
        pkts = []  # (direction, seq, flags, payload)
        if proto == 17:
            for _ in range(rng.randrange(1, 30)):
                pkts.append((rng.randrange(2), 0, 0, bytes(rng.choice(b"abc") for _ in
                                                           range(rng.randrange(0, 12)))))
        else:
            isn = [rng.randrange(2**32), rng.randrange(2**32)]
            nxt = [0, 0]
            if rng.random() < 0.8:
                pkts.append((0, isn[0], 0x02, b""))
                pkts.append((1, isn[1], 0x12, b""))
                isn = [(isn[0] + 1) % 2**32, (isn[1] + 1) % 2**32]
            for _ in range(rng.randrange(1, 40)):
                d = rng.randrange(2)
                n = rng.choice([0, 1, 2, 3, 5, 8, 13])
                data = bytes(rng.choice(b"abc") for _ in range(n))
                pkts.append((d, (isn[d] + nxt[d]) % 2**32, 0x18 if n else 0x10, data))
                nxt[d] += n
            for d in (0, 1):
                if rng.random() < 0.6:
                    pkts.append((d, (isn[d] + nxt[d]) % 2**32, 0x11, b""))
            if rng.random() < 0.15:
                pkts.append((rng.randrange(2), (isn[0] + nxt[0]) % 2**32, 0x04, b""))
            # perturb: swap neighbours, repeat, overlap with other bytes, lose
            for _ in range(rng.randrange(0, 6)):
                if not pkts:
                    break
                i = rng.randrange(len(pkts))
                kind = rng.random()
                if kind < 0.35 and i + 1 < len(pkts):
                    pkts[i], pkts[i + 1] = pkts[i + 1], pkts[i]
                elif kind < 0.6:
                    pkts.insert(rng.randrange(i, len(pkts) + 1), pkts[i])
                elif kind < 0.8 and pkts[i][3]:
                    d, seq, fl, data = pkts[i]
                    other = bytes(rng.choice(b"abc") for _ in data)
                    pkts.insert(rng.randrange(i, len(pkts) + 1), (d, seq, fl, other))
                else:
                    del pkts[i]
        convs.append((v6, proto, src, dst, sport, dport, pkts))
    order = [c for c, conv in enumerate(convs) for _ in conv[6]]
    rng.shuffle(order)
    pos = [0] * len(convs)
    t = 1_700_000_000.0
    recs = []
    for c in order:
        v6, proto, src, dst, sport, dport, pkts = convs[c]
        d, seq, flags, data = pkts[pos[c]]
        pos[c] += 1
        a, b, pa, pb = (src, dst, sport, dport) if d == 0 else (dst, src, dport, sport)
        jump = rng.random()
        t += 2.5 if jump < 0.01 else -1.0 if jump < 0.02 else rng.choice([0.0, 0.001, 0.01])
        frame = raw_frame(v6, proto, a, b, pa, pb, seq, flags, data, vlan=rng.random() < 0.1)
        recs.append((int(t), int((t % 1) * 1e6), frame))
    return recs


def test_lane_equals_the_python_tracker_on_random_conversations(tmp_path, monkeypatch):
    table = seamscan.compile(LANE_SIGS)
    rng = random.Random(20261201)
    limits = [{}, {"tcp_idle": 2, "udp_idle": 1}, {"max_flows": 3}, {"keep_bytes": 3},
              {"keep_bytes": 0, "hold_bytes": 4, "hold_total": 9}, {"max_flows": 1, "tcp_idle": 1}]
    for trial in range(120):
        recs = lane_capture(rng, rng.randrange(1, 12))
        if trial % 3 == 1:  # nanosecond fractions
            recs = [(sec, usec * 1000 + rng.randrange(1000), f) for sec, usec, f in recs]
        data = pcap_bytes(recs, big=trial % 2 == 1, nano=trial % 3 == 1)
        if trial % 7 == 3:  # damaged: cut short, the replay stops there in both paths
            data = data[: rng.randrange(24, len(data) + 1)]
        path = write(tmp_path, data, f"lane{trial}.pcap")
        options = limits[trial % len(limits)]
        py, c = replay_both(path, table, monkeypatch, **options)
        assert c == py, (trial, options)


def test_lane_fills_batches_and_keeps_long_streams(tmp_path, monkeypatch):
    # more items and bytes than one batch holds (the lane stops with its
    # batch full), and tails trimmed again and again
    table = seamscan.compile(LANE_SIGS)
    rng = random.Random(5)
    src, dst = bytes([192, 0, 2, 10]), bytes([198, 51, 100, 21])
    recs = [(1, 0, raw_frame(False, 6, src, dst, 40000, 80, 99, 0x02, b""))]
    seq = 100
    for i in range(3000):
        data = bytes(rng.choice(b"abc") for _ in range(rng.choice([1, 7, 700, 1400])))
        recs.append((2 + i // 1000, i % 1000, raw_frame(False, 6, src, dst, 40000, 80, seq, 0x18,
                                                         data)))
        seq += len(data)
        if i % 400 == 7:  # a retransmission of older bytes: compared with the tail
            recs.append((2 + i // 1000, i % 1000, raw_frame(False, 6, src, dst, 40000, 80,
                                                             seq - 3, 0x18, b"zzz")))
    for keep in (4096, 5):
        py, c = replay_both(write(tmp_path, pcap_bytes(recs)), table, monkeypatch,
                            keep_bytes=keep)
        assert c == py
        assert py[1]["overlap_conflicts"] > 0


def test_lane_flow_table_under_churn():
    # The lane's open-addressing table (linear probing, deletion by backward
    # shift), small enough that keys collide: after random lends and
    # reclaims, a packet is taken by the lane exactly when its side is lent.
    from seamscan.fastpath import _STATE, ffi, lib

    rng = random.Random(11)
    max_flows = 8
    lane = ffi.gc(lib.sf_lane_new(max_flows, 16), lib.sf_lane_free)
    items = ffi.new("uint8_t[]", 40 * 8)
    meta = ffi.new("uint8_t[]", lib.SF_META_SIZE * 8)
    data = ffi.new("uint8_t[]", 4096)
    rec = ffi.new("uint8_t[]", 48)
    st_buf = bytearray(_STATE.size)
    st = ffi.from_buffer("sf_side_state *", st_buf)
    tail = ffi.new("uint8_t[]", 64)
    hosts = [bytes([192, 0, 2, h]) for h in range(1, 6)]
    keys = {}  # sid -> (src, dst, sport, dport) while lent
    for step in range(3000):
        sid = rng.randrange(2 * max_flows)
        if sid in keys:
            lib.sf_lane_reclaim(lane, sid, st, tail)
            del keys[sid]
        else:
            taken = set(keys.values())
            while True:
                ep = (rng.choice(hosts), rng.choice(hosts), rng.randrange(3), rng.randrange(3))
                if ep not in taken:
                    break
            src, dst, sport, dport = ep
            key = (bytes((17, 4)) + sport.to_bytes(2, "big") + dport.to_bytes(2, "big")
                   + b"\0\0" + src.ljust(16, b"\0") + dst.ljust(16, b"\0"))
            _STATE.pack_into(st_buf, 0, 0, 0, 0, 0, 0, 0, 17, 1, 2, 0, dport, 0, 3)
            assert lib.sf_lane_lend(lane, sid, key, st, ffi.NULL) == 0
            keys[sid] = ep
        src, dst, sport, dport = rng.choice(list(keys.values()) or [(hosts[0],) * 2 + (0, 0)])
        if rng.random() < 0.3:  # an endpoint pair that may not be lent
            src, dport = rng.choice(hosts), rng.randrange(3)
        frame = raw_frame(False, 17, src, dst, sport, dport, 0, 0, b"twelve bytes")
        buf = pcap_bytes([(1, 0, frame)])
        c_buf = ffi.from_buffer(buf)
        r = ffi.new("sf_run *")
        r.pos, r.sweep_at, r.buf, r.len = 24, float("inf"), c_buf, len(buf)
        r.items, r.meta, r.data, r.rec = items, meta, data, rec
        r.item_cap, r.data_cap, r.units, r.limit, r.ethernet = 8, 4096, 10**6, 65535, 1
        lib.sf_lane_run(lane, r)
        assert r.fast == ((src, dst, sport, dport) in keys.values()), step


SANITIZED_RUN = r'''
import os, random, sys
sys.path.insert(0, sys.argv[1])  # tests/, for its capture writers
import seamscan
assert "sanitized" in seamscan.__file__, seamscan.__file__
import test_fastpath as T
from seamscan.replay import ReplayOptions, replay_file
table = seamscan.compile(T.LANE_SIGS)
rng = random.Random(77)
for trial in range(40):
    data = T.pcap_bytes(T.lane_capture(rng, rng.randrange(1, 12)), big=trial % 2 == 1)
    path = os.path.join(sys.argv[2], "s.pcap")
    open(path, "wb").write(data)
    got = []
    for flag in "10":
        os.environ["SEAMSCAN_FASTPATH"] = flag
        r = replay_file(path, table, ReplayOptions(keep_bytes=trial % 5, max_flows=1 + trial % 4))
        got.append((r.records, dict(r.counters)))
    assert got[0] == got[1], trial
print("ok")
'''


def test_lane_under_sanitizers(tmp_path):
    # The fast lane is host-only C, so the runtime's ASan/UBSan harness
    # never runs it: build the extension with the sanitizers
    # (tools/build_sanitized.py) and replay random conversations with it.
    import shutil
    import subprocess
    import sys

    gcc = shutil.which("gcc")
    if gcc is None:
        pytest.skip(skip_message("gcc not found", "gcc"))
    libs = [subprocess.run([gcc, f"-print-file-name={name}"], capture_output=True,
                           text=True).stdout.strip() for name in ("libasan.so", "libubsan.so")]
    if not all(Path(lib).is_file() for lib in libs):
        pytest.skip(skip_message("the sanitizer runtimes are not installed", "gcc sanitizers"))
    out = tmp_path / "sanitized"
    subprocess.run([sys.executable, str(ROOT / "tools" / "build_sanitized.py"), str(out)],
                   check=True, capture_output=True)
    env = dict(os.environ, PYTHONPATH=str(out), LD_PRELOAD=" ".join(libs),
               ASAN_OPTIONS="detect_leaks=0", UBSAN_OPTIONS="halt_on_error=1:print_stacktrace=1")
    done = subprocess.run([sys.executable, "-c", SANITIZED_RUN, str(ROOT / "tests"), str(tmp_path)],
                          env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == 0 and done.stdout.strip() == "ok", done.stderr[-3000:]
