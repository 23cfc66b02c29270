"""The host engine: a table image scanned by the C runtime through cffi.

The bytes a :class:`Table` scans with are exactly the image exported to a
device (``Table.to_bytes()``), and the code that scans them is the same C
(``csrc/``), so host results are device results.
"""

from __future__ import annotations

import re
import struct
from typing import NamedTuple

from seamscan import compact, compiler, image, wellformed
from seamscan._seamcore import ffi, lib
from seamscan.image import TableError

SIDE_CODES = {None: 0, "client": 1, "server": 2}
TRANSPORT_CODES = {None: 0, "tcp": 1, "udp": 2}
CTX_HAS_PORT = 0x01
CTX_DATAGRAM = 0x02
ITEM_RESET = 0x01
ITEM = struct.Struct("<IIBBHIIIQQ")  # ss_item: slot flags ctx(side transport port flags) len done data_off reset_offset
MATCH = struct.Struct("<IIQQ")  # ss_match: item sig start end
_BUFFER_MATCHES = 65536


class Match(NamedTuple):
    """One occurrence: signature id, stream offsets [start, end)."""

    sig: str
    start: int
    end: int


_SIZE = re.compile(r"^\s*(\d+)\s*([KMG]i?B|B)?\s*$", re.I)
_UNITS = {None: 1, "b": 1, "kib": 1024, "mib": 1024**2, "gib": 1024**3, "kb": 1000, "mb": 1000**2,
          "gb": 1000**3}


def parse_size(value) -> int:
    """A byte count: an int, or text such as ``"32KiB"``, ``"2 MiB"``, ``"4096"``."""
    if isinstance(value, int):
        return value
    m = _SIZE.match(str(value))
    if not m:
        raise ValueError(f"not a size: {value!r} (write e.g. 32768, 32KiB, 2MiB)")
    return int(m.group(1)) * _UNITS[m.group(2).lower() if m.group(2) else None]


ENCODERS = {"dense": image.encode_dense, "compact": compact.encode_compact}
AUTO_ORDER = ("dense", "compact")  # fastest first


def compile(sigset, layout: str = "dense", budget=None, *,
            max_states: int = compiler.DEFAULT_MAX_STATES) -> Table:
    """Compile a :class:`~seamscan.signatures.SignatureSet` into a table.

    ``layout``: ``"dense"`` (one lookup per byte), ``"compact"`` (own
    transitions and failure links: a few bytes per state, at most two steps
    per byte amortised) or ``"auto"`` (the fastest that fits ``budget``).
    ``budget`` (bytes, or text like ``"32KiB"``) is the most the image may
    take; when no candidate fits, :class:`~seamscan.compiler.CompileError`
    says what each takes and which signatures cost the most states.
    """
    if layout not in (*ENCODERS, "auto"):
        raise compiler.CompileError(
            f"layout {layout!r} is not available; choose one of: {', '.join(ENCODERS)}, auto")
    sigs = list(sigset)
    automaton = build_automaton(sigs, max_states=max_states)
    limit = None if budget is None else parse_size(budget)
    sizes = {}
    for name in AUTO_ORDER if layout == "auto" else (layout,):
        blob = ENCODERS[name](automaton, sigs)
        sizes[name] = len(blob)
        if limit is None or len(blob) <= limit:
            table = Table.from_bytes(blob)
            table.signatures = sigset
            table.automaton = automaton
            return table
    raise BudgetError(limit, sizes, automaton, sigs)


