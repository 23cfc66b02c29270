"""The table image: the one byte layout scanned on the host and on devices.

``csrc/FORMAT.md`` is the contract; this module writes images and reads
their header and names.  Validation of everything the scanner relies on is
done by the C loader (``ss_load``), the same code a device runs; the rest of
the format's rules are checked on the host by ``seamscan.wellformed``.
"""

from __future__ import annotations

import struct
import zlib
from dataclasses import dataclass

MAGIC = b"SEAM"
FORMAT_VERSION = 2  # written for sets with multi-part signatures; others are written as 1
LITERAL_VERSION = 1
HEADER_SIZE = 64
SECTION_ENTRY = 12
ALIGN = 8
NO_WINDOW_END = 0xFFFFFFFF

LAYOUT_DENSE = 1
LAYOUT_COMPACT = 2
LAYOUTS = {"dense": LAYOUT_DENSE, "compact": LAYOUT_COMPACT}
LAYOUT_NAMES = {v: k for k, v in LAYOUTS.items()}

SEC_CLASSES = 1
SEC_DENSE = 2
SEC_OUT_INDEX = 3
SEC_OUT_LIST = 4
SEC_SIGS = 5
SEC_PORTS = 6
SEC_NAMES = 7
SEC_PARTS = 17
SECTION_NAMES = {SEC_CLASSES: "classes", SEC_DENSE: "transitions", SEC_OUT_INDEX: "output index",
                 SEC_OUT_LIST: "output list", SEC_SIGS: "signature records", SEC_PORTS: "ports",
                 SEC_NAMES: "names", SEC_PARTS: "part records"}

SIDES = {"either": 0, "client": 1, "server": 2}
TRANSPORTS = {"any": 0, "tcp": 1, "udp": 2}
SIG_HAS_WINDOW = 0x01
SIG_DATAGRAM = 0x02  # UDP matches are confined to one datagram
SIG_RECORD = struct.Struct("<BBBxHHIII")  # side, transport, flags, len, nports, ports_first, w0, w1

HEADER = struct.Struct("<4sHHII" "III" "I" "HHBBH" "II" "II8x")
# sig, index, count, length, ring capacity, spacing MIN, MAX, link offset
PART_RECORD = struct.Struct("<IHHHHIII")
assert PART_RECORD.size == 24
assert HEADER.size == HEADER_SIZE


class TableError(ValueError):
    """A table image is damaged or not a table image."""


@dataclass(frozen=True, slots=True)
class Header:
    version: int
    layout: int
    size: int
    crc: int
    flags: int
    states: int
    first_match: int
    sigs: int
    nclasses: int
    stride: int
    trans_width: int
    out_width: int
    nsections: int
    max_outputs: int
    max_len: int
    sections: dict[int, tuple[int, int]]  # kind -> (offset, size) of its first directory entry
    nparts: int = 0  # version 2: part records (the automaton's outputs); 0: outputs are signatures
    track_bytes: int = 0  # version 2: part tracker bytes per flow side

    @property
    def layout_name(self) -> str:
        return LAYOUT_NAMES.get(self.layout, f"unknown ({self.layout})")


def crc32(data) -> int:
    """CRC-32, IEEE 802.3 polynomial (reflected 0xEDB88320), as zlib computes it."""
    return zlib.crc32(data) & 0xFFFFFFFF


def _width(max_value: int) -> int:
    return 1 if max_value < 1 << 8 else 2 if max_value < 1 << 16 else 4


_DTYPES = {1: "<u1", 2: "<u2", 4: "<u4"}


def encode_dense(automaton, signatures) -> bytes:
    """Lay out a compiled automaton and its signature records as a dense image."""
    import numpy as np

    a = automaton
    nstates = a.states
    width = _width(nstates - 1)
    trans = np.ascontiguousarray(a.trans, dtype=_DTYPES[width]).tobytes()
    out_width = 2 if output_count(signatures) <= 1 << 16 else 4
    index = [0]
    flat: list[int] = []
    for outs in a.outputs:
        flat.extend(outs)
        index.append(len(flat))
    out_index = np.asarray(index, dtype="<u4").tobytes()
    out_list = np.asarray(flat, dtype=_DTYPES[out_width]).tobytes()
    sig_records, ports = _signature_records(signatures)
    names = _names(signatures)
    max_outputs = max((len(o) for o in a.outputs), default=0)
    sections = [
        (SEC_CLASSES, bytes(a.classes)),
        (SEC_DENSE, trans),
        (SEC_OUT_INDEX, out_index),
        (SEC_OUT_LIST, out_list),
        (SEC_SIGS, sig_records),
        (SEC_PORTS, ports),
        (SEC_NAMES, names),
    ]
    return _assemble(LAYOUT_DENSE, sections, signatures=signatures, states=nstates,
                     first_match=a.first_match,
                     sigs=len(signatures), nclasses=a.nclasses, stride=a.nclasses,
                     trans_width=width, out_width=out_width, max_outputs=max_outputs,
                     max_len=a.max_len)


def _signature_records(signatures) -> tuple[bytes, bytes]:
    import numpy as np

    records = bytearray()
    ports: list[int] = []
    for sig in signatures:
        flags = 0
        w0, w1 = 0, NO_WINDOW_END
        if sig.window is not None:
            flags |= SIG_HAS_WINDOW
            w0, w1 = sig.window
        if sig.scope == "datagram":
            flags |= SIG_DATAGRAM
        sig_ports = sig.ports or ()
        records += SIG_RECORD.pack(SIDES[sig.side], TRANSPORTS[sig.transport], flags,
                                   min(len(sig), 0xFFFF),
                                   len(sig_ports), len(ports), w0, w1)
        ports.extend(sig_ports)
    return bytes(records), np.asarray(ports, dtype="<u2").tobytes()


