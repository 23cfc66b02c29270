"""Capture replay: records -> packets -> flows -> batched scans -> records.

One capture file is replayed by :func:`replay_file`: ``capture`` reads its
records, ``decode`` turns frames into TCP/UDP packets (IP fragments
reassembled), ``flows`` delivers each flow side's intended byte stream, and
:class:`ScanSink` hands those bytes to the C runtime in batches, with the
automaton state of each flow side carried in the runtime's state array
(one slot per flow side).  Records come out in the order the capture
delivered the bytes: each match when the frame that completed it arrives,
each flow when it ends.
"""

from __future__ import annotations

import gc
import math
import os
import struct
import time
from bisect import bisect_right
from collections import Counter
from dataclasses import dataclass, field
from operator import itemgetter

from seamscan import engine
from seamscan._seamcore import ffi, lib
from seamscan.capture import CaptureError, open_capture
from seamscan.decode import Decoder, format_ip
from seamscan.flows import CLIENT, FlowTracker

SIDE_NAMES = ("client", "server")
TRANSPORT_NAMES = {6: "tcp", 17: "udp"}
_ITEM = engine.ITEM
_ITEM_SIZE = _ITEM.size
_PACK = _ITEM.pack_into
_RESET = engine.ITEM_RESET
_BATCH_ITEMS = 1024
_BATCH_BYTES = 1 << 20
# Room past _BATCH_BYTES: a batch is scanned once it holds _BATCH_BYTES, so
# the last payload added (an IP datagram: 64 KiB at most) always fits.
_DATA_CAP = _BATCH_BYTES + (1 << 18)
META = struct.Struct("=QdI4xq")  # per batch item: frame, ts, slot, ts_ns (SF_META_SIZE)
_META_SIZE = META.size
_META_PACK = META.pack_into
_META_UNPACK = META.unpack_from


@dataclass(slots=True)
class ReplayOptions:
    """Limits of the replay (the flow tracker's caps)."""

    hold_bytes: int = 65536
    hold_total: int = 64 * 2**20
    max_flows: int = 65536
    tcp_idle: float = 300.0
    udp_idle: float = 60.0
    keep_bytes: int = 4096  # delivered bytes kept per side to check overlaps against


@dataclass(slots=True)
class FileResult:
    """What one capture gave: records in order, counters, and the damage if any."""

    path: str
    records: list = field(default_factory=list)
    counters: Counter = field(default_factory=Counter)
    error: str | None = None
    elapsed: float = 0.0


def flow_fields(flow) -> dict:
    (cip, cport), (sip, sport) = flow.client, flow.server
    return {"transport": TRANSPORT_NAMES[flow.proto], "client_ip": format_ip(cip),
            "client_port": cport, "server_ip": format_ip(sip), "server_port": sport}


