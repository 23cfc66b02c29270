"""Tests for seamscan.capture: pcap, pcapng and gzip reading, damage reports.

Captures are crafted with scapy (frames, and its pcap / pcapng writers) or
block by block with ``struct`` following the pcapng specification, written
into ``tmp_path``. The outside oracle is scapy's own reader
(``scapy.utils.rdpcap``), which must agree with us on the frame count,
timestamps, frame bytes and, for TCP/UDP frames, the L4 payload.
"""

import gzip
import struct
import tracemalloc
from fractions import Fraction

import pytest
from scapy.layers.inet import IP, TCP, UDP
from scapy.layers.inet6 import IPv6, IPv6ExtHdrFragment
from scapy.layers.l2 import ARP, CookedLinux, Ether
from scapy.packet import Padding, raw
from scapy.utils import PcapNgWriter, RawPcapWriter, rdpcap

from seamscan.capture import CHUNK, CaptureError, open_capture
from seamscan.decode import Decoder

# -- a small smart-building lab -------------------------------------------

CONTROLLER_MAC, SWITCH_MAC = "02:00:5e:10:00:01", "02:00:5e:10:00:02"


def lab_frames():
    """Ethernet frames of the lab: sensors publishing over TCP, a building
    controller polling over UDP, a CoAP-style IPv6 exchange and one ARP."""
    eth = Ether(src=CONTROLLER_MAC, dst=SWITCH_MAC)
    return [
        raw(eth / IP(src="198.51.100.21", dst="203.0.113.5")
            / TCP(sport=40121, dport=1883, seq=1000, ack=77, flags="PA")
            / b"lab/floor3/co2 ppm=612"),
        raw(eth / IP(src="192.0.2.10", dst="192.0.2.20")
            / UDP(sport=47808, dport=47808) / b"read zone=3F-east temp"),
        raw(eth / IPv6(src="2001:db8:10::21", dst="2001:db8:10::5")
            / UDP(sport=5683, dport=5683) / b"GET /lights/hall-2"),
        raw(Ether(src=CONTROLLER_MAC, dst="ff:ff:ff:ff:ff:ff")
            / ARP(psrc="192.0.2.10", pdst="192.0.2.20", hwsrc=CONTROLLER_MAC)),
        raw(eth / IP(src="203.0.113.5", dst="198.51.100.21")
            / TCP(sport=1883, dport=40121, seq=77, ack=1022, flags="A")),
    ]


TIMES = [(1_700_000_000, 123_456), (1_700_000_001, 0), (1_700_000_002, 999_999),
         (1_700_000_002, 999_999), (1_700_000_060, 1)]


def exact_ts(sec, frac, units):
    """The timestamp's exact value sec + frac / units, rounded once."""
    return float(Fraction(sec * units + frac, units))


def write_pcap(path, records, *, linktype=1, endian="<", nano=False):
    """Write ``(sec, frac, frame)`` records with scapy's pcap writer."""
    w = RawPcapWriter(str(path), linktype=linktype, endianness=endian, nano=nano)
    w.write_header(None)
    for sec, frac, frame in records:
        w.write_packet(frame, sec=sec, usec=frac)
    w.close()
    return path


def read_all(path):
    with open_capture(path) as cap:
        return list(cap)


def read_until_error(path):
    """Frames yielded before the CaptureError, and that error."""
    got = []
    with pytest.raises(CaptureError) as info:
        with open_capture(path) as cap:
            for rec in cap:
                got.append(rec)
    return got, info.value


def scapy_payload(pkt):
    """The L4 payload as scapy dissects it, without the trailing Padding
    layer scapy splits off by the IP length; None unless TCP or UDP."""
    layer = pkt.getlayer(TCP) or pkt.getlayer(UDP)
    v4, v6 = pkt.getlayer(IP), pkt.getlayer(IPv6ExtHdrFragment)
    if (layer is None or v4 is not None and (v4.flags.MF or v4.frag)
            or v6 is not None and (v6.m or v6.offset)):
        return None  # a fragment: scapy's reader does not reassemble
    data = bytes(layer.payload)
    part = layer.payload
    while part:
        if isinstance(part, Padding):
            data = data[:len(data) - len(part.load)]
        part = part.payload
    return data


