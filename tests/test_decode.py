"""Tests for seamscan.decode: link layers, IPv4/IPv6, TCP/UDP, malformed input.

Frames are crafted with scapy. Outside oracles: scapy's own reader and
dissectors (``check_against_scapy`` from test_capture, over every capture
written here), scapy's ``defragment`` / ``defragment6`` for reassembly,
and the RFCs' header layouts for hand-built bytes (named beside each check).
Our own brute-force references: the payload scapy was asked to send.
"""

import random
import struct

import pytest
from scapy.layers.inet import ICMP, IP, TCP, UDP, defragment, fragment
from scapy.layers.inet6 import (
    ICMPv6EchoRequest,
    IPv6,
    IPv6ExtHdrDestOpt,
    IPv6ExtHdrFragment,
    IPv6ExtHdrHopByHop,
    IPv6ExtHdrRouting,
    PadN,
    defragment6,
    fragment6,
)
from scapy.layers.l2 import ARP, LLC, CookedLinux, CookedLinuxV2, Dot1AD, Dot1Q, Ether
from scapy.packet import Raw, raw

from seamscan.decode import COUNTERS, FATES, Decoder, Packet, format_ip
from seamscan.ipfrag import Defragmenter
from test_capture import check_against_scapy, write_pcap

MACS = {"src": "02:00:5e:10:00:01", "dst": "02:00:5e:10:00:02"}
SENSOR, BROKER = "198.51.100.21", "203.0.113.5"
NODE6, HUB6 = "2001:db8:10::21", "2001:db8:10::5"
MQTT_TEXT = b"lab/floor3/co2 ppm=612"
COAP_TEXT = b"GET /lights/hall-2"


def tcp4():
    return (IP(src=SENSOR, dst=BROKER)
            / TCP(sport=40121, dport=1883, seq=1000, ack=77, flags="PA") / MQTT_TEXT)


def udp6():
    return IPv6(src=NODE6, dst=HUB6) / UDP(sport=5683, dport=5683) / COAP_TEXT


def expect_tcp4(pkt, frame=1, ts=0.5):
    # flags PSH|ACK = 0x18 (RFC 9293 section 3.1, control bits) (recalled from memory)
    assert pkt == Packet(6, bytes([198, 51, 100, 21]), bytes([203, 0, 113, 5]), 40121, 1883,
                         1000, 77, 0x18, MQTT_TEXT, frame, ts)


def expect_udp6(pkt, frame=1, ts=0.5):
    assert pkt.proto == 17 and (pkt.sport, pkt.dport) == (5683, 5683)
    assert format_ip(pkt.src) == NODE6 and format_ip(pkt.dst) == HUB6
    assert (pkt.seq, pkt.ack, pkt.flags) == (0, 0, 0)
    assert (pkt.payload, pkt.frame, pkt.ts) == (COAP_TEXT, frame, ts)


def decode_one(linktype, frame, decoder=None):
    decoder = decoder or Decoder()
    return decoder.decode(1, 0.5, linktype, frame), decoder.counters


def loop_header(family, endian):
    return struct.pack(endian + "I", family)


# (name, linktype, frame, expect) -- every link type the decoder handles
LINKS = [
    ("ethernet", 1, lambda ip: raw(Ether(**MACS) / ip)),
    ("802.1Q", 1, lambda ip: raw(Ether(**MACS) / Dot1Q(vlan=30) / ip)),
    ("802.1ad+802.1Q", 1, lambda ip: raw(Ether(**MACS) / Dot1AD(vlan=100) / Dot1Q(vlan=30) / ip)),
    ("0x9100 three deep", 1, lambda ip: raw(Ether(type=0x9100, **MACS) / Dot1Q(vlan=1, type=0x88A8)
                                            / Dot1Q(vlan=2, type=0x8100) / Dot1Q(vlan=3) / ip)),
    ("cooked v1", 113, lambda ip: raw(CookedLinux(pkttype=0, lladdrtype=1, lladdrlen=6,
                                                  src=b"\x02\x00\x5e\x10\x00\x01") / ip)),
    ("cooked v2", 276, lambda ip: raw(CookedLinuxV2(ifindex=3, lladdrtype=1, pkttype=4,
                                                    lladdrlen=6,
                                                    src=b"\x02\x00\x5e\x10\x00\x01") / ip)),
    ("raw 101", 101, raw),
    ("raw 12", 12, raw),
    ("raw 14", 14, raw),
    ("null little-endian", 0, lambda ip: loop_header(2 if IP in ip else 30, "<") + raw(ip)),
    ("null big-endian", 0, lambda ip: loop_header(2 if IP in ip else 24, ">") + raw(ip)),
    ("null family 28", 0, lambda ip: loop_header(2 if IP in ip else 28, "<") + raw(ip)),
    ("loop 108", 108, lambda ip: loop_header(2 if IP in ip else 24, ">") + raw(ip)),
]


