"""IP fragment reassembly for IPv4 (RFC 791) and IPv6 (RFC 8200 section 4.5).

A ``Defragmenter`` collects the fragments of each datagram, keyed by
(source, destination, protocol, identification) for IPv4 and by (source,
destination, identification) for IPv6, and hands back the whole upper-layer
datagram (everything after the IP header, resp. after the Fragment header)
when every byte from 0 to the end given by the last fragment has arrived.
Offsets passed in are in bytes (the header field times 8).

Rules:

- Overlaps: bytes received first win; a later fragment only fills the
  holes it covers. Each fragment that brings any byte already held (an
  exact duplicate too) counts once in ``overlaps``. (RFC 5722 asks IPv6
  hosts to drop such datagrams; an inspection tool instead keeps the first
  copy, the same rule as for TCP segments, and reports the overlap.)
- IPv6: the upper-layer protocol is the Next Header of the offset-zero
  fragment (RFC 8200 section 4.5: the others may differ and are ignored).
- ``bad`` (the fragment alone is dropped, the datagram goes on): a fragment
  other than the last whose length is not a multiple of 8 or is zero; a
  last fragment whose end differs from an earlier last fragment's or lies
  before bytes already received; a fragment ending beyond the known end.
- Limits, each dropping the whole datagram and counted once: ``too_big``
  (a fragment ending beyond ``max_datagram`` bytes), ``too_many`` (more than
  ``max_fragments`` fragments, duplicates included), ``evicted`` (holding the
  fragment would exceed ``max_bytes`` payload bytes over all datagrams: the
  oldest datagrams are dropped first, possibly this one). The key of such a
  datagram is remembered, without its bytes, for ``timeout`` seconds so that
  its remaining fragments are discarded rather than counted again (at most
  ``TOMBSTONES`` keys, oldest forgotten first).
- ``timeouts``: datagrams still incomplete ``timeout`` seconds of capture
  time after their first fragment. Expiry runs as capture time advances in
  ``add_v4``/``add_v6`` and on ``expire(now)``; at the end of a capture,
  ``expire(math.inf)`` counts every datagram still incomplete.
- ``reassembled``: datagrams completed and returned.
"""

from __future__ import annotations

import bisect
import math

TOMBSTONES = 4096
"""How many dropped datagrams' keys are remembered at most."""

COUNTERS = ("reassembled", "overlaps", "timeouts", "evicted", "too_big", "too_many", "bad")


class _Datagram:
    """Fragments of one datagram being reassembled."""

    __slots__ = ("first_ts", "pieces", "held", "total", "count", "upper")

    def __init__(self, ts: float):
        self.first_ts = ts
        self.pieces: list[tuple[int, int, bytes]] = []  # (start, end, data), sorted, disjoint
        self.held = 0  # bytes in pieces
        self.total: int | None = None  # datagram length, known from the last fragment
        self.count = 0  # fragments received, duplicates included
        self.upper: int | None = None  # protocol from the offset-zero fragment


