"""Flows, client/server roles and TCP stream reassembly.

`FlowTracker` takes decoded packets (`seamscan.decode`) one at a time and
delivers every flow side's intended byte stream to a `Sink` exactly once, in
stream order, with stream offsets, and says where the holes are.

A packet is a tuple of the fields proto (6 TCP, 17 UDP), src, dst (4 or 16
bytes), sport, dport, seq, ack, flags (TCP flags byte), payload, frame
(1-based record number), ts (capture seconds), cut (payload bytes promised
beyond the captured ones, 0 for a whole packet) and sum_ok (the TCP checksum
of a FIN or RST segment, or None), in this order and also readable by
name: `seamscan.decode.Packet`, or any namedtuple of these fields (the hot
path unpacks it, the rest reads names); ack is read only for a RST of a
side with nothing seen.

Contract, in short (the sink's side of it is in `Sink`):

* A flow is a 5-tuple (protocol, two endpoints). TCP roles: the sender of a
  SYN without ACK is the client; the receiver of a SYN-ACK is the client; a
  flow picked up mid-stream takes the endpoint with the larger port as the
  client (equal ports: the sender of the first packet). UDP: the sender of the
  flow's first datagram is the client.
* TCP stream offset = sequence number - (ISN + 1) when that side's SYN was
  seen, else - the sequence number of the first segment seen from that side,
  in RFC 9293 modular arithmetic; offsets handed to the sink are unbounded
  ints (a stream longer than 4 GiB keeps counting). SYN and FIN occupy one
  sequence number each but no stream byte. UDP offset = the sum of that
  side's earlier payload lengths.
* Out-of-order TCP bytes are held (per-flow cap `hold_bytes`, global cap
  `hold_total`) and delivered, with the frame that brought them, when the
  hole before them fills. Bytes received again are never delivered twice;
  where they disagree with bytes received earlier the earlier bytes win and
  `Sink.overlap` reports the range. Disagreement is detected against held
  bytes and against the last `keep_bytes` (at least) delivered bytes of that
  side; older conflicts cannot be detected and are counted as
  ``retransmitted_bytes``. After a gap the delivered tail starts afresh.
* A hole is given up (`Sink.gap`, delivery continues after it) when a hold
  cap is exceeded or the flow ends. The flow exceeding a cap gives up its own
  holes, oldest first, the sending side first, until it is back under the
  cap. At a flow's end, bytes missing before a side's FIN are a gap too.
  Bytes before the first segment seen of a mid-stream side are not a gap; a
  segment more than 2**30 bytes from the next expected byte is dropped.
  `hold_bytes` counts payload bytes (the device's measure); `hold_total`
  counts what holding costs here: payload plus HELD_CHUNK_COST per held
  chunk, so it bounds the memory held however small the segments.
* Bytes not captured (a packet cut by the capture's snap length: its `cut`
  bytes after the captured payload) take their place in the stream: when
  delivery reaches them they are a gap of reason "not_captured", and the
  stream goes on after them (a FIN after them is where the segment says).
  This holds for a cut segment that arrived out of order too. Bytes of the
  range received whole in another copy are delivered, not given up. A side
  remembers at most `_LOST_CAP` such ranges ahead of its next byte; beyond
  that a range's bytes become an ordinary hole. A UDP datagram cut short
  delivers what was captured, then a "not_captured" gap of the rest (UDP
  offsets count the datagram's whole length).
* Every gap has a reason: "not_captured", "hold_cap", "hold_total" or
  "flow_end" (a hole still open when the flow ended); a hole given up
  across an uncaptured range is split into gaps of their own reasons.
* A RST or FIN changes a flow only where the receiver would take it. A RST
  counts when its sequence number lies from the next byte expected of its
  sender to one past the highest sequence number seen of it (see
  `FlowTracker._rst_acceptable` for a sender with nothing seen); it then
  ends the flow at once. A FIN counts at its own sequence number (after the
  segment's payload) when that is not before the next byte expected (older
  is stale), and only the side's first FIN. A FIN or RST whose checksum is
  wrong (`sum_ok` False) loses its FIN/RST and is otherwise a plain segment
  (captures on the sending host show offloaded segments unsummed, and no
  data segment's checksum is checked); without payload it is ignored whole.
  Every ignored FIN or RST is counted; none starts a side or moves one.
* A SYN without ACK on a live flow at a new sequence number is held back;
  when the peer's SYN-ACK acknowledges it, the flow ends "reused" and the
  two packets start a new flow (a SYN alone is counted and ignored).
* Both FINs with everything before them delivered end a flow "fin"; idle
  flows end by capture time (checked at most once per capture second,
  oldest first); the `max_flows` cap evicts the longest-idle flow. After a
  "fin" or "rst" end, for `closed_window` seconds of capture time, packets
  of the same 5-tuple without payload and without SYN, and segments whose
  payload lies wholly before where their side's stream stopped
  (retransmissions), are ignored; a SYN starts a new flow, any other
  segment with payload a mid-stream one that keeps the roles the ended
  flow had.

Every drop and eviction is counted in `FlowTracker.counters` (see COUNTERS).
"""

