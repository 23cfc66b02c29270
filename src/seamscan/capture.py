"""Reading capture files: classic pcap and pcapng, plain or gzip-compressed.

``open_capture(path)`` returns a ``CaptureReader``; iterating it yields one
``(frame_no, ts, linktype, frame)`` tuple per captured frame:

- ``frame_no``: 1-based count of frames in the file;
- ``ts``: capture time in seconds, a :class:`Stamp`: a float, the exact
  rational value of the record's timestamp rounded once to the nearest
  float, whose ``ns`` attribute is the exact time in integer nanoseconds
  since the epoch (rounded down when the capture's resolution is finer
  than a nanosecond). A float near today's epoch seconds holds about 7
  decimal places, not 9: ``ns`` is what keeps a nanosecond capture's
  times exact. A classic pcap record whose fraction field is out of range
  (at least 10**6 microseconds or 10**9 nanoseconds) keeps the value
  sec + frac / units, as an :class:`InvalidStamp` (a ``Stamp``), which the
  decoder counts;
- ``linktype``: the LINKTYPE_ value of the frame's link layer;
- ``frame``: the captured bytes (at most the snapshot length; not copied
  beyond the one slice).

Formats (byte layouts per the IETF drafts draft-ietf-opsawg-pcap and
draft-ietf-opsawg-pcapng):

- classic pcap in either byte order, microsecond (magic 0xa1b2c3d4) or
  nanosecond (0xa1b23c4d) timestamps; the link type is the low 16 bits of the
  header's LinkType field (the upper bits carry FCS information);
- pcapng, any number of sections (each with its own byte order) and of
  interfaces, each interface with its own link type, ``if_tsresol`` and
  ``if_tsoffset``. Enhanced, Simple and (obsolete) Packet Blocks carry
  frames; all other blocks are checked for framing and skipped. A Simple
  Packet Block has no timestamp: it takes the previous frame's (0.0 first);
- either of the above compressed with gzip, recognised by its magic bytes
  (not by the file name) and read through ``gzip``.

Both formats are parsed here with ``struct`` over a chunked buffer, not with
dpkt's readers: dpkt 1.9.8's pcapng Reader keeps only the first Interface
Description Block (one link type and one ``if_tsresol`` for the whole file),
and its pcap Reader yields a short last record without notice and a
``Decimal`` timestamp for nanosecond files, and neither reports where in the
file it stopped. Parsing here also costs less per record than dpkt's.

Streaming: the file is read in chunks of ``CHUNK`` bytes; memory holds one
chunk plus at most one record, whatever the capture's size.

Damage: every frame before the damage is yielded first; then the iterator
raises ``CaptureError`` naming the file, the problem, the byte offset (in
the decompressed data for a gzip file) and the last good frame. No other
exception type escapes from opening or iterating.
"""

from __future__ import annotations

import gzip
import os
import struct
import zlib
from collections.abc import Iterator

CHUNK = 1 << 18
"""Bytes read from the file at a time."""

MAX_RECORD = 1 << 18
"""Largest frame accepted (262144, libpcap's maximum snapshot length (recalled
from memory)); a larger record length is taken as damage, so that a garbage
length never makes the reader allocate gigabytes. A pcap file whose header
declares a larger snapshot length raises this bound to it (up to 64 MiB)."""

MAX_BLOCK = 1 << 24
"""Largest pcapng block accepted (16 MiB); larger is taken as damage."""

_PCAP_MAGICS = {
    # first four bytes -> (byte order, timestamp fraction units per second)
    b"\xd4\xc3\xb2\xa1": ("<", 1_000_000),
    b"\xa1\xb2\xc3\xd4": (">", 1_000_000),
    b"\x4d\x3c\xb2\xa1": ("<", 1_000_000_000),
    b"\xa1\xb2\x3c\x4d": (">", 1_000_000_000),
}
_PCAPNG_SHB = b"\x0a\x0d\x0d\x0a"
_GZIP_MAGIC = b"\x1f\x8b"
_BOM_LE = b"\x4d\x3c\x2b\x1a"
_BOM_BE = b"\x1a\x2b\x3c\x4d"

# pcapng block types and options used here
_BT_IDB, _BT_PB, _BT_SPB, _BT_EPB, _BT_SHB = 1, 2, 3, 6, 0x0A0D0D0A
_OPT_END, _OPT_TSRESOL, _OPT_TSOFFSET = 0, 9, 14


class Stamp(float):
    """A capture time: seconds as a float, and ``ns``, the exact integer
    nanoseconds since the epoch."""

    __slots__ = ("ns",)


