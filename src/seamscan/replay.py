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

import math
import time
from collections import Counter
from dataclasses import dataclass, field

from seamscan import engine
from seamscan.capture import CaptureError, open_capture
from seamscan.decode import Decoder, format_ip
from seamscan.flows import CLIENT, FlowTracker

SIDE_NAMES = ("client", "server")
TRANSPORT_NAMES = {6: "tcp", 17: "udp"}
_ITEM = engine.ITEM
_ITEM_SIZE = _ITEM.size
_BATCH_ITEMS = 1024
_BATCH_BYTES = 1 << 20


@dataclass(slots=True)
class ReplayOptions:
    """Limits of the replay (the flow tracker's caps)."""

    hold_bytes: int = 65536
    hold_total: int = 64 * 2**20
    max_flows: int = 65536
    tcp_idle: float = 300.0
    udp_idle: float = 60.0


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
    """

    def __init__(self, table: engine.Table, slots: int, path: str, emit):
        self.table = table
        self.ids = table.ids
        self.scanner = engine.BatchScanner(table, slots)
        self.path = path
        self.emit = emit  # called with each record dict, in order
        self.next_offset = [-1] * slots  # where each slot's state stands; -1: reset needed
        self.ctx = {}  # flow slot -> (client ctx tuple, server ctx tuple, fields)
        self.matches = 0
        self.bytes = 0
        self._packed = bytearray(_ITEM_SIZE * _BATCH_ITEMS)
        self._chunks: list[bytes] = []
        self._meta: list[tuple] = []  # per item: (flow, side, frame, ts)
        self._events: list[tuple] = []  # (item position, record or flow to end)
        self._nbytes = 0

    # -- the tracker's sink interface ------------------------------------
    def data(self, flow, side, offset, payload, frame, ts, datagram):
        slot = 2 * flow.slot + side
        n = len(self._meta)
        c = self.ctx.get(flow.slot)
        if c is None or c[2] is not flow:
            c = self._begin(flow)
        sc, tr, port, cflags = c[side]
        if self.next_offset[slot] == offset:
            flags = 0
        else:
            flags = engine.ITEM_RESET
        self.next_offset[slot] = offset + len(payload)
        _ITEM.pack_into(self._packed, n * _ITEM_SIZE, slot, flags, sc, tr, port, cflags,
                        len(payload), 0, self._nbytes, offset)
        self._chunks.append(payload)
        self._meta.append((flow, side, frame, ts))
        self._nbytes += len(payload)
        if n + 1 >= _BATCH_ITEMS or self._nbytes >= _BATCH_BYTES:
            self.flush()

    def gap(self, flow, side, offset, length, frame, ts):
        self.next_offset[2 * flow.slot + side] = -1
        self._events.append((len(self._meta), self._range_record("gap", flow, side, offset,
                                                                 length, frame, ts)))

    def overlap(self, flow, side, offset, length, frame, ts):
        self._events.append((len(self._meta), self._range_record("overlap", flow, side, offset,
                                                                 length, frame, ts)))

    def end(self, flow):
        self._events.append((len(self._meta), flow))
        self.next_offset[2 * flow.slot] = self.next_offset[2 * flow.slot + 1] = -1

    # -- batching ----------------------------------------------------------
    def _begin(self, flow):
        port = flow.server[1]
        transport = TRANSPORT_NAMES[flow.proto]
        cflags = engine.CTX_HAS_PORT | (engine.CTX_DATAGRAM if transport == "udp" else 0)
        tcode = engine.TRANSPORT_CODES[transport]
        c = ((1, tcode, port, cflags), (2, tcode, port, cflags), flow, flow_fields(flow))
        self.ctx[flow.slot] = c
        return c

    def _range_record(self, kind, flow, side, offset, length, frame, ts):
        return {"type": kind, **self._fields(flow), "side": SIDE_NAMES[side], "start": offset,
                "end": offset + length, "file": self.path, "frame": frame, "ts": ts}

    def _fields(self, flow):
        c = self.ctx.get(flow.slot)
        if c is None or c[2] is not flow:
            c = self._begin(flow)
        return c[3]

    def flush(self):
        """Scan what is pending and emit the records, in delivery order."""
        n = len(self._meta)
        found = []
        if n:
            found = self.scanner.scan_packed(self._packed, n, b"".join(self._chunks))
            if len(found) > 1:
                found.sort(key=_item_of)
        meta, events, emit, ids, path = self._meta, self._events, self.emit, self.ids, self.path
        ei = 0
        for item, sig, start, end in found:
            while ei < len(events) and events[ei][0] <= item:
                self._event(events[ei][1])
                ei += 1
            flow, side, frame, ts = meta[item]
            flow.matches += 1
            emit({"type": "match", "sig": ids[sig], **self._fields(flow),
                  "side": SIDE_NAMES[side], "start": start, "end": end, "file": path,
                  "frame": frame, "ts": ts})
        for _pos, ev in events[ei:]:
            self._event(ev)
        self.matches += len(found)
        self.bytes += self._nbytes
        self._chunks = []
        self._meta = []
        self._events = []
        self._nbytes = 0

    def _event(self, ev):
        if isinstance(ev, dict):
            self.emit(ev)
            return
        flow = ev
        self.emit(flow_record(flow, self._fields(flow), self.path))
        if self.ctx.get(flow.slot, (None, None, None))[2] is flow:
            del self.ctx[flow.slot]


def _item_of(m):
    return m[0]


def flow_record(flow, fields, path) -> dict:
    return {"type": "flow", **fields, "file": path, "first_ts": flow.first_ts,
            "last_ts": flow.last_ts, "client_packets": flow.packets[CLIENT],
            "server_packets": flow.packets[1], "client_bytes": flow.bytes[CLIENT],
            "server_bytes": flow.bytes[1], "matches": flow.matches, "gaps": flow.gaps,
            "overlaps": flow.overlaps, "end": flow.end_reason}


def replay_file(path, table: engine.Table, options: ReplayOptions | None = None, *,
                emit=None, progress=None) -> FileResult:
    """Replay one capture.  Records go to ``emit`` as they are made (or are
    collected in the result).  A damaged capture ends the replay where the
    damage is: everything before it is flushed and reported, flows end as
    ``capture_end``, and ``result.error`` says what and where."""
    options = options or ReplayOptions()
    result = FileResult(str(path))
    out = emit if emit is not None else result.records.append
    t0 = time.perf_counter()
    sink = ScanSink(table, 2 * options.max_flows, str(path), out)
    tracker = FlowTracker(sink, hold_bytes=options.hold_bytes, hold_total=options.hold_total,
                          max_flows=options.max_flows, tcp_idle=options.tcp_idle,
                          udp_idle=options.udp_idle)
    decoder = Decoder()
    decode = decoder.decode
    packet = tracker.packet
    reader = None
    try:
        reader = open_capture(path)
        tick = 0
        for frame_no, ts, linktype, buf in reader:
            pkt = decode(frame_no, ts, linktype, buf)
            if pkt is not None:
                packet(pkt)
            if progress is not None:
                tick += 1
                if tick == 4096:
                    tick = 0
                    progress(reader.position())
    except CaptureError as err:
        result.error = str(err)
    finally:
        if reader is not None:
            if progress is not None:
                progress(reader.position())
            reader.close()
    decoder.defrag.expire(math.inf)  # unfinished datagrams count as timed out
    tracker.finish()
    sink.flush()
    result.elapsed = time.perf_counter() - t0
    c = result.counters
    c.update(decoder.counters)
    c.update(tracker.counters)
    c["bytes_scanned"] = sink.bytes
    c["matches"] = sink.matches
    c["files"] = 1
    if result.error:
        c["damaged_files"] = 1
    return result