def build_automaton(sigs, *, max_states: int = compiler.DEFAULT_MAX_STATES):
    """The automaton of a list of signatures: one pattern per signature, or
    per part when the set has multi-part signatures (``image.patterns``);
    ``unique_nodes`` is summed back per signature."""
    pats = image.patterns(sigs)
    if len(pats) == len(sigs):
        return compiler.build(pats, max_states=max_states, names=[s.id for s in sigs])
    owners = [i for i, s in enumerate(sigs) for _ in s.pattern_parts()]
    names = [f"{s.id} part {k + 1}" if len(s.pattern_parts()) > 1 else s.id
             for s in sigs for k in range(len(s.pattern_parts()))]
    automaton = compiler.build(pats, max_states=max_states, names=names)
    per_sig = [0] * len(sigs)
    for owner, n in zip(owners, automaton.unique_nodes, strict=True):
        per_sig[owner] += n
    automaton.unique_nodes = per_sig
    return automaton


def compile_layouts(sigset, *, max_states: int = compiler.DEFAULT_MAX_STATES):
    """One automaton, every layout: (automaton, {layout: Table})."""
    sigs = list(sigset)
    automaton = build_automaton(sigs, max_states=max_states)
    tables = {}
    for name, encode in ENCODERS.items():
        table = Table.from_bytes(encode(automaton, sigs))
        table.signatures = sigset
        table.automaton = automaton
        tables[name] = table
    return automaton, tables


def sample_traffic(nbytes: int = 4_000_000, seed: int = 7) -> bytes:
    """Packet-like bytes for a quick speed figure: text requests and binary records."""
    import random

    rnd = random.Random(seed)
    out = bytearray()
    while len(out) < nbytes:
        if rnd.random() < 0.5:
            out += (b"GET /zone/%d/state HTTP/1.1\r\nhost: ctl-%d.lab\r\naccept: */*\r\n\r\n"
                    % (rnd.randrange(100), rnd.randrange(50)))
        else:
            out += rnd.randbytes(rnd.randrange(60, 1400))
    return bytes(out[:nbytes])


def measure_speed(table: Table, data: bytes, rounds: int = 3) -> float:
    """MB/s of one stream through ``table`` (best of ``rounds``)."""
    import time

    best = float("inf")
    for _ in range(rounds):
        t0 = time.perf_counter()
        table.scan(data)
        best = min(best, time.perf_counter() - t0)
    return len(data) / best / 1e6


class BudgetError(compiler.CompileError):
    """No layout fits the budget; carries the sizes and the costliest signatures."""

    def __init__(self, limit, sizes, automaton, sigs):
        self.limit = limit
        self.sizes = sizes
        self.costliest = costliest_signatures(automaton, sigs, sizes)
        tried = ", ".join(f"{name} takes {size:,} bytes" for name, size in sizes.items())
        worst = "; ".join(f"{sid} ({states} states, about {saved:,} bytes)"
                          for sid, states, saved in self.costliest[:5])
        super().__init__(f"no layout fits the budget of {limit:,} bytes: {tried}. The signatures "
                         f"costing the most states, and what dropping each would save: {worst}")


def costliest_signatures(automaton, sigs, sizes) -> list[tuple[str, int, int]]:
    """(id, states only it needs, bytes dropping it would save in the smallest layout)."""
    per_state = min(sizes.values()) / max(1, automaton.states)
    ranked = sorted(zip(automaton.unique_nodes, range(len(sigs)), strict=True),
                    key=lambda p: (-p[0], p[1]))
    return [(sigs[i].id, n, round(n * per_state)) for n, i in ranked]


