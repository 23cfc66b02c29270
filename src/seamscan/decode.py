"""Fast header decoding: link layer -> IPv4/IPv6 -> TCP/UDP, on raw bytes.

``Decoder.decode(frame_no, ts, linktype, frame)`` returns a ``Packet`` for a
TCP or UDP packet and ``None`` for anything else; it never raises on bad
input. Headers are read with ``struct`` and indexing straight from the
frame bytes (no per-layer objects: this is the replay's hot path). The
common frame (untagged Ethernet, IPv4 without options or IPv6 without
extension headers, TCP or UDP, nothing truncated) is read by one struct
call; any other falls through to the general path, which gives the same
answer for these frames.

Link types: Ethernet (1) with any depth of 802.1Q / 802.1ad tags (TPID
0x8100, 0x88a8, 0x9100); Linux cooked capture v1 (113) and v2 (276); raw IP
(101, and 12 or 14 as some systems write it; the version nibble picks IPv4
or IPv6); IPv4 (228) and IPv6 (229); BSD loopback (0: 4-byte address family
in the writer's byte order, told apart by which half is zero) and OpenBSD
loopback (108: network byte order), family 2 = IPv4, 24/28/30 = IPv6.

IP: IPv4 options are skipped by IHL; IPv6 extension headers hop-by-hop (0),
routing (43), destination options (60) ((len + 1) * 8 bytes), AH (51,
(len + 2) * 4 bytes, RFC 4302) and fragment (44) are walked; ESP (50), no
next header (59) and every other protocol end the chain as "other IP". A
Fragment header with offset 0 and M = 0 (an atomic fragment, RFC 6946) is
skipped over. Fragments go to the ``ipfrag.Defragmenter``; the reassembled
datagram is decoded as if it arrived in the frame that completed it.

Checksums: the TCP checksum of a segment carrying FIN or RST that was
captured whole is verified (``Packet.sum_ok``; RFC 9293 section 3.1 with
its pseudo-header), so that the flow tracker can tell a forged control
segment; other checksums are not verified, and a wrong one never drops a
packet here (captures taken on the sending host carry unfinished checksums
when the network card computes them) (common practice).

Lengths: the L4 payload ends where the IP header's length says, never at
the end of the frame (short Ethernet frames carry padding, and some links
append a frame check sequence); a UDP payload ends where the UDP length
says, which may be before the IP payload's end, never after. IPv6
jumbograms (payload length 0) are counted as malformed.

Truncated frames (a capture's snap length cuts the frame before the end the
IP header gives): every captured byte is still decoded. The payload ends at
the earlier of the IP (or UDP) header's end and the end of the captured
bytes; ``Packet.cut`` says how many promised payload bytes were not
captured (0 for a whole packet), and the flow tracker reports them as a
gap. A frame cut before the transport header's fields that matter (TCP: the
first 14 bytes, up to the flags; UDP: 8 bytes), or inside the IPv4 header's
options or an IPv6 extension header, counts as ``headers_cut``. A fragment
cut short cannot be reassembled: it is counted (``fragments`` and
``truncated_fragments``) and dropped. An IPv4 TCP segment with total length
0 (what a host-side capture shows for a segment the network card
segments, TSO) runs to the end of the captured frame (counted in
``ipv4_total_zero``).

Counters (``Decoder.counters``, all present from the start). The fates,
``FATES``: every frame given to ``decode`` counts in exactly one of them, so
they add up to ``frames``:

- ``decoded``: TCP or UDP packets returned (a datagram reassembled from
  fragments counts once, for the frame that completed it);
- ``not_ip``: link layer fine but carrying neither IPv4 nor IPv6 (ARP, ...);
- ``other_ip``: IP, but not TCP or UDP after reassembly (ICMP, ESP, ...);
- ``malformed``: a header inconsistent or cut short anywhere before the IP
  header's length can be read, or contradicting it: IPv4 IHL < 5, total
  length below the header, an extension chain running past the payload,
  TCP data offset < 5 or beyond the datagram, UDP length < 8 or beyond the
  datagram, an IP version that the link type contradicts;
- ``unknown_link``: a link type not listed above;
- ``headers_cut``: the capture ends inside the IP options, an IPv6
  extension header or the TCP/UDP header fields needed (see above);
- ``fragments``: frames carrying an IP fragment that did not complete a
  datagram (held for later, or dropped).

Other counters (not fates): ``frames`` (frames given to ``decode``);
``truncated_packets`` (decoded packets whose payload was cut short by the
snap length; they count as ``decoded``); ``truncated_fragments`` (fragments
dropped because they were cut short; they count as ``fragments``);
``ipv4_total_zero`` (IPv4 TCP segments whose total length 0 was read as
"to the end of the frame"); ``invalid_timestamps`` (frames whose time is a
``capture.InvalidStamp``: a fraction of a second out of range); and ``frag_*``, the defragmenter's counters (see ``ipfrag``): ``reassembled``,
``overlaps``, ``timeouts``, ``evicted``, ``too_big``, ``too_many``, ``bad``.
"""

