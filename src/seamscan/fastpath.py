"""The replay's C front end: classic pcap framing, fast decode and the fast lane.

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
``CaptureReader._pcap_record``, the reader's own one-record step (refill,
or the exact ``CaptureError``).  A pcapng file is read by the reader as
before.

The fast lane (``feed(..., lane=Lane(tracker, sink))``, what
``replay_file`` uses): most packets of a replay are in-order segments or
bare ACKs of flows already known, and for those the flow tracker's
decisions are foregone.  The tracker lends such flow sides to
``csrc/host/lane.c``, which takes records straight from the buffer into the
sink's scan batch as long as they are of lent sides and need no decision;
at the first record that does, it stops and Python takes that record as
above (the tracker reclaims the side first).  Records, counters and their
order are exactly those of the pure-Python path: ``tests/test_fastpath.py``
and every replay in ``tests/test_replay.py`` compare the two.  See
:class:`Lane`.

Record written by C per frame (``SF_REC_SIZE`` = 48 bytes, host byte
order, no padding): kind (0 decoded here, 1 left to the decoder), proto,
TCP flags, address length, source port, destination port, seq, ack, offset
of the source address (the destination follows it), payload start and end
(for kind 1: the frame's start and end), the header's seconds and fraction,
whether ``ts`` is exact, ``ts``.  ``ts`` equals the reader's
``(sec * units + frac) / units`` whenever the numerator is below 2**53 and
the fraction below ``units``; otherwise Python computes it (the lane stops
at such a record).  Kind 0 is never a frame cut by the snap length (its
``Packet.cut`` is 0) nor a TCP segment with FIN or RST (whose checksum the
decoder verifies), so its ``Packet.sum_ok`` is None.

Progress is reported every 4096 records or so, not every 4096 exactly.
"""

from __future__ import annotations

import struct
from operator import itemgetter

from seamscan._seamcore import ffi, lib
from seamscan.capture import _PCAP_MAGICS, CaptureReader, Stamp, pcap_header, stamp, stamp_of
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


def feed(path, decoder, packet, progress, lane=None, base=0) -> str | None:
    """Decode every record of ``path`` and hand each packet to ``packet``, as
    ``replay._feed`` with ``decoder.decode``; the capture's damage or None.
    With ``lane`` (a :class:`Lane` whose tracker's ``packet`` this is), the
    in-order packets of lent flow sides go from the buffer to the sink in C.
    Packets carry frame numbers counted from ``base`` (the frames of the
    captures read before this one in the same replay)."""
    from seamscan.replay import decode_records, read_capture

    def body(reader):
        if reader.format == "pcap":
            _pcap(reader, reader.head, decoder, packet, progress, lane, base)
        else:
            decode_records(reader, decoder.decode, packet, progress, base)

    return read_capture(_Reader, path, progress, body)


