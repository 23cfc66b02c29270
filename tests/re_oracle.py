"""The outside oracle for byte sets, ``??`` and parts: Python's ``re``.

Built from the signature *as written* (the TOML field values), not from
seamscan's parsed model, so a parsing slip shows up as a difference.  The
contract (issue 10, section 2): translate the signature into a bytes
regular expression, each ``??`` a ``.``, each byte set a character class,
each part's ``fold_case`` as ``(?i:...)`` (which on a bytes pattern folds
the ASCII letters only, classes included: Python ``re`` documentation), each
spacing ``.{MIN,MAX}`` or ``.{MIN,}``, DOTALL; an occurrence is ``[s, e)``
that ``re.fullmatch`` accepts; one match per end ``e``, at the largest ``s``.
"""

from __future__ import annotations

import re


def _hex_part(tokens: str) -> bytes:
    out = []
    text = tokens
    i = 0
    while i < len(text):
        ch = text[i]
        if ch == " ":
            i += 1
        elif ch == "<":
            j = text.index(">", i)
            body = text[i + 1:j]
            neg = body.startswith("!")
            items = body[1:].split() if neg else body.split()
            cls = []
            for item in items:
                lo, _, hi = item.partition("-")
                cls.append(b"\\x" + lo.encode() + ((b"-\\x" + hi.encode()) if hi else b""))
            out.append(b"[" + (b"^" if neg else b"") + b"".join(cls) + b"]")
            i = j + 1
        elif text.startswith("??", i):
            out.append(b".")
            i += 2
        else:
            out.append(re.escape(bytes.fromhex(text[i:i + 2])))
            i += 2
    return b"".join(out)


def part_regex(part: dict, fold: bool) -> bytes:
    body = (re.escape(part["text"].encode("utf-8")) if "text" in part
            else _hex_part(part["hex"]))
    return b"(?i:" + body + b")" if fold else body


def signature_regex(sig: dict) -> re.Pattern[bytes]:
    fold = sig.get("fold_case", False)
    parts = sig.get("part") or [sig]
    out = []
    for k, part in enumerate(parts):
        if k:
            low, high = part.get("spacing", [0, "any"])
            out.append(b".{%d,%s}" % (low, b"" if high == "any" else str(high).encode()))
        out.append(part_regex(part, part.get("fold_case", fold)))
    return re.compile(b"".join(out), re.DOTALL)


def matches(sigs: list[dict], data: bytes) -> list[tuple[str, int, int]]:
    """(id, start, end) sorted by end then signature order: per end offset
    the largest start whose slice fullmatches, inside the window if any."""
    found = []
    for index, sig in enumerate(sigs):
        pattern = signature_regex(sig)
        low, high = sig.get("window", (0, len(data)))
        high = min(high, len(data))
        for e in range(low, high + 1):
            for s in range(e, low - 1, -1):
                if pattern.fullmatch(data, s, e):
                    found.append((index, sig["id"], s, e))
                    break
    found.sort(key=lambda m: (m[3], m[0]))
    return [(sid, s, e) for _i, sid, s, e in found]