from __future__ import annotations

import ipaddress
import socket
import struct
from collections import namedtuple

from seamscan.capture import InvalidStamp
from seamscan.ipfrag import Defragmenter

COUNTERS = ("frames", "decoded", "not_ip", "other_ip", "malformed", "unknown_link",
            "headers_cut", "fragments", "truncated_packets", "truncated_fragments",
            "ipv4_total_zero", "invalid_timestamps")

# The fates of a frame: each frame read counts in exactly one of them.
FATES = ("decoded", "not_ip", "other_ip", "malformed", "unknown_link", "headers_cut",
         "fragments")


class Packet(namedtuple("Packet", "proto src dst sport dport seq ack flags payload frame ts cut sum_ok", defaults=(0, None))):
    """A decoded TCP or UDP packet (a tuple; fields by name or position).

    ``proto`` 6 or 17; ``src``/``dst`` the IP addresses as 4 or 16 bytes;
    ``sport``/``dport``; ``seq``/``ack``/``flags`` (TCP sequence, ack and
    flags byte; 0 for UDP); ``payload`` the L4 payload bytes; ``frame`` the
    frame number and ``ts`` the capture time of the frame it came in (for a
    reassembled datagram, the frame that completed it); ``cut`` the
    payload bytes the IP (and UDP) header promise beyond the bytes captured
    (0 when the whole packet was captured: ``payload`` is then all of it);
    ``sum_ok`` whether the TCP checksum is right (RFC 9293 section 3.1, the
    pseudo-header included), for a segment with FIN or RST wholly captured,
    else None (not checked).
    """

    __slots__ = ()


def tcp_checksum_ok(src: bytes, dst: bytes, segment: bytes) -> bool:
    """Whether the TCP ``segment`` (header and payload, as captured) between
    the 4- or 16-byte addresses ``src`` and ``dst`` carries a right checksum:
    the one's complement sum of the pseudo-header (RFC 9293 section 3.1 for
    IPv4, RFC 8200 section 8.1 for IPv6) and the segment is all ones.  The
    one's complement sum of 16-bit words is their value modulo 0xFFFF (as
    2**16 = 1 mod 0xFFFF), so the check is one big-integer remainder."""
    n = len(segment)
    if len(src) == 4:
        pseudo = src + dst + b"\0\x06" + n.to_bytes(2, "big")
    else:
        pseudo = src + dst + n.to_bytes(4, "big") + b"\0\0\0\x06"
    if n & 1:
        segment += b"\0"
    return int.from_bytes(pseudo + segment, "big") % 0xFFFF == 0


def format_ip(addr: bytes) -> str:
    """Canonical text form of a 4-byte (dotted quad) or 16-byte (RFC 5952)
    address; ``ValueError`` for any other length."""
    if len(addr) == 4:
        return socket.inet_ntop(socket.AF_INET, addr)
    if len(addr) == 16:
        return str(ipaddress.IPv6Address(addr))
    raise ValueError(f"an IP address has 4 or 16 bytes, not {len(addr)}")


_new = tuple.__new__
_VLAN_TPIDS = (0x8100, 0x88A8, 0x9100)
_RAW_IP = (101, 12, 14)
_IP_FAMILY = {2: 0x0800, 24: 0x86DD, 28: 0x86DD, 30: 0x86DD}  # loopback AF_ -> ethertype
_V6_SKIP = (0, 43, 60)  # extension headers of (len + 1) * 8 bytes

# IPv4: version/IHL, total length, identification, flags/offset, protocol, source, destination
_V4 = struct.Struct("!BxHHHxBxx4s4s").unpack_from
# IPv6: version/class, payload length, next header, source, destination
_V6 = struct.Struct("!BxxxHBx16s16s").unpack_from
_V6_FRAG = struct.Struct("!HI").unpack_from  # offset/M, identification
_TCP = struct.Struct("!HHIIBB").unpack_from  # ports, seq, ack, data offset, flags
_UDP = struct.Struct("!HHH").unpack_from  # ports, length
_U32_LE = struct.Struct("<I").unpack_from
_U32_BE = struct.Struct(">I").unpack_from
# The fast path, one call per frame: an untagged Ethernet header's ethertype,
# then an IPv4 header without options (as _V4) or an IPv6 header (as _V6), then
# the first 14 bytes of a TCP header (as _TCP; for UDP: the ports, and the UDP
# length in the top half of what would be the sequence number).
_ETH_V4_L4 = struct.Struct("!12xHBxHxxHxBxx4s4sHHIIBB").unpack_from
_ETH_V6_L4 = struct.Struct("!12xHBxxxHBx16s16sHHIIBB").unpack_from