class ScanSink:
    """The flow tracker's sink: batches delivered bytes into ``ss_scan_batch``.

    Each flow side owns slot ``2 * flow.slot + side`` of the runtime's state
    array.  A side's state is reset (with the stream offset of its next byte)
    when its flow begins, after a gap, and whenever the next bytes do not
    follow the last ones; otherwise it is carried, so signatures are found
    across packet boundaries.  UDP datagrams carry the datagram flag, so
    datagram-scoped signatures only match inside one datagram while
    stream-scoped ones span datagrams.

    The batch lives in C memory: ``c_items`` (``ss_item`` records),
    ``c_meta`` (per item the frame, timestamp and slot: ``META``) and
    ``c_data`` (the payload bytes); ``n`` and ``nbytes`` say how much of
    them is filled.
    The replay's fast lane (``seamscan.fastpath``) appends to the same
    batch from C.
    """

    def __init__(self, table: engine.Table, slots: int, path: str, emit):
        self.table = table
        self.ids = table.ids
        self.scanner = engine.BatchScanner(table, slots)
        self.path = path
        self.emit = emit  # called with each record dict, in order
        self.next_offset = [-1] * slots  # where each slot's state stands; -1: reset needed
        self.ctx = {}  # live flow -> (client side, server side, flow fields); see _begin
        self.by_slot = {}  # flow slot -> the flow that holds it (set by _begin)
        self._retired = {}  # flow slot -> [(items before its end, flow)] ended this batch
        self.matches = 0
        self.bytes = 0
        self.item_cap = _BATCH_ITEMS
        self.c_items = ffi.new("uint8_t[]", _ITEM_SIZE * _BATCH_ITEMS)
        self.c_meta = ffi.new("uint8_t[]", META.size * _BATCH_ITEMS)
        self._items = ffi.buffer(self.c_items)
        self._meta = ffi.buffer(self.c_meta)
        self._grow(_DATA_CAP)
        self.n = 0
        self.nbytes = 0
        self._events: list[tuple] = []  # (item position, record or flow to end)
        self.base = 0  # frames of the files before the one being read
        self._files: list[tuple[int, str]] = [(0, path)]  # (frame base, path) per file

    def begin_file(self, path: str, base: int) -> None:
        """The next frames (numbered from ``base`` + 1) are those of ``path``;
        nothing may be pending (``flush`` first)."""
        assert not self.n and not self._events
        if self._files[-1][0] == base:
            self._files[-1] = (base, path)
        else:
            self._files.append((base, path))
        self.path = path
        self.base = base

    def locate(self, frame: int) -> tuple[str, int]:
        """(file, frame within it) of a frame number of the replay."""
        if frame > self.base:
            return self.path, frame - self.base
        files = self._files
        i = bisect_right(files, frame - 1, key=_first) - 1
        base, path = files[max(i, 0)]
        return path, frame - base

    def close(self) -> None:
        """Drop the batch memory now."""
        self.c_items = self.c_meta = self.c_data = None
        self._items = self._meta = self._data = None
        self.scanner = None
        self.ctx.clear()
        self.by_slot.clear()

    def _grow(self, size):
        self.data_cap = size
        self.c_data = ffi.new("uint8_t[]", size)
        self._data = ffi.buffer(self.c_data)

    # -- the tracker's sink interface ------------------------------------
    def data(self, flow, side, offset, payload, frame, ts, datagram):
        c = self.ctx.get(flow)
        if c is None:
            c = self._begin(flow)
        slot, sc, tr, port, cflags, _template = c[side]
        size = len(payload)
        nbytes = self.nbytes
        if nbytes + size > self.data_cap or self.n >= _BATCH_ITEMS:  # filled by the fast lane
            self.flush()
            nbytes = 0
            if size > self.data_cap:
                self._grow(size)
        next_offset = self.next_offset
        flags = 0 if next_offset[slot] == offset else _RESET
        next_offset[slot] = offset + size
        n = self.n
        _PACK(self._items, n * _ITEM_SIZE, slot, flags, sc, tr, port, cflags, size, 0, nbytes,
              offset)
        _META_PACK(self._meta, n * _META_SIZE, frame, ts, slot, ts.ns)
        self._data[nbytes:nbytes + size] = payload
        self.n = n = n + 1
        self.nbytes = nbytes = nbytes + size
        if n >= _BATCH_ITEMS or nbytes >= _BATCH_BYTES:
            self.flush()

    def gap(self, flow, side, offset, length, frame, ts, reason):
        self.next_offset[2 * flow.slot + side] = -1
        self._events.append((self.n, self._range_record("gap", flow, side, offset, length,
                                                        frame, ts, reason)))

    def overlap(self, flow, side, offset, length, frame, ts):
        self._events.append((self.n, self._range_record("overlap", flow, side, offset, length,
                                                        frame, ts)))

    def end(self, flow):
        self._fields(flow)
        self._events.append((self.n, flow))
        self._retired.setdefault(flow.slot, []).append((self.n, flow))
        self.next_offset[2 * flow.slot] = self.next_offset[2 * flow.slot + 1] = -1

    # -- batching ----------------------------------------------------------
    def _begin(self, flow):
        """The flow's entry of ``ctx``: per side, its item's slot and context
        fields (side, transport, port, flags) and the template of its match
        records (every key in record order; a copy is filled per match), then
        the flow's record fields."""
        port = flow.server[1]
        transport = TRANSPORT_NAMES[flow.proto]
        cflags = engine.CTX_HAS_PORT | (engine.CTX_DATAGRAM if transport == "udp" else 0)
        tcode = engine.TRANSPORT_CODES[transport]
        fields = flow_fields(flow)
        slot = 2 * flow.slot
        c = tuple((slot + side, side + 1, tcode, port, cflags,
                   {"type": "match", "sig": None, **fields, "side": SIDE_NAMES[side],
                    "start": 0, "end": 0, "file": "", "frame": 0, "ts": 0.0,
                    "ts_ns": 0})
                  for side in (0, 1)) + (fields,)
        self.ctx[flow] = c
        self.by_slot[flow.slot] = flow
        return c

    def _range_record(self, kind, flow, side, offset, length, frame, ts, reason=None):
        rec = {"type": kind, **self._fields(flow), "side": SIDE_NAMES[side], "start": offset,
               "end": offset + length}
        if reason is not None:  # a gap's
            rec["reason"] = reason
        rec["file"], rec["frame"] = self.locate(frame)
        rec["ts"] = float(ts)
        rec["ts_ns"] = ts.ns
        return rec

    def _fields(self, flow):
        c = self.ctx.get(flow)
        if c is None:
            c = self._begin(flow)
        return c[2]

    def _owner(self, fslot, item):
        """The flow that held flow slot ``fslot`` when item ``item`` was added."""
        for stop, flow in self._retired.get(fslot, ()):
            if item < stop:
                return flow
        return self.by_slot[fslot]

    def flush(self):
        """Scan what is pending and emit the records, in delivery order.

        Matches are emitted as the items that carry them are scanned through
        (``ss_scan_batch`` says how many leading items are done after each
        call), so only the matches of items still in progress are held: when
        those pass ``_PENDING_CAP``, the batch goes on one item at a time,
        which completes the first unfinished item at every call.  Memory
        stays bounded however dense the matches are."""
        n = self.n
        self._ei = 0
        self._last = -1
        if n:
            scanner, table = self.scanner, self.table
            items = ffi.cast("ss_item *", self.c_items)
            out, nout, cap = scanner._out, scanner._nout, table._cap
            scan, tt, states, data = lib.ss_scan_batch_parts, table._t, scanner.states, self.c_data
            track = scanner._track_arg
            unpack = engine.MATCH.iter_unpack
            self._metab = None
            pending = []
            start = 0
            while start < n:
                window = n - start if len(pending) < _PENDING_CAP else 1
                done = scan(tt, states, track, items + start, window, data, out, cap, nout)
                k = nout[0]
                if k:
                    got = unpack(ffi.buffer(out, k * _MATCH_SIZE))
                    if start:  # item indices count from the resumed position
                        pending += [(item + start, sig, s, e) for item, sig, s, e in got]
                    else:
                        pending += got
                    self.matches += k
                start += done
                if pending and (done or start >= n):
                    if start >= n:
                        ready, pending = pending, []
                    else:
                        ready = [m for m in pending if m[0] < start]
                        pending = [m for m in pending if m[0] >= start]
                    if ready:
                        if len(ready) > 1:
                            ready.sort(key=_item_of)
                        self._emit_matches(ready)
        events = self._events
        for _pos, ev in events[self._ei:]:
            self._event(ev)
        self.bytes += self.nbytes
        self.n = 0
        self.nbytes = 0
        self._events = []
        self._retired.clear()

    def _emit_matches(self, found):
        """Emit the records of ``found`` (sorted by item), with the events due
        before each item."""
        events, emit, ids, ctx = self._events, self.emit, self.ids, self.ctx
        meta = self._metab
        if meta is None:  # bytes: quicker to unpack
            meta = self._metab = self._meta[:self.n * _META_SIZE]
        by_slot, retired = self.by_slot, self._retired
        ei = self._ei
        due = events[ei][0] if ei < len(events) else self.n  # item of the next event
        last = self._last  # the item whose flow, frame, ts and template are at hand
        base, path = self.base, self.path
        if last >= 0:
            flow, template, where, frame, ts, ts_ns = self._at
        for item, sig, start, end in found:
            while item >= due:
                self._event(events[ei][1])
                ei += 1
                due = events[ei][0] if ei < len(events) else self.n
            if item != last:
                last = item
                frame, ts, slot, ts_ns = _META_UNPACK(meta, item * _META_SIZE)
                fslot = slot >> 1
                flow = by_slot[fslot] if fslot not in retired else self._owner(fslot, item)
                template = ctx[flow][slot & 1][5]
                if frame > base:
                    where, frame = path, frame - base
                else:
                    where, frame = self.locate(frame)
            flow.matches += 1
            record = template.copy()
            record["sig"] = ids[sig]
            record["start"] = start
            record["end"] = end
            record["file"] = where
            record["frame"] = frame
            record["ts"] = ts
            record["ts_ns"] = ts_ns
            emit(record)
        self._ei = ei
        self._last = last
        if last >= 0:
            self._at = (flow, template, where, frame, ts, ts_ns)

    def _event(self, ev):
        if isinstance(ev, dict):
            self.emit(ev)
            return
        flow = ev
        self.emit(flow_record(flow, self._fields(flow), self.path))  # the file being read
        self.ctx.pop(flow, None)
        if self.by_slot.get(flow.slot) is flow:
            del self.by_slot[flow.slot]


