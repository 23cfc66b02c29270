"""Craft small, deterministic test captures with scapy.

Used by the end-to-end replay tests (which put ``tools/`` on ``sys.path``)
and by ``tools/make_demo_pcaps.py``.  Everything here is deterministic:
timestamps come from an explicit :class:`Clock`, IP ids and MAC addresses
are derived from the flow's addresses, so the same script writes
byte-identical files on every run.

Conventions:

* TCP stream offsets (``rel_seq``) count from 0 at the first payload byte
  of a side, i.e. relative to that side's ISN + 1; sequence numbers wrap
  modulo 2**32 (pick an ISN near 2**32 to craft a wrap).
* A packet's link layer is Ethernet (optionally 802.1Q / 802.1ad tagged)
  or, with ``link="raw"``, none at all (bare IP, LINKTYPE_RAW = 101).
* Every packet carries its capture time in ``pkt.time`` as a
  :class:`decimal.Decimal`, exact to the nanosecond.
"""

from __future__ import annotations

import ipaddress
import struct
from collections.abc import Iterable, Mapping, Sequence
from decimal import ROUND_FLOOR, Decimal
from pathlib import Path

from scapy.config import conf
from scapy.layers.inet import IP, TCP, UDP
from scapy.layers.inet6 import IPv6
from scapy.layers.l2 import Dot1AD, Dot1Q, Ether
from scapy.packet import Packet
from scapy.utils import EDecimal, PcapWriter

__all__ = [
    "Clock",
    "Conversation",
    "Datagrams",
    "ipv4_fragments",
    "merge",
    "write_pcap",
    "write_pcapng",
    "LINKTYPE_ETHERNET",
    "LINKTYPE_RAW",
]

# Link-layer header type values (tcpdump.org link-layer header types registry).
LINKTYPE_ETHERNET = 1
LINKTYPE_RAW = 101

#: 2024-03-04 09:00:00 UTC: an arbitrary fixed start for crafted captures.
DEFAULT_START = Decimal(1709542800)
DEFAULT_STEP = Decimal("0.001")

_SIDES = ("client", "server")
_SEQ_MOD = 1 << 32


def _decimal(value) -> Decimal:
    """A Decimal from an int, str, Decimal or float (floats via their repr)."""
    if isinstance(value, float):
        return Decimal(repr(value))
    return Decimal(value)


class Clock:
    """A deterministic capture clock.

    ``tick()`` returns the current time and then advances it by ``step``
    seconds; ``advance(seconds)`` jumps forward.  Share one clock between
    several flows to interleave them on one timeline in call order.
    """

    def __init__(self, start=DEFAULT_START, step=DEFAULT_STEP):
        self.now = _decimal(start)
        self.step = _decimal(step)
        if self.step < 0:
            raise ValueError(f"clock step must be >= 0, got {step!r}")

    def tick(self) -> Decimal:
        """Return the current time, then advance it by ``step``."""
        now = self.now
        self.now += self.step
        return now

    def advance(self, seconds) -> None:
        """Move the clock forward by ``seconds`` (>= 0)."""
        seconds = _decimal(seconds)
        if seconds < 0:
            raise ValueError(f"the clock only moves forward, got {seconds}")
        self.now += seconds


def _side(side: str) -> int:
    if side not in _SIDES:
        raise ValueError(f"side must be 'client' or 'server', got {side!r}")
    return _SIDES.index(side)


def _endpoint(value, ipv6: bool, what: str) -> tuple[str, int]:
    try:
        addr, port = value
        ip = ipaddress.ip_address(addr)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{what} must be (address, port), got {value!r}") from exc
    if (ip.version == 6) != ipv6:
        family = "IPv6" if ipv6 else "IPv4"
        raise ValueError(f"{what} address {addr} is not {family} (ipv6={ipv6})")
    if not isinstance(port, int) or not 0 <= port <= 0xFFFF:
        raise ValueError(f"{what} port must be an int in 0..65535, got {port!r}")
    return str(ip), port


def _vlans(vlan) -> list[int]:
    tags = [] if vlan is None else [vlan] if isinstance(vlan, int) else list(vlan)
    for tag in tags:
        if not isinstance(tag, int) or not 0 <= tag <= 4095:
            raise ValueError(f"VLAN id must be an int in 0..4095, got {tag!r}")
    return tags


def _mac(addr: str) -> str:
    """A locally administered MAC address derived from an IP address."""
    tail = ipaddress.ip_address(addr).packed[-4:]
    return "02:00:" + ":".join(f"{b:02x}" for b in tail)


