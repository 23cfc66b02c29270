"""The capture-crafting tools write what they claim.

Oracles from outside the project: scapy's own readers (rdpcap,
PcapNgReader, defragment), dpkt's pcap reader, Python's ``re`` and
``tomllib``; the file-format constants are quoted from the specifications
named beside each check.
"""

from __future__ import annotations

import csv
import os
import re
import struct
import subprocess
import sys
import tomllib
from collections import defaultdict
from decimal import Decimal
from pathlib import Path

import dpkt
import pytest
from scapy.layers.inet import IP, TCP, UDP, defragment
from scapy.layers.inet6 import IPv6
from scapy.layers.l2 import Dot1AD, Dot1Q, Ether
from scapy.utils import PcapNgReader, rdpcap

ROOT = Path(__file__).resolve().parent.parent
TOOLS = ROOT / "tools"
DEMO = ROOT / "pcaps_demo"
sys.path.insert(0, str(TOOLS))

import craft  # noqa: E402
import gen_sigs  # noqa: E402
import make_bench_capture  # noqa: E402
from craft import Clock, Conversation, Datagrams, ipv4_fragments, merge  # noqa: E402


def roundtrip(tmp_path, packets, **kw):
    path = tmp_path / "t.pcap"
    craft.write_pcap(path, packets, **kw)
    return rdpcap(str(path))


def payload(pkt) -> bytes:
    """The transport payload, trimmed to the IP length (no link padding)."""
    if IP in pkt:
        ip = pkt[IP]
        raw = bytes(ip)[ip.ihl * 4:ip.len]
    else:
        raw = bytes(pkt[IPv6])[40:40 + pkt[IPv6].plen]
    hdr = (raw[12] >> 4) * 4 if TCP in pkt else 8
    return raw[hdr:]


# --- TCP conversations --------------------------------------------------------

def test_segments_sizes_order_dups_and_seq_numbers(tmp_path):
    data = bytes(range(30))
    conv = Conversation(isn_c=1000, isn_s=5000, clock=Clock(100, "0.25"))
    conv.handshake()
    conv.send("client", data, segments=[5, 10, 15], order=[2, 0, 1], dup=[0])
    got = roundtrip(tmp_path, conv.packets)
    syn, synack, ack, *segs = got
    assert str(syn[TCP].flags) == "S" and syn[TCP].seq == 1000
    assert str(synack[TCP].flags) == "SA" and (synack[TCP].seq, synack[TCP].ack) == (5000, 1001)
    assert str(ack[TCP].flags) == "A" and (ack[TCP].seq, ack[TCP].ack) == (1001, 5001)
    assert [s[TCP].seq for s in segs] == [1016, 1001, 1006, 1001]
    assert [payload(s) for s in segs] == [data[15:], data[:5], data[5:15], data[:5]]
    assert all(s[TCP].ack == 5001 and str(s[TCP].flags) == "PA" for s in segs)
    # Timestamps: exactly start + k * step, as read back by scapy.
    assert [p.time for p in got] == [Decimal(100) + Decimal("0.25") * k for k in range(7)]


def test_default_segmentation_uses_mss_and_int_sizes():
    conv = Conversation(mss=100)
    conv.handshake()
    conv.send("server", b"x" * 250)
    conv.send("server", b"y" * 25, segments=10)
    sizes = [len(payload(p)) for p in conv.packets[3:]]
    assert sizes == [100, 100, 50, 10, 10, 5]
    with pytest.raises(ValueError, match="sum to"):
        conv.send("client", b"abc", segments=[1, 1])
    with pytest.raises(ValueError, match="side"):
        conv.send("attacker", b"abc")


def test_sequence_numbers_wrap_modulo_2_32():
    isn = 0xFFFFFFF0
    data = bytes(range(40))
    conv = Conversation(isn_c=isn)
    conv.handshake()
    conv.send("client", data, segments=10)
    segs = conv.packets[3:]
    assert [s[TCP].seq for s in segs] == [(isn + 1 + 10 * k) % 2**32 for k in range(4)]
    assert segs[2][TCP].seq < isn    # wrapped (RFC 9293 section 3.4: arithmetic mod 2**32)
    stream = b"".join(payload(s) for s in sorted(segs, key=lambda s: (s[TCP].seq - isn - 1)
                                                 % 2**32))
    assert stream == data