def check_against_scapy(path):
    """Outside oracle: scapy's own reader (rdpcap) agrees with us on frame
    count, timestamps, frame bytes and TCP/UDP payloads."""
    theirs = rdpcap(str(path))
    ours = read_all(path)
    assert len(ours) == len(theirs)
    decoder = Decoder()
    for pkt, (no, ts, linktype, frame) in zip(theirs, ours, strict=True):
        assert frame == pkt.original
        assert ts == float(pkt.time)
        want = scapy_payload(pkt)
        got = decoder.decode(no, ts, linktype, frame)
        if want is not None:
            assert got is not None and got.payload == want
    return ours


# -- pcapng blocks, per the pcapng specification (draft-ietf-opsawg-pcapng) --

def ng_block(btype, body, e="<"):
    body += b"\0" * (-len(body) % 4)
    return struct.pack(e + "II", btype, len(body) + 12) + body + struct.pack(e + "I",
                                                                             len(body) + 12)


def ng_option(code, value, e="<"):
    return struct.pack(e + "HH", code, len(value)) + value + b"\0" * (-len(value) % 4)


def ng_shb(e="<"):
    return ng_block(0x0A0D0D0A, struct.pack(e + "IHHq", 0x1A2B3C4D, 1, 0, -1), e)


def ng_idb(linktype, options=(), e="<", snaplen=262144):
    opts = b"".join(ng_option(c, v, e) for c, v in options)
    if opts:
        opts += ng_option(0, b"", e)
    return ng_block(1, struct.pack(e + "HHI", linktype, 0, snaplen) + opts, e)


def ng_epb(ifid, units, frame, e="<"):
    return ng_block(6, struct.pack(e + "IIIII", ifid, units >> 32, units & 0xFFFFFFFF,
                                   len(frame), len(frame)) + frame, e)


# -- classic pcap ---------------------------------------------------------

@pytest.mark.parametrize("endian", ["<", ">"])
@pytest.mark.parametrize("nano", [False, True])
def test_pcap_byte_orders_and_resolutions(tmp_path, endian, nano):
    units = 10**9 if nano else 10**6
    frames = lab_frames()
    fracs = [(s, f * 1000 + 789 if nano else f) for s, f in TIMES]
    records = [(s, f, fr) for (s, f), fr in zip(fracs, frames, strict=True)]
    path = write_pcap(tmp_path / "lab.pcap", records, endian=endian, nano=nano)
    # magic 0xA1B2C3D4 (micro) / 0xA1B23C4D (nano) in the writer's byte order
    # (draft-ietf-opsawg-pcap, File Header)
    magic = struct.pack(endian + "I", 0xA1B23C4D if nano else 0xA1B2C3D4)
    assert path.read_bytes()[:4] == magic
    ours = check_against_scapy(path)
    assert [r[0] for r in ours] == [1, 2, 3, 4, 5]
    assert [r[1] for r in ours] == [exact_ts(s, f, units) for s, f in fracs]
    assert [r[2] for r in ours] == [1] * 5
    assert [r[3] for r in ours] == frames
    with open_capture(path) as cap:
        assert cap.format == "pcap" and not cap.compressed
        assert cap.size == path.stat().st_size


def test_pcap_linktype_field_keeps_low_16_bits(tmp_path):
    # draft-ietf-opsawg-pcap: the upper bits of LinkType carry FCS information
    path = write_pcap(tmp_path / "fcs.pcap", [(1, 0, lab_frames()[0])],
                      linktype=1 | (0x1 << 26) | (0x2 << 28))
    assert [r[2] for r in read_all(path)] == [1]


def test_pcap_exact_timestamps_worked_example(tmp_path):
    # 1700000000.123456 s is the nearest float to the decimal value; the
    # nanosecond 1.000000001 s likewise (exact rounding, Python's float()).
    path = write_pcap(tmp_path / "n.pcap", [(1_700_000_000, 123_456, b"x" * 14)])
    assert read_all(path)[0][1] == 1700000000.123456
    path = write_pcap(tmp_path / "n2.pcap", [(1, 1, b"x" * 14)], nano=True)
    assert read_all(path)[0][1] == 1.000000001


def test_empty_pcap_has_no_frames(tmp_path):
    path = write_pcap(tmp_path / "empty.pcap", [])
    assert read_all(path) == []
    assert len(rdpcap(str(path))) == 0  # scapy's reader agrees