class Table:
    """A loaded, validated table image: accepted by ``ss_load`` (the device
    loader: safe to scan) and, unless ``well_formed=False``, by the host's
    well-formedness rules (``seamscan.wellformed``: an image the compiler
    writes)."""

    def __init__(self, blob: bytes, *, well_formed: bool = True):
        self._blob = bytes(blob)
        self._buf = ffi.from_buffer(self._blob)
        self._t = ffi.new("ss_table *")
        rc = lib.ss_load(self._t, self._buf, len(self._blob))
        if rc != 0:
            raise TableError(f"table image refused: {ffi.string(lib.ss_strerror(rc)).decode()}"
                             f" (code {rc})")
        if well_formed:
            wellformed.check(self._blob)
        self.header = image.read_header(self._blob)
        try:
            self.ids, self.labels = image.read_names(self._blob, self.header)
        except TableError:
            if well_formed:
                raise
            self.ids = [f"#{i + 1}" for i in range(self.header.sigs)]
            self.labels = [""] * self.header.sigs
        self.lengths = image.signature_lengths(self._blob, self.header)
        self.signatures = None  # the SignatureSet, when compiled here
        self.automaton = None  # the compiler's automaton, when compiled here
        self._cap = max(_BUFFER_MATCHES, 8 * self._t.max_outputs)

    @classmethod
    def from_bytes(cls, blob, *, well_formed: bool = True) -> Table:
        """Load an image; a damaged or ill-formed one raises
        :class:`~seamscan.image.TableError`.  ``well_formed=False`` skips the
        host's rules (to scan an image exactly as a device would take it)."""
        return cls(blob, well_formed=well_formed)

    def to_bytes(self) -> bytes:
        return self._blob

    @property
    def nbytes(self) -> int:
        return len(self._blob)

    @property
    def states(self) -> int:
        return int(self._t.states)

    @property
    def classes(self) -> int:
        return int(self._t.nclasses)

    @property
    def layout(self) -> str:
        return self.header.layout_name

    @property
    def max_outputs(self) -> int:
        return int(self._t.max_outputs)

    @property
    def track_bytes(self) -> int:
        """Part tracker bytes a flow side needs beside its 16-byte state (0: none)."""
        return int(lib.ss_track_bytes(self._t))

    def __len__(self) -> int:
        return int(self._t.nsigs)

    def __repr__(self) -> str:
        return (f"<Table {self.layout}: {len(self)} signatures, {self.states} states, "
                f"{self.classes} classes, {self.nbytes:,} bytes>")

    def scan(self, data, *, side=None, transport=None, server_port=None) -> list[Match]:
        """Every occurrence in ``data`` (offsets from its start), ordered by end
        offset then signature order.  ``side``/``transport``/``server_port``
        filter signatures as a flow would; ``None`` filters nothing."""
        return self.stream(side=side, transport=transport, server_port=server_port).feed(data)

    def stream(self, *, side=None, transport=None, server_port=None, datagram=False) -> Stream:
        return Stream(self, side=side, transport=transport, server_port=server_port,
                      datagram=datagram)

    def scan_batch(self, payloads) -> list[list[Match]]:
        """Scan many independent buffers in one call (each from its own start)."""
        scanner = BatchScanner(self, len(payloads))
        found = scanner.scan([(i, ITEM_RESET, 0, 0, p, 0) for i, p in enumerate(payloads)])
        result: list[list[Match]] = [[] for _ in payloads]
        ids = self.ids
        for item, sig, start, end in found:
            result[item].append(Match(ids[sig], start, end))
        return result

    def _matches(self, out, n) -> list[Match]:
        ids = self.ids
        return [Match(ids[sig], start, end)
                for _item, sig, start, end in MATCH.iter_unpack(ffi.buffer(out, n * MATCH.size))]


def context(side=None, transport=None, server_port=None, datagram=False) -> tuple[int, int, int, int]:
    """(side, transport, port, flags) codes of an ``ss_ctx``."""
    flags = (CTX_HAS_PORT if server_port is not None else 0) | (CTX_DATAGRAM if datagram else 0)
    return (SIDE_CODES[side], TRANSPORT_CODES[transport], server_port or 0, flags)