def test_seq_offset_overlaps_gaps_and_raw_segments():
    conv = Conversation(isn_c=0)
    conv.handshake()
    conv.send("client", b"abcdef")
    conv.send("client", b"EFgh", seq_offset=-2)          # overlaps "ef"
    conv.send("client", b"zz", seq_offset=3)             # leaves a 3-byte gap
    conv.segment("client", 1, b"B", flags="A")
    conv.send("client", b"0123", segments=2, order=[1])  # piece 0 lost
    rel = [(p[TCP].seq - 1, payload(p)) for p in conv.packets[3:]]
    assert rel == [(0, b"abcdef"), (4, b"EFgh"), (11, b"zz"), (1, b"B"), (15, b"23")]
    assert conv.next[0] == 17


def test_close_fin_and_rst():
    conv = Conversation(isn_c=10, isn_s=20)
    conv.handshake()
    conv.send("client", b"hello")
    conv.close()
    fin, fin2, last = conv.packets[-3:]
    assert (str(fin[TCP].flags), fin[TCP].seq, fin[TCP].ack) == ("FA", 16, 21)
    assert (str(fin2[TCP].flags), fin2[TCP].seq, fin2[TCP].ack) == ("FA", 21, 17)
    assert (str(last[TCP].flags), last[TCP].seq, last[TCP].ack) == ("A", 17, 22)
    conv = Conversation()
    conv.handshake()
    conv.close("rst", side="server")
    assert str(conv.packets[-1][TCP].flags) == "R"
    assert conv.packets[-1][IP].src == "198.51.100.20"


def test_vlan_tags_ipv6_and_raw_link(tmp_path):
    conv = Conversation(vlan=[100, 30])
    conv.handshake()
    pkt = roundtrip(tmp_path, conv.packets)[0]
    assert pkt[Dot1AD].vlan == 100 and pkt[Dot1Q].vlan == 30 and IP in pkt
    raw = bytes(pkt)
    # IEEE 802.1ad S-tag TPID 0x88a8, then the 802.1Q C-tag TPID 0x8100, then IPv4
    # 0x0800 (recalled from memory; the same values are in scapy's layer bindings).
    assert raw[12:14] == b"\x88\xa8" and raw[16:18] == b"\x81\x00" and raw[20:22] == b"\x08\x00"

    v6 = Conversation(("2001:db8:7e::10", 40000), ("2001:db8:7e::20", 8080), ipv6=True,
                      link="raw")
    v6.handshake()
    v6.send("client", b"GET / HTTP/1.1\r\n\r\n")
    path = tmp_path / "v6.pcap"
    craft.write_pcap(path, v6.packets)
    # pcap header field 6 is the link type; LINKTYPE_RAW = 101 (tcpdump.org registry).
    assert struct.unpack("<I", path.read_bytes()[20:24])[0] == 101
    got = rdpcap(str(path))
    assert all(IPv6 in p and Ether not in p for p in got)
    assert payload(got[3]) == b"GET / HTTP/1.1\r\n\r\n"
    with pytest.raises(ValueError, match="IPv6"):
        Conversation(("192.0.2.1", 1), ("2001:db8::1", 2), ipv6=True)
    with pytest.raises(ValueError, match="Ethernet"):
        Conversation(vlan=5, link="raw")


def test_shared_clock_interleaves_flows():
    clock = Clock(0, "0.001")
    a = Conversation(("192.0.2.1", 1111), clock=clock)
    b = Datagrams(("192.0.2.2", 2222), clock=clock)
    a.handshake()
    b.send("client", b"ping")
    a.close()
    merged = merge(a, b)
    assert [p.time for p in merged] == [Decimal(k) / 1000 for k in range(7)]
    assert UDP in merged[3]


# --- UDP and IPv4 fragments ----------------------------------------------------