_item_of = itemgetter(0)
_first = itemgetter(0)
_MATCH_SIZE = engine.MATCH.size
# Matches of items still being scanned, held before the batch goes on one
# item at a time (see ScanSink.flush).
_PENDING_CAP = 1 << 16


def fastpath_enabled() -> bool:
    """Whether classic pcap is framed and its common headers decoded in C
    (``seamscan.fastpath``); ``SEAMSCAN_FASTPATH=0`` selects the pure-Python
    reader and decoder, the reference the C front end is tested against."""
    return os.environ.get("SEAMSCAN_FASTPATH", "1") != "0"


def flow_record(flow, fields, path) -> dict:
    first, last = flow.first_ts, flow.last_ts
    return {"type": "flow", **fields, "file": path, "first_ts": float(first),
            "first_ts_ns": first.ns, "last_ts": float(last), "last_ts_ns": last.ns,
            "client_packets": flow.packets[CLIENT],
            "server_packets": flow.packets[1], "client_bytes": flow.bytes[CLIENT],
            "server_bytes": flow.bytes[1], "matches": flow.matches, "gaps": flow.gaps,
            "overlaps": flow.overlaps, "end": flow.end_reason}


# Counters that are a running maximum, not a sum: a file's result carries the
# peak so far, and adding results keeps the largest (``add_counters``).
PEAK_COUNTERS = frozenset({"held_bytes_peak"})