def _pcap(reader, buf, decoder, packet, progress, lane, base_frame=0) -> None:
    """The records of a classic pcap file whose buffer ``buf`` starts with
    its header: ``CaptureReader._pcap_records`` with the complete records
    of each buffer framed (and mostly decoded) in C, and with a lane, the
    lane's packets delivered in C.  ``frame`` counts this file's records (the
    reader's messages name them); packets, the lane and the sink see
    ``base_frame + frame``."""
    linktype, units, limit, unpack = pcap_header(buf)
    scale = 1_000_000_000 // units  # classic pcap: units is 10**6 or 10**9
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
    relend = lane.relend if lane is not None else None

    def take(recs, buf, frame):
        """Hand framed records to the tracker; the last frame number."""
        for (kind, proto, flags, alen, sport, dport, seq, ack, so, ps, pe, sec, frac, exact,
             ts) in recs:
            frame += 1
            if exact:  # the reader's Stamp (C's ts is its float; frac < units)
                ts = Stamp(ts)
                ts.ns = sec * 1_000_000_000 + frac * scale
            else:
                ts = stamp(sec, frac, units)
            if lane is not None:
                lane.cur = base_frame + frame
            if kind:  # a frame C does not decode: lending its flow would not help
                pkt = decode(base_frame + frame, ts, linktype, buf[ps:pe])
                if pkt is not None:
                    packet(pkt)
                continue
            da = so + alen
            side = packet(_new(Packet, (proto, buf[so:da], buf[da:da + alen], sport, dport, seq,
                                        ack, flags, buf[ps:pe], base_frame + frame, ts, 0,
                                        None)))
            if relend is not None and side is not None:
                relend(side)
        return frame

    base = 0  # stream offset of buf[0]
    pos = 24
    frame = 0
    reported = 0  # frame at the last progress report
    # Records framed per call for Python to take, after a lane stop: one;
    # after 64 stops in a row where the lane took nothing (a capture it
    # cannot help with), doubling at each such stop, back to one when it
    # takes a record.  Only speed depends on it: Python takes any record
    # correctly.  Without a lane: all there are.
    want = 1 if lane is not None else _REC_CAP
    misses = 0
    if lane is not None:
        lane.start(counts, big, units, limit, ethernet)
    while True:
        if lane is not None:
            pos, frame, rc, handled, rec = lane.run(buf, pos, base_frame + frame)
            frame -= base_frame
            if rc == _RUN_STOP and rec is not None:  # the record the lane stopped at
                frame = take(rec, buf, frame)
                pos = lane.rec_end()
                if handled:
                    misses, want = 0, 1
                else:
                    misses += 1
                    if misses >= 64:
                        want = min(2 * want, _REC_CAP)
            if progress is not None and frame - reported >= 4096:
                reported = frame
                progress(reader.position())
            if rc != _RUN_STOP or (rec is not None and want == 1):
                continue
        n = records(ffi.from_buffer(buf), len(buf), pos, big, units, limit, ethernet, c_out,
                    want, end_pos, nfast)
        if n:
            fast = nfast[0]
            counts["frames"] += fast
            counts["decoded"] += fast
            frame = take(iter_unpack(view[:n * _REC.size]), buf, frame)
            pos = end_pos[0]
            if progress is not None and frame - reported >= 4096:
                reported = frame
                progress(reader.position())
            if n == want:
                continue
        # The next record is not wholly in the buffer, or is too long: the
        # reader's own step, for this one record.
        step = reader._pcap_record(buf, pos, base, frame, unpack, limit)
        if step is None:
            return
        buf, pos, base, sec, frac, data = step
        frame += 1
        if lane is not None:
            lane.cur = base_frame + frame
        pkt = decode(base_frame + frame, stamp(sec, frac, units), linktype, data)
        if pkt is not None:
            side = packet(pkt)
            if relend is not None and side is not None:
                relend(side)


_RUN_STOP, _RUN_FULL = lib.SF_RUN_STOP, lib.SF_RUN_FULL
_live = [0]  # lanes whose C memory is not freed yet (``live_lanes``)


def _free_lane(c):
    _live[0] -= 1
    lib.sf_lane_free(c)


def live_lanes() -> int:
    """How many fast lanes hold C memory now (a replay frees its lane when it
    ends: tests check that this returns to 0 without the cyclic collector)."""
    return _live[0]


_TOUCH = struct.Struct("=I4xQdq")  # SF_TOUCH_SIZE: flow slot, frame, ts, ts_ns
# sf_side_state: next, sink_next, packets, bytes, expect, tail_len, proto,
# side_code, transport, pad, port, pad2, cflags (and padding to 8 bytes)
_STATE = struct.Struct("=QQQQIIBBBBHHI4x")
# sf_run's first fields: pos, frame, nitems, ndata, sweep_at (carried in and
# out), then fast, nrec, rec_fast, rec_end, retransmitted (out)
_RUN_IN = struct.Struct("=QQQQd")
_RUN_OUT = struct.Struct("=QQQQdQQQQQ")
assert ffi.offsetof("sf_run", "retransmitted") + 8 == _RUN_OUT.size
assert _STATE.size == ffi.sizeof("sf_side_state")
assert _TOUCH.size == lib.SF_TOUCH_SIZE and _REC.size == lib.SF_REC_SIZE
_NO_RESET = (1 << 64) - 1
_second = itemgetter(1)  # sf_side_state.sink_next: the next item resets the slot