def has_parts(signatures) -> bool:
    """A set with a multi-part signature: its image is version 2, with part records."""
    return any(len(sig.pattern_parts()) > 1 for sig in signatures)


def patterns(signatures):
    """The automaton's patterns (each a byte-set sequence), in output-id order:
    one per signature, or one per part (signature order, then part order)
    when the set has multi-part signatures."""
    if not has_parts(signatures):
        return [sig.byte_sets() for sig in signatures]
    return [part.sets for sig in signatures for part in sig.pattern_parts()]


def output_count(signatures) -> int:
    return len(patterns(signatures)) if has_parts(signatures) else len(signatures)


def part_records(signatures) -> tuple[bytes, int, int]:
    """(part records, their count, tracker bytes per flow side): FORMAT.md
    section 17; each link's ring capacity from ``seamscan.tracker``."""
    from seamscan import tracker

    out = bytearray()
    slot = 0
    count = 0
    for index, sig in enumerate(signatures):
        parts = sig.pattern_parts()
        caps = tracker.signature_links(parts)
        for k, (part, cap) in enumerate(zip(parts, caps, strict=True)):
            high = tracker.ANY if part.high is None else part.high
            out += PART_RECORD.pack(index, k, len(parts), len(part), cap, part.low,
                                    high if k else 0, slot if cap else 0)
            count += 1
            if cap:
                slot += tracker.link_bytes(cap)
    return bytes(out), count, slot


def _names(signatures) -> bytes:
    out = bytearray()
    for sig in signatures:
        for text in (sig.id, sig.label):
            raw = text.encode("utf-8")[:0xFFFF]
            out += struct.pack("<H", len(raw)) + raw
    return bytes(out)


def _assemble(layout: int, sections, signatures=(), **fields) -> bytes:
    nparts = track = 0
    version = LITERAL_VERSION
    if has_parts(signatures):
        records, nparts, track = part_records(signatures)
        sections = [*sections, (SEC_PARTS, records)]
        version = FORMAT_VERSION
    directory = bytearray()
    body = bytearray()
    offset = HEADER_SIZE + SECTION_ENTRY * len(sections)
    pad = -offset % ALIGN
    offset += pad
    body += b"\0" * pad
    for kind, data in sections:
        directory += struct.pack("<HHII", kind, 0, offset, len(data))
        body += data
        pad = -len(data) % ALIGN
        body += b"\0" * pad
        offset += len(data) + pad
    size = offset
    rest = bytes(directory) + bytes(body)
    head_tail = HEADER.pack(MAGIC, version, layout, size, 0, 0, fields["states"],
                            fields["first_match"], fields["sigs"], fields["nclasses"],
                            fields["stride"], fields["trans_width"], fields["out_width"],
                            len(sections), fields["max_outputs"], fields["max_len"], nparts,
                            track)
    crc = crc32(head_tail[16:] + rest)
    header = head_tail[:12] + struct.pack("<I", crc) + head_tail[16:]
    return header + rest


def read_header(image) -> Header:
    """Parse the header and section directory (no deep validation: ``ss_load`` and
    ``wellformed`` do that)."""
    image = memoryview(image)
    if len(image) < HEADER_SIZE:
        raise TableError(f"not a table image: {len(image)} bytes, shorter than the {HEADER_SIZE}-byte header")
    (magic, version, layout, size, crc, flags, states, first_match, sigs, nclasses, stride,
     trans_width, out_width, nsections, max_outputs, max_len, nparts,
     track_bytes) = HEADER.unpack_from(image)
    if version != FORMAT_VERSION:  # version 1: those bytes are reserved
        nparts = track_bytes = 0
    if magic != MAGIC:
        raise TableError(f"not a table image: starts with {bytes(magic)!r}, expected {MAGIC!r}")
    sections: dict[int, tuple[int, int]] = {}
    end = HEADER_SIZE + SECTION_ENTRY * nsections
    if end <= len(image):
        for i in range(nsections):
            kind, _flags, off, sz = struct.unpack_from("<HHII", image, HEADER_SIZE + SECTION_ENTRY * i)
            sections.setdefault(kind, (off, sz))  # the first entry of a kind counts, as in ss_load
    return Header(version, layout, size, crc, flags, states, first_match, sigs, nclasses, stride,
                  trans_width, out_width, nsections, max_outputs, max_len, sections, nparts,
                  track_bytes)


def read_names(image, header: Header) -> tuple[list[str], list[str]]:
    """Signature ids and labels from the names section (the loader has checked its bounds).

    The section is optional (``FORMAT.md``): without it, signature ``i`` is
    named ``#i`` (1-based) and has no label, as a signature with an empty id."""
    ids: list[str] = []
    labels: list[str] = []
    if SEC_NAMES not in header.sections:
        return [f"#{i + 1}" for i in range(header.sigs)], [""] * header.sigs
    off, size = header.sections[SEC_NAMES]
    view = memoryview(image)[off:off + size]
    pos = 0
    for i in range(header.sigs):
        pair = []
        for _ in range(2):
            if pos + 2 > len(view):
                raise TableError(f"names section ends inside the entry of signature #{i + 1}")
            (n,) = struct.unpack_from("<H", view, pos)
            pos += 2
            if pos + n > len(view):
                raise TableError(f"names section ends inside the entry of signature #{i + 1}")
            pair.append(bytes(view[pos:pos + n]).decode("utf-8", "replace"))
            pos += n
        ids.append(pair[0] or f"#{i + 1}")
        labels.append(pair[1])
    return ids, labels


def signature_lengths(image, header: Header) -> list[int]:
    off, _size = header.sections[SEC_SIGS]
    return [SIG_RECORD.unpack_from(image, off + SIG_RECORD.size * i)[3] for i in range(header.sigs)]