def test_ipv4_fragments_offsets_flags_and_reassembly(tmp_path):
    data = bytes(i % 251 for i in range(3000))
    flow = Datagrams(clock=Clock(0, "0.01"))
    frags = flow.send("client", data, fragments=[1480, 1480, 48], order=[2, 0, 1])
    got = roundtrip(tmp_path, flow.packets)
    assert len(got) == 3
    # RFC 791 section 3.1: the fragment offset counts 8-octet units; MF on all but
    # the last fragment; every fragment repeats the datagram's identification.
    assert [p[IP].frag for p in got] == [370, 0, 185]
    assert [bool(p[IP].flags.MF) for p in got] == [False, True, True]
    assert [p[IP].len for p in got] == [20 + 48, 20 + 1480, 20 + 1480]
    assert len({p[IP].id for p in got}) == 1
    for p in got:    # header checksums as scapy computes them
        rebuilt = p[IP].copy()
        del rebuilt.chksum
        assert IP(bytes(rebuilt)).chksum == p[IP].chksum
    # scapy's reassembly as the oracle (it needs the last fragment last).
    whole = defragment(sorted(got, key=lambda p: p[IP].frag))
    assert len(whole) == 1 and bytes(whole[0][UDP].payload) == data
    assert [p.time for p in frags] == [0, Decimal("0.01"), Decimal("0.02")]


def test_ipv4_fragments_refuses_what_rfc_791_forbids():
    pkt = Datagrams().send("client", b"x" * 100)[0]
    with pytest.raises(ValueError, match="multiples of 8"):
        ipv4_fragments(pkt, [50, 58])
    pkt[IP].flags = "DF"
    with pytest.raises(ValueError, match="DF"):
        ipv4_fragments(pkt, 16)
    pkt[IP].flags = 0
    first = ipv4_fragments(pkt, 64)[0]
    with pytest.raises(ValueError, match="already"):
        ipv4_fragments(ipv4_fragments(pkt, 64)[1], 8)
    assert first[IP].flags.MF and first[IP].frag == 0


def test_datagrams_roles_and_payloads():
    flow = Datagrams(("192.0.2.30", 5000), ("198.51.100.40", 6000))
    flow.send("client", b"hello")
    flow.send("server", b"world")
    c, s = flow.packets
    assert (c[IP].src, c[UDP].sport, c[UDP].dport) == ("192.0.2.30", 5000, 6000)
    assert (s[IP].src, s[UDP].sport, s[UDP].dport) == ("198.51.100.40", 6000, 5000)
    assert payload(c) == b"hello" and payload(s) == b"world"


# --- file formats --------------------------------------------------------------

@pytest.mark.parametrize("nano", [False, True])
@pytest.mark.parametrize("big_endian", [False, True])
def test_pcap_magic_endianness_and_timestamps(tmp_path, nano, big_endian):
    flow = Datagrams(clock=Clock("1709542800.123456789", "0.000000001"))
    for k in range(3):
        flow.send("client", bytes([k]) * 20)
    path = tmp_path / "t.pcap"
    craft.write_pcap(path, flow.packets, nano=nano, big_endian=big_endian)
    raw = path.read_bytes()
    # draft-ietf-opsawg-pcap section 4: magic 0xA1B2C3D4 (microseconds) or
    # 0xA1B23C4D (nanoseconds), written in the file's byte order; version 2.4.
    magic = 0xA1B23C4D if nano else 0xA1B2C3D4
    order = ">" if big_endian else "<"
    assert raw[:4] == struct.pack(order + "I", magic)
    assert struct.unpack(order + "HHiIII", raw[4:24]) == (2, 4, 0, 0, 65535, 1)
    expect = [Decimal("1709542800.123456789") + Decimal(k) / 10**9 for k in range(3)]
    if not nano:
        expect = [Decimal("1709542800.123456")] * 3
    assert [p.time for p in rdpcap(str(path))] == expect
    with path.open("rb") as f:    # dpkt as a second reader
        records = list(dpkt.pcap.Reader(f))
    assert [buf for _, buf in records] == [bytes(p) for p in flow.packets]


def test_empty_pcap_has_a_header(tmp_path):
    path = tmp_path / "empty.pcap"
    craft.write_pcap(path, [])
    assert len(path.read_bytes()) == 24 and len(rdpcap(str(path))) == 0