def _split_sizes(total: int, segments, what: str) -> list[int]:
    """Sizes of the pieces ``total`` bytes are cut into (see Conversation.send)."""
    if segments is None:
        return [total]
    if isinstance(segments, int):
        if segments <= 0:
            raise ValueError(f"{what} size must be > 0, got {segments}")
        sizes = [segments] * (total // segments)
        if total % segments:
            sizes.append(total % segments)
        return sizes
    sizes = list(segments)
    if any(not isinstance(s, int) or s <= 0 for s in sizes):
        raise ValueError(f"{what} sizes must be positive ints, got {sizes}")
    if sum(sizes) != total:
        raise ValueError(f"{what} sizes {sizes} sum to {sum(sizes)}, data has {total} bytes")
    return sizes


def _indices(order, count: int, what: str) -> list[int]:
    if order is None:
        return list(range(count))
    order = list(order)
    for i in order:
        if not isinstance(i, int) or not 0 <= i < count:
            raise ValueError(f"{what} index {i!r} out of range 0..{count - 1}")
    return order


class _Flow:
    """What TCP and UDP flows share: endpoints, link layer, clock, packets."""

    def __init__(self, client, server, *, ipv6, vlan, clock, link, defaults):
        if client is None:
            client = defaults[ipv6][0]
        if server is None:
            server = defaults[ipv6][1]
        self.client = _endpoint(client, ipv6, "client")
        self.server = _endpoint(server, ipv6, "server")
        self.ipv6 = ipv6
        self.vlan = _vlans(vlan)
        if link not in ("ether", "raw"):
            raise ValueError(f"link must be 'ether' or 'raw', got {link!r}")
        if link == "raw" and self.vlan:
            raise ValueError("VLAN tags need an Ethernet link layer (link='ether')")
        self.link = link
        self.clock = clock if clock is not None else Clock()
        self.packets: list[Packet] = []
        ports = self.client[1] * 31 + self.server[1]
        self._ip_id = [ports & 0xFFFF, (ports * 7 + 0x5A5A) & 0xFFFF]

    def _ip(self, s: int) -> Packet:
        src, dst = (self.client, self.server) if s == 0 else (self.server, self.client)
        if self.ipv6:
            return IPv6(src=src[0], dst=dst[0], hlim=64)
        self._ip_id[s] = (self._ip_id[s] + 1) & 0xFFFF
        return IP(src=src[0], dst=dst[0], id=self._ip_id[s], ttl=64)

    def _build(self, s: int, l4: Packet) -> Packet:
        """``l4`` from side ``s`` with its IP and link layers, built (checksums set)."""
        pkt = self._ip(s) / l4
        if self.link == "ether":
            src, dst = (self.client, self.server) if s == 0 else (self.server, self.client)
            head = Ether(src=_mac(src[0]), dst=_mac(dst[0]))
            for i, tag in enumerate(self.vlan):
                head = head / (Dot1Q(vlan=tag) if i == len(self.vlan) - 1 else Dot1AD(vlan=tag))
            pkt = head / pkt
        return pkt.__class__(bytes(pkt))

    def _emit(self, s: int, l4: Packet) -> Packet:
        """Build ``l4`` for side ``s``, stamp it with the next clock tick, keep it."""
        pkt = self._build(s, l4)
        pkt.time = EDecimal(self.clock.tick())
        self.packets.append(pkt)
        return pkt


class Conversation(_Flow):
    """One TCP connection, both directions, as a list of crafted packets.

    ``client`` / ``server`` are ``(address, port)``; the defaults are
    192.0.2.10:40001 -> 198.51.100.20:80, or 2001:db8::10 -> 2001:db8::20
    with ``ipv6=True`` (addresses must match the family).  ``vlan`` is a
    VLAN id or a list of ids, outermost first (outer tags 802.1ad, the
    innermost 802.1Q).  Packets accumulate in ``self.packets`` in emission
    order, each stamped by ``self.clock``.
    """

    _DEFAULTS = {
        False: (("192.0.2.10", 40001), ("198.51.100.20", 80)),
        True: (("2001:db8::10", 40001), ("2001:db8::20", 80)),
    }

    def __init__(self, client=None, server=None, *, isn_c=1000, isn_s=5000, ipv6=False,
                 vlan=None, clock=None, link="ether", mss=1460):
        super().__init__(client, server, ipv6=ipv6, vlan=vlan, clock=clock, link=link,
                         defaults=self._DEFAULTS)
        self.isn = [isn_c % _SEQ_MOD, isn_s % _SEQ_MOD]
        self.mss = mss
        # Per side: stream offset one past the highest byte sent so far.
        self.next = [0, 0]

    def _seq(self, s: int, rel: int) -> int:
        return (self.isn[s] + 1 + rel) % _SEQ_MOD

    def _tcp(self, s: int, rel: int, flags: str, data: bytes = b"", **extra) -> Packet:
        sport, dport = (self.client[1], self.server[1]) if s == 0 else (self.server[1],
                                                                         self.client[1])
        ack = self._seq(1 - s, self.next[1 - s]) if "A" in flags else 0
        seg = TCP(sport=sport, dport=dport, seq=self._seq(s, rel), ack=ack, flags=flags,
                  window=64240, **extra)
        return self._emit(s, seg / data if data else seg)

    def handshake(self) -> None:
        """Emit SYN (client), SYN-ACK (server), ACK (client)."""
        self._tcp(0, -1, "S", options=[("MSS", self.mss)])
        self._tcp(1, -1, "SA", options=[("MSS", self.mss)])
        self._tcp(0, 0, "A")

    def segment(self, side: str, rel_seq: int, data: bytes, flags: str = "PA") -> Packet:
        """Emit one raw segment carrying ``data`` at stream offset ``rel_seq``.

        Nothing is checked against what was sent before: use it to craft
        overlaps, conflicting retransmissions and gaps.  Returns the packet.
        """
        s = _side(side)
        pkt = self._tcp(s, rel_seq, flags, bytes(data))
        self.next[s] = max(self.next[s], rel_seq + len(data))
        return pkt

    def send(self, side: str, data: bytes, *, segments=None, order=None, dup=None,
             seq_offset: int = 0) -> list[Packet]:
        """Send ``data`` from ``side`` ("client" | "server") as segments.

        ``segments``: None (one segment per ``mss`` bytes), an int (pieces of
        that size, the last one shorter) or a list of sizes summing to
        ``len(data)``.  ``order``: indices of the pieces in emission order;
        an index left out is never sent (a capture loss), a repeated one is
        sent again.  ``dup``: indices re-emitted, in that order, after all of
        ``order`` (retransmissions).  ``seq_offset`` shifts the first byte's
        stream offset from the side's next offset: negative to overlap bytes
        already sent, positive to leave a gap.  Returns the packets emitted.
        """
        data = bytes(data)
        s = _side(side)
        if not data:
            raise ValueError("send needs at least one byte of data")
        sizes = _split_sizes(len(data), self.mss if segments is None else segments, "segment")
        start = self.next[s] + seq_offset
        if start < 0:
            raise ValueError(f"seq_offset {seq_offset} points before the stream start")
        pieces, off = [], 0
        for size in sizes:
            pieces.append((start + off, data[off:off + size]))
            off += size
        emitted = []
        for i in _indices(order, len(pieces), "order") + _indices(dup or [], len(pieces), "dup"):
            emitted.append(self.segment(side, *pieces[i]))
        self.next[s] = max(self.next[s], start + len(data))
        return emitted

    def ack(self, side: str) -> Packet:
        """Emit a pure ACK from ``side`` for everything the peer sent so far."""
        s = _side(side)
        return self._tcp(s, self.next[s], "A")

    def close(self, how: str = "fin", *, side: str = "client") -> None:
        """Close the connection from ``side``: "fin" (FIN, FIN, ACK) or "rst"."""
        s = _side(side)
        if how == "rst":
            self._tcp(s, self.next[s], "R")
        elif how == "fin":
            for who in (s, 1 - s):
                self._tcp(who, self.next[who], "FA")
                self.next[who] += 1
            self._tcp(s, self.next[s], "A")
        else:
            raise ValueError(f"close how must be 'fin' or 'rst', got {how!r}")


class Datagrams(_Flow):
    """A UDP flow, both directions: ``send(side, data)`` emits one datagram.

    Same endpoints, ``vlan``, ``clock`` and ``link`` conventions as
    :class:`Conversation`; defaults 192.0.2.30:50001 -> 198.51.100.40:47100
    (2001:db8::30 -> 2001:db8::40 with ``ipv6=True``).
    """

    _DEFAULTS = {
        False: (("192.0.2.30", 50001), ("198.51.100.40", 47100)),
        True: (("2001:db8::30", 50001), ("2001:db8::40", 47100)),
    }

    def __init__(self, client=None, server=None, *, ipv6=False, vlan=None, clock=None,
                 link="ether"):
        super().__init__(client, server, ipv6=ipv6, vlan=vlan, clock=clock, link=link,
                         defaults=self._DEFAULTS)

    def send(self, side: str, data: bytes, *, fragments=None, order=None) -> list[Packet]:
        """Emit one datagram from ``side``; returns the packets emitted.

        With ``fragments`` (sizes as for :func:`ipv4_fragments`) the datagram
        is sent as IPv4 fragments in ``order``, each on its own clock tick.
        """
        s = _side(side)
        sport, dport = (self.client[1], self.server[1]) if s == 0 else (self.server[1],
                                                                         self.client[1])
        udp = UDP(sport=sport, dport=dport) / bytes(data)
        if fragments is None:
            return [self._emit(s, udp)]
        if self.ipv6:
            raise ValueError("fragments are IPv4 only")
        pkt = self._build(s, udp)
        pkt.time = EDecimal(self.clock.now)
        frags = ipv4_fragments(pkt, fragments, order)
        for frag in frags:
            frag.time = EDecimal(self.clock.tick())
        self.packets.extend(frags)
        return frags


def ipv4_fragments(pkt: Packet, sizes, order=None) -> list[Packet]:
    """Split the IPv4 packet ``pkt`` into fragments (RFC 791, section 3.2).

    ``sizes`` cuts the IP payload (transport header included): an int (a
    multiple of 8: pieces of that size) or a list of sizes summing to the
    payload length, all but the last a multiple of 8 (the fragment offset
    counts 8-byte units).  ``order`` lists fragment indices in emission
    order (left out: lost; repeated: duplicated).  The link layer is kept;
    fragment k in emission order is stamped ``pkt.time`` + k microseconds.
    Packets with IP options, DF set, or that already are fragments are
    refused with ValueError.
    """
    if IP not in pkt:
        raise ValueError("ipv4_fragments needs an IPv4 packet")
    raw = bytes(pkt)
    ip_raw = bytes(pkt[IP])
    head = raw[: len(raw) - len(ip_raw)]
    ihl = (ip_raw[0] & 0x0F) * 4
    if ihl != 20:
        raise ValueError("ipv4_fragments does not handle IP options")
    flags_frag = struct.unpack_from("!H", ip_raw, 6)[0]
    if flags_frag & 0x4000:
        raise ValueError("the packet has DF (don't fragment) set")
    if flags_frag & 0x3FFF:
        raise ValueError("the packet already is a fragment")
    total = struct.unpack_from("!H", ip_raw, 2)[0]
    payload = ip_raw[ihl:total]
    lengths = _split_sizes(len(payload), sizes, "fragment")
    if any(n % 8 for n in lengths[:-1]):
        raise ValueError(f"fragment sizes {lengths}: all but the last must be multiples of 8")
    pieces, off = [], 0
    for i, n in enumerate(lengths):
        more = 0x2000 if i < len(lengths) - 1 else 0
        hdr = bytearray(ip_raw[:ihl])
        struct.pack_into("!H", hdr, 2, ihl + n)
        struct.pack_into("!H", hdr, 6, more | (off // 8))
        struct.pack_into("!H", hdr, 10, 0)
        struct.pack_into("!H", hdr, 10, _inet_checksum(bytes(hdr)))
        pieces.append(head + bytes(hdr) + payload[off:off + n])
        off += n
    out = []
    for k, i in enumerate(_indices(order, len(pieces), "order")):
        frag = pkt.__class__(pieces[i])
        frag.time = EDecimal(Decimal(pkt.time) + Decimal(k) / 1_000_000)
        out.append(frag)
    return out


def _inet_checksum(data: bytes) -> int:
    """The Internet checksum of RFC 1071 (one's complement of the word sum)."""
    if len(data) % 2:
        data += b"\0"
    total = sum(struct.unpack(f"!{len(data) // 2}H", data))
    while total >> 16:
        total = (total & 0xFFFF) + (total >> 16)
    return ~total & 0xFFFF


def merge(*flows) -> list[Packet]:
    """All packets of several flows (or packet lists) in time order (stable)."""
    packets = []
    for flow in flows:
        packets.extend(flow.packets if isinstance(flow, _Flow) else flow)
    return sorted(packets, key=lambda p: Decimal(p.time))


def _linktype(pkt: Packet) -> int:
    """Link type of a packet by its outermost layer: bare IP maps to LINKTYPE_RAW."""
    if isinstance(pkt, (IP, IPv6)):
        return LINKTYPE_RAW
    linktype = conf.l2types.layer2num.get(pkt.__class__)
    if linktype is None:
        raise ValueError(f"no link type known for {pkt.__class__.__name__}; give it explicitly")
    return linktype


def _split_time(t, units_per_second: int) -> tuple[int, int]:
    """(seconds, fraction in units) of a timestamp, rounded down."""
    t = Decimal(t)
    sec = int(t.to_integral_value(rounding=ROUND_FLOOR))
    frac = int(((t - sec) * units_per_second).to_integral_value(rounding=ROUND_FLOOR))
    return sec, frac


def write_pcap(path, packets: Iterable[Packet], *, linktype: int | None = None,
               nano: bool = False, big_endian: bool = False,
               snaplen: int | None = None) -> None:
    """Write a classic pcap file (draft-ietf-opsawg-pcap) with scapy's writer.

    ``linktype`` defaults to the first packet's (Ethernet 1, bare IP 101;
    Ethernet for an empty list).  ``nano`` selects nanosecond timestamps
    (magic 0xa1b23c4d instead of 0xa1b2c3d4); ``big_endian`` writes every
    header field big-endian.  Timestamps are taken exactly from ``pkt.time``.
    ``snaplen``: capture at most that many bytes of each frame, as a capture
    with that snapshot length does (the record's captured length is the
    cut one, its original length the frame's; the header says ``snaplen``).
    """
    packets = list(packets)
    if linktype is None:
        linktype = _linktype(packets[0]) if packets else LINKTYPE_ETHERNET
    units = 1_000_000_000 if nano else 1_000_000
    with PcapWriter(str(path), linktype=linktype, endianness=">" if big_endian else "<",
                    nano=nano, snaplen=snaplen or 65535) as writer:
        writer.write_header(None)
        for pkt in packets:
            sec, frac = _split_time(pkt.time, units)
            if snaplen is None:
                writer.write_packet(pkt, sec=sec, usec=frac)
            else:
                data = bytes(pkt)
                writer.write_packet(data[:snaplen], sec=sec, usec=frac,
                                    caplen=min(len(data), snaplen), wirelen=len(data))


def _pcapng_option(code: int, value: bytes) -> bytes:
    return struct.pack("<HH", code, len(value)) + value + b"\0" * (-len(value) % 4)


def _pcapng_block(block_type: int, body: bytes) -> bytes:
    body += b"\0" * (-len(body) % 4)
    length = 12 + len(body)
    return struct.pack("<II", block_type, length) + body + struct.pack("<I", length)


def write_pcapng(path, packets_by_interface: Mapping[str, Sequence[Packet] | tuple],
                 *, nano: bool = False) -> None:
    """Write a little-endian pcapng file (draft-ietf-opsawg-pcapng).

    ``packets_by_interface`` maps an interface name to its packets, or to
    ``(linktype, packets)``; without a link type it is the first packet's.
    One Section Header Block, one Interface Description Block per entry
    (in mapping order, with if_name and if_tsresol 6 or, with ``nano``, 9),
    then one Enhanced Packet Block per packet, all interfaces merged in
    time order (ties: interface order, then list order).

    Our own writer rather than scapy's, which cannot name the first
    interface, nor write exact timestamps or nanosecond resolution.
    """
    units = 1_000_000_000 if nano else 1_000_000
    out = [_pcapng_block(0x0A0D0D0A, struct.pack("<IHHq", 0x1A2B3C4D, 1, 0, -1)
                         + _pcapng_option(4, b"seamscan tools/craft.py")
                         + _pcapng_option(0, b""))]
    records = []
    for if_id, (name, entry) in enumerate(packets_by_interface.items()):
        if isinstance(entry, tuple) and len(entry) == 2 and isinstance(entry[0], int):
            linktype, packets = entry
        else:
            packets = list(entry)
            linktype = _linktype(packets[0]) if packets else LINKTYPE_ETHERNET
        out.append(_pcapng_block(1, struct.pack("<HHI", linktype, 0, 0)
                                 + _pcapng_option(2, name.encode())
                                 + _pcapng_option(9, bytes([9 if nano else 6]))
                                 + _pcapng_option(0, b"")))
        for n, pkt in enumerate(packets):
            records.append((Decimal(pkt.time), if_id, n, pkt))
    records.sort(key=lambda r: r[:3])
    for t, if_id, _, pkt in records:
        sec, frac = _split_time(t, units)
        ts = sec * units + frac
        data = bytes(pkt)
        out.append(_pcapng_block(6, struct.pack("<IIIII", if_id, ts >> 32, ts & 0xFFFFFFFF,
                                                len(data), len(data)) + data))
    Path(path).write_bytes(b"".join(out))
