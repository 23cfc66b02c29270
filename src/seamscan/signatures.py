"""Signature sets: the TOML format, its validation, and the in-memory model.

A signature set file looks like this (every field but ``id`` and one of
``text`` / ``hex`` is optional)::

    [set]
    name = "bldg-lab-baseline"
    version = "3"

    [[signature]]
    id = "bldg-0001"
    text = "POST /relay/"
    fold_case = false
    side = "either"          # client | server | either
    transport = "any"        # tcp | udp | any
    ports = [80, 8080]
    window = [0, 1024]       # the whole match lies in stream bytes [start, end)
    scope = "datagram"       # UDP only: datagram | stream
    label = "relay override request"
    tags = ["hvac", "write"]

Pattern rules:

* ``text`` is the string exactly as TOML delivers it (TOML's own escapes
  only: the literal string ``'\\x00'`` is four characters), encoded UTF-8.
* ``hex`` is byte pairs of hex digits (either case).  Single ASCII spaces
  may separate pairs but never split one: ``"de ad be ef"``, ``"deadbeef"``
  and ``"dead beef"`` are the same four bytes, ``"d ead"`` is an error.  No
  other whitespace is accepted; wrap a long pattern with a TOML multi-line
  basic string and a line-ending backslash, which TOML itself removes.
* ``hex`` also takes ``??`` (any byte) and byte sets ``<...>``: byte pairs
  and ranges ``30-39`` separated by single spaces, a leading ``!`` for the
  complement (``<!0d 0a>``: any byte but CR and LF).  An empty set, a
  reversed range or a set of every byte is an error.
* ``fold_case`` pairs the ASCII letters A-Z with a-z and nothing else; it
  applies to byte sets as well (a set gains the other case of each letter
  in it, then ``!`` complements), as ``re.IGNORECASE`` does on bytes.
* A pattern holds 1 to 65535 bytes; a window is ``[start, end)`` with
  ``0 <= start < end <= 4294967295`` and must be able to hold the pattern.

Multi-part signatures: instead of ``text`` / ``hex``, up to ``MAX_PARTS``
``[[signature.part]]`` tables, each with exactly one of ``text`` / ``hex``,
an optional ``fold_case`` (default: the signature's) and, from the second
part on, ``spacing = [MIN, MAX]`` (bytes between the end of the previous
part and the start of this one; ``MAX`` may be ``"any"``; default
``[0, "any"]``; both at most ``MAX_SPACING``).  An occurrence is what
``re.fullmatch`` of the parts joined by ``.{MIN,MAX}`` (DOTALL) accepts;
one match is reported per end offset, starting at the latest start.  The
part tracker's memory per flow side (``seamscan.tracker``) is limited to
``tracker.MAX_SIGNATURE_BYTES`` per signature.

Every problem of a file is collected and raised at once as one
:class:`SignatureError`; nothing here ever lets a raw traceback escape for
bad input.
"""

from __future__ import annotations

import difflib
import os
import re
import tomllib
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

MAX_PATTERN_BYTES = 65535
MAX_WINDOW_END = 0xFFFF_FFFF
MAX_PORT = 65535

SIDES = ("client", "server", "either")
TRANSPORTS = ("tcp", "udp", "any")
SCOPES = ("datagram", "stream")

SIGNATURE_FIELDS = (
    "id", "text", "hex", "part", "fold_case", "side", "transport",
    "ports", "window", "scope", "label", "tags",
)
PART_FIELDS = ("text", "hex", "fold_case", "spacing")
MAX_PARTS = 16
MAX_SPACING = 65535
SET_FIELDS = ("name", "version")
TOP_LEVEL_KEYS = ("set", "signature")

_HEX_OK = re.compile(r"(?:[0-9A-Fa-f]{2}| )*")
_HEX_TOKEN = re.compile(r"<[^<>]*>|[^ <>]+|[<>][^ ]*")
_PAIR = re.compile(r"[0-9A-Fa-f]{2}")
ALL_BYTES = frozenset(range(256))
_HEX_DIGITS = frozenset("0123456789abcdefABCDEF")
_TOML_POSITION = re.compile(r"^(?P<msg>.*) \(at line (?P<line>\d+), column (?P<col>\d+)\)$", re.S)
_TOML_AT_END = re.compile(r"^(?P<msg>.*) \(at end of document\)$", re.S)
_LINE_PREFIX = re.compile(r"^line (\d+): ")
_TOML_TYPE_NAMES = {
    bool: "boolean", int: "integer", float: "float", str: "string",
    list: "array", dict: "table",
}