class Defragmenter:
    """Bounded IPv4/IPv6 fragment reassembly; see the module docstring.

    ``counters`` holds the keys of ``COUNTERS``, all present from the start.
    """

    def __init__(self, *, max_datagram=65535, max_fragments=64, max_bytes=8 * 2**20,
                 timeout=30.0):
        self.max_datagram = max_datagram
        self.max_fragments = max_fragments
        self.max_bytes = max_bytes
        self.timeout = timeout
        self.counters: dict[str, int] = dict.fromkeys(COUNTERS, 0)
        self._pending: dict[tuple, _Datagram] = {}  # in order of first arrival
        self._dropped: dict[tuple, float] = {}  # key -> capture time of the drop
        self._held = 0
        self._next_expiry = math.inf

    @property
    def held_bytes(self) -> int:
        """Payload bytes currently held over all incomplete datagrams."""
        return self._held

    def add_v4(self, src, dst, proto, ident, offset, more, data, ts) -> bytes | None:
        """Add one IPv4 fragment (``offset`` in bytes, ``more`` = MF flag);
        return the whole upper-layer datagram if this fragment completed it."""
        got = self._add((4, src, dst, proto, ident), proto, offset, more, data, ts)
        return None if got is None else got[1]

    def add_v6(self, src, dst, ident, next_header, offset, more, data,
               ts) -> tuple[int, bytes] | None:
        """Add one IPv6 fragment (``data``: the fragmentable part after the
        Fragment header); return (protocol after the Fragment header,
        datagram) if this fragment completed it."""
        return self._add((6, src, dst, ident), next_header, offset, more, data, ts)

    def expire(self, now_ts) -> None:
        """Drop datagrams whose first fragment is more than ``timeout``
        seconds older than ``now_ts`` (counted in ``timeouts``), and forget
        dropped keys as old."""
        limit = now_ts - self.timeout
        pending = self._pending
        while pending:
            key = next(iter(pending))
            dg = pending[key]
            if dg.first_ts >= limit:
                break
            del pending[key]
            self._held -= dg.held
            self.counters["timeouts"] += 1
        dropped = self._dropped
        while dropped:
            key = next(iter(dropped))
            if dropped[key] >= limit:
                break
            del dropped[key]
        self._schedule()

    def _schedule(self) -> None:
        """Set the capture time at which the oldest entry next expires."""
        first = math.inf
        if self._pending:
            first = next(iter(self._pending.values())).first_ts
        if self._dropped:
            first = min(first, next(iter(self._dropped.values())))
        self._next_expiry = first + self.timeout

    def _drop(self, key, reason: str, ts: float) -> None:
        """Drop a datagram whole, count it under ``reason``, remember its key."""
        dg = self._pending.pop(key, None)
        if dg is not None:
            self._held -= dg.held
        self.counters[reason] += 1
        dropped = self._dropped
        dropped[key] = ts
        if len(dropped) > TOMBSTONES:
            del dropped[next(iter(dropped))]
        self._next_expiry = min(self._next_expiry, ts + self.timeout)

    def _add(self, key, upper, offset, more, data, ts) -> tuple[int, bytes] | None:
        if ts > self._next_expiry:
            self.expire(ts)
        if key in self._dropped:
            return None
        c = self.counters
        end = offset + len(data)
        if more and (len(data) % 8 or not data):
            c["bad"] += 1
            return None
        if end > self.max_datagram:
            self._drop(key, "too_big", ts)
            return None
        dg = self._pending.get(key)
        if dg is not None:
            if dg.count >= self.max_fragments:
                self._drop(key, "too_many", ts)
                return None
            if dg.total is not None:
                if end > dg.total or (not more and end != dg.total):
                    c["bad"] += 1
                    return None
            elif not more and dg.pieces and dg.pieces[-1][1] > end:
                c["bad"] += 1
                return None
        else:
            dg = _Datagram(ts)
            if not self._pending and not self._dropped:
                self._next_expiry = ts + self.timeout
            self._pending[key] = dg
        dg.count += 1
        gaps = _holes(dg.pieces, offset, end)
        added = sum(e - s for s, e in gaps)
        if added != end - offset:
            c["overlaps"] += 1
        if added:
            while self._held + added > self.max_bytes:
                oldest = next(iter(self._pending))
                self._drop(oldest, "evicted", ts)
                if oldest == key:
                    return None
            for s, e in gaps:
                bisect.insort(dg.pieces, (s, e, data[s - offset:e - offset]))
            dg.held += added
            self._held += added
        if not more:
            dg.total = end
        if offset == 0 and dg.upper is None:
            dg.upper = upper
        if dg.total is None or dg.held != dg.total:
            return None
        del self._pending[key]
        self._held -= dg.held
        c["reassembled"] += 1
        return dg.upper, b"".join(piece for _, _, piece in dg.pieces)


def _holes(pieces: list[tuple[int, int, bytes]], start: int, end: int) -> list[tuple[int, int]]:
    """The sub-ranges of [start, end) not covered by the sorted, disjoint
    ``pieces``."""
    holes = []
    cur = start
    for s, e, _ in pieces:
        if e <= cur:
            continue
        if s >= end:
            break
        if s > cur:
            holes.append((cur, s))
        cur = e
        if cur >= end:
            break
    if cur < end:
        holes.append((cur, end))
    return holes