@pytest.mark.parametrize("name,linktype,wrap", LINKS, ids=[c[0] for c in LINKS])
def test_every_link_type(tmp_path, name, linktype, wrap):
    decoder = Decoder()
    expect_tcp4(decoder.decode(1, 0.5, linktype, wrap(tcp4())))
    expect_udp6(decoder.decode(2, 0.5, linktype, wrap(udp6())), frame=2)
    assert decoder.counters["decoded"] == 2
    path = write_pcap(tmp_path / "link.pcap", [(1, 0, wrap(tcp4())), (2, 0, wrap(udp6()))],
                      linktype=linktype)
    # scapy 2.8 dissects all of these but TPID 0x9100, link type 14 and
    # DLT_NULL (on this host), whose payloads are checked against ours above
    check_against_scapy(path)


@pytest.mark.parametrize("linktype,ip,check", [(228, tcp4, expect_tcp4),
                                               (229, udp6, expect_udp6)])
def test_ipv4_and_ipv6_link_types(tmp_path, linktype, ip, check):
    check(decode_one(linktype, raw(ip()))[0])
    check_against_scapy(write_pcap(tmp_path / "ip.pcap", [(1, 0, raw(ip()))],
                                   linktype=linktype))


def test_vlan_tpids_per_ieee_802_1q_and_802_1ad():
    # TPID 0x8100 (802.1Q C-tag) and 0x88A8 (802.1ad S-tag) (recalled from
    # memory); check scapy wrote them where the decoder looks
    frame = raw(Ether(**MACS) / Dot1AD(vlan=100) / Dot1Q(vlan=30) / tcp4())
    assert frame[12:14] == b"\x88\xa8" and frame[16:18] == b"\x81\x00"
    assert frame[20:22] == b"\x08\x00"


def test_ethernet_padding_is_not_payload(tmp_path):
    # a 44-byte frame padded to the 60-byte Ethernet minimum, plus a 4-byte FCS
    short = raw(Ether(**MACS) / IP(src="192.0.2.10", dst="192.0.2.20")
                / UDP(sport=47808, dport=47808) / b"ok")
    assert len(short) == 44
    frames = [short + b"\xaa" * 16, raw(Ether(**MACS) / tcp4()) + b"\x5a\x5a\x5a\x5a",
              raw(Ether(**MACS) / IP(src=SENSOR, dst=BROKER) / TCP(sport=1, dport=2))
              + bytes(6)]
    decoder = Decoder()
    got = [decoder.decode(i, 0.0, 1, f) for i, f in enumerate(frames, 1)]
    assert [p.payload for p in got] == [b"ok", MQTT_TEXT, b""]
    check_against_scapy(write_pcap(tmp_path / "pad.pcap", [(1, 0, f) for f in frames]))


def test_ipv6_extension_chain(tmp_path):
    ip = (IPv6(src=NODE6, dst=HUB6) / IPv6ExtHdrHopByHop()
          / IPv6ExtHdrRouting(addresses=["2001:db8:10::9"])
          / IPv6ExtHdrDestOpt(options=[PadN(optdata=b"\0" * 10)])
          / IPv6ExtHdrFragment(offset=0, m=0, id=0x5EA4)  # atomic fragment (RFC 6946)
          / TCP(sport=40122, dport=8080, seq=5, flags="PA") / b"firmware chunk 1")
    frame = raw(Ether(**MACS) / ip)
    # RFC 8200 section 4: Hdr Ext Len in 8-octet units not counting the first 8:
    # hop-by-hop 0 (8 bytes), routing with one address 2 (24), destination options 1 (16)
    l3 = 14 + 40
    assert (frame[l3 + 1], frame[l3 + 8 + 1], frame[l3 + 32 + 1]) == (0, 2, 1)
    assert frame[l3 + 48] == 6  # the fragment header's next header: TCP
    pkt, counters = decode_one(1, frame)
    assert (pkt.proto, pkt.sport, pkt.dport, pkt.seq, pkt.payload) == (6, 40122, 8080, 5,
                                                                       b"firmware chunk 1")
    assert counters["fragments"] == 0
    check_against_scapy(write_pcap(tmp_path / "ext.pcap", [(1, 0, frame)]))