def test_many_records_cross_chunk_boundaries(tmp_path):
    frames = lab_frames()
    records = [(1_700_000_000 + i, i % 1_000_000, frames[i % len(frames)] + bytes(i % 700))
               for i in range(2500)]
    path = write_pcap(tmp_path / "long.pcap", records)
    assert path.stat().st_size > 2 * CHUNK
    positions = []
    with open_capture(path) as cap:
        got = []
        for rec in cap:
            got.append(rec)
            positions.append(cap.position())
        assert cap.position() == cap.size
    assert positions == sorted(positions)
    assert [r[3] for r in got] == [r[2] for r in records]
    check_against_scapy(path)


def test_memory_does_not_grow_with_capture(tmp_path):
    frame = lab_frames()[0] + bytes(1400)
    path = write_pcap(tmp_path / "big.pcap", [(i, 0, frame) for i in range(6000)])
    assert path.stat().st_size > 8 * 2**20
    tracemalloc.start()
    try:
        with open_capture(path) as cap:
            count = sum(1 for _ in cap)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert count == 6000
    assert peak < 4 * CHUNK + 2**20


# -- pcapng ---------------------------------------------------------------

def test_pcapng_two_interfaces_with_own_linktype_and_resolution(tmp_path):
    eth_frames = lab_frames()
    raw_frame = raw(IP(src="192.0.2.30", dst="192.0.2.10") / UDP(sport=5000, dport=47808)
                    / b"damper=open 40%")
    # interface 0: Ethernet, if_tsresol 9 (nanoseconds); interface 1: raw IP,
    # if_tsresol 0x8A (2^-10 s): pcapng specification, option if_tsresol
    units0, units1 = 10**9, 2**10
    t0 = 1_700_000_000 * units0 + 123_456_789
    t1 = 1_700_000_000 * units1 + 513
    data = (ng_shb() + ng_idb(1, [(9, b"\x09")]) + ng_idb(101, [(9, b"\x8a")])
            + ng_epb(0, t0, eth_frames[0])
            + ng_block(4, struct.pack("<HH", 0, 0))  # name resolution block: skipped
            + ng_epb(1, t1, raw_frame)
            + ng_block(0x80000001, b"lab-notes")  # a custom block: skipped
            + ng_epb(0, t0 + 1, eth_frames[1])
            + ng_block(5, struct.pack("<III", 1, 0, 0)))  # interface statistics: skipped
    path = tmp_path / "two-ifaces.pcapng"
    path.write_bytes(data)
    ours = check_against_scapy(path)
    assert [(r[0], r[2]) for r in ours] == [(1, 1), (2, 101), (3, 1)]
    assert [r[1] for r in ours] == [float(Fraction(t0, units0)), float(Fraction(t1, units1)),
                                    float(Fraction(t0 + 1, units0))]
    assert [r[3] for r in ours] == [eth_frames[0], raw_frame, eth_frames[1]]
    with open_capture(path) as cap:
        assert cap.format == "pcapng"


def test_pcapng_written_by_scapy_with_two_interfaces(tmp_path):
    # scapy's pcapng writer adds one interface per capture interface name,
    # with the link type of the first packet seen on it
    eth = Ether(lab_frames()[0])
    cooked = (CookedLinux(pkttype=4, lladdrtype=1, lladdrlen=6, src=b"\x02\x00\x5e\x10\x00\x01")
              / IP(src="192.0.2.40", dst="192.0.2.10") / UDP(sport=47809, dport=47808)
              / b"lamp=dim")
    eth2 = Ether(lab_frames()[1])
    for pkt, when, where in ((eth, 1_700_000_000.5, "lab-eth0"), (cooked, 1_700_000_001.25,
                             "lab-any"), (eth2, 1_700_000_002.75, "lab-eth0")):
        pkt.time, pkt.sniffed_on = when, where
    path = tmp_path / "scapy.pcapng"
    w = PcapNgWriter(str(path))
    for pkt in (eth, cooked, eth2):
        w.write(pkt)
    w.close()
    ours = check_against_scapy(path)
    assert [r[2] for r in ours] == [1, 113, 1]
    assert [r[1] for r in ours] == [1_700_000_000.5, 1_700_000_001.25, 1_700_000_002.75]
    assert [r[3] for r in ours] == [raw(eth), raw(cooked), raw(eth2)]