class InvalidStamp(Stamp):
    """The time of a record whose fraction-of-a-second field was out of range."""

    __slots__ = ()


def stamp(sec: int, frac: int, units: int) -> Stamp:
    """The :class:`Stamp` of ``sec`` seconds and ``frac`` units of
    1/``units`` second: ``(sec * units + frac) / units`` rounded once, and
    its nanoseconds rounded down; an :class:`InvalidStamp` when ``frac`` is
    not below ``units``."""
    whole = sec * units + frac
    t = (Stamp if frac < units else InvalidStamp)(whole / units)
    t.ns = whole * 1_000_000_000 // units
    return t


def stamp_of(seconds: float, ns: int) -> Stamp:
    """A :class:`Stamp` from its two values (as C hands them back)."""
    t = Stamp(seconds)
    t.ns = ns
    return t


class CaptureError(Exception):
    """A capture that cannot be read (further).

    ``str()`` is ``"{path}: {message} (at byte offset {offset}, after frame
    {frame})"``, each parenthesised part present only when known. ``frame``
    is the number of the last frame yielded before the damage (0: none).
    """

    def __init__(self, path, message, *, offset=None, frame=None):
        self.path = str(path)
        self.message = message
        self.offset = offset
        self.frame = frame
        where = []
        if offset is not None:
            where.append(f"at byte offset {offset}")
        if frame is not None:
            where.append(f"after frame {frame}")
        text = f"{self.path}: {message}"
        if where:
            text += f" ({', '.join(where)})"
        super().__init__(text)


def open_capture(path) -> CaptureReader:
    """Open a pcap, pcapng or gzip-compressed capture; raise ``CaptureError``
    if it cannot be opened, is empty or is not a capture."""
    return CaptureReader(path)


def pcap_header(buf: bytes):
    """(linktype, timestamp units per second, largest record, record header
    unpacker) of a classic pcap file whose first 24 bytes are ``buf[:24]``."""
    endian, units = _PCAP_MAGICS[buf[:4]]
    _, _, _, _, _, snaplen, linkfield = struct.unpack_from(endian + "IHHiIII", buf, 0)
    limit = min(max(MAX_RECORD, snaplen), 1 << 26)
    return linkfield & 0xFFFF, units, limit, struct.Struct(endian + "IIII").unpack_from