def test_ipv6_authentication_header_length_unit():
    # RFC 4302 section 2.2: Payload Len = AH length in 4-octet units minus 2;
    # 12 fixed bytes + a 12-byte ICV = 24 bytes -> 4
    ah = bytes([6, 4, 0, 0]) + struct.pack("!II", 0x100, 1) + bytes(12)
    tcp = raw(IP(src=SENSOR, dst=BROKER) / TCP(sport=40123, dport=1883) / b"sealed")[20:]
    frame = raw(IPv6(src=NODE6, dst=HUB6, nh=51) / Raw(ah + tcp))
    pkt, _ = decode_one(229, frame)
    assert (pkt.sport, pkt.dport, pkt.payload) == (40123, 1883, b"sealed")


@pytest.mark.parametrize("name,linktype,frame,counter", [
    ("arp", 1, lambda: raw(Ether(**MACS) / ARP(psrc="192.0.2.10", pdst="192.0.2.20")),
     "not_ip"),
    ("802.2 llc", 1, lambda: raw(Ether(**MACS) / LLC() / b"spanning tree"), "not_ip"),
    ("loopback family 7", 0, lambda: loop_header(7, "<") + raw(tcp4()), "not_ip"),
    ("icmp", 1, lambda: raw(Ether(**MACS) / IP(src=SENSOR, dst=BROKER) / ICMP()), "other_ip"),
    ("icmpv6", 229, lambda: raw(IPv6(src=NODE6, dst=HUB6) / ICMPv6EchoRequest()), "other_ip"),
    ("esp", 229, lambda: raw(IPv6(src=NODE6, dst=HUB6, nh=50) / Raw(bytes(24))), "other_ip"),
    ("no next header", 229, lambda: raw(IPv6(src=NODE6, dst=HUB6) / IPv6ExtHdrDestOpt(nh=59)),
     "other_ip"),
    ("esp in ipv4", 228, lambda: raw(IP(src=SENSOR, dst=BROKER, proto=50) / Raw(bytes(24))),
     "other_ip"),
    ("unknown link type", 147, lambda: raw(tcp4()), "unknown_link"),
])
def test_not_tcp_or_udp_is_counted(name, linktype, frame, counter):
    pkt, counters = decode_one(linktype, frame())
    assert pkt is None
    assert counters["frames"] == 1 and counters[counter] == 1
    assert sum(counters[k] for k in COUNTERS if k != "frames") == 1


def patched(data, offset, value):
    return data[:offset] + bytes([value]) + data[offset + 1:]


def put16(data, offset, value):
    return data[:offset] + struct.pack("!H", value) + data[offset + 2:]


ETH_TCP = raw(Ether(**MACS) / tcp4())
ETH_UDP = raw(Ether(**MACS) / IP(src="192.0.2.10", dst="192.0.2.20")
              / UDP(sport=47808, dport=47808) / b"read zone=3F-east temp")
RAW6 = raw(udp6())

MALFORMED = {
    "ipv4 IHL 4": (1, patched(ETH_TCP, 14, 0x44)),
    "tcp data offset 3": (1, patched(ETH_TCP, 14 + 20 + 12, 0x30)),
    "tcp data offset beyond datagram": (1, patched(ETH_TCP, 14 + 20 + 12, 0xF0)),
    "total length below header": (1, put16(ETH_TCP, 16, 19)),
    "tcp header cut by total length": (1, put16(ETH_TCP, 16, 30)),
    "ipv4 version 5": (1, patched(ETH_TCP, 14, 0x55)),
    "udp length 7": (1, put16(ETH_UDP, 14 + 20 + 4, 7)),
    "udp length beyond datagram": (1, put16(ETH_UDP, 14 + 20 + 4, 31)),
    "udp header cut by total length": (1, put16(ETH_UDP, 16, 24)),
    "ethernet 10 bytes": (1, ETH_TCP[:10]),
    "ip header truncated": (1, ETH_TCP[:14 + 12]),
    "vlan tag truncated": (1, raw(Ether(**MACS) / Dot1Q(vlan=3) / tcp4())[:16]),
    "ipv6 jumbogram": (229, put16(RAW6, 4, 0)),
    "extension chain past end": (229, raw(IPv6(src=NODE6, dst=HUB6, nh=60) / Raw(b"\x11\x00\0\0"))),
    "extension length past end": (229, raw(IPv6(src=NODE6, dst=HUB6, nh=0)
                                           / Raw(b"\x11\x05" + bytes(6) + RAW6[40:]))),
    "ipv6 on the ipv4 link type": (228, RAW6),
    "ipv4 on the ipv6 link type": (229, raw(tcp4())),
    "raw ip version 5": (101, patched(raw(tcp4()), 0, 0x55)),
    "cooked v2 short": (276, b"\x08\x00" + bytes(10)),
    "loopback 3 bytes": (0, b"\x02\x00\x00"),
    "empty frame": (1, b""),
}


