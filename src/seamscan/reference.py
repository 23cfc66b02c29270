"""Brute-force reference matcher: the oracle every engine layout is tested against.

Deliberately naive: each signature is searched for on its own; no
automaton, no shared state.  A literal signature is found at every start
offset with ``bytes.find``; case folding compares ``bytes.lower()`` of both
sides, which (per the Python documentation of ``bytes.lower``) changes only
the ASCII letters A-Z, exactly the pairing ``fold_case`` defines.  Any other
signature (byte sets, ``??``, parts) is translated into a Python bytes
regular expression (:func:`signature_regex`: each byte set a character
class, each spacing ``.{MIN,MAX}``, DOTALL) and, for every end offset ``e``,
the largest ``s`` whose ``data[s:e]`` it ``fullmatch``-es is the match: the
contract of FORMAT.md and the signature format.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

from seamscan.signatures import MAX_PORT, Signature

_CONTEXT_SIDES = (None, "client", "server")
_CONTEXT_TRANSPORTS = (None, "tcp", "udp")


def reference_matches(
    sigs: Iterable[Signature],
    data: bytes,
    *,
    side: str | None = None,
    transport: str | None = None,
    server_port: int | None = None,
) -> list[tuple[int, int, int]]:
    """Every match of every signature in ``data``, overlapping ones included.

    Returns ``(signature index, start, end)`` triples, end exclusive, offsets
    from the start of ``data``, sorted by ``(end, index)``.  A signature with
    a ``window`` keeps only matches with ``window[0] <= start`` and
    ``end <= window[1]``.  Context filters (``None`` means "do not filter"):
    ``side`` ("client" / "server") drops signatures of the other side,
    ``transport`` ("tcp" / "udp") those of the other transport, and
    ``server_port`` those whose ``ports`` do not contain it.  ``scope``
    plays no part within one buffer.
    """
    if side not in _CONTEXT_SIDES:
        raise ValueError(f"side must be 'client', 'server' or None, not {side!r}")
    if transport not in _CONTEXT_TRANSPORTS:
        raise ValueError(f"transport must be 'tcp', 'udp' or None, not {transport!r}")
    if server_port is not None and not (
        isinstance(server_port, int) and 0 <= server_port <= MAX_PORT
    ):
        raise ValueError(f"server_port must be an integer 0..{MAX_PORT} or None, not {server_port!r}")
    data = bytes(data)
    lowered = data.lower()
    found: list[tuple[int, int, int]] = []
    for index, sig in enumerate(sigs):
        if side is not None and sig.side not in ("either", side):
            continue
        if transport is not None and sig.transport not in ("any", transport):
            continue
        if server_port is not None and sig.ports is not None and server_port not in sig.ports:
            continue
        low, high = sig.window if sig.window is not None else (0, len(data))
        if not sig.is_literal:
            found.extend((index, s, e) for s, e in _regex_matches(sig, data, low, high))
            continue
        haystack, needle = (lowered, sig.data.lower()) if sig.fold_case else (data, sig.data)
        # find(needle, low, high) only reports occurrences lying wholly in data[low:high].
        start = haystack.find(needle, low, high)
        while start != -1:
            found.append((index, start, start + len(needle)))
            start = haystack.find(needle, start + 1, high)
    found.sort(key=lambda match: (match[2], match[0]))
    return found


def _byte_class(byte_set: frozenset[int]) -> bytes:
    if len(byte_set) == 256:
        return b"."
    return b"[" + b"".join(b"\\x%02x" % b for b in sorted(byte_set)) + b"]"


def signature_regex(sig: Signature) -> re.Pattern[bytes]:
    """The signature as a bytes regex (DOTALL): byte sets as classes (fold_case
    already in them), spacings as ``.{MIN,MAX}`` / ``.{MIN,}``."""
    out = []
    for k, part in enumerate(sig.pattern_parts()):
        if k:
            high = b"" if part.high is None else b"%d" % part.high
            out.append(b".{%d,%s}" % (part.low, high))
        out.extend(_byte_class(s) for s in part.sets)
    return re.compile(b"".join(out), re.DOTALL)


def _regex_matches(sig: Signature, data: bytes, low: int, high: int):
    """(start, end) per end offset in [low, high]: the largest start >= low."""
    pattern = signature_regex(sig)
    parts = sig.pattern_parts()
    shortest = sig.shortest()
    longest = None
    if all(p.high is not None for p in parts):
        longest = sum(len(p) + p.high for p in parts)
    for e in range(low + shortest, min(high, len(data)) + 1):
        first = low if longest is None else max(low, e - longest)
        for s in range(e - shortest, first - 1, -1):
            if pattern.fullmatch(data, s, e):
                yield s, e
                break