from bisect import bisect_right, insort
from collections import OrderedDict
from operator import attrgetter, itemgetter
from typing import Protocol

CLIENT, SERVER = 0, 1
TCP, UDP = 6, 17
FIN, SYN, RST, PSH, ACK = 0x01, 0x02, 0x04, 0x08, 0x10

_MOD = 1 << 32
_MASK = _MOD - 1
_HALF = 1 << 31
# RFC 7323 §2.3: the largest window a TCP peer can advertise is 2**30 bytes
# (recalled from memory); a segment farther than that from the next expected
# byte cannot belong to the stream and is dropped.
_WINDOW = 1 << 30
# Capture seconds between idle checks.
_SWEEP_INTERVAL = 1.0
# How long an ended TCP 5-tuple swallows payload-less packets: TIME-WAIT is
# held for 2*MSL, 60 s on common stacks (common practice).
CLOSED_WINDOW = 60.0
# What a held out-of-order chunk costs beyond its payload bytes: the tuple
# (offset, bytes, frame, ts), its int and float objects, the bytes object's
# header and its list slot.  Measured with tracemalloc on CPython 3.11: 201 B
# per chunk for chunks of 2 to 1,000 bytes; 208 B covers the allocator's
# rounding of the bytes object to 8.  The total hold cap counts it.
HELD_CHUNK_COST = 208
# Uncaptured ranges a side remembers ahead of its next byte, at most.
_LOST_CAP = 4096
# The gap reason of a hole given up, by the counter of its cause.
_GAP_REASON = {"hold_cap_gaps": "hold_cap", "hold_total_gaps": "hold_total", None: "flow_end"}

COUNTERS: dict[str, str] = {
    "flows": "flows started (TCP and UDP)",
    "tcp_flows": "TCP flows started",
    "udp_flows": "UDP flows started",
    "ended_fin": "flows ended by FINs of both sides, everything before them delivered",
    "ended_rst": "flows ended by a RST",
    "ended_idle": "flows ended after tcp_idle / udp_idle seconds without a packet",
    "ended_evicted": "flows ended because the table held max_flows flows",
    "ended_capture_end": "flows still live at finish()",
    "ended_reused": "flows ended because a new connection took their 5-tuple: a SYN at a new "
    "sequence number, answered by the peer's SYN-ACK acknowledging it",
    "retransmitted_bytes": "payload bytes received again and dropped: they agreed with the "
    "bytes received first, or were too old to compare (older than the kept tail, or "
    "inside a range already given up as a gap)",
    "overlap_conflicts": "overlap events: a received range disagreed with bytes received earlier",
    "overlap_bytes": "bytes covered by overlap events (dropped; the earlier bytes won)",
    "gaps": "gap events (holes given up); the sum of the four *_gaps counters by reason",
    "gap_bytes": "bytes covered by gap events",
    "hold_cap_gaps": "gaps given up because a flow held more than hold_bytes",
    "hold_total_gaps": "gaps given up because the memory held by all flows (held bytes plus "
    "HELD_CHUNK_COST per held chunk) exceeded hold_total",
    "flow_end_gaps": "gaps of holes still open when their flow ended",
    "not_captured_gaps": "gaps of bytes the capture did not hold: a TCP segment or UDP "
    "datagram cut short by the snap length",
    "not_captured_bytes": "bytes covered by not_captured gaps",
    "held_bytes_peak": "most out-of-order bytes held at once between packets, all flows",
    "held_memory_peak": "most memory held for out-of-order bytes at once between packets, all "
    "flows: held bytes plus HELD_CHUNK_COST per held chunk (what hold_total bounds)",
    "ignored_after_close": "packets of a 5-tuple that ended by FIN or RST, ignored: no payload "
    "and no SYN, or payload wholly before where that side's stream stopped",
    "ignored_protocol": "packets that are neither TCP nor UDP, ignored",
    "before_start_bytes": "TCP bytes before the start of their side's stream, dropped",
    "beyond_fin_bytes": "TCP bytes at or after their side's FIN, dropped",
    "out_of_window_segments": "TCP segments more than 2**30 bytes from the next expected "
    "byte, dropped",
    "closed_forgotten": "ended 5-tuples forgotten early because max_flows of them were kept",
    "ignored_rst": "RSTs ignored: outside what the receiver would accept (a sequence number "
    "before the next byte expected from the sender or beyond the highest one seen; a sender "
    "with no byte seen: an ACK that does not acknowledge a byte seen of the receiver)",
    "ignored_rst_checksum": "RSTs with a wrong TCP checksum: the RST ignored, any payload taken as "
    "a plain segment's",
    "ignored_fin": "FINs ignored: their sequence number lies before the next byte expected "
    "from that side (the receiver already has that sequence number as data), or another FIN "
    "of that side came first at another place",
    "ignored_fin_checksum": "FINs with a wrong TCP checksum: the FIN ignored, any payload taken as "
    "a plain segment's",
    "syn_on_live_flow": "SYNs without ACK at a new sequence number on a live flow: held back "
    "until the peer's SYN-ACK acknowledges one (then the flow ends \"reused\"), else ignored",
    "roles_kept": "flows picked up without a SYN on a 5-tuple ended by FIN or RST less than "
    "closed_window seconds before: they keep the roles the ended flow had",
}