class Lane:
    """The replay's fast lane (``csrc/host/lane.c``) for one tracker and sink.

    The tracker decides; the lane only repeats its fast path.  After each
    packet the tracker handles, ``relend`` lends that packet's flow's sides
    that qualify (TCP: ``expect`` set, i.e. started, nothing held, no FIN;
    UDP: any), each under its sender's key when the tracker's own lookup
    gives that side for the key; the tracker calls ``reclaim`` (its
    ``reclaim`` hook) before it handles a packet of a lent side, and for
    both sides before a flow ends.  ``run`` lets C handle records up to the
    next one it cannot (a new or unlent flow side, a SYN, FIN or RST, a
    segment ahead of the next byte or partly new or disagreeing with the
    delivered tail, a frame the C decode does not take, a due idle sweep,
    an inexact timestamp, a full batch).  The LRU touches of the lane and
    of the tracker are held back (``_touch``) until the tracker needs the
    idle order (its ``sync`` hook: idle sweep, eviction, finish).
    """

    def __init__(self, tracker, sink):
        from seamscan.replay import META

        assert META.size == lib.SF_META_SIZE  # the sink's per-item record, as C writes it
        self.tracker = tracker
        self.sink = sink
        self.keep = tracker.keep_bytes
        c = lib.sf_lane_new(tracker.max_flows, self.keep)
        if c == ffi.NULL:
            raise MemoryError("seamscan: cannot allocate the replay's flow table")
        self.c = ffi.gc(c, _free_lane)
        _live[0] += 1
        self.owner = [None] * tracker.max_flows  # flow slot -> its flow, once lent, till it ends
        self.pending = {}  # flow -> frame of its last packet, touched since the last sync
        self.cur = 0  # the frame of the packet the tracker is handling
        self.lent = bytearray(2 * tracker.max_flows)  # per side slot: lent?
        self.tail = ffi.new("uint8_t[]", 2 * self.keep + 1)
        self._tail = ffi.buffer(self.tail)
        self.touched = ffi.new("uint8_t[]", lib.SF_TOUCH_SIZE * tracker.max_flows)
        self._touched = ffi.buffer(self.touched)
        self._frame = ffi.new("uint64_t *")
        self._ts = ffi.new("double *")
        self._ns = ffi.new("int64_t *")
        self._r = bytearray(ffi.sizeof("sf_run"))
        self.r = ffi.from_buffer("sf_run *", self._r)
        self.rec = ffi.new("uint8_t[]", _REC.size)
        self._rec = ffi.buffer(self.rec)
        self._st = bytearray(_STATE.size)
        self.st = ffi.from_buffer("sf_side_state *", self._st)
        self._buf = self._buf_c = None
        self._keys = {}  # side slot -> (side, its key or None), for the side last seen there
        tracker.reclaim = self.reclaim

    def close(self):
        """Free the lane's C memory now and let go of the tracker and sink
        (they refer back to the lane: without this the lot waits for the
        cyclic collector).  The tracker must not call the lane afterwards."""
        if self.c is not None:
            ffi.release(self.c)
            self.c = None
        self.tracker = self.sink = self.owner = self.pending = None
        self.tail = self.touched = self._tail = self._touched = None
        self._buf = self._buf_c = None
        self.r = None

    def start(self, counts, big, units, limit, ethernet):
        """Set the capture's constants for ``run``."""
        r = self.r
        r.big, r.units, r.limit, r.ethernet = big, units, limit, ethernet
        r.rec = self.rec
        self.counts = counts
        self._data = None
        tracker = self.tracker
        tracker._tcp_touch = tracker._udp_touch = self._touch
        tracker.sync = self.sync

    def run(self, buf, pos, frame):
        """C takes the records from ``pos`` on; (pos, frame, stop reason,
        records it took, the framed record it stopped at or None)."""
        r, sink, tracker = self.r, self.sink, self.tracker
        if buf is not self._buf:
            self._buf, self._buf_c = buf, ffi.from_buffer(buf)
            r.buf = self._buf_c
            r.len = len(buf)
        if sink.c_data is not self._data:  # the sink's batch memory (new if it grew)
            self._data = sink.c_data
            r.items, r.meta, r.data = sink.c_items, sink.c_meta, sink.c_data
            r.item_cap, r.data_cap = sink.item_cap, sink.data_cap
        rbuf = self._r
        _RUN_IN.pack_into(rbuf, 0, pos, frame, sink.n, sink.nbytes, tracker._sweep_at)
        rc = lib.sf_lane_run(self.c, r)
        (pos, frame, sink.n, sink.nbytes, _, handled, nrec, rec_fast, _,
         retransmitted) = _RUN_OUT.unpack_from(rbuf, 0)
        if handled:
            counts = self.counts
            counts["frames"] += handled
            counts["decoded"] += handled
            if retransmitted:
                tracker.counters["retransmitted_bytes"] += retransmitted
        if rc == _RUN_FULL:
            sink.flush()
        rec = None
        if nrec:
            if rec_fast:
                counts = self.counts
                counts["frames"] += 1
                counts["decoded"] += 1
            rec = _REC.iter_unpack(self._rec)
        return pos, frame, rc, handled, rec

    def rec_end(self):
        """Where the record after the one ``run`` stopped at starts."""
        return self.r.rec_end

    def relend(self, side):
        """Lend the qualifying sides of ``side``'s flow, once the tracker has
        handled a packet of it."""
        flow = side.flow
        if flow.end_reason is not None:
            return
        lent = self.lent
        tcp = flow.proto == 6
        base = 2 * flow.slot
        for s in flow._sides:
            sid = base + s.side
            if lent[sid] or (tcp and s.expect == -1):
                continue
            key = self._key(flow, s, sid)
            if key is None:
                continue
            sink = self.sink
            c = sink.ctx.get(flow)
            if c is None:
                c = sink._begin(flow)
            _slot, side_code, transport, port, cflags, _t = c[s.side]
            nxt = sink.next_offset[sid]
            if tcp:
                recent = s.recent
                tail = recent[0] if len(recent) == 1 else b"".join(recent)
                expect = s.expect
            else:
                tail = b""
                expect = 0
            _STATE.pack_into(self._st, 0, s.next, nxt if nxt >= 0 else _NO_RESET, 0, 0, expect,
                             len(tail), flow.proto, side_code, transport, 0, port, 0, cflags)
            if lib.sf_lane_lend(self.c, sid, key, self.st, tail) != 0:
                continue  # not lent: the tracker keeps the side (only speed differs)
            lent[sid] = 1
            flow.lent = True
            self.owner[flow.slot] = flow

    def _key(self, flow, s, sid):
        """Side ``s``'s sender key (``SF_KEY_SIZE`` bytes), or None when the
        tracker's lookup of that key gives the other side (a flow from an
        endpoint to itself)."""
        hit = self._keys.get(sid)
        if hit is not None and hit[0] is s:
            return hit[1]
        (src, sport), (dst, dport) = ((flow.client, flow.server) if s.side == 0
                                      else (flow.server, flow.client))
        key = None
        if self.tracker._sides.get((src, sport, dst, dport, flow.proto)) is s:
            key = (bytes((flow.proto, len(src))) + sport.to_bytes(2, "big")
                   + dport.to_bytes(2, "big") + b"\0\0" + src.ljust(16, b"\0")
                   + dst.ljust(16, b"\0"))
        self._keys[sid] = (s, key)
        return key

    def reclaim(self, flow, side):
        """Take ``side`` of a flow back into the tracker, if lent; with side
        None (the flow is ending) both, and the flow's last timestamp from
        the lane if its last packet went through it.  The tracker's
        ``reclaim`` hook."""
        lent = self.lent
        base = 2 * flow.slot
        for s in flow._sides if side is None else (side,):
            sid = base + s.side
            if not lent[sid]:
                continue
            lib.sf_lane_reclaim(self.c, sid, self.st, self.tail)
            lent[sid] = 0
            nxt, sink_next, packets, nbytes, expect, n = _STATE.unpack_from(self._st)[:6]
            s.next = nxt
            if flow.proto == 6:
                s.expect = expect
                s.recent = [self._tail[:n]] if n else []
                s.recent_len = n
            flow.packets[s.side] += packets
            flow.bytes[s.side] += nbytes
            self.sink.next_offset[sid] = -1 if sink_next == _NO_RESET else sink_next
        if not (lent[base] or lent[base + 1]):
            flow.lent = False
        if side is None:
            mine = self.pending.pop(flow, -1)
            if lib.sf_lane_untouch(self.c, flow.slot, self._frame, self._ts, self._ns) and \
                    self._frame[0] > mine:
                flow.last_ts = stamp_of(self._ts[0], self._ns[0])
            if self.owner[flow.slot] is flow:
                self.owner[flow.slot] = None

    def _touch(self, flow):
        """The tracker's LRU touch while the lane runs: held back till ``sync``."""
        self.pending[flow] = self.cur

    def sync(self):
        """Bring the idle order and last timestamps up to date: every flow
        touched since the last sync (by the tracker or the lane) moves to
        the end of its LRU, in the order of its last packet.  The tracker's
        ``sync`` hook."""
        pending = self.pending
        n = lib.sf_lane_touched(self.c, self.touched)
        if n:
            owner = self.owner
            for fslot, frame, ts, ns in _TOUCH.iter_unpack(self._touched[:n * _TOUCH.size]):
                flow = owner[fslot]
                if frame > pending.get(flow, -1):
                    pending[flow] = frame
                    flow.last_ts = stamp_of(ts, ns)
        if pending:
            tcp, udp = self.tracker._tcp_lru, self.tracker._udp_lru
            for flow, _frame in sorted(pending.items(), key=_second):
                lru = tcp if flow.proto == 6 else udp
                if flow in lru:
                    lru.move_to_end(flow)
            pending.clear()
