"""The replay's C front end: classic pcap framing and fast decode in C.

``feed(path, decoder, packet, progress)`` does what ``replay._feed`` does
(every record of the capture decoded and each TCP/UDP packet handed to
``packet``; the capture's damage as a string, or None) with the same
packets, counters and error messages.  It is used unless
``SEAMSCAN_FASTPATH=0`` is set (``replay.fastpath_enabled``).

How: the file is opened by ``capture``'s reader (gzip, header checks and
the messages for a file that cannot be opened stay there).  For a classic
pcap file, ``sf_pcap_records`` (``csrc/host/front.c``) frames every
complete record in the reader's buffer and decodes those that the
decoder's fast path takes (untagged Ethernet, IPv4 without options and not
a fragment or IPv6 without extension headers, TCP or UDP); every other
frame goes through ``Decoder.decode`` unchanged.  A record that is not
wholly in the buffer, or too long, is handled by the same steps as
``CaptureReader._pcap_record``, the reader's own one-record step (refill, or the exact ``CaptureError``).
A pcapng file is read by the reader as before.

Record written by C per frame (``SF_REC_SIZE`` = 48 bytes, host byte
order, no padding): kind (0 decoded here, 1 left to the decoder), proto,
TCP flags, address length, source port, destination port, seq, ack, offset
of the source address (the destination follows it), payload start and end
(for kind 1: the frame's start and end), the header's seconds and fraction,
whether ``ts`` is exact, ``ts``.  ``ts`` equals the reader's
``(sec * units + frac) / units`` whenever the numerator is below 2**53;
otherwise Python computes it.

Progress is reported after each C call (every few thousand records), not
every 4096 records exactly.
"""

from __future__ import annotations

import struct

from seamscan._seamcore import ffi, lib
from seamscan.capture import _PCAP_MAGICS, CaptureError, CaptureReader, pcap_header
from seamscan.decode import Packet

_REC = struct.Struct("=BBBBHHIIIIIIII d")
_REC_CAP = 4096
_new = tuple.__new__


class _Reader(CaptureReader):
    """The capture reader, keeping a classic pcap file's first buffer for
    ``feed`` instead of iterating it."""

    def _pcap_records(self, buf):
        self.head = buf
        return iter(())


def feed(path, decoder, packet, progress) -> str | None:
    """Decode every record of ``path`` and hand each packet to ``packet``, as
    ``replay._feed`` with ``decoder.decode``; the capture's damage or None."""
    reader = None
    try:
        reader = _Reader(path)
        if reader.format != "pcap":
            from seamscan.replay import decode_records

            decode_records(reader, decoder.decode, packet, progress)
            return None
        _pcap(reader, reader.head, decoder, packet, progress)
    except CaptureError as err:
        return str(err)
    finally:
        if reader is not None:
            if progress is not None:
                progress(reader.position())
            reader.close()
    return None


def _pcap(reader, buf, decoder, packet, progress) -> None:
    """The records of a classic pcap file whose buffer ``buf`` starts with
    its header: ``CaptureReader._pcap_records`` with the complete records
    of each buffer framed (and mostly decoded) in C."""
    linktype, units, limit, unpack = pcap_header(buf)
    big = int(_PCAP_MAGICS[buf[:4]][0] == ">")
    ethernet = int(linktype == 1)
    decode = decoder.decode
    counts = decoder._counts
    out = bytearray(_REC_CAP * _REC.size)
    c_out = ffi.from_buffer("uint8_t[]", out)
    view = memoryview(out)
    end_pos = ffi.new("size_t *")
    nfast = ffi.new("size_t *")
    records = lib.sf_pcap_records
    iter_unpack = _REC.iter_unpack
    base = 0  # stream offset of buf[0]
    pos = 24
    frame = 0
    while True:
        n = records(ffi.from_buffer(buf), len(buf), pos, big, units, limit, ethernet, c_out,
                    _REC_CAP, end_pos, nfast)
        if n:
            fast = nfast[0]
            counts["frames"] += fast
            counts["decoded"] += fast
            for (kind, proto, flags, alen, sport, dport, seq, ack, so, ps, pe, sec, frac, exact,
                 ts) in iter_unpack(view[:n * _REC.size]):
                frame += 1
                if not exact:
                    ts = (sec * units + frac) / units
                if kind:
                    pkt = decode(frame, ts, linktype, buf[ps:pe])
                    if pkt is not None:
                        packet(pkt)
                else:
                    da = so + alen
                    packet(_new(Packet, (proto, buf[so:da], buf[da:da + alen], sport, dport, seq,
                                         ack, flags, buf[ps:pe], frame, ts)))
            pos = end_pos[0]
            if progress is not None:
                progress(reader.position())
            if n == _REC_CAP:
                continue
        # The next record is not wholly in the buffer, or is too long: the
        # reader's own step, for this one record.
        step = reader._pcap_record(buf, pos, base, frame, unpack, limit)
        if step is None:
            return
        buf, pos, base, sec, frac, data = step
        frame += 1
        pkt = decode(frame, (sec * units + frac) / units, linktype, data)
        if pkt is not None:
            packet(pkt)