_start = itemgetter(0)
_last_ts = attrgetter("last_ts")


class Sink(Protocol):
    """Receiver of a tracker's events; every offset is a stream offset of that side."""

    def data(self, flow, side, offset, payload, frame, ts, datagram) -> None:
        """`payload` occupies [offset, offset+len) of that side's stream.

        Delivered in stream order, each byte exactly once; `frame`/`ts` are
        those of the packet that brought the bytes. datagram=True for UDP,
        where each non-empty datagram is exactly one call.
        """

    def gap(self, flow, side, offset, length, frame, ts, reason) -> None:
        """Bytes [offset, offset+length) of that side will never be delivered.

        The next data() of that side starts at offset+length; `frame`/`ts` are
        those of the first segment received after the hole (or of the FIN),
        for "not_captured" those of the packet that was cut. `reason`:
        "not_captured", "hold_cap", "hold_total" or "flow_end" (see the
        module docstring).
        """

    def overlap(self, flow, side, offset, length, frame, ts) -> None:
        """A segment (`frame`) disagreed with bytes already received.

        [offset, offset+length) runs from the first to the last disagreeing
        byte against one earlier-received run; the earlier bytes won.
        """

    def end(self, flow) -> None:
        """The flow is over (flow.end_reason set); after all its events.

        The flow's slot is free once this returns.
        """


class Flow:
    """One bidirectional flow. `matches` belongs to the sink; the rest is the tracker's.

    key: direction-independent (proto, (ip, port), (ip, port)), endpoints sorted.
    slot: unique among live flows, 0 .. max_flows-1, reused after the flow ends.
    packets / bytes: per side [client, server]; bytes = payload bytes delivered.
    gaps / overlaps: gap and overlap events of this flow.
    end_reason: None while live, then "fin" | "rst" | "reused" | "idle" | "evicted" |
    "capture_end".
    lent: some of its sides are held by a fast lane (see FlowTracker.reclaim).
    The reassembly state goes once the flow has ended; the fields above stay.
    """

    __slots__ = (
        "key",
        "proto",
        "client",
        "server",
        "slot",
        "first_ts",
        "last_ts",
        "packets",
        "bytes",
        "gaps",
        "overlaps",
        "matches",
        "end_reason",
        "lent",
        "_sides",
        "_held",
    )

    def __init__(self, key, proto, client, server, slot, ts):
        self.key = key
        self.proto = proto
        self.client = client
        self.server = server
        self.slot = slot
        self.first_ts = ts
        self.last_ts = ts
        self.packets = [0, 0]
        self.bytes = [0, 0]
        self.gaps = 0
        self.overlaps = 0
        self.matches = 0
        self.end_reason = None
        self.lent = False  # sides lent to a fast lane (FlowTracker.reclaim)
        self._sides = (_Side(self, CLIENT), _Side(self, SERVER))
        self._held = 0  # out-of-order bytes held, both sides

    def __repr__(self):
        def ep(e):
            ip, port = e
            return f"{ip.hex()}:{port}"

        return (
            f"Flow(proto={self.proto}, client={ep(self.client)}, server={ep(self.server)}, "
            f"slot={self.slot}, end_reason={self.end_reason!r})"
        )


class _Side:
    """Reassembly state of one direction of a flow.

    base: sequence number of stream offset 0 (TCP). next: stream offset of the
    next byte to deliver. expect: sequence number an in-order segment must
    carry to take the fast path, or -1 (side not started, bytes held, or FIN
    seen). held: sorted, non-overlapping (offset, bytes, frame, ts) beyond
    next. recent: delivered bytes ending at next, recent_len of them. lost:
    sorted (start, end, frame, ts) ranges of the stream not captured, ahead
    of next (cut by the snap length).
    """

    __slots__ = (
        "flow",
        "side",
        "started",
        "base",
        "next",
        "expect",
        "fin",
        "fin_frame",
        "fin_ts",
        "held",
        "recent",
        "recent_len",
        "resyn",
        "lost",
    )

    def __init__(self, flow, side):
        self.flow = flow
        self.side = side
        self.started = False
        self.base = 0
        self.next = 0
        self.expect = -1
        self.fin = None
        self.fin_frame = 0
        self.fin_ts = 0.0
        self.held = []
        self.recent = []
        self.recent_len = 0
        self.resyn = None  # the last SYN at a new sequence number (FlowTracker._reused)
        self.lost = []


def _diff_span(x, y):
    """(first, last+1) of the positions where equal-length x and y differ, or None."""
    if x == y:
        return None
    v = int.from_bytes(x, "big") ^ int.from_bytes(y, "big")
    top = len(x) - 1
    return top - (v.bit_length() - 1) // 8, top - ((v & -v).bit_length() - 1) // 8 + 1