@pytest.mark.parametrize("name", sorted(MALFORMED))
def test_malformed_counted_not_fatal(name):
    linktype, frame = MALFORMED[name]
    pkt, counters = decode_one(linktype, frame)
    assert pkt is None
    assert counters["frames"] == 1 and counters["malformed"] == 1
    assert sum(counters[k] for k in COUNTERS if k != "frames") == 1


def decode_counted(decoder, linktype, frame):
    """Decode one frame and check it was counted once: in exactly one fate
    (a fragment held or dropped: as a fragment)."""
    before = decoder.counters
    pkt = decoder.decode(0, 0.0, linktype, frame)
    after = decoder.counters
    delta = {k: after[k] - before[k] for k in COUNTERS}
    assert delta["frames"] == 1
    assert sum(delta[k] for k in FATES) == 1
    assert (pkt is not None) == (delta["decoded"] == 1)
    return pkt


def test_truncations_and_corruptions_never_raise():
    rng = random.Random(20240607)
    decoder = Decoder()
    frames = [(lt, wrap(ip())) for _, lt, wrap in LINKS for ip in (tcp4, udp6)]
    for linktype, frame in frames:
        whole = decode_counted(decoder, linktype, frame)
        for cut in range(len(frame)):  # every strict prefix cuts the IP datagram short
            pkt = decode_counted(decoder, linktype, frame[:cut])
            if pkt is not None:  # scanned as far as captured, the rest counted as cut
                assert pkt.cut > 0
                assert whole.payload.startswith(pkt.payload)
                assert len(pkt.payload) + pkt.cut == len(whole.payload)
                assert pkt[:8] == whole[:8]
        for _ in range(60):
            data = bytearray(frame)
            for _ in range(rng.randrange(1, 4)):
                data[rng.randrange(len(data))] = rng.randrange(256)
            decode_counted(decoder, linktype, bytes(data))
    for _ in range(500):
        decode_counted(decoder, rng.choice([0, 1, 12, 101, 108, 113, 228, 229, 276]),
                       rng.randbytes(rng.randrange(80)))


def test_counters_present_from_the_start():
    assert Decoder().counters == {name: 0 for name in (
        "frames", "decoded", "not_ip", "other_ip", "malformed", "unknown_link", "fragments",
        "headers_cut", "truncated_packets", "truncated_fragments", "ipv4_total_zero",
        "invalid_timestamps",
        "frag_reassembled", "frag_overlaps", "frag_timeouts", "frag_evicted", "frag_too_big",
        "frag_too_many", "frag_bad")}


# -- fragments through the decoder ---------------------------------------

FIRMWARE = bytes(range(256)) * 12  # 3072 bytes of an invented firmware image


def test_ipv4_fragments_out_of_order(tmp_path):
    whole = (IP(src="192.0.2.30", dst="192.0.2.10", id=0x4242)
             / UDP(sport=69, dport=50000) / FIRMWARE)
    pieces = fragment(whole, fragsize=1000)
    # RFC 791: the fragment offset field counts 8-octet units
    assert [p.frag for p in pieces] == [0, 125, 250, 375]
    frames = [raw(Ether(**MACS) / p) for p in pieces]
    order = [2, 0, 3, 1]
    decoder = Decoder()
    got = [decoder.decode(n, 10.0 + n, 1, frames[i]) for n, i in enumerate(order, 1)]
    assert got[:3] == [None, None, None]
    pkt = got[3]
    assert (pkt.proto, pkt.sport, pkt.dport, pkt.payload) == (17, 69, 50000, FIRMWARE)
    assert (pkt.frame, pkt.ts) == (4, 14.0)  # the frame that completed it
    c = decoder.counters
    # the completing frame counts once, as decoded (the fates add up to the frames)
    assert (c["fragments"], c["decoded"], c["frag_reassembled"]) == (3, 1, 1)
    # outside oracle: scapy's defragment (given the fragments in order)
    assert bytes(defragment([IP(raw(p)) for p in pieces])[0][UDP].payload) == FIRMWARE
    check_against_scapy(write_pcap(tmp_path / "frag4.pcap", [(1, 0, f) for f in frames]))