def add_counters(total: Counter, counters) -> None:
    """Add one file's counters to ``total``: sums, except ``PEAK_COUNTERS``."""
    for key, value in counters.items():
        if key in PEAK_COUNTERS:
            if value > total.get(key, 0):
                total[key] = value
        else:
            total[key] += value


class Replay:
    """One replay over one or more captures read as one continuous capture.

    Captures are read in the order given (``read``); flows, their streams,
    held segments, IP fragments and idle timers carry on from one file into
    the next, as for the files of a rotated capture ring.  Frames are
    numbered across the files inside the replay; every record names the
    file, and the frame within that file, of the record it refers to.
    ``finish`` ends the flows still live; ``close`` releases the C memory at
    once (it is also released when the object is dropped).
    """

    def __init__(self, table: engine.Table, options: ReplayOptions | None = None, emit=None):
        options = options or ReplayOptions()
        self.emit = emit
        self.sink = ScanSink(table, 2 * options.max_flows, "", emit)
        self.tracker = FlowTracker(self.sink, hold_bytes=options.hold_bytes,
                                   hold_total=options.hold_total, max_flows=options.max_flows,
                                   tcp_idle=options.tcp_idle, udp_idle=options.udp_idle,
                                   keep_bytes=options.keep_bytes)
        self.decoder = Decoder()
        self.lane = None
        self.fast = fastpath_enabled()
        if self.fast:
            from seamscan import fastpath
            try:
                self.lane = fastpath.Lane(self.tracker, self.sink)
            except MemoryError:  # no room for its flow table: without it (same records)
                self.lane = None
        self.frames = 0  # frames read so far, all files: the next file's frame base
        self._seen = Counter()  # the counters at the end of the last file
        self.files = 0
        self.finished = False

    def _counters(self) -> Counter:
        c = Counter(self.decoder.counters)
        c.update(self.tracker.counters)
        c["bytes_scanned"] = self.sink.bytes
        c["matches"] = self.sink.matches
        return c

    def _take(self, result: FileResult) -> FileResult:
        """Give ``result`` the counters since the last file (peaks: the peak so far)."""
        now = self._counters()
        seen = self._seen
        c = result.counters
        for key, value in now.items():
            c[key] = value if key in PEAK_COUNTERS else value - seen.get(key, 0)
        self._seen = now
        c["files"] = 1
        if result.error:
            c["damaged_files"] = 1
        return result

    def read(self, path, progress=None, *, last=False) -> FileResult:
        """Read one capture, continuing the flows of the files before it; with
        ``last``, also finish the replay (its records and counters go to this
        file's result).  A damaged capture is read up to the damage and
        ``result.error`` says what and where; the next capture carries on."""
        result = FileResult(str(path))
        t0 = time.perf_counter()
        sink = self.sink
        sink.flush()  # pending items belong to the files before
        sink.begin_file(str(path), self.frames)
        collecting = gc.isenabled()
        gc.disable()  # see ``replay_file``
        try:
            if self.fast:
                from seamscan import fastpath
                result.error = fastpath.feed(path, self.decoder, self.tracker.packet, progress,
                                             self.lane, self.frames)
            else:
                result.error = _feed(path, self.decoder.decode, self.tracker.packet, progress,
                                     self.frames)
            self.frames = self.decoder._counts["frames"]
            if last:
                self._finish()
            else:
                sink.flush()
        finally:
            if collecting:
                gc.enable()
        self.files += 1
        result.elapsed = time.perf_counter() - t0
        return self._take(result)

    def _finish(self):
        self.decoder.defrag.expire(math.inf)  # unfinished datagrams count as timed out
        self.tracker.finish()
        self.sink.flush()
        self.finished = True

    def finish(self) -> Counter:
        """End the flows still live (after the last file); the counters this added."""
        if self.finished:
            return Counter()
        self._finish()
        return self._take(FileResult("")).counters

    def close(self) -> None:
        """Release the replay's C memory now: the fast lane refers to the
        tracker and the tracker to the lane, so without this the pair waits
        for the cyclic garbage collector."""
        lane, self.lane = self.lane, None
        if lane is not None:
            lane.close()
        tracker = self.tracker
        tracker.reclaim = tracker.sync = None
        tracker._tcp_touch = tracker._tcp_lru.move_to_end
        tracker._udp_touch = tracker._udp_lru.move_to_end
        self.sink.close()