def test_pcapng_sections_byte_orders_offset_and_packet_block_kinds(tmp_path):
    frames = lab_frames()
    # section 1, big-endian: if_tsoffset 100 s (option 14), simple packet
    # block (no timestamp: takes the previous one) and obsolete packet block
    be = (ng_shb(">") + ng_idb(1, [(14, struct.pack(">q", 100))], ">")
          + ng_epb(0, 5_000_000, frames[0], ">")
          + ng_block(3, struct.pack(">I", len(frames[1])) + frames[1], ">")
          + ng_block(2, struct.pack(">HHIIII", 0, 0, 0, 7_000_000, len(frames[2]),
                                    len(frames[2])) + frames[2], ">"))
    # section 2, little-endian: interfaces start again from id 0
    le = ng_shb("<") + ng_idb(229) + ng_epb(0, 9, frames[2][14:])
    path = tmp_path / "sections.pcapng"
    path.write_bytes(be + le)
    got = read_all(path)
    assert [(r[0], r[1], r[2]) for r in got] == [(1, 105.0, 1), (2, 105.0, 1), (3, 107.0, 1),
                                                 (4, 9e-6, 229)]
    assert [r[3] for r in got] == [frames[0], frames[1], frames[2], frames[2][14:]]


def test_pcapng_simple_packet_block_cut_to_snaplen(tmp_path):
    frame = lab_frames()[0]
    path = tmp_path / "spb.pcapng"
    path.write_bytes(ng_shb() + ng_idb(1, snaplen=40) + ng_block(3, struct.pack(
        "<I", len(frame)) + frame[:40]))
    assert read_all(path)[0][3] == frame[:40]


# -- gzip -----------------------------------------------------------------

@pytest.mark.parametrize("name", ["lab.pcap.gz", "lab-capture.bin"])
def test_gzip_detected_by_magic(tmp_path, name):
    frames = lab_frames()
    records = [(s, f, fr) for (s, f), fr in zip(TIMES, frames, strict=True)]
    plain = write_pcap(tmp_path / "plain.pcap", records)
    path = tmp_path / name
    path.write_bytes(gzip.compress(plain.read_bytes()))
    with open_capture(path) as cap:
        assert cap.format == "pcap" and cap.compressed
        assert cap.size == path.stat().st_size
        got = list(cap)
        assert cap.position() == cap.size
    assert got == read_all(plain)
    check_against_scapy(path)  # scapy's reader also opens gzip by its magic


def test_gzip_pcapng(tmp_path):
    data = ng_shb() + ng_idb(1) + ng_epb(0, 42, lab_frames()[0])
    path = tmp_path / "lab.pcapng.gz"
    path.write_bytes(gzip.compress(data))
    got = check_against_scapy(path)
    assert [(r[0], r[1]) for r in got] == [(1, 42e-6)]