def test_ipv6_fragments_with_headers_on_both_sides(tmp_path):
    whole = (IPv6(src=NODE6, dst=HUB6) / IPv6ExtHdrHopByHop()
             / IPv6ExtHdrFragment(id=0xB111D1)
             / IPv6ExtHdrDestOpt() / TCP(sport=40124, dport=8080, seq=9, flags="PA")
             / FIRMWARE)
    pieces = fragment6(whole, 1280)
    assert len(pieces) == 3
    frames = [raw(Ether(**MACS) / p) for p in pieces]
    decoder = Decoder()
    results = [decoder.decode(n, 1.0, 1, frames[i]) for n, i in enumerate([1, 2, 0], 1)]
    pkt = results[-1]
    assert results[:2] == [None, None]
    assert (pkt.proto, pkt.sport, pkt.dport, pkt.seq, pkt.payload) == (6, 40124, 8080, 9,
                                                                       FIRMWARE)
    assert decoder.counters["frag_reassembled"] == 1
    # outside oracle: scapy's defragment6
    assert bytes(defragment6([IPv6(raw(p)) for p in pieces])[TCP].payload) == FIRMWARE
    check_against_scapy(write_pcap(tmp_path / "frag6.pcap", [(1, 0, f) for f in frames]))


def test_ipv6_fragment_offset_in_8_byte_units():
    # RFC 8200 section 4.5: Fragment Offset (13 bits, 8-octet units), Res (2),
    # M (1); built by hand: 24 bytes of UDP datagram in two fragments
    udp = struct.pack("!HHHH", 5683, 5683, 24, 0) + b"hall-2 on"[:8] + b"dim 30%!"
    assert len(udp) == 24

    def frag(offset_units, more, data):
        hdr = struct.pack("!BBHI", 17, 0, offset_units << 3 | more, 0xC0A1)
        return raw(IPv6(src=NODE6, dst=HUB6, nh=44) / Raw(hdr + data))

    decoder = Decoder()
    assert decoder.decode(1, 0.0, 229, frag(2, 0, udp[16:])) is None
    pkt = decoder.decode(2, 0.0, 229, frag(0, 1, udp[:16]))
    assert pkt.payload == udp[8:] and pkt.sport == 5683


def test_reassembled_but_not_tcp_or_udp():
    whole = IP(src=SENSOR, dst=BROKER) / ICMP() / bytes(3000)
    decoder = Decoder()
    for n, p in enumerate(fragment(whole, fragsize=1480), 1):
        assert decoder.decode(n, 0.0, 228, raw(p)) is None
    c = decoder.counters
    assert (c["fragments"], c["other_ip"], c["frag_reassembled"]) == (2, 1, 1)


def test_reassembled_tcp_header_truncated_is_malformed():
    whole = raw(IP(src=SENSOR, dst=BROKER, id=9) / TCP(sport=1, dport=2))
    head = IP(whole)
    first = raw(IP(src=SENSOR, dst=BROKER, id=9, proto=6, flags="MF") / Raw(raw(head[TCP])[:8]))
    last = raw(IP(src=SENSOR, dst=BROKER, id=9, proto=6, frag=1) / Raw(raw(head[TCP])[8:16]))
    decoder = Decoder()
    assert decoder.decode(1, 0.0, 228, first) is None
    assert decoder.decode(2, 0.0, 228, last) is None
    assert decoder.counters["malformed"] == 1 and decoder.counters["frag_reassembled"] == 1


def test_decoder_uses_given_defragmenter():
    defrag = Defragmenter(max_datagram=2000)
    decoder = Decoder(defrag)
    for n, p in enumerate(fragment(IP(src=SENSOR, dst=BROKER) / UDP() / FIRMWARE, 1000), 1):
        decoder.decode(n, 0.0, 228, raw(p))
    assert decoder.counters["frag_too_big"] == 1 and decoder.defrag is defrag


# -- addresses ------------------------------------------------------------

@pytest.mark.parametrize("text,canonical", [
    ("192.0.2.10", "192.0.2.10"),
    ("2001:db8:10::21", "2001:db8:10::21"),
    # RFC 5952 section 4.2.2: one 16-bit 0 field is not shortened to "::"
    ("2001:db8:0:1:1:1:1:1", "2001:db8:0:1:1:1:1:1"),
    # RFC 5952 section 4.2.3: the longest run of zeros, the first if equal
    ("2001:0:0:1:0:0:0:1", "2001:0:0:1::1"),
    ("2001:db8:0:0:1:0:0:1", "2001:db8::1:0:0:1"),
    # RFC 5952 section 4.3: lower case
    ("2001:DB8::AAAA", "2001:db8::aaaa"),
])
def test_format_ip(text, canonical):
    import ipaddress

    assert format_ip(ipaddress.ip_address(text).packed) == canonical


def test_format_ip_rejects_other_lengths():
    with pytest.raises(ValueError, match="4 or 16 bytes"):
        format_ip(b"\x01\x02")