class Stream:
    """One byte stream (one flow side): state carried between ``feed`` calls."""

    def __init__(self, table: Table, *, side=None, transport=None, server_port=None,
                 datagram=False):
        self.table = table
        self._st = ffi.new("ss_state *")
        self._track = ffi.new("uint64_t[]", max(1, table.track_bytes // 8))
        self._ctx = ffi.new("ss_ctx *", context(side, transport, server_port, datagram))
        self._out = ffi.new("ss_match[]", table._cap)
        self._datagram = datagram
        self.reset(0)

    @property
    def offset(self) -> int:
        """Stream offset of the next byte."""
        return int(self._st.offset)

    def reset(self, offset: int = 0) -> None:
        """Back to the start state (as after a gap), next byte at ``offset``."""
        lib.ss_reset(self._st, offset)
        lib.ss_track_reset(self.table._t, self._track)

    def feed(self, data) -> list[Match]:
        """Scan the next bytes; with ``datagram=True`` each call is one datagram."""
        if self._datagram:
            lib.ss_new_datagram(self._st)
        buf = ffi.from_buffer(data)
        total = len(buf)
        done = 0
        found: list[Match] = []
        nout = ffi.new("size_t *")
        t = self.table
        while True:
            done += lib.ss_scan_parts(t._t, self._st, self._track, self._ctx, buf + done,
                                      total - done, self._out, t._cap, nout)
            if nout[0]:
                found += t._matches(self._out, nout[0])
            if done >= total:
                return found


class BatchScanner:
    """Many flow sides (slots), scanned a batch of payloads per C call."""

    def __init__(self, table: Table, slots: int):
        self.table = table
        self.slots = slots
        self.states = ffi.new("ss_state[]", max(1, slots))
        self._track_bytes = table.track_bytes
        self.track = ffi.new("uint64_t[]", max(1, slots * self._track_bytes // 8))
        self._track_arg = self.track if self._track_bytes else ffi.NULL
        self._out = ffi.new("ss_match[]", table._cap)
        self._nout = ffi.new("size_t *")
        self._items = bytearray()
        self._items_c = None

    def reset(self, slot: int, offset: int = 0) -> None:
        lib.ss_reset(self.states + slot, offset)
        if self._track_bytes:
            lib.ss_track_reset(self.table._t, self.track + slot * (self._track_bytes // 8))

    def offset(self, slot: int) -> int:
        return int(self.states[slot].offset)

    def scan(self, items) -> list[tuple[int, int, int, int]]:
        """``items``: (slot, flags, ctx, ctx_flags_extra, payload, reset_offset) where
        ctx is a tuple from :func:`context` or 0 for none.  Returns (item, sig, start, end)."""
        packed = bytearray(ITEM.size * len(items))
        chunks = []
        off = 0
        pack = ITEM.pack_into
        for i, (slot, flags, ctx, _extra, payload, reset_offset) in enumerate(items):
            side, transport, port, cflags = ctx or (0, 0, 0, 0)
            n = len(payload)
            pack(packed, i * ITEM.size, slot, flags, side, transport, port, cflags, n, 0, off,
                 reset_offset)
            chunks.append(payload)
            off += n
        return self.scan_packed(packed, len(items), b"".join(chunks))

    def scan_packed(self, packed: bytearray, n: int, data: bytes) -> list[tuple[int, int, int, int]]:
        """The same with items already packed as ``ss_item`` records over ``data``."""
        return self.scan_items(ffi.from_buffer("ss_item[]", packed), n,
                               ffi.from_buffer(data or b"\0"))

    def scan_items(self, items, n: int, buf) -> list[tuple[int, int, int, int]]:
        """The same with the ``ss_item`` records and the data in C memory
        (cdata pointers or arrays): ``n`` items over ``buf``."""
        items = ffi.cast("ss_item *", items)
        t = self.table
        found: list[tuple[int, int, int, int]] = []
        start = 0
        while True:
            done = lib.ss_scan_batch_parts(t._t, self.states, self._track_arg, items + start,
                                           n - start, buf, self._out, t._cap, self._nout)
            k = self._nout[0]
            if k:
                got = MATCH.iter_unpack(ffi.buffer(self._out, k * MATCH.size))
                if start:  # item indices count from the resumed position
                    got = [(item + start, sig, s, e) for item, sig, s, e in got]
                found += got
            start += done
            if start >= n:
                return found