class FlowTracker:
    """Track flows, assign roles, reassemble TCP and feed a `Sink` (see the module doc)."""

    def __init__(
        self,
        sink,
        *,
        hold_bytes=65536,
        hold_total=64 * 2**20,
        max_flows=65536,
        tcp_idle=300.0,
        udp_idle=60.0,
        keep_bytes=4096,
    ):
        for name, value, low in (
            ("hold_bytes", hold_bytes, 0),
            ("hold_total", hold_total, 0),
            ("max_flows", max_flows, 1),
            ("tcp_idle", tcp_idle, 0),
            ("udp_idle", udp_idle, 0),
            ("keep_bytes", keep_bytes, 0),
        ):
            if not value >= low:
                raise ValueError(f"FlowTracker: {name} must be at least {low}, got {value!r}")
        self.sink = sink
        self.hold_bytes = hold_bytes
        self.hold_total = hold_total
        self.max_flows = max_flows
        self.tcp_idle = tcp_idle
        self.udp_idle = udp_idle
        self.keep_bytes = keep_bytes
        self.closed_window = CLOSED_WINDOW
        self.counters = dict.fromkeys(COUNTERS, 0)
        self._data = sink.data
        self._gap = sink.gap
        self._overlap = sink.overlap
        self._end = sink.end
        self._sides = {}  # (src, sport, dst, dport, proto) -> _Side of that sender
        self._tcp_lru = OrderedDict()  # live TCP flows, least recently active first
        self._udp_lru = OrderedDict()
        self._tcp_touch = self._tcp_lru.move_to_end
        self._udp_touch = self._udp_lru.move_to_end
        # key of a flow ended by fin/rst -> (capture time it expires, client
        # endpoint, sequence number where each side's stream stopped or None)
        self._closed = OrderedDict()
        self._free = []  # freed slots
        self._slots = 0  # slots ever handed out
        self._held_total = 0  # out-of-order bytes held, all flows
        self._held_chunks = 0  # and the chunks they are held in
        self._tail_cap = 2 * keep_bytes
        self._sweep_at = float("-inf")
        # A fast lane (seamscan.fastpath) may hold some sides' reassembly
        # state (next, expect, the delivered tail) and counts (packets,
        # bytes) while it delivers their in-order packets; such a flow has
        # `lent` set.  Only sides with nothing held and no FIN are lent, and
        # a packet changes only its sender's state, so before the tracker
        # handles a packet of a lent flow it calls reclaim(flow, side) to
        # take back the sender's side.  (A packet of the other side may
        # recompute a lent side's `expect` from stale fields: the lane's value
        # replaces it when that side comes back.)  Before any flow ends, lent
        # or not, it calls reclaim(flow, None).  The lane may also hold back
        # the idle (LRU) order and the last timestamps of the flows it and
        # the tracker touched: the tracker calls sync() before it reads them
        # (idle sweep, eviction, finish).
        self.reclaim = None
        self.sync = None

    # -- packets ----------------------------------------------------------

    def packet(self, pkt):
        """Account one decoded packet; emits the sink events it makes due.
        Returns the sender's side (its `flow` may have ended), or None if the
        packet was ignored."""
        proto, src, dst, sport, dport, seq, _ack, flags, payload, frame, ts, cut, _sum_ok = pkt
        if ts >= self._sweep_at:
            self._sweep(ts)
        s = self._sides.get((src, sport, dst, dport, proto))
        if s is None:
            s = self._new_flow(pkt)
            if s is None:
                return None
        flow = s.flow
        if flow.lent:
            self.reclaim(flow, s)
        flow.last_ts = ts
        side = s.side
        flow.packets[side] += 1
        if proto == TCP:
            self._tcp_touch(flow)
            if not flags & 7 and not cut:  # no FIN, SYN or RST; captured whole
                if payload:
                    if seq == s.expect:  # in order, nothing held: deliver as is
                        n = len(payload)
                        off = s.next
                        self._data(flow, side, off, payload, frame, ts, False)
                        s.next = off + n
                        s.expect = (seq + n) & _MASK
                        flow.bytes[side] += n
                        s.recent.append(payload)
                        s.recent_len = tail = s.recent_len + n
                        if tail > self._tail_cap:
                            self._trim_tail(s)
                        return s
                elif s.started:
                    return s
            self._tcp_segment(s, pkt)
        else:
            self._udp_touch(flow)
            if payload:
                n = len(payload)
                off = s.next
                self._data(flow, side, off, payload, frame, ts, True)
                s.next = off + n
                flow.bytes[side] += n
            if cut:
                self._emit_gap(s, s.next + cut, frame, ts, "not_captured")
        return s

    def finish(self) -> None:
        """End of capture: flows idle past their timeout end "idle", the rest "capture_end".

        Holes still open become gaps (held bytes after them are delivered)
        before each flow's end event.
        """
        if self.sync is not None:
            self.sync()
        live = list(self._tcp_lru) + list(self._udp_lru)
        if live:
            self._sweep(max(f.last_ts for f in live))
        live = sorted(list(self._tcp_lru) + list(self._udp_lru), key=_last_ts)
        for flow in live:
            self._end_flow(flow, "capture_end")
        self._closed.clear()

    # -- flow table -------------------------------------------------------

    def _new_flow(self, pkt):
        """Start the flow of a packet with no live flow; its sender's side, or None if ignored."""
        proto = pkt.proto
        if proto != TCP and proto != UDP:
            self.counters["ignored_protocol"] += 1
            return None
        here, there = (pkt.src, pkt.sport), (pkt.dst, pkt.dport)
        key = (proto, here, there) if here <= there else (proto, there, here)
        sender_is_client = True
        if proto == TCP:
            flags = pkt.flags
            record = self._closed.get(key)
            kept = False
            if record is not None:
                if record[0] > pkt.ts and not flags & SYN:
                    if self._stale(pkt, here, record):
                        self.counters["ignored_after_close"] += 1
                        return None
                    # The same connection going on (say after a RST the
                    # receiver ignored): the roles it had, not the port rule.
                    kept = True
                    sender_is_client = here == record[1]
                    self.counters["roles_kept"] += 1
                del self._closed[key]
            if flags & SYN:
                sender_is_client = not flags & ACK
            elif not kept and pkt.sport != pkt.dport:
                sender_is_client = pkt.sport > pkt.dport
        if len(self._tcp_lru) + len(self._udp_lru) >= self.max_flows:
            self._evict()
        if self._free:
            slot = self._free.pop()
        else:
            slot = self._slots
            self._slots += 1
        client, server = (here, there) if sender_is_client else (there, here)
        flow = Flow(key, proto, client, server, slot, pkt.ts)
        c, s = flow._sides
        # Register the receiver first: a flow from an endpoint to itself has one
        # key for both directions, and then every packet is the sender's.
        if sender_is_client:
            self._sides[(*server, *client, proto)] = s
            self._sides[(*client, *server, proto)] = c
        else:
            self._sides[(*client, *server, proto)] = c
            self._sides[(*server, *client, proto)] = s
        counters = self.counters
        counters["flows"] += 1
        if proto == TCP:
            counters["tcp_flows"] += 1
            self._tcp_lru[flow] = None
        else:
            counters["udp_flows"] += 1
            self._udp_lru[flow] = None
        return c if sender_is_client else s

    def _evict(self):
        """End the longest-idle live flow "evicted"."""
        if self.sync is not None:
            self.sync()
        heads = [next(iter(lru)) for lru in (self._tcp_lru, self._udp_lru) if lru]
        self._end_flow(min(heads, key=_last_ts), "evicted")

    def _sweep(self, ts):
        """End flows idle for longer than their timeout; forget expired closed 5-tuples."""
        if self.sync is not None:
            self.sync()
        self._sweep_at = ts + _SWEEP_INTERVAL
        tcp_cutoff, udp_cutoff = ts - self.tcp_idle, ts - self.udp_idle
        while True:  # oldest first across both tables
            due = [
                flow
                for flow, cutoff in (
                    (next(iter(self._tcp_lru), None), tcp_cutoff),
                    (next(iter(self._udp_lru), None), udp_cutoff),
                )
                if flow is not None and flow.last_ts < cutoff
            ]
            if not due:
                break
            self._end_flow(min(due, key=_last_ts), "idle")
        closed = self._closed
        while closed:
            key, record = next(iter(closed.items()))
            if record[0] > ts:
                break
            del closed[key]

    @staticmethod
    def _stale(pkt, here, record):
        """True if a packet of an ended 5-tuple brings nothing new: no payload, or old payload."""
        payload = pkt.payload
        if not payload:
            return True
        _, client, *stops = record
        stop = stops[CLIENT if here == client else SERVER]
        if stop is None:
            return False
        d = (pkt.seq - stop) & _MASK
        if d >= _HALF:
            d -= _MOD
        return d + len(payload) <= 0

    def _end_flow(self, flow, reason):
        """Give up open holes, deliver what is held, emit end, free the slot."""
        if self.reclaim is not None:
            self.reclaim(flow, None)
        for s in flow._sides:
            self._flush(s)
        flow.end_reason = reason
        self.counters["ended_" + reason] += 1
        self._end(flow)
        proto = flow.proto
        self._sides.pop((*flow.client, *flow.server, proto), None)
        self._sides.pop((*flow.server, *flow.client, proto), None)
        if proto == TCP:
            del self._tcp_lru[flow]
            if reason == "fin" or reason == "rst":
                closed = self._closed
                closed[flow.key] = (
                    flow.last_ts + self.closed_window,
                    flow.client,
                    *((s.base + s.next) & _MASK if s.started else None for s in flow._sides),
                )
                if len(closed) > self.max_flows:
                    closed.popitem(last=False)
                    self.counters["closed_forgotten"] += 1
        else:
            del self._udp_lru[flow]
        self._free.append(flow.slot)
        # Sides and flow point at each other: drop the sides, so that an ended
        # flow is freed (with its buffers) by reference counting alone, even
        # while the cyclic garbage collector is paused.
        flow._sides = ()

    # -- TCP reassembly ---------------------------------------------------

    def _tcp_segment(self, s, pkt):
        """The general TCP path: start a side, SYN/FIN/RST, reordering, overlaps."""
        flow = s.flow
        flags = pkt.flags
        seq = pkt.seq
        if flags & (FIN | RST) and pkt.sum_ok is False:
            # A wrong checksum takes the FIN or RST away, not the bytes: a
            # capture on the sending host shows offloaded segments unsummed,
            # and no data segment's checksum is checked either.
            counters = self.counters
            if flags & RST:
                counters["ignored_rst_checksum"] += 1
            if flags & FIN:
                counters["ignored_fin_checksum"] += 1
            flags &= ~(FIN | RST)
            if not pkt.payload and not flags & SYN:
                return
        if flags & SYN and s.started and self._reused(s, pkt, flags):
            return
        if flags & RST:
            if not self._rst_acceptable(s, pkt):
                self.counters["ignored_rst"] += 1
                return
            if not pkt.payload:
                self._end_flow(flow, "rst")
                return
        if not s.started:
            s.started = True
            s.base = (seq + 1) & _MASK if flags & SYN else seq
        data_seq = (seq + 1) & _MASK if flags & SYN else seq
        d = (data_seq - s.base - s.next) & _MASK
        if d >= _HALF:
            d -= _MOD
        payload = pkt.payload
        cut = pkt.cut
        if -_WINDOW <= d <= _WINDOW:
            off = s.next + d
            if cut:
                self._note_lost(s, off + len(payload), cut, pkt.frame, pkt.ts)
            # The FIN first: bytes held beyond it are dropped before the
            # payload's arrival can deliver them.
            if flags & FIN:
                self._fin(s, off + len(payload) + cut, pkt.frame, pkt.ts)
            if payload:
                self._receive(s, off, payload, pkt.frame, pkt.ts)
            if s.lost and s.lost[0][0] <= s.next:
                self._drain(s)
        else:
            self.counters["out_of_window_segments"] += 1
        if flags & RST:
            self._end_flow(flow, "rst")
            return
        c, v = flow._sides
        if c.fin is not None and v.fin is not None and c.next == c.fin and v.next == v.fin:
            self._end_flow(flow, "fin")
            return
        for side in flow._sides:
            if side.started and not side.held and side.fin is None and not side.lost:
                side.expect = (side.base + side.next) & _MASK
            else:
                side.expect = -1

    def _reused(self, s, pkt, flags):
        """A SYN on a started side: True if it was taken as a new connection's.

        A SYN without ACK at another sequence number than the side's own SYN
        is held back (a receiver in a synchronized state does not take it:
        RFC 5961 §4); the peer's SYN-ACK acknowledging it shows the peer took
        it: the flow ends "reused" and the two start a new flow. So a
        connection the tracker could not see end (its RST lost with the
        sender's last bytes) does not swallow the next one on its 5-tuple.
        """
        if not flags & ACK:
            if (pkt.seq + 1) & _MASK == s.base:
                return False  # its own SYN again
            s.resyn = pkt
            self.counters["syn_on_live_flow"] += 1
            return True
        flow = s.flow
        peer = flow._sides[1 - s.side]
        syn = peer.resyn
        if syn is None or pkt.ack != (syn.seq + 1) & _MASK:
            return False
        flow.packets[s.side] -= 1  # both belong to the new flow
        flow.packets[peer.side] -= 1
        self._end_flow(flow, "reused")
        self.packet(syn)
        self.packet(pkt)
        return True

    def _rst_acceptable(self, s, pkt):
        """Would the receiver take this RST (checksum aside)?

        RFC 9293 §3.10.7.4 takes a RST whose sequence number lies in the
        receive window, RFC 5961 §3.2 only one exactly at RCV.NXT. A capture
        shows neither the receiver's RCV.NXT nor its window, so the window is
        what the tracker knows the sender sent: from the next byte expected
        of the sender to one past the highest byte seen of it (held bytes,
        and the FIN's own sequence number). A genuine RST carries the
        sender's SND.NXT, which lies there when the sender's segments were
        captured. A sender with nothing seen (a RST answering a SYN, or a
        capture of one direction) has no window: its RST counts when its ACK
        lies from the receiver's first sequence number seen (its SYN's + 1)
        to one past its highest seen (RFC 9293 §3.10.7.3, SYN-SENT: the ACK
        must acknowledge the SYN and nothing never sent), or when nothing at
        all is known of the flow (its first packet: nothing to lose).
        """
        if s.started:
            d = (pkt.seq - s.base - s.next) & _MASK
            return d <= self._top(s) - s.next
        flow = s.flow
        peer = flow._sides[1 - s.side]
        if not peer.started:
            return True
        if not pkt.flags & ACK:
            return False
        if flow.lent:
            self.reclaim(flow, peer)
        a = (pkt.ack - peer.base - peer.next) & _MASK
        if a >= _HALF:
            a -= _MOD
        return -peer.next <= a <= self._top(peer) - peer.next

    @staticmethod
    def _top(s):
        """Stream offset one past the highest sequence number seen of a started side."""
        top = s.next
        if s.held:
            top = max(top, s.held[-1][0] + len(s.held[-1][1]))
        if s.fin is not None:
            top = max(top, s.fin + 1)
        return top

    def _receive(self, s, off, p, frame, ts):
        """Place payload `p` at stream offset `off` of side `s`."""
        counters = self.counters
        end = off + len(p)
        if s.fin is not None and end > s.fin:
            cut = max(off, s.fin)
            counters["beyond_fin_bytes"] += end - cut
            p = p[: cut - off]
            end = cut
            if not p:
                return
        if off < 0:
            cut = min(end, 0)
            counters["before_start_bytes"] += cut - off
            p = p[cut - off :]
            off = cut
            if not p:
                return
        spans = []
        if off < s.next:
            stop = min(end, s.next)
            self._compare_delivered(s, off, p[: stop - off], spans)
            p = p[stop - off :]
            off = stop
        if p and off == s.next and not s.held:
            self._report(s, spans, frame, ts)
            self._deliver(s, off, p, frame, ts)
            return
        if p:
            self._hold(s, off, p, frame, ts, spans)
        self._report(s, spans, frame, ts)
        self._drain(s)
        flow = s.flow
        if flow._held > self.hold_bytes:
            self._relieve(s, "hold_cap_gaps", lambda: flow._held > self.hold_bytes)
        if self._held_memory() > self.hold_total:
            self._relieve(s, "hold_total_gaps", lambda: self._held_memory() > self.hold_total)
        counters = self.counters
        if self._held_total > counters["held_bytes_peak"]:
            counters["held_bytes_peak"] = self._held_total
        memory = self._held_memory()
        if memory > counters["held_memory_peak"]:
            counters["held_memory_peak"] = memory

    def _held_memory(self):
        """What the held out-of-order bytes cost, all flows (what hold_total bounds)."""
        return self._held_total + HELD_CHUNK_COST * self._held_chunks

    def _compare_delivered(self, s, off, p, spans):
        """Check bytes `p` at `off` (< next) against the delivered tail; add conflicts to spans."""
        counters = self.counters
        tail_start = s.next - s.recent_len
        if off < tail_start:
            old = min(len(p), tail_start - off)
            counters["retransmitted_bytes"] += old
            p = p[old:]
            off += old
            if not p:
                return
        recent = s.recent
        if len(recent) > 1:
            recent[:] = [b"".join(recent)]
        at = off - tail_start
        span = _diff_span(p, recent[0][at : at + len(p)])
        self._count_compared(len(p), off, span, spans)

    def _hold(self, s, off, p, frame, ts, spans):
        """Hold the bytes of `p` at `off` (>= next) not held yet; compare the rest to held bytes."""
        held = s.held
        end = off + len(p)
        i = bisect_right(held, off, key=_start) - 1
        if i < 0 or held[i][0] + len(held[i][1]) <= off:
            i += 1
        pos = off
        added = 0
        chunks = 0
        while pos < end:
            if i < len(held) and held[i][0] <= pos:
                start, data = held[i][0], held[i][1]
                stop = min(end, start + len(data))
                mine = p[pos - off : stop - off]
                span = _diff_span(mine, data[pos - start : stop - start])
                self._count_compared(len(mine), pos, span, spans)
            else:
                stop = min(end, held[i][0]) if i < len(held) else end
                held.insert(i, (pos, p[pos - off : stop - off], frame, ts))
                added += stop - pos
                chunks += 1
            pos = stop
            i += 1
        s.flow._held += added
        self._held_total += added
        self._held_chunks += chunks

    def _count_compared(self, n, off, span, spans):
        """Account n compared bytes at off; a disagreeing span goes to spans (merged if adjacent)."""
        if span is None:
            self.counters["retransmitted_bytes"] += n
            return
        lo, hi = off + span[0], off + span[1]
        self.counters["retransmitted_bytes"] += n - (hi - lo)
        if spans and spans[-1][1] == lo:
            spans[-1] = (spans[-1][0], hi)
        else:
            spans.append((lo, hi))

    def _report(self, s, spans, frame, ts):
        """Emit the overlap events of one segment."""
        flow = s.flow
        counters = self.counters
        for lo, hi in spans:
            self._overlap(flow, s.side, lo, hi - lo, frame, ts)
            flow.overlaps += 1
            counters["overlap_conflicts"] += 1
            counters["overlap_bytes"] += hi - lo

    def _deliver(self, s, off, p, frame, ts):
        """Hand bytes at off == next to the sink and advance the side."""
        n = len(p)
        flow = s.flow
        self._data(flow, s.side, off, p, frame, ts, False)
        s.next = off + n
        flow.bytes[s.side] += n
        s.recent.append(p)
        s.recent_len += n
        if s.recent_len > self._tail_cap:
            self._trim_tail(s)

    def _trim_tail(self, s):
        """Keep only the last keep_bytes delivered bytes of a side: whole chunks
        are dropped from the front, and the first one kept is cut if need be."""
        recent = s.recent
        excess = s.recent_len - self.keep_bytes
        i = 0
        while i < len(recent) and len(recent[i]) <= excess:
            excess -= len(recent[i])
            i += 1
        del recent[:i]
        if excess:
            recent[0] = recent[0][excess:]
        s.recent_len = self.keep_bytes

    def _drain(self, s):
        """Deliver held chunks that now start at next, and give up as
        "not_captured" the uncaptured bytes delivery has reached."""
        held = s.held
        lost = s.lost
        while True:
            k = 0
            done = 0
            while k < len(held) and held[k][0] == s.next:
                off, data, frame, ts = held[k]
                self._deliver(s, off, data, frame, ts)
                done += len(data)
                k += 1
            if k:
                del held[:k]
                s.flow._held -= done
                self._held_total -= done
                self._held_chunks -= k
            while lost and lost[0][1] <= s.next:
                del lost[0]
            if not lost or lost[0][0] > s.next:
                return
            _, end, frame, ts = lost[0]
            self._emit_gap(s, min(end, held[0][0]) if held else end, frame, ts, "not_captured")

    def _note_lost(self, s, start, n, frame, ts):
        """Stream bytes [start, start + n) of side `s` were not captured."""
        end = start + n
        if s.fin is not None:
            end = min(end, s.fin)
        start = max(start, s.next)
        if start < end and len(s.lost) < _LOST_CAP:
            insort(s.lost, (start, end, frame, ts))

    def _skip_hole(self, s, cause):
        """Give up the hole before the first held chunk, then deliver what follows it."""
        start, _, frame, ts = s.held[0]
        self._emit_gap(s, start, frame, ts, _GAP_REASON[cause])
        self._drain(s)

    def _emit_gap(self, s, stop, frame, ts, reason):
        """Give up [next, stop) as gaps of `reason`, except that the parts not
        captured are "not_captured" gaps (with the frame that was cut); move
        next past it; the delivered tail restarts."""
        lost = s.lost
        while s.next < stop:
            while lost and lost[0][1] <= s.next:
                del lost[0]
            if lost and lost[0][0] <= s.next:
                _, end, fr, t = lost[0]
                self._one_gap(s, min(stop, end), fr, t, "not_captured")
            else:
                self._one_gap(s, min(stop, lost[0][0]) if lost else stop, frame, ts, reason)

    def _one_gap(self, s, stop, frame, ts, reason):
        """Emit the gap [next, stop) of one reason and move next past it."""
        flow = s.flow
        length = stop - s.next
        self._gap(flow, s.side, s.next, length, frame, ts, reason)
        flow.gaps += 1
        counters = self.counters
        counters["gaps"] += 1
        counters["gap_bytes"] += length
        counters[reason + "_gaps"] += 1
        if reason == "not_captured":
            counters["not_captured_bytes"] += length
        s.next = stop
        s.recent = []
        s.recent_len = 0

    def _relieve(self, s, cause, over):
        """Give up holes of this flow, side `s` first, while `over()` holds."""
        for side in (s, s.flow._sides[1 - s.side]):
            while side.held and over():
                self._skip_hole(side, cause)

    def _fin(self, s, at, frame, ts):
        """Record the first FIN of a side at stream offset `at`; drop held bytes beyond it.

        A FIN before `next` is stale (the receiver has that sequence number
        as data already), one at another place than the side's first FIN a
        contradiction: both are ignored and counted."""
        if s.fin is not None or at < s.next:
            if at != s.fin:
                self.counters["ignored_fin"] += 1
            return
        s.fin, s.fin_frame, s.fin_ts = at, frame, ts
        held = s.held
        dropped = 0
        while held and held[-1][0] + len(held[-1][1]) > at:
            start, data, fr, t = held.pop()
            if start < at:
                held.append((start, data[: at - start], fr, t))
                dropped += start + len(data) - at
                break
            dropped += len(data)
            self._held_chunks -= 1
        if dropped:
            self.counters["beyond_fin_bytes"] += dropped
            s.flow._held -= dropped
            self._held_total -= dropped
        if s.lost:  # no stream bytes lie beyond the FIN, uncaptured or not
            s.lost[:] = [(a, min(b, at), fr, t) for a, b, fr, t in s.lost if a < at]

    def _flush(self, s):
        """At flow end: every hole becomes a gap, held bytes are delivered, up to the FIN."""
        while s.held:
            self._skip_hole(s, None)
        if s.lost:  # up to the end of the last range known not captured
            _, end, frame, ts = max(s.lost, key=itemgetter(1))
            self._emit_gap(s, end, frame, ts, "flow_end")
        if s.fin is not None and s.next < s.fin:
            self._emit_gap(s, s.fin, s.fin_frame, s.fin_ts, "flow_end")