def test_truncated_gzip_yields_what_was_complete(tmp_path):
    frames = lab_frames()
    records = [(i, 0, frames[i % 5] + bytes(i % 300)) for i in range(3000)]
    plain = write_pcap(tmp_path / "plain.pcap", records)
    packed = gzip.compress(plain.read_bytes())
    path = tmp_path / "cut.pcap.gz"
    path.write_bytes(packed[:len(packed) * 2 // 3])
    got, err = read_until_error(path)
    assert 0 < len(got) < 3000
    assert [r[3] for r in got] == [r[2] for r in records[:len(got)]]
    assert err.frame == len(got)
    assert str(err).startswith(f"{path}: ")


# -- damage ---------------------------------------------------------------

def test_empty_file(tmp_path):
    path = tmp_path / "nothing.pcap"
    path.write_bytes(b"")
    with pytest.raises(CaptureError, match="empty file") as info:
        open_capture(path)
    assert str(info.value).startswith(str(path))


def test_bad_magic(tmp_path):
    path = tmp_path / "notes.txt"
    path.write_bytes(b"zone 3F east: thermostat replaced\n")
    with pytest.raises(CaptureError) as info:
        open_capture(path)
    assert str(info.value) == (f"{path}: not a pcap or pcapng capture: starts with 0x7a6f6e65 "
                               "(at byte offset 0)")


@pytest.mark.parametrize("kind", ["missing", "directory"])
def test_unreadable_file(tmp_path, kind):
    path = tmp_path / "missing.pcap"
    if kind == "directory":
        path.mkdir()
    with pytest.raises(CaptureError, match="cannot open"):
        open_capture(path)


def test_truncated_file_header(tmp_path):
    path = tmp_path / "short.pcap"
    path.write_bytes(struct.pack("<IHH", 0xA1B2C3D4, 2, 4))
    with pytest.raises(CaptureError, match="truncated pcap file header: 8 of 24 bytes"):
        open_capture(path)


def good_then(tmp_path, tail, name="damaged.pcap"):
    """Three good lab records followed by ``tail``; (path, good frames)."""
    frames = lab_frames()[:3]
    path = write_pcap(tmp_path / name, [(1_700_000_000 + i, 0, f) for i, f in enumerate(frames)])
    good_size = path.stat().st_size
    path.write_bytes(path.read_bytes() + tail)
    return path, frames, good_size


def test_record_length_beyond_file(tmp_path):
    path, frames, good_size = good_then(tmp_path, struct.pack("<IIII", 5, 0, 1514, 1514)
                                        + bytes(200))
    got, err = read_until_error(path)
    assert [r[3] for r in got] == frames
    assert err.frame == 3 and err.offset == good_size
    assert err.message == "record 4 claims 1514 bytes but the file ends after 200"
    assert str(err) == (f"{path}: record 4 claims 1514 bytes but the file ends after 200 "
                        f"(at byte offset {good_size}, after frame 3)")


def test_truncated_record_header(tmp_path):
    path, frames, good_size = good_then(tmp_path, bytes(7))
    got, err = read_until_error(path)
    assert [r[3] for r in got] == frames
    assert (err.frame, err.offset) == (3, good_size)
    assert "record 4 header is truncated: 7 of 16 bytes" in str(err)


def test_garbage_after_good_records(tmp_path):
    path, frames, good_size = good_then(tmp_path, b"\xde\xad\xbe\xef" * 16)
    got, err = read_until_error(path)
    assert [r[3] for r in got] == frames
    assert (err.frame, err.offset) == (3, good_size)
    assert "record 4 claims 4022250974 bytes, more than the 262144" in str(err)


def test_truncated_first_record(tmp_path):
    path = write_pcap(tmp_path / "one.pcap", [(1, 0, lab_frames()[0])])
    path.write_bytes(path.read_bytes()[:-10])
    got, err = read_until_error(path)
    assert got == [] and err.frame == 0 and err.offset == 24


def pcapng_damage_cases():
    frame = lab_frames()[0]
    good = ng_epb(0, 1, frame)
    bad_trailer = good[:-4] + struct.pack("<I", len(good) + 4)
    return {
        "trailing length differs": (bad_trailer, "trailing length"),
        "length not multiple of 4": (struct.pack("<II", 6, 30) + bytes(22),
                                     "invalid length 30"),
        "unknown interface": (ng_epb(3, 1, frame), "refers to interface 3 but 1 are described"),
        "block beyond the file": (good[:40], f"claims {len(good)} bytes but the file ends "
                                             "after 40"),
        "garbage": (b"\xde\xad\xbe\xef" * 8, "invalid length 4022250974"),
        "oversized block": (struct.pack("<II", 6, 1 << 30) + bytes(24),
                            "claims 1073741824 bytes, more than the 16777216 accepted"),
        "truncated block header": (b"\x06\x00\x00\x00", "truncated block header"),
        "captured length beyond block": (
            ng_block(6, struct.pack("<IIIII", 0, 0, 1, 400, 400) + frame),
            "claims 400 captured bytes"),
        "unsupported version": (ng_block(0x0A0D0D0A, struct.pack("<IHHq", 0x1A2B3C4D, 2, 0, -1)),
                                "unsupported pcapng version 2.0"),
        "bad byte-order magic": (ng_block(0x0A0D0D0A, struct.pack("<IHHq", 0x11223344, 1, 0, -1)),
                                 "no valid byte-order magic"),
    }


@pytest.mark.parametrize("case", sorted(pcapng_damage_cases()))
def test_pcapng_damage_after_good_blocks(tmp_path, case):
    tail, message = pcapng_damage_cases()[case]
    frames = lab_frames()[:2]
    head = ng_shb() + ng_idb(1) + b"".join(ng_epb(0, i, f) for i, f in enumerate(frames))
    path = tmp_path / "damaged.pcapng"
    path.write_bytes(head + tail)
    got, err = read_until_error(path)
    assert [r[3] for r in got] == frames
    assert err.frame == 2 and err.offset == len(head)
    assert message in err.message
    assert str(err).startswith(f"{path}: ")


def test_pcapng_idb_option_past_block(tmp_path):
    idb = ng_block(1, struct.pack("<HHI", 1, 0, 0) + struct.pack("<HH", 9, 40))
    path = tmp_path / "badopt.pcapng"
    path.write_bytes(ng_shb() + idb)
    got, err = read_until_error(path)
    assert got == [] and "option 9 runs past the block" in str(err)