class SignatureError(ValueError):
    """A signature set could not be read or is invalid.

    ``source`` is the file path (or ``"<string>"`` / ``"<python>"``) and
    ``problems`` holds one line per problem, e.g.
    ``"line 12: signature 'bldg-0003' (#3): field 'hex': odd number of hex digits (7)"``.
    ``str(err)`` is ``"SOURCE:LINE: problem"`` for a single problem that has a
    line, ``"SOURCE: problem"`` for a single one without, and otherwise
    ``"SOURCE: N problem(s) in the signature set:"`` followed by one indented
    line per problem.
    """

    def __init__(self, source: str, problems: Iterable[str]):
        problems = list(problems)
        super().__init__(source, problems)
        self.source = source
        self.problems = problems

    def __str__(self) -> str:
        if len(self.problems) == 1:
            only = self.problems[0]
            at_line = _LINE_PREFIX.match(only)
            if at_line:
                return f"{self.source}:{at_line.group(1)}: {only[at_line.end():]}"
            return f"{self.source}: {only}"
        return (
            f"{self.source}: {len(self.problems)} problem(s) in the signature set:\n  "
            + "\n  ".join(self.problems)
        )


@dataclass(frozen=True, slots=True)
class Part:
    """One part of a signature: a sequence of byte sets (fold_case already
    applied), the spacing before it (``low``, ``high``; ``high`` None: no
    bound; ``(0, 0)`` for the first part) and its source, for display."""

    sets: tuple[frozenset[int], ...]
    low: int = 0
    high: int | None = 0
    field: str = "hex"  # "text" or "hex": how it was written
    source: str = ""  # the text or hex string as written
    fold_case: bool = False

    def __len__(self) -> int:
        return len(self.sets)

    def readable(self) -> str:
        """``"FORCE"`` / ``"force"i`` for text, ``hex a5 5a ?? <30-39>`` for hex."""
        if self.field == "text":
            body = self.source.encode("unicode_escape").decode("ascii").replace('"', '\\"')
            return f'"{body}"' + ("i" if self.fold_case else "")
        return f"hex {self.source.strip()}" + (" (fold_case)" if self.fold_case else "")


@dataclass(frozen=True, slots=True)
class Signature:
    """One validated signature: a byte pattern plus where it applies.

    ``data`` is the pattern when it is one literal (no byte sets, one part),
    else ``b""``; ``parts`` holds the pattern as parts of byte sets (empty for
    a literal built in Python: :meth:`pattern_parts` then derives it).
    ``ports`` is sorted and deduplicated (``None``: any server port);
    ``window`` is ``(start, end)``, end exclusive, in stream bytes (``None``:
    anywhere).  Build signatures through :func:`signature_set` or the loaders
    so that they are validated.
    """

    id: str
    data: bytes
    fold_case: bool = False
    side: str = "either"
    transport: str = "any"
    ports: tuple[int, ...] | None = None
    window: tuple[int, int] | None = None
    scope: str = "datagram"
    label: str = ""
    tags: tuple[str, ...] = ()
    parts: tuple[Part, ...] = ()
    written: str = field(default="hex", compare=False)  # a literal's field: "text" or "hex"

    def pattern_parts(self) -> tuple[Part, ...]:
        """The pattern as parts (one part for a literal, whose ``parts`` is empty)."""
        if self.parts:
            return self.parts
        if self.written == "text":
            try:
                source = self.data.decode("utf-8")
            except UnicodeDecodeError:
                source = None
            if source is not None:
                return (Part(_literal_sets(self.data, self.fold_case), field="text",
                             source=source, fold_case=self.fold_case),)
        return (Part(_literal_sets(self.data, self.fold_case), field="hex",
                     source=self.data.hex(" "), fold_case=self.fold_case),)

    def byte_sets(self) -> tuple[frozenset[int], ...]:
        """Per pattern byte, the set of haystack bytes that match it (a
        single-part signature only).

        ``{b}``, or ``{b, b ^ 0x20}`` for an ASCII letter when ``fold_case``.
        """
        parts = self.pattern_parts()
        if len(parts) != 1:
            raise ValueError(f"signature {self.id!r} has {len(parts)} parts; use pattern_parts()")
        return parts[0].sets

    @property
    def is_literal(self) -> bool:
        """One part written as bytes (fold_case allowed), held in ``data``."""
        return not self.parts

    def shortest(self) -> int:
        """Bytes in the shortest occurrence: every part plus every spacing's minimum."""
        return sum(len(p) + p.low for p in self.pattern_parts())

    def readable(self) -> str:
        """The pattern as a person reads it: ``"text"``, ``hex ...``, parts
        joined by their spacings ``.. [0,40] ..``."""
        out = []
        for k, part in enumerate(self.pattern_parts()):
            if k:
                high = "any" if part.high is None else part.high
                out.append(f"[{part.low},{high}]")
            out.append(part.readable())
        return " ".join(out)

    def __len__(self) -> int:
        return self.shortest()