class Decoder:
    """Decodes frames to ``Packet``; one per capture (it holds the
    fragments in progress). See the module docstring for the counters."""

    def __init__(self, defrag: Defragmenter | None = None):
        self.defrag = defrag if defrag is not None else Defragmenter()
        self._counts = dict.fromkeys(COUNTERS, 0)

    @property
    def counters(self) -> dict[str, int]:
        """A snapshot of the counters, the defragmenter's prefixed ``frag_``."""
        out = dict(self._counts)
        for name, value in self.defrag.counters.items():
            out["frag_" + name] = value
        return out

    def decode(self, frame_no: int, ts: float, linktype: int, buf: bytes) -> Packet | None:
        """Decode one frame; ``None`` (counted) unless it is TCP or UDP."""
        c = self._counts
        c["frames"] += 1
        if ts.__class__ is InvalidStamp:
            c["invalid_timestamps"] += 1
        if linktype == 1:  # the common case in one struct call; anything unusual falls through
            n = len(buf)
            if n >= 48:
                et, vihl, total, fragw, proto, src, dst, sport, dport, seq, ack, doff, flags = \
                    _ETH_V4_L4(buf)
                if et == 0x0800:
                    if vihl == 0x45 and not fragw & 0x3FFF and 14 + total <= n:
                        if proto == 6:
                            doff = (doff >> 4) << 2
                            if doff >= 20 and 20 + doff <= total:
                                c["decoded"] += 1
                                return _new(Packet, (6, src, dst, sport, dport, seq, ack, flags,
                                                     buf[34 + doff:14 + total], frame_no, ts, 0,
                                                     tcp_checksum_ok(src, dst, buf[34:14 + total])
                                                     if flags & 5 else None))
                        elif proto == 17:
                            ulen = seq >> 16
                            if 8 <= ulen <= total - 20:
                                c["decoded"] += 1
                                return _new(Packet, (17, src, dst, sport, dport, 0, 0, 0,
                                                     buf[42:34 + ulen], frame_no, ts, 0, None))
                elif et == 0x86DD and n >= 68:
                    _, vtc, plen, proto, src, dst, sport, dport, seq, ack, doff, flags = \
                        _ETH_V6_L4(buf)
                    if vtc >> 4 == 6 and 54 + plen <= n:
                        if proto == 6:
                            doff = (doff >> 4) << 2
                            if doff >= 20 and doff <= plen:
                                c["decoded"] += 1
                                return _new(Packet, (6, src, dst, sport, dport, seq, ack, flags,
                                                     buf[54 + doff:54 + plen], frame_no, ts, 0,
                                                     tcp_checksum_ok(src, dst, buf[54:54 + plen])
                                                     if flags & 5 else None))
                        elif proto == 17:
                            ulen = seq >> 16
                            if 8 <= ulen <= plen:
                                c["decoded"] += 1
                                return _new(Packet, (17, src, dst, sport, dport, 0, 0, 0,
                                                     buf[62:54 + ulen], frame_no, ts, 0, None))
        try:
            # -- link layer: find the ethertype and where IP starts --------
            if linktype == 1:
                et = buf[12] << 8 | buf[13]
                off = 14
                while et in _VLAN_TPIDS:
                    et = buf[off + 2] << 8 | buf[off + 3]
                    off += 4
            elif linktype in _RAW_IP:
                version = buf[0] >> 4
                et = 0x0800 if version == 4 else 0x86DD if version == 6 else -1
                off = 0
            elif linktype == 113:
                et = buf[14] << 8 | buf[15]
                off = 16
                while et in _VLAN_TPIDS:
                    et = buf[off + 2] << 8 | buf[off + 3]
                    off += 4
            elif linktype == 276:
                if len(buf) < 20:
                    raise IndexError
                et = buf[0] << 8 | buf[1]
                off = 20
            elif linktype == 228:
                et, off = 0x0800, 0
            elif linktype == 229:
                et, off = 0x86DD, 0
            elif linktype == 0:
                family = _U32_LE(buf, 0)[0]
                if family > 0xFFFF:  # written by a big-endian host
                    family = _U32_BE(buf, 0)[0]
                et = _IP_FAMILY.get(family, 0)
                off = 4
            elif linktype == 108:
                et = _IP_FAMILY.get(_U32_BE(buf, 0)[0], 0)
                off = 4
            else:
                c["unknown_link"] += 1
                return None

            # -- IP --------------------------------------------------------
            # end: where the IP header says the datagram ends; got: where the
            # captured bytes end (the snap length may cut the frame short).
            n = len(buf)
            if et == 0x0800:
                vihl, total, ident, fragw, proto, src, dst = _V4(buf, off)
                ihl = (vihl & 15) << 2
                if total == 0 and proto == 6 and not fragw & 0x3FFF and vihl >> 4 == 4:
                    # A segment handed to the network card for segmentation
                    # (TSO), captured on the sending host: its total length
                    # is 0 and it runs to the end of the captured frame.
                    total = n - off
                    c["ipv4_total_zero"] += 1
                if vihl >> 4 != 4 or ihl < 20 or total < ihl:
                    c["malformed"] += 1
                    return None
                l4 = off + ihl
                end = off + total
                got = min(end, n)
                if got < l4:
                    c["headers_cut"] += 1
                    return None
                if fragw & 0x3FFF:
                    if got < end:  # a fragment cut short cannot be reassembled
                        c["fragments"] += 1
                        c["truncated_fragments"] += 1
                        return None
                    buf = self.defrag.add_v4(src, dst, proto, ident, (fragw & 0x1FFF) << 3,
                                             fragw & 0x2000 != 0, buf[l4:end], ts)
                    if buf is None:
                        c["fragments"] += 1
                        return None
                    l4 = 0
                    end = got = len(buf)
            elif et == 0x86DD:
                vtc, plen, proto, src, dst = _V6(buf, off)
                end = off + 40 + plen
                if vtc >> 4 != 6:
                    c["malformed"] += 1
                    return None
                got = min(end, n)
                l4 = off + 40
                reassembled = False
                while proto != 6 and proto != 17:
                    if proto in _V6_SKIP or proto == 51:
                        if l4 + 8 > end:
                            c["malformed"] += 1
                            return None
                        if l4 + 2 > got:
                            c["headers_cut"] += 1
                            return None
                        if proto == 51:
                            size = (buf[l4 + 1] + 2) << 2
                        else:
                            size = (buf[l4 + 1] + 1) << 3
                        proto = buf[l4]
                        l4 += size
                        if l4 > end:
                            c["malformed"] += 1
                            return None
                    elif proto == 44:
                        if l4 + 8 > end or reassembled:
                            c["malformed"] += 1
                            return None
                        if l4 + 8 > got:
                            c["headers_cut"] += 1
                            return None
                        offw, ident = _V6_FRAG(buf, l4 + 2)
                        if offw & 0xFFF9 == 0:  # atomic fragment: offset 0, M = 0
                            proto = buf[l4]
                            l4 += 8
                            continue
                        if got < end:  # a fragment cut short cannot be reassembled
                            c["fragments"] += 1
                            c["truncated_fragments"] += 1
                            return None
                        back = self.defrag.add_v6(src, dst, ident, buf[l4], offw & 0xFFF8,
                                                  offw & 1 == 1, buf[l4 + 8:end], ts)
                        if back is None:
                            c["fragments"] += 1
                            return None
                        proto, buf = back
                        l4 = 0
                        end = got = len(buf)
                        reassembled = True
                    else:
                        c["other_ip"] += 1
                        return None
            else:
                c["not_ip" if et >= 0 else "malformed"] += 1
                return None

            # -- TCP / UDP -------------------------------------------------
            if proto == 6:
                if end - l4 < 20:
                    c["malformed"] += 1
                    return None
                if got - l4 < 14:  # ports, sequence number, data offset and flags
                    c["headers_cut"] += 1
                    return None
                sport, dport, seq, ack, doff, flags = _TCP(buf, l4)
                doff = (doff >> 4) << 2
                if doff < 20 or l4 + doff > end:
                    c["malformed"] += 1
                    return None
                start = l4 + doff
                cut = end - max(start, got)
                c["decoded"] += 1
                if cut or got < end:  # the checksum needs the whole segment
                    if cut:
                        c["truncated_packets"] += 1
                    return _new(Packet, (6, src, dst, sport, dport, seq, ack, flags,
                                         buf[start:min(got, end)], frame_no, ts, cut, None))
                return _new(Packet, (6, src, dst, sport, dport, seq, ack, flags,
                                     buf[start:end], frame_no, ts, 0,
                                     tcp_checksum_ok(src, dst, buf[l4:end])
                                     if flags & 5 else None))
            if proto == 17:
                if end - l4 < 8:
                    c["malformed"] += 1
                    return None
                if got - l4 < 8:
                    c["headers_cut"] += 1
                    return None
                sport, dport, ulen = _UDP(buf, l4)
                if ulen < 8 or ulen > end - l4:
                    c["malformed"] += 1
                    return None
                stop = l4 + ulen
                cut = stop - min(stop, got)
                c["decoded"] += 1
                if cut:
                    c["truncated_packets"] += 1
                return _new(Packet, (17, src, dst, sport, dport, 0, 0, 0,
                                     buf[l4 + 8:stop - cut], frame_no, ts, cut, None))
            c["other_ip"] += 1
            return None
        except (IndexError, struct.error):
            c["malformed"] += 1
            return None