@pytest.mark.parametrize("nano", [False, True])
def test_pcapng_two_interfaces_two_link_types(tmp_path, nano):
    clock = Clock("1709542800.5", "0.000001001")
    eth = Conversation(vlan=30, clock=clock)
    v6 = Conversation(ipv6=True, link="raw", clock=clock)
    eth.handshake()
    v6.handshake()
    eth.send("client", b"over ethernet")
    v6.send("client", b"over raw ipv6")
    path = tmp_path / "t.pcapng"
    craft.write_pcapng(path, {"trunk0": eth.packets, "v6tap": (101, v6.packets)}, nano=nano)
    raw = path.read_bytes()
    # draft-ietf-opsawg-pcapng section 4.1: SHB type 0x0A0D0D0A, byte-order magic 0x1A2B3C4D.
    assert raw[:4] == b"\x0a\x0d\x0d\x0a" and raw[8:12] == struct.pack("<I", 0x1A2B3C4D)
    with PcapNgReader(str(path)) as reader:
        got = list(reader)
        linktypes = [iface[0] for iface in reader.interfaces]
    assert linktypes == [1, 101]
    want = merge(eth, v6)
    assert [p.sniffed_on for p in got] == ["trunk0" if Ether in p else "v6tap" for p in want]
    assert [bytes(p) for p in got] == [bytes(p) for p in want]
    assert all(IPv6 in p for p in got if p.sniffed_on == "v6tap")
    unit = Decimal(1) / (10**9 if nano else 10**6)
    assert [p.time for p in got] == [(Decimal(p.time) / unit).to_integral_value(
        rounding="ROUND_FLOOR") * unit for p in want]


# --- the bundled demo ----------------------------------------------------------

DEMO_FILES = ("lab-http.pcap", "lab-udp.pcap", "lab-trunk.pcapng", "labels.csv")


def test_demo_is_deterministic_and_matches_the_bundled_files(tmp_path):
    for run, hashseed in (("a", "1"), ("b", "2")):
        subprocess.run([sys.executable, str(TOOLS / "make_demo_pcaps.py"), str(tmp_path / run)],
                       check=True, capture_output=True, env={**os.environ,
                                                              "PYTHONHASHSEED": hashseed})
    for name in DEMO_FILES:
        a = (tmp_path / "a" / name).read_bytes()
        assert a == (tmp_path / "b" / name).read_bytes(), name
        assert a == (DEMO / name).read_bytes(), f"{name}: rerun tools/make_demo_pcaps.py"
        assert len(a) < 200_000


def load_demo_signatures():
    return tomllib.loads((DEMO / "demo-signatures.toml").read_text())["signature"]


def test_demo_signature_file_shape():
    sigs = load_demo_signatures()
    assert 15 <= len(sigs) <= 30
    assert len({s["id"] for s in sigs}) == len(sigs)
    allowed = {"id", "text", "hex", "fold_case", "side", "transport", "ports", "window",
               "scope", "label", "tags"}
    for s in sigs:
        assert set(s) <= allowed, s["id"]
        assert ("text" in s) != ("hex" in s), s["id"]
        assert s.get("side", "either") in ("client", "server", "either")
        assert s.get("transport", "any") in ("tcp", "udp", "any")
        assert "scope" not in s or s["transport"] == "udp"
    for key in ("text", "hex", "fold_case", "side", "transport", "ports", "window", "scope",
                "label", "tags"):
        assert any(key in s for s in sigs), key
    assert any(s.get("scope") == "stream" for s in sigs)


def reassemble_ipv4(pkts):
    """Complete IPv4 datagrams in arrival order of their last fragment: (pkt, l4 bytes)."""
    held = defaultdict(dict)
    for p in pkts:
        if IP not in p:
            yield p, bytes(p[IPv6])[40:40 + p[IPv6].plen]
            continue
        ip = p[IP]
        body = bytes(ip)[ip.ihl * 4:ip.len]
        if not ip.flags.MF and ip.frag == 0:
            yield p, body
            continue
        key = (ip.src, ip.dst, ip.id, ip.proto)
        held[key][ip.frag * 8] = (body, bool(ip.flags.MF))
        parts, data = held[key], b""
        while len(data) in parts:
            body, more = parts[len(data)]
            data += body
            if not more:
                del held[key]
                yield p, data
                break