class SignatureSet:
    """An ordered, validated collection of signatures with unique ids.

    The order is the file order; a signature's position is its index in
    match results.  Obtain one from :func:`load_signatures`,
    :func:`loads_signatures` or :func:`signature_set`.
    """

    __slots__ = ("name", "version", "source", "signatures", "_by_id")

    def __init__(
        self,
        signatures: Iterable[Signature],
        *,
        name: str = "",
        version: str = "",
        source: str = "<python>",
    ):
        self.signatures = tuple(signatures)
        self.name = name
        self.version = version
        self.source = source
        self._by_id = {sig.id: i for i, sig in enumerate(self.signatures)}
        if len(self._by_id) != len(self.signatures):
            raise ValueError("signature ids must be unique (use signature_set() to validate)")

    def __len__(self) -> int:
        return len(self.signatures)

    def __iter__(self) -> Iterator[Signature]:
        return iter(self.signatures)

    def __getitem__(self, i: int) -> Signature:
        return self.signatures[i]

    def index(self, sig_id: str) -> int:
        """The position of the signature with this id; ``KeyError`` if absent."""
        try:
            return self._by_id[sig_id]
        except KeyError:
            raise KeyError(f"no signature with id {sig_id!r} in {self.source}") from None

    @property
    def ids(self) -> tuple[str, ...]:
        return tuple(sig.id for sig in self.signatures)

    def __repr__(self) -> str:
        return (
            f"SignatureSet(name={self.name!r}, version={self.version!r}, "
            f"source={self.source!r}, {len(self.signatures)} signatures)"
        )