def replay_files(paths, table: engine.Table, options: ReplayOptions | None = None, *,
                 emit=None, progress=None):
    """Replay captures as one continuous capture (a rotated ring, say): yields
    each file's :class:`FileResult` once it has been read (the last one after
    the flows still live have ended).  ``progress(i, pos)``: file ``i`` read up
    to byte ``pos``.  Records go to ``emit`` (or into each result)."""
    paths = list(paths)
    replay = None
    try:
        for i, path in enumerate(paths):
            result = FileResult(str(path))
            out = emit if emit is not None else result.records.append
            if replay is None:
                replay = Replay(table, options, out)
            else:
                replay.sink.emit = out
            prog = None if progress is None else (lambda pos, i=i: progress(i, pos))
            got = replay.read(path, prog, last=i == len(paths) - 1)
            got.records = result.records
            yield got
    finally:
        if replay is not None:
            replay.close()


def replay_file(path, table: engine.Table, options: ReplayOptions | None = None, *,
                emit=None, progress=None) -> FileResult:
    """Replay one capture.  Records go to ``emit`` as they are made (or are
    collected in the result).  A damaged capture ends the replay where the
    damage is: everything before it is flushed and reported, flows end as
    ``capture_end``, and ``result.error`` says what and where.

    The replay makes no reference cycles (an ended flow drops its own), so
    the cyclic collector would walk every live object again and again and
    find nothing: it is paused while a capture is read, and restarted even on
    error."""
    result = FileResult(str(path))
    out = emit if emit is not None else result.records.append
    replay = Replay(table, options, out)
    try:
        got = replay.read(path, progress, last=True)
    finally:
        replay.close()
    got.records = result.records
    return got


def _feed(path, decode, packet, progress, base=0) -> str | None:
    """Decode every record of the capture and hand its packet to the tracker;
    the capture's damage if it stops early, else None.  Frames are numbered
    from ``base`` + 1."""
    return read_capture(open_capture, path, progress,
                        lambda reader: decode_records(reader, decode, packet, progress, base))


def read_capture(opener, path, progress, body) -> str | None:
    """Open ``path`` with ``opener`` and run ``body(reader)``; the capture's
    damage as a string if reading stopped there, else None.  The reader's
    final position goes to ``progress`` and the reader is closed, whatever
    happens."""
    reader = None
    try:
        reader = opener(path)
        body(reader)
    except CaptureError as err:
        return str(err)
    finally:
        if reader is not None:
            if progress is not None:
                progress(reader.position())
            reader.close()
    return None


def decode_records(reader, decode, packet, progress, base=0) -> None:
    """Every record of an open reader through ``decode`` into ``packet``
    (frame numbers from ``base`` + 1), reporting the reader's position every
    4096 records."""
    tick = 0
    for frame_no, ts, linktype, buf in reader:
        pkt = decode(base + frame_no, ts, linktype, buf)
        if pkt is not None:
            packet(pkt)
        if progress is not None:
            tick += 1
            if tick == 4096:
                tick = 0
                progress(reader.position())