def demo_streams():
    """Per flow, per side, the byte runs (offset, bytes) seen from the captures.

    An independent reading: scapy dissects; TCP roles from the SYN, offsets
    from the ISN, first-received bytes win, runs never span a gap; UDP
    roles from the first sender, datagrams reassembled from fragments.
    """
    flows = {}
    for name in ("lab-http.pcap", "lab-udp.pcap", "lab-trunk.pcapng"):
        pkts = rdpcap(str(DEMO / name))
        assert len(pkts) > 0
        for p, l4 in reassemble_ipv4(pkts):
            ip = p[IP] if IP in p else p[IPv6]
            proto = ip.proto if IP in p else ip.nh
            sport, dport = struct.unpack("!HH", l4[:4])
            a, b = (ip.src, sport), (ip.dst, dport)
            key = (proto, frozenset((a, b)))
            if proto == 6:
                flags = l4[13]
                flow = flows.setdefault(key, {"transport": "tcp", "isn": {}, "bytes": {}})
                if flags & 0x02:    # SYN; without ACK it names the client
                    flow["isn"][a] = struct.unpack("!I", l4[4:8])[0]
                    if not flags & 0x10:
                        flow["client"], flow["server"] = a, b
                    continue
                data = l4[(l4[12] >> 4) * 4:]
                rel = (struct.unpack("!I", l4[4:8])[0] - flow["isn"][a] - 1) % 2**32
                side = flow["bytes"].setdefault(a, {})
                for i, byte in enumerate(data):
                    side.setdefault(rel + i, byte)
            else:
                flow = flows.setdefault(key, {"transport": "udp", "client": a, "server": b,
                                              "datagrams": defaultdict(list)})
                flow["datagrams"][a].append(l4[8:])
    return flows


def find(sig, data: bytes):
    """Start offsets of every (overlapping) occurrence, found by Python's re."""
    pattern = sig["text"].encode() if "text" in sig else bytes.fromhex(sig["hex"])
    # re.IGNORECASE on a bytes pattern folds ASCII letters only (Python docs, module re).
    rx = re.compile(b"(?=" + re.escape(pattern) + b")", re.IGNORECASE if sig.get("fold_case")
                    else 0)
    return [(m.start(), m.start() + len(pattern)) for m in rx.finditer(data)]


def fires(sig, flow) -> bool:
    if sig.get("transport", "any") not in ("any", flow["transport"]):
        return False
    if "ports" in sig and flow["server"][1] not in sig["ports"]:
        return False
    lo, hi = sig.get("window", [0, 2**63])
    for role in ("client", "server"):
        if sig.get("side", "either") not in ("either", role):
            continue
        end = flow[role]
        if flow["transport"] == "tcp":
            side = flow["bytes"].get(end, {})
            runs, prev = [], None
            for off in sorted(side):
                if prev is None or off != prev + 1:
                    runs.append([off, bytearray()])
                runs[-1][1].append(side[off])
                prev = off
        elif sig.get("scope", "datagram") == "stream":
            runs = [(0, b"".join(flow["datagrams"][end]))]
        else:
            runs = [(0, d) for d in flow["datagrams"][end]]
        for base, data in runs:
            if any(lo <= base + s and base + e <= hi for s, e in find(sig, bytes(data))):
                return True
    return False


def test_demo_truth_matches_the_captures():
    sigs = load_demo_signatures()
    tags = {s["id"]: set(s.get("tags", [])) for s in sigs}
    derived = {}
    for flow in demo_streams().values():
        key = (flow["transport"], *flow["client"], *flow["server"])
        derived[tuple(map(str, key))] = {s["id"] for s in sigs if fires(s, flow)}
    with (DEMO / "labels.csv").open(newline="") as f:
        rows = list(csv.DictReader(f))
    assert list(rows[0]) == ["transport", "client_ip", "client_port", "server_ip",
                             "server_port", "expect"]
    labelled = defaultdict(list)
    for row in rows:
        key = tuple(row[k] for k in ("transport", "client_ip", "client_port", "server_ip",
                                     "server_port"))
        labelled[key].append(row["expect"])
    assert set(labelled) == set(derived)
    for key, verdicts in labelled.items():
        ids = {v for v in verdicts if v != "clean" and not v.startswith("tag:")}
        assert derived[key] == ids, key
        assert ("clean" in verdicts) == (not ids), key
        for v in verdicts:
            if v.startswith("tag:"):
                assert any(v[4:] in tags[i] for i in ids), (key, v)
    fired = set().union(*derived.values())
    assert {"ty-0012", "ty-0015", "ty-0017", "ty-0020"}.isdisjoint(fired)
    assert sum(not ids for ids in derived.values()) >= 4    # flows with nothing of interest


