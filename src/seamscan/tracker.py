"""The part tracker's memory rules: how many bytes a flow side needs.

A multi-part signature's parts are separate automaton outputs; the C
runtime links them with a small per-flow-side tracker (``csrc/FORMAT.md``,
"The part tracker").  Each link (from part ``k`` to part ``k + 1``) keeps
the chains that reached part ``k`` and cannot yet be followed by part
``k + 1`` (they end fewer than ``MIN + len(part k+1)`` bytes ago), plus the
latest one that can.  This module computes how many such chains can wait at
once: the ring capacity, and from it the bytes per link and per signature.
The compiler writes these numbers into the image; ``signatures`` uses them
to refuse a signature whose tracker would be too large.
"""

from __future__ import annotations

LINK_HEADER = 24  # u32 head, u32 count, u64 latest end, u64 latest start
ENTRY = 16  # u64 end, u64 start
MAX_SIGNATURE_BYTES = 4096  # per signature, per flow side
ANY = 0xFFFFFFFF  # a spacing's MAX when there is no upper bound (the image's value)


def self_overlap(sets) -> int:
    """The smallest shift ``d >= 1`` at which the part can occur twice
    (every overlapping position's byte sets intersect); ``len(sets)`` when
    no shorter shift can."""
    n = len(sets)
    for d in range(1, n):
        if all(sets[j + d] & sets[j] for j in range(n - d)):
            return d
    return n


def link_capacity(before, after_len: int, after_min: int) -> int:
    """Chains that can wait in one link at once: ends of the part ``before``
    lying within ``after_min + after_len`` consecutive offsets, each two at
    least the part's self-overlap apart."""
    window = after_min + after_len
    return (window - 1) // self_overlap(before) + 1


def link_bytes(capacity: int) -> int:
    return LINK_HEADER + ENTRY * capacity


def signature_links(parts) -> list[int]:
    """Ring capacity of the link after each part (0 after the last one)."""
    caps = []
    for k, part in enumerate(parts):
        if k + 1 < len(parts):
            nxt = parts[k + 1]
            caps.append(link_capacity(part.sets, len(nxt), nxt.low))
        else:
            caps.append(0)
    return caps


def signature_bytes(parts) -> int:
    """Tracker bytes per flow side for one signature (0 for one part)."""
    return sum(link_bytes(c) for c in signature_links(parts) if c)