class CaptureReader:
    """One pass over a capture file's frames; see the module docstring.

    Attributes: ``path``; ``format`` ("pcap" or "pcapng"); ``size`` (bytes
    on disk, the compressed size for a gzip file); ``compressed`` (bool).
    Iterating yields ``(frame_no, ts, linktype, frame)``; the reader is its
    own iterator, so a second loop continues where the first stopped.
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        self._raw = None
        self._stream = None
        self._got = 0  # bytes delivered by the (decompressed) stream so far
        try:
            self._raw = open(self.path, "rb", buffering=0)
            self.size = os.fstat(self._raw.fileno()).st_size
            magic = self._raw.read(4)
            self._raw.seek(0)
        except OSError as e:
            self.close()
            raise CaptureError(self.path, f"cannot open: {e.strerror or e}") from None
        if not magic:
            self.close()
            raise CaptureError(self.path, "empty file")
        self.compressed = magic[:2] == _GZIP_MAGIC
        if self.compressed:
            gz = gzip.GzipFile(fileobj=self._raw, mode="rb")
            self._read = gz.read1
            self._stream = gz
        else:
            self._read = self._raw.read
        try:
            head = self._fill(b"", 24)
        except CaptureError:
            self.close()
            raise
        if not head:
            self.close()
            raise CaptureError(self.path, "empty file" + (" (after decompression)"
                                                          if self.compressed else ""))
        if head[:4] in _PCAP_MAGICS:
            self.format = "pcap"
            if len(head) < 24:
                self.close()
                raise CaptureError(self.path, "truncated pcap file header: "
                                   f"{len(head)} of 24 bytes", offset=0)
            self._iter = self._pcap_records(head)
        elif head[:4] == _PCAPNG_SHB:
            self.format = "pcapng"
            self._iter = self._pcapng_records(head)
        else:
            self.close()
            raise CaptureError(self.path, "not a pcap or pcapng capture: starts with 0x"
                               + head[:4].hex(), offset=0)

    # -- file access -----------------------------------------------------

    def _fill(self, buf: bytes, need: int, frame=None) -> bytes:
        """Return ``buf`` extended from the file to at least ``need`` bytes,
        or shorter only at end of file; read errors become CaptureError."""
        parts = [buf]
        have = len(buf)
        read = self._read
        while have < need:
            try:
                more = read(max(CHUNK, need - have))
            except (OSError, EOFError, ValueError, zlib.error) as e:
                what = "compressed data is damaged" if self.compressed else "read failed"
                raise CaptureError(self.path, f"{what}: {e}", offset=self._got,
                                   frame=frame) from None
            if not more:
                break
            self._got += len(more)
            parts.append(more)
            have += len(more)
        return b"".join(parts) if len(parts) > 1 else buf

    def position(self) -> int:
        """Bytes of the file on disk read so far (compressed bytes for a gzip
        file); advances a chunk at a time, for a progress display."""
        try:
            return self._raw.tell() if self._raw is not None else self.size
        except (OSError, ValueError):
            return self.size

    def __iter__(self) -> Iterator[tuple[int, float, int, bytes]]:
        return self._iter

    def close(self) -> None:
        """Release the file; safe to call twice."""
        for f in (self._stream, self._raw):
            if f is not None:
                try:
                    f.close()
                except (OSError, EOFError, zlib.error):
                    pass
        self._stream = self._raw = None

    def __enter__(self) -> CaptureReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _error(self, message, offset, frame):
        return CaptureError(self.path, message, offset=offset, frame=frame)

    # -- classic pcap ----------------------------------------------------

    def _pcap_records(self, buf: bytes) -> Iterator[tuple[int, float, int, bytes]]:
        """Records of a classic pcap file; ``buf`` holds its 24-byte header
        and possibly more."""
        linktype, units, limit, unpack = pcap_header(buf)
        scale = 1_000_000_000 // units  # classic pcap: units is 10**6 or 10**9
        base = 0  # stream offset of buf[0]
        pos = 24
        frame = 0
        while True:
            step = self._pcap_record(buf, pos, base, frame, unpack, limit)
            if step is None:
                return
            buf, pos, base, sec, frac, data = step
            frame += 1
            if frac < units:  # stamp(sec, frac, units), inline: the reader's hot path
                ts = Stamp((sec * units + frac) / units)
                ts.ns = sec * 1_000_000_000 + frac * scale
            else:
                ts = stamp(sec, frac, units)
            yield frame, ts, linktype, data

    def _pcap_record(self, buf, pos, base, frame, unpack, limit):
        """One record at ``buf[pos:]`` (refilling the buffer as needed):
        (buf, position after it, base, seconds, fraction, frame bytes), or
        None at the clean end of the file; damage raises CaptureError.
        ``base`` is the file offset of ``buf[0]``; ``frame`` the records so far."""
        if len(buf) - pos < 16:
            base += pos
            buf = self._fill(buf[pos:], 16, frame)
            pos = 0
            if len(buf) < 16:
                if buf:
                    raise self._error(f"record {frame + 1} header is truncated: "
                                      f"{len(buf)} of 16 bytes", base, frame)
                return None
        sec, frac, caplen, _ = unpack(buf, pos)
        if caplen > limit:
            raise self._error(f"record {frame + 1} claims {caplen} bytes, more than "
                              f"the {limit} a frame may hold", base + pos, frame)
        end = pos + 16 + caplen
        if end > len(buf):
            base += pos
            buf = self._fill(buf[pos:], 16 + caplen, frame)
            pos = 0
            end = 16 + caplen
            if end > len(buf):
                raise self._error(f"record {frame + 1} claims {caplen} bytes but the "
                                  f"file ends after {len(buf) - 16}", base, frame)
        return buf, end, base, sec, frac, buf[pos + 16:end]

    # -- pcapng ----------------------------------------------------------

    def _pcapng_records(self, buf: bytes) -> Iterator[tuple[int, float, int, bytes]]:
        """Frames of a pcapng file, block by block; ``buf`` holds its start."""
        base = 0  # stream offset of buf[0]
        pos = 0
        frame = 0
        last_ts = stamp(0, 0, 1)
        endian = "<"
        interfaces: list[tuple[int, int, int, int]] = []  # linktype, units/s, offset, snaplen
        head = struct.Struct("<II")
        u32 = struct.Struct("<I")
        epb = struct.Struct("<IIIII")
        while True:
            if len(buf) - pos < 12:
                base += pos
                buf = self._fill(buf[pos:], 12, frame)
                pos = 0
                if len(buf) < 12:
                    if buf:
                        raise self._error(f"truncated block header: {len(buf)} bytes "
                                          "where a block needs at least 12", base, frame)
                    return
            btype, blen = head.unpack_from(buf, pos)
            if btype == _BT_SHB:  # the same in either byte order; sets the section's
                bom = buf[pos + 8:pos + 12]
                if bom not in (_BOM_LE, _BOM_BE):
                    raise self._error("section header block has no valid byte-order "
                                      f"magic (0x{bom.hex()})", base + pos, frame)
                endian = "<" if bom == _BOM_LE else ">"
                head = struct.Struct(endian + "II")
                u32 = struct.Struct(endian + "I")
                epb = struct.Struct(endian + "IIIII")
                blen = u32.unpack_from(buf, pos + 4)[0]
            where = base + pos
            if blen < 12 or blen % 4:
                raise self._error(f"block of type 0x{btype:x} has an invalid length {blen} "
                                  "(must be a multiple of 4, at least 12)", where, frame)
            if blen > MAX_BLOCK:
                raise self._error(f"block of type 0x{btype:x} claims {blen} bytes, "
                                  f"more than the {MAX_BLOCK} accepted", where, frame)
            if blen > len(buf) - pos:
                base += pos
                buf = self._fill(buf[pos:], blen, frame)
                pos = 0
                if blen > len(buf):
                    raise self._error(f"block of type 0x{btype:x} claims {blen} bytes but "
                                      f"the file ends after {len(buf)}", where, frame)
            end = pos + blen
            trailer = u32.unpack_from(buf, end - 4)[0]
            if trailer != blen:
                raise self._error(f"block of type 0x{btype:x}: trailing length {trailer} "
                                  f"differs from the leading length {blen}", where, frame)
            if btype == _BT_EPB or btype == _BT_PB:
                if blen < 32:
                    raise self._error(f"packet block of {blen} bytes is too short for its "
                                      "fields", where, frame)
                ifid, tsh, tsl, caplen, _ = epb.unpack_from(buf, pos + 8)
                if btype == _BT_PB:
                    ifid = struct.unpack_from(endian + "H", buf, pos + 8)[0]
                if ifid >= len(interfaces):
                    raise self._error(f"packet block refers to interface {ifid} but "
                                      f"{len(interfaces)} are described", where, frame)
                if 28 + caplen > blen - 4:
                    raise self._error(f"packet block claims {caplen} captured bytes but "
                                      f"holds at most {blen - 32}", where, frame)
                linktype, units, offset, _ = interfaces[ifid]
                frame += 1
                last_ts = stamp(*divmod(((tsh << 32) | tsl) + offset, units), units)
                yield frame, last_ts, linktype, buf[pos + 28:pos + 28 + caplen]
            elif btype == _BT_SPB:
                if not interfaces:
                    raise self._error("simple packet block before any interface "
                                      "description", where, frame)
                linktype, _, _, snaplen = interfaces[0]
                caplen = min(u32.unpack_from(buf, pos + 8)[0], blen - 16)
                if snaplen:
                    caplen = min(caplen, snaplen)
                frame += 1
                yield frame, last_ts, linktype, buf[pos + 12:pos + 12 + caplen]
            elif btype == _BT_SHB:
                self._check_section(buf, pos, blen, endian, where, frame)
                interfaces = []
            elif btype == _BT_IDB:
                interfaces.append(self._interface(buf, pos, blen, endian, where, frame))
            pos = end

    def _check_section(self, buf, pos, blen, endian, where, frame) -> None:
        """Reject a section header block whose version is not 1.x."""
        if blen < 28:
            raise self._error(f"section header block of {blen} bytes is too short",
                              where, frame)
        major, minor = struct.unpack_from(endian + "HH", buf, pos + 12)
        if major != 1:
            raise self._error(f"unsupported pcapng version {major}.{minor}", where, frame)

    def _interface(self, buf, pos, blen, endian, where, frame) -> tuple[int, int, int, int]:
        """Parse an Interface Description Block into (linktype, timestamp
        units per second, timestamp offset in units, snaplen)."""
        if blen < 20:
            raise self._error(f"interface description block of {blen} bytes is too short",
                              where, frame)
        linktype, _, snaplen = struct.unpack_from(endian + "HHI", buf, pos + 8)
        units, offset_s = 1_000_000, 0  # the specification's defaults
        opt, stop = pos + 16, pos + blen - 4
        while opt + 4 <= stop:
            code, length = struct.unpack_from(endian + "HH", buf, opt)
            value = opt + 4
            if value + length > stop:
                raise self._error(f"interface description block option {code} runs past "
                                  "the block", where, frame)
            if code == _OPT_END:
                break
            if code == _OPT_TSRESOL and length == 1:
                res = buf[value]
                units = (2 if res & 0x80 else 10) ** (res & 0x7F)
            elif code == _OPT_TSOFFSET and length == 8:
                offset_s = struct.unpack_from(endian + "q", buf, value)[0]
            opt = value + length + (-length % 4)
        return linktype, units, offset_s * units, snaplen