def test_demo_uses_documentation_addresses_only():
    import ipaddress
    docs = [ipaddress.ip_network(n) for n in ("192.0.2.0/24", "198.51.100.0/24",
                                              "203.0.113.0/24", "2001:db8::/32")]
    for flow in demo_streams().values():
        for addr, _ in (flow["client"], flow["server"]):
            ip = ipaddress.ip_address(addr)
            assert any(ip.version == n.version and ip in n for n in docs), addr


# --- benchmark inputs ----------------------------------------------------------

def test_gen_sigs_is_deterministic_and_well_formed(tmp_path):
    sigs = gen_sigs.generate(600, seed=7, binary_share=0.5)
    assert sigs == gen_sigs.generate(600, seed=7, binary_share=0.5)
    assert sigs != gen_sigs.generate(600, seed=8, binary_share=0.5)
    values = [s["text"].encode() if "text" in s else bytes.fromhex(s["hex"]) for s in sigs]
    assert all(4 <= len(v) <= 32 for v in values)
    assert len(set(values)) == len(values)
    assert len({s["id"] for s in sigs}) == 600
    binary = sum("hex" in s for s in sigs)
    assert 200 < binary < 400
    assert any(s.get("fold_case") for s in sigs)
    prefixes = defaultdict(int)
    for v in values:
        prefixes[v[:4]] += 1
    assert max(prefixes.values()) >= 3    # some signatures share a prefix
    out = tmp_path / "g.toml"
    assert gen_sigs.main(["600", "-o", str(out), "--seed", "7"]) == 0
    doc = tomllib.loads(out.read_text())    # tomllib as the oracle for our writer
    assert [{"fold_case": False, **s} for s in doc["signature"]] == sigs
    assert doc["set"]["name"]


def test_gen_sigs_binary_covers_all_byte_values():
    sigs = gen_sigs.generate(800, seed=1, binary_share=1.0)
    assert all("hex" in s for s in sigs)
    assert set().union(*(bytes.fromhex(s["hex"]) for s in sigs)) == set(range(256))
    assert all("text" in s for s in gen_sigs.generate(50, seed=1, binary_share=0.0))


def test_bench_capture_is_what_it_says(tmp_path, capsys):
    sigs = tmp_path / "s.toml"
    sigs.write_text(gen_sigs.to_toml(gen_sigs.generate(40, seed=3), "bench"))
    out = tmp_path / "b.pcap"
    assert make_bench_capture.main([str(out), "--packets", "1500", "--flows", "30",
                                    "--sigs", str(sigs), "--seed", "5"]) == 0
    assert "1500 packets, 30 flows" in capsys.readouterr().out
    again = tmp_path / "b2.pcap"
    make_bench_capture.main([str(again), "--packets", "1500", "--flows", "30",
                             "--sigs", str(sigs), "--seed", "5"])
    assert out.read_bytes() == again.read_bytes()
    pkts = rdpcap(str(out))
    assert len(pkts) == 1500
    isn, streams = {}, defaultdict(dict)
    for p in pkts:
        for layer in (IP, TCP, UDP):    # checksums as scapy recomputes them
            if layer in p:
                rebuilt = p.copy()
                del rebuilt[layer].chksum
                assert Ether(bytes(rebuilt))[layer].chksum == p[layer].chksum
        if TCP in p:
            ip = p[IP] if IP in p else p[IPv6]
            end = (ip.src, p[TCP].sport, ip.dst, p[TCP].dport)
            if p[TCP].flags.S:
                isn[end] = p[TCP].seq
            elif payload(p):
                rel = (p[TCP].seq - isn[end] - 1) % 2**32
                old = streams[end].setdefault(rel, payload(p))
                assert old == payload(p)    # a retransmission repeats the same bytes
    assert any(IPv6 in p for p in pkts) and any(UDP in p for p in pkts)
    for segs in streams.values():    # in-order data from offset 0, nothing missing
        offsets = sorted(segs)
        assert offsets[0] == 0
        assert all(a + len(segs[a]) == b for a, b in zip(offsets, offsets[1:], strict=False))