def load_signatures(path: str | os.PathLike) -> SignatureSet:
    """Read and validate a TOML signature set file.

    Raises :class:`SignatureError` (never anything else for bad input) when
    the file cannot be read, is not UTF-8, is not valid TOML or breaks any
    rule of the format; all problems of the file are reported together.
    """
    source = os.fsdecode(path)
    try:
        with open(path, "rb") as f:
            raw = f.read()
    except FileNotFoundError:
        raise SignatureError(source, ["cannot read the file: no such file"]) from None
    except IsADirectoryError:
        raise SignatureError(source, ["cannot read the file: it is a directory"]) from None
    except OSError as exc:
        reason = exc.strerror or exc.__class__.__name__
        raise SignatureError(source, [f"cannot read the file: {reason}"]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        problem = (
            f"line {line}: the file is not UTF-8 text "
            f"(byte 0x{raw[exc.start]:02x} at offset {exc.start})"
        )
        raise SignatureError(source, [problem]) from None
    return loads_signatures(text.removeprefix("\ufeff"), source)


def loads_signatures(text: str, source: str = "<string>") -> SignatureSet:
    """Parse and validate a signature set from TOML text (see the module doc).

    ``source`` names the text in error messages.
    """
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SignatureError(source, [_toml_problem(str(exc), text)]) from None
    problems: list[str] = []
    for key in document:
        if key not in TOP_LEVEL_KEYS:
            problems.append(
                f"{_at(_key_line(text, key))}top level: unknown key {key!r}"
                + _suggest(key, TOP_LEVEL_KEYS)
            )
    name, version = _check_set(document.get("set", {}), _at(_header_line(text, "set")), problems)
    entries = document.get("signature", [])
    if not isinstance(entries, list):
        problems.append(
            f"{_at(_key_line(text, 'signature'))}top level: 'signature' must be an array "
            "of tables, written as [[signature]] sections"
        )
        return _build([], name, version, source, problems, empty_reported=True)
    lines = _signature_header_lines(text)
    if len(lines) != len(entries):  # written some other way: no reliable line numbers
        lines = [None] * len(entries)
    return _build(list(zip(entries, lines, strict=True)), name, version, source, problems)


def signature_set(
    entries: Iterable[Mapping[str, Any] | Signature],
    *,
    name: str = "",
    version: str = "",
    source: str = "<python>",
) -> SignatureSet:
    """Build a validated set from Python values.

    Each entry is a dict keyed by the TOML field names (validated exactly as
    a file would be) or a :class:`Signature` (revalidated the same way).
    Raises :class:`SignatureError` listing every problem.
    """
    problems: list[str] = []
    name, version = _check_set({"name": name, "version": version}, "", problems)
    return _build([(entry, None) for entry in entries], name, version, source, problems)


# --- validation ----------------------------------------------------------


def _build(
    items: list[tuple[Any, int | None]],
    name: str,
    version: str,
    source: str,
    problems: list[str],
    *,
    empty_reported: bool = False,
) -> SignatureSet:
    """Validate (entry, header line) pairs; raise with every problem found.

    An entry is a table of TOML fields or a :class:`Signature`.  No entries
    is a problem unless ``empty_reported`` says it has been reported already.
    """
    first_seen: dict[str, tuple[int, int | None]] = {}
    signatures: list[Signature] = []
    for number, (entry, line) in enumerate(items, start=1):
        if isinstance(entry, Signature):
            if not isinstance(entry.data, bytes):
                problems.append(
                    f"{_where(line, entry.id, number)}: field 'data': "
                    + _expected("bytes", entry.data)
                )
                # A stand-in pattern keeps the other fields and the id checked.
                entry = replace(entry, data=b"\0")
            entry = _as_entry(entry)
        elif not isinstance(entry, Mapping):
            problems.append(
                f"{_at(line)}signature #{number}: expected a table of fields or a "
                f"Signature, got {_type_name(entry)}"
            )
            continue
        sig = _check_signature(entry, number, line, problems)
        sig_id = entry.get("id")
        if isinstance(sig_id, str) and sig_id.strip():
            if sig_id in first_seen:
                other, other_line = first_seen[sig_id]
                where = f"signature #{other}" + (f" (line {other_line})" if other_line else "")
                problems.append(
                    f"{_where(line, sig_id, number)}: field 'id': duplicate id, "
                    f"already used by {where}"
                )
                continue
            first_seen[sig_id] = (number, line)
        if sig is not None:
            signatures.append(sig)
    if not items and not empty_reported:
        problems.append("no signatures: the set needs at least one [[signature]] table")
    if problems:
        raise SignatureError(source, problems)
    return SignatureSet(signatures, name=name, version=version, source=source)


def _check_set(table: Any, at: str, problems: list[str]) -> tuple[str, str]:
    """Validate the ``[set]`` table; return (name, version)."""
    if not isinstance(table, dict):
        problems.append(f"{at}[set]: must be a table, got {_type_name(table)}")
        return "", ""
    for key in table:
        if key not in SET_FIELDS:
            problems.append(f"{at}[set]: field {key!r}: unknown field" + _suggest(key, SET_FIELDS))
    values = []
    for key in SET_FIELDS:
        value = table.get(key, "")
        if not isinstance(value, str):
            problems.append(f"{at}[set]: field {key!r}: {_expected('a string', value)}")
            value = ""
        values.append(value)
    return values[0], values[1]


def _check_signature(
    entry: Mapping[str, Any], number: int, line: int | None, problems: list[str]
) -> Signature | None:
    """Validate one signature table; append its problems; None if it has any."""
    sig_id = entry.get("id")
    where = _where(line, sig_id, number)
    found: list[str] = []

    def bad(field: str, message: str) -> None:
        found.append(f"{where}: field {field!r}: {message}")

    for key in entry:
        if key not in SIGNATURE_FIELDS:
            bad(key, "unknown field" + _suggest(key, SIGNATURE_FIELDS))

    if "id" not in entry:
        bad("id", "missing: every signature needs a unique id")
    elif not isinstance(sig_id, str):
        bad("id", _expected("a string", sig_id))
    elif not sig_id.strip():
        bad("id", "must not be empty")

    fold_case = _check_bool(entry, "fold_case", False, bad)
    parts = _check_parts(entry, fold_case, bad, found, where)
    checked_parts = parts
    data = b""
    written = "hex"
    if parts is not None and len(parts) == 1 and _is_literal_part(parts[0]):
        data = _literal_bytes(parts[0])
        written = parts[0].field
        parts = ()

    side = _check_choice(entry, "side", SIDES, "either", bad)
    transport = _check_choice(entry, "transport", TRANSPORTS, "any", bad)
    scope = _check_choice(entry, "scope", SCOPES, "datagram", bad)
    if "scope" in entry and transport == "tcp":
        bad("scope", "only applies to UDP, but this signature has transport = 'tcp'")
    ports = _check_ports(entry, bad)
    window = _check_window(entry, checked_parts, bad)
    label = entry.get("label", "")
    if not isinstance(label, str):
        bad("label", _expected("a string", label))
    tags = entry.get("tags", [])
    if not isinstance(tags, list | tuple):
        bad("tags", _expected("an array of strings", tags))
        tags = []
    else:
        for k, tag in enumerate(tags, start=1):
            if not isinstance(tag, str):
                bad("tags", f"element {k}: {_expected('a string', tag)}")
                break

    if found:
        problems.extend(found)
        return None
    return Signature(
        id=sig_id,
        data=data,
        fold_case=fold_case,
        side=side,
        transport=transport,
        ports=ports,
        window=window,
        scope=scope,
        label=label,
        tags=tuple(tags),
        parts=parts,
        written=written,
    )


def _check_parts(entry, fold_case: bool, bad, found: list[str], where: str
                 ) -> tuple[Part, ...] | None:
    """The signature's parts: its own text / hex, or its ``part`` tables."""
    if "part" not in entry:
        part = _check_pattern(entry, fold_case, bad, found, where)
        return None if part is None else (part,)
    if "text" in entry or "hex" in entry:
        found.append(f"{where}: field 'part': the signature also has "
                     f"{'text' if 'text' in entry else 'hex'}; give either parts or one pattern")
        return None
    tables = entry["part"]
    if not isinstance(tables, list | tuple) or not tables:
        bad("part", _expected("[[signature.part]] tables", tables))
        return None
    if len(tables) > MAX_PARTS:
        bad("part", f"{len(tables)} parts; the limit is {MAX_PARTS}")
        return None
    parts: list[Part] = []
    ok = True
    for k, table in enumerate(tables, start=1):
        pwhere = f"{where}: part {k}"
        if not isinstance(table, Mapping):
            found.append(f"{pwhere}: {_expected('a table with text or hex', table)}")
            ok = False
            continue

        def pbad(field: str, message: str, pwhere=pwhere) -> None:
            found.append(f"{pwhere}: field {field!r}: {message}")

        for key in table:
            if key not in PART_FIELDS:
                pbad(key, "unknown field" + _suggest(key, PART_FIELDS))
                ok = False
        fold = _check_bool(table, "fold_case", fold_case, pbad)
        part = _check_pattern(table, fold, pbad, found, pwhere)
        spacing = _check_spacing(table, k, pbad)
        if part is None or spacing is None:
            ok = False
            continue
        parts.append(replace(part, low=spacing[0], high=spacing[1]))
    if not ok:
        return None
    from seamscan import tracker

    need = tracker.signature_bytes(parts)
    if need > tracker.MAX_SIGNATURE_BYTES:
        bad("part", f"the part tracker would need {need:,} bytes per flow side for this "
            f"signature (the limit is {tracker.MAX_SIGNATURE_BYTES:,}); lower a spacing's "
            "minimum or make the part before it longer or more specific")
        return None
    return tuple(parts)


def _check_spacing(table, k: int, bad) -> tuple[int, int | None] | None:
    """``spacing = [MIN, MAX | "any"]``: (MIN, MAX or None); (0, 0) for part 1."""
    if k == 1:
        if "spacing" in table:
            bad("spacing", "the first part has no spacing (nothing comes before it)")
            return None
        return (0, 0)
    value = table.get("spacing", [0, "any"])
    if not (isinstance(value, list | tuple) and len(value) == 2 and _is_int(value[0])
            and (_is_int(value[1]) or value[1] == "any")):
        bad("spacing", _expected('[MIN, MAX] with MAX an integer or "any"', value))
        return None
    low, high = value
    if not 0 <= low <= MAX_SPACING:
        bad("spacing", f"MIN {low} is out of range 0..{MAX_SPACING}")
        return None
    if high == "any":
        return (low, None)
    if not 0 <= high <= MAX_SPACING:
        bad("spacing", f"MAX {high} is out of range 0..{MAX_SPACING} (or \"any\")")
        return None
    if high < low:
        bad("spacing", f"MAX {high} is less than MIN {low}")
        return None
    return (low, high)


def _check_pattern(entry, fold_case: bool, bad, found: list[str], where: str) -> Part | None:
    """The pattern of exactly one of ``text`` / ``hex``, as a :class:`Part`, or None."""
    has_text, has_hex = "text" in entry, "hex" in entry
    if has_text and has_hex:
        found.append(f"{where}: fields 'text' and 'hex': both given; use exactly one")
        return None
    if not (has_text or has_hex):
        found.append(f"{where}: field 'text' or 'hex': missing; give exactly one")
        return None
    field = "text" if has_text else "hex"
    value = entry[field]
    if not isinstance(value, str):
        bad(field, _expected("a string", value))
        return None
    if has_text:
        try:
            data = value.encode("utf-8")
        except UnicodeEncodeError as exc:
            bad("text", f"cannot be encoded as UTF-8 (character {exc.start + 1}: {exc.reason})")
            return None
        sets = _literal_sets(data, fold_case)
    else:
        try:
            sets = _parse_hex(value, fold_case)
        except ValueError as exc:
            bad("hex", str(exc))
            return None
    if not sets:
        bad(field, "empty pattern")
        return None
    if len(sets) > MAX_PATTERN_BYTES:
        bad(field, f"pattern is {len(sets)} bytes long; the limit is {MAX_PATTERN_BYTES}")
        return None
    return Part(sets, field=field, source=value, fold_case=fold_case)


def _literal_sets(data: bytes, fold_case: bool) -> tuple[frozenset[int], ...]:
    if not fold_case:
        return tuple(frozenset((b,)) for b in data)
    return tuple(_fold(frozenset((b,))) for b in data)


def _fold(byte_set: frozenset[int]) -> frozenset[int]:
    """The set with the other ASCII case of each letter in it."""
    return byte_set | frozenset(b ^ 0x20 for b in byte_set if _is_ascii_letter(b))


def _is_literal_part(part: Part) -> bool:
    """Written as bytes only: text, or hex without ``??`` and sets."""
    return part.field == "text" or not any(ch in part.source for ch in "?<")


def _literal_bytes(part: Part) -> bytes:
    """The bytes of a literal part, as written (fold_case not applied)."""
    if part.field == "text":
        return part.source.encode("utf-8")
    return bytes.fromhex(part.source)


def _parse_hex(text: str, fold_case: bool = False) -> tuple[frozenset[int], ...]:
    """Hex tokens (byte pairs, ``??``, ``<...>`` sets), single spaces between
    tokens (pairs may also be written together); ValueError explains."""
    if _HEX_OK.fullmatch(text):
        return _literal_sets(bytes.fromhex(text), fold_case)
    if "?" not in text and "<" not in text and ">" not in text:
        digits = 0
        for pos, ch in enumerate(text, start=1):
            if ch == " ":
                if digits % 2:
                    raise ValueError(f"a space at character {pos} splits a byte pair")
            elif ch in _HEX_DIGITS:
                digits += 1
            else:
                raise ValueError(
                    f"{ch!r} at character {pos} is not a hex digit "
                    "(allowed: 0-9, a-f, A-F, ??, <...> byte sets, and spaces between tokens)"
                )
        raise ValueError(f"odd number of hex digits ({digits})")
    sets: list[frozenset[int]] = []
    pos = 0
    while pos < len(text):
        if text[pos] == " ":
            pos += 1
            continue
        m = _HEX_TOKEN.match(text, pos)
        token = m.group(0)
        where = f"token {token!r} at character {pos + 1}"
        if token.startswith("<"):
            if not token.endswith(">"):
                raise ValueError(f"{where}: a byte set '<' is not closed with '>'")
            sets.append(_parse_set(token, where, fold_case))
        elif token == "??":
            sets.append(ALL_BYTES)
        elif "?" in token:
            raise ValueError(f"{where}: '?' only comes as '??' (any byte), alone between spaces")
        elif token.startswith(">") or ">" in token or "<" in token:
            raise ValueError(f"{where}: a '>' without its '<', or a set not set apart by spaces")
        elif len(token) % 2 or not all(ch in _HEX_DIGITS for ch in token):
            bad_ch = next((ch for ch in token if ch not in _HEX_DIGITS), None)
            if bad_ch is not None:
                raise ValueError(f"{where}: {bad_ch!r} is not a hex digit (allowed: 0-9, a-f, "
                                 "A-F, ??, <...> byte sets, and spaces between tokens)")
            raise ValueError(f"{where}: odd number of hex digits")
        else:
            sets.extend(_literal_sets(bytes.fromhex(token), fold_case))
        pos = m.end()
    return tuple(sets)


def _parse_set(token: str, where: str, fold_case: bool) -> frozenset[int]:
    """``<30-39 41>``, ``<!0d 0a>``: the set, fold_case applied, then the complement."""
    body = token[1:-1]
    negate = body.startswith("!")
    if negate:
        body = body[1:]
    members: set[int] = set()
    for item in body.split(" ") if body else ():
        if not item:
            raise ValueError(f"{where}: items of a set are separated by single spaces")
        low_high = item.split("-")
        if len(low_high) > 2 or not all(_PAIR.fullmatch(x) for x in low_high):
            raise ValueError(f"{where}: {item!r} is neither a byte pair (like 0d) nor a range "
                             "(like 30-39)")
        low = int(low_high[0], 16)
        high = int(low_high[-1], 16)
        if high < low:
            raise ValueError(f"{where}: the range {item!r} is reversed (write {low_high[1]}-"
                             f"{low_high[0]})")
        members.update(range(low, high + 1))
    raw = frozenset(members)
    if negate:
        raw = ALL_BYTES - raw
    if not raw:
        raise ValueError(f"{where}: the set is empty, so it matches no byte")
    if raw == ALL_BYTES:
        raise ValueError(f"{where}: the set holds every byte; write ?? for any byte")
    folded = _fold(frozenset(members)) if fold_case else frozenset(members)
    result = ALL_BYTES - folded if negate else folded
    if not result:
        raise ValueError(f"{where}: with fold_case the set matches no byte")
    return result


def _check_bool(entry, field: str, default: bool, bad) -> bool:
    value = entry.get(field, default)
    if not isinstance(value, bool):
        bad(field, _expected("true or false", value))
        return default
    return value


def _check_choice(entry, field: str, allowed: tuple[str, ...], default: str, bad) -> str | None:
    """The field's value if it is one of ``allowed``; None after a problem."""
    value = entry.get(field, default)
    if isinstance(value, str) and value in allowed:
        return value
    choices = ", ".join(repr(a) for a in allowed)
    if isinstance(value, str):
        close = _closest(value, allowed)
        hint = f"; did you mean {close!r}?" if close else ""
        bad(field, f"{value!r} is not one of {choices}{hint}")
    else:
        bad(field, _expected(f"one of {choices}", value))
    return None


def _check_ports(entry, bad) -> tuple[int, ...] | None:
    if "ports" not in entry:
        return None
    value = entry["ports"]
    if not isinstance(value, list | tuple):
        bad("ports", _expected("an array of port numbers", value))
        return None
    if not value:
        bad("ports", "empty array matches no flow; leave the field out to allow any port")
        return None
    for k, port in enumerate(value, start=1):
        if not _is_int(port):
            bad("ports", f"element {k}: {_expected('an integer', port)}")
            return None
        if not 0 <= port <= MAX_PORT:
            bad("ports", f"element {k}: port {port} is out of range 0..{MAX_PORT}")
            return None
    return tuple(sorted(set(value)))


def _check_window(entry, parts, bad) -> tuple[int, int] | None:
    if "window" not in entry:
        return None
    value = entry["window"]
    if not (isinstance(value, list | tuple) and len(value) == 2 and all(map(_is_int, value))):
        bad("window", _expected("[start, end], two integers", value))
        return None
    start, end = value
    if start < 0:
        bad("window", f"start {start} is negative")
    elif start >= end:
        bad("window", f"start {start} must be less than end {end}")
    elif end > MAX_WINDOW_END:
        bad("window", f"end {end} is larger than {MAX_WINDOW_END}")
    elif parts is not None and end - start < (need := sum(len(p) + p.low for p in parts)):
        bad(
            "window",
            f"[{start}, {end}) holds {end - start} bytes, fewer than the "
            f"{need}-byte pattern: it could never match",
        )
    else:
        return (start, end)
    return None


def _as_entry(sig: Signature) -> dict[str, Any]:
    """A Signature back in TOML field names, so it is validated like a file."""
    entry: dict[str, Any] = {
        "id": sig.id,
        "fold_case": sig.fold_case,
        "side": sig.side,
        "transport": sig.transport,
        "label": sig.label,
        "tags": sig.tags,
    }
    parts = sig.parts or None
    if parts is None:
        if sig.written == "text" and sig.data.decode("utf-8", "replace").encode() == sig.data:
            entry["text"] = sig.data.decode("utf-8")
        else:
            entry["hex"] = sig.data.hex()
    elif len(parts) == 1:
        entry[parts[0].field] = parts[0].source
    else:
        entry["part"] = [
            {p.field: p.source, "fold_case": p.fold_case,
             **({"spacing": [p.low, "any" if p.high is None else p.high]} if k else {})}
            for k, p in enumerate(parts)
        ]
    if sig.transport != "tcp" or sig.scope != "datagram":
        entry["scope"] = sig.scope
    if sig.ports is not None:
        entry["ports"] = sig.ports
    if sig.window is not None:
        entry["window"] = sig.window
    return entry


# --- message helpers -----------------------------------------------------


def _where(line: int | None, sig_id: Any, number: int) -> str:
    """``line 12: signature 'x' (#3)`` or ``signature #3`` when the id is unusable."""
    if isinstance(sig_id, str) and sig_id.strip():
        return f"{_at(line)}signature {sig_id!r} (#{number})"
    return f"{_at(line)}signature #{number}"


def _at(line: int | None) -> str:
    return f"line {line}: " if line else ""


def _suggest(word: str, options: tuple[str, ...]) -> str:
    """``; did you mean 'x'?`` for a close option, else the list of options."""
    close = _closest(word, options)
    return f"; did you mean {close!r}?" if close else "; known: " + ", ".join(options)


def _closest(word: str, options: tuple[str, ...]) -> str | None:
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return close[0] if close else None


def _expected(what: str, value: Any) -> str:
    return f"expected {what}, got {_type_name(value)} {_short_repr(value)}"


def _type_name(value: Any) -> str:
    for kind, toml_name in _TOML_TYPE_NAMES.items():
        if type(value) is kind:
            return toml_name
    return type(value).__name__


def _short_repr(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _is_int(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_ascii_letter(b: int) -> bool:
    return 0x41 <= b <= 0x5A or 0x61 <= b <= 0x7A


# --- locating things in the TOML text (best effort) -------------------------


def _toml_problem(message: str, text: str) -> str:
    """tomllib's message as ``line N: TOML syntax error: ... (column C)``."""
    m = _TOML_POSITION.match(message)
    if m:
        hint = "; is a string left unclosed?" if m["msg"] == "Illegal character '\\n'" else ""
        return f"line {m['line']}: TOML syntax error: {m['msg']} (column {m['col']}){hint}"
    m = _TOML_AT_END.match(message)
    if m:
        last = text.count("\n") + (0 if text.endswith("\n") else 1)
        return f"line {max(last, 1)}: TOML syntax error: {m['msg']} (at the end of the file)"
    return f"TOML syntax error: {message}"


def _key_pattern(key: str) -> str:
    """A regex for the key, bare or quoted, as TOML may write it."""
    k = re.escape(key)
    return rf"(?:{k}|\"{k}\"|'{k}')"


def _signature_header_lines(text: str) -> list[int]:
    """Line numbers of the ``[[signature]]`` headers, in order."""
    header = re.compile(rf"^[ \t]*\[\[[ \t]*{_key_pattern('signature')}[ \t]*\]\]", re.M)
    lines: list[int] = []
    line, pos = 1, 0
    for m in header.finditer(text):
        line += text.count("\n", pos, m.start())
        pos = m.start()
        lines.append(line)
    return lines


def _header_line(text: str, key: str) -> int | None:
    """Line of the first ``[key]`` table header, if any."""
    m = re.search(rf"^[ \t]*\[[ \t]*{_key_pattern(key)}[ \t]*\]", text, re.M)
    return text.count("\n", 0, m.start()) + 1 if m else None


def _key_line(text: str, key: str) -> int | None:
    """Line where a top-level key first appears: ``[key``, ``[[key`` or ``key =``."""
    k = _key_pattern(key)
    m = re.search(rf"^[ \t]*(?:\[\[?[ \t]*{k}[ \t]*[\].]|{k}[ \t]*[=.])", text, re.M)
    return text.count("\n", 0, m.start()) + 1 if m else None
