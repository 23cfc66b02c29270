"""The host's rules for a table image: what ``ss_load`` leaves unchecked.

``csrc/FORMAT.md`` ("Loading") splits the format's rules in two.  The
*safety* rules (every offset, count and index the scanner follows lies
inside the image; the work per byte is bounded) are what every runtime must
enforce, and the C loader does, on the host and on devices.  The rest are
*well-formedness* rules: a runtime never reads outside an image that breaks
them and always finishes, but the image is not one the compiler writes, so
its matches are not the automaton's.  Those are checked here, on the host,
before an image is scanned with (``Table.from_bytes``) or shipped
(``seamscan inspect``), so that a device only ever gets images that pass
both.

:func:`problems` lists every rule an image breaks, each message naming the
rule; it expects an image ``ss_load`` has accepted (sizes and bounds are not
checked again).  No numpy here: loading an image stays light.
"""

from __future__ import annotations

import struct
import sys
from array import array

from seamscan import compact, image

MAX_SECTIONS = 64
REQUIRED = {image.LAYOUT_DENSE: (image.SEC_CLASSES, image.SEC_DENSE, image.SEC_OUT_INDEX,
                                 image.SEC_OUT_LIST, image.SEC_SIGS, image.SEC_PORTS),
            image.LAYOUT_COMPACT: (image.SEC_CLASSES, image.SEC_OUT_INDEX, image.SEC_OUT_LIST,
                                   image.SEC_SIGS, image.SEC_PORTS, *compact.SECTION_NAMES)}
_RECORD_FLAGS = image.SIG_HAS_WINDOW | image.SIG_DATAGRAM
_TYPECODES = {1: "B", 2: "H", 4: next(c for c in "IL" if array(c).itemsize == 4)}


def _name(kind: int) -> str:
    name = image.SECTION_NAMES.get(kind) or compact.SECTION_NAMES.get(kind) or "unknown"
    return f"section {kind} ({name})"


def _unsigned(raw, width: int) -> array:
    """Little-endian unsigned integers of ``width`` bytes (1, 2 or 4)."""
    values = array(_TYPECODES[width])
    values.frombytes(bytes(raw[:len(raw) - len(raw) % width]))
    if width > 1 and sys.byteorder == "big":
        values.byteswap()
    return values


def problems(blob) -> list[str]:
    """Every well-formedness rule the image breaks (empty: none)."""
    blob = bytes(blob)
    h = image.read_header(blob)
    found: list[str] = []
    found += _header(blob, h)
    found += _directory(blob, h)
    if found:  # the rest reads sections the directory describes
        return found
    found += _records(blob, h)
    if h.nparts:
        found += _parts(blob, h)
    try:
        image.read_names(blob, h)
    except image.TableError as err:
        found.append(str(err))
    if h.layout == image.LAYOUT_COMPACT:
        found += _compact(blob, h)
    return found


def check(blob) -> None:
    """Raise :class:`~seamscan.image.TableError` naming the first rule broken."""
    found = problems(blob)
    if found:
        more = f" (and {len(found) - 1} more)" if len(found) > 1 else ""
        raise image.TableError(f"table image is not well-formed: {found[0]}{more}")


def _header(blob: bytes, h: image.Header) -> list[str]:
    out = []
    if h.flags:
        out.append(f"header flags are {h.flags:#x}, not 0")
    if h.version == image.FORMAT_VERSION:
        if any(blob[56:64]):
            out.append("the header's reserved bytes 56..63 are not all zero")
        if h.nparts == 0:
            out.append("version 2 without part records: write a set without parts as version 1")
    elif any(blob[48:64]):
        out.append("the header's reserved bytes 48..63 are not all zero")
    if not 1 <= h.nclasses <= 256:
        out.append(f"{h.nclasses} byte classes: must be 1..256")
    if h.stride < h.nclasses:
        out.append(f"stride {h.stride} is below the class count {h.nclasses}")
    if h.trans_width < 4 and h.states > 1 << (8 * h.trans_width):
        out.append(f"{h.states:,} states do not fit {8 * h.trans_width}-bit state ids")
    if h.max_len < 1:
        out.append("max_len is 0")
    if h.nsections > MAX_SECTIONS:
        out.append(f"{h.nsections} sections: at most {MAX_SECTIONS}")
    if h.layout == image.LAYOUT_COMPACT and h.first_match != h.states:
        out.append(f"compact: first_match {h.first_match:,} is not the state count {h.states:,}")
    return out


def _directory(blob: bytes, h: image.Header) -> list[str]:
    out = []
    first = image.HEADER_SIZE + image.SECTION_ENTRY * h.nsections
    seen: dict[int, tuple[int, int]] = {}
    for i in range(h.nsections):
        kind, flags, off, size = struct.unpack_from("<HHII", blob, image.HEADER_SIZE + 12 * i)
        what = _name(kind)
        if kind in seen:
            out.append(f"{what} appears twice in the directory")
        seen.setdefault(kind, (off, size))
        if flags:
            out.append(f"{what}: directory flags {flags:#x}, not 0")
        if off < first:
            out.append(f"{what}: offset {off} lies in the header or the directory")
        if off % image.ALIGN:
            out.append(f"{what}: offset {off} is not a multiple of {image.ALIGN}")
        if off + size > h.size:
            out.append(f"{what}: bytes {off}..{off + size} run past the image's {h.size}")
    spans = sorted((off, off + size, kind) for kind, (off, size) in seen.items() if size)
    for (_a, end, k1), (start, _b, k2) in zip(spans, spans[1:], strict=False):
        if start < end:
            out.append(f"{_name(k1)} and {_name(k2)} overlap")
    for kind in REQUIRED.get(h.layout, ()):
        if kind not in seen:
            out.append(f"{_name(kind)} is missing")
    return out


def _section(blob: bytes, h: image.Header, kind: int) -> bytes:
    off, size = h.sections[kind]
    return blob[off:off + size]


def _records(blob: bytes, h: image.Header) -> list[str]:
    out = []
    ports = h.sections[image.SEC_PORTS][1]
    if ports % 2:
        out.append(f"the ports section holds {ports} bytes, not a whole number of u16")
    lists = [(image.SEC_OUT_LIST, h.out_width, "output list entries")]
    if h.layout == image.LAYOUT_COMPACT:
        lists.append((compact.SEC_EXTRA_LIST, 1 + h.trans_width, "transition entries"))
    for kind, width, what in lists:
        size = h.sections[kind][1]
        if size % width:
            out.append(f"{_name(kind)}: {size} bytes is not a whole number of {width}-byte {what}")
    raw = _section(blob, h, image.SEC_SIGS)
    for i in range(h.sigs):
        side, transport, flags, length, _nports, _first, w0, w1 = image.SIG_RECORD.unpack_from(
            raw, image.SIG_RECORD.size * i)
        what = f"signature record #{i + 1}"
        if side > 2:
            out.append(f"{what}: side {side} (0 either, 1 client, 2 server)")
        if transport > 2:
            out.append(f"{what}: transport {transport} (0 any, 1 TCP, 2 UDP)")
        if flags & ~_RECORD_FLAGS:
            out.append(f"{what}: unknown flag bits {flags & ~_RECORD_FLAGS:#x}")
        if raw[image.SIG_RECORD.size * i + 3]:
            out.append(f"{what}: its pad byte is not 0")
        if length == 0:
            out.append(f"{what}: length 0")
        if flags & image.SIG_HAS_WINDOW and w0 >= w1:
            out.append(f"{what}: window [{w0}, {w1}) is empty")
        if not flags & image.SIG_HAS_WINDOW and (w0, w1) != (0, image.NO_WINDOW_END):
            out.append(f"{what}: no window flag, yet window fields {w0}, {w1:#x}")
    return out


# --- the compact layout ---------------------------------------------------------

ONE = ord("1")
_FLAG_TEXT = {bit: bytes(ONE if (hb << 8) & bit else ord("0") for hb in range(256))
              for bit in (compact.W_EXTRA, compact.W_FAIL_STORED, compact.W_OWN)}


def _members(raw: bytes, states: int) -> tuple[bytes, bool]:
    """A rank set as one ASCII 0/1 per state, and whether bits past `states` are clear."""
    maps = [compact.RANK_ENTRY.unpack_from(raw, k)[1]
            for k in range(0, len(raw), compact.RANK_ENTRY.size)]
    text = "".join(format(m, "064b")[::-1] for m in maps).encode()
    return text[:states], b"1" not in text[states:]


def _compact(blob: bytes, h: image.Header) -> list[str]:
    out: list[str] = []
    n, tw, ow = h.states, h.trans_width, h.out_width
    words_raw = _section(blob, h, compact.SEC_WORDS)
    words = _unsigned(words_raw, 2)
    high = words_raw[1::2]
    if any(w & 0xC000 for w in words):
        out.append("a state word has bit 14 or 15 set")
    if words[0]:
        out.append(f"state 0's word is {words[0]:#06x}: the start state has no flags and class 0")
    if any((w & compact.W_FAIL_STORED) and (w & compact.W_FAIL_ROOT_CHILD) for w in words):
        out.append("a state word has both FAILX and FAILROOT")
    members = {}
    for kind, bit, name in ((compact.SEC_FAIL_RANK, compact.W_FAIL_STORED, "FAILX"),
                            (compact.SEC_EXTRA_RANK, compact.W_EXTRA, "EXTRA"),
                            (compact.SEC_OWN_RANK, compact.W_OWN, "OWN")):
        text, clear = _members(_section(blob, h, kind), n)
        members[kind] = text
        if not clear:
            out.append(f"{_name(kind)} has bits set past the last state")
        if text != high.translate(_FLAG_TEXT[bit]):
            out.append(f"the {name} bits of the state words disagree with {_name(kind)}")
    if out:
        return out  # the checks below walk the lists by these bits

    root = _unsigned(_section(blob, h, compact.SEC_ROOT), tw)
    fail_list = _unsigned(_section(blob, h, compact.SEC_FAIL_LIST), tw)
    extra_index = _unsigned(_section(blob, h, compact.SEC_EXTRA_INDEX), ow)
    extra_list = _section(blob, h, compact.SEC_EXTRA_LIST)
    own_index = _unsigned(_section(blob, h, image.SEC_OUT_INDEX), ow)
    own_list = _unsigned(_section(blob, h, image.SEC_OUT_LIST), ow)
    entry = 1 + tw
    for index, total, what in ((extra_index, len(extra_list) // entry, "transition index"),
                               (own_index, len(own_list), "output index")):
        if index[0] != 0 or index[-1] != total or any(a > b for a, b in zip(index, index[1:], strict=False)):
            out.append(f"the {what} does not run from 0, never decreasing, to its list's "
                       f"{total:,} entries")
    if out:
        return out

    # The transition filter: every transition of a state in set 12 (its
    # stored entries, and with CHILD the one to s + 1) has its bit set.
    filt = _section(blob, h, compact.SEC_EXTRA_FILTER)
    log2 = (8 * len(filt)).bit_length() - 1
    extra_at = [s for s, bit in enumerate(members[compact.SEC_EXTRA_RANK]) if bit == ONE]
    for r, s in enumerate(extra_at):
        keys = [extra_list[e * entry] for e in range(extra_index[r], extra_index[r + 1])]
        if words[s] & compact.W_CHILD:
            keys.append(words[s + 1] & 0xFF)
        for c in keys:
            bit = compact.filter_bit(s, c, log2)
            if not filt[bit >> 3] >> (bit & 7) & 1:
                return out + [f"the transition filter misses state {s:,}'s transition on "
                              f"class {c}"]

    # Failure links, and the outputs they chain: every chain reaches the
    # start state within max_len links; a state's own outputs are not its
    # failure state's; MATCH says whether it has outputs at all.
    fail = [0] * n
    links = iter(fail_list)
    for s in range(1, n):
        w = words[s]
        if w & compact.W_FAIL_STORED:
            fail[s] = next(links)
        elif w & compact.W_FAIL_ROOT_CHILD:
            fail[s] = root[w & 0xFF]
    own_at = [s for s, bit in enumerate(members[compact.SEC_OWN_RANK]) if bit == ONE]
    own = {s: own_list[own_index[r]:own_index[r + 1]] for r, s in enumerate(own_at)}
    for s, sigs in own.items():
        if any(a >= b for a, b in zip(sigs, sigs[1:], strict=False)):
            return out + [f"state {s:,}'s own outputs are not in ascending signature order"]
    depth = [0] * n  # links from the state to the start state, once known
    full: dict[int, frozenset] = {}  # the outputs of each state that has any
    most = 0
    for s in range(1, n):
        chain = []
        t = s
        while t and not depth[t]:
            chain.append(t)
            t = fail[t]
            if len(chain) > h.max_len:
                return out + [f"the failure chain from state {s:,} does not reach the start "
                              f"state within max_len = {h.max_len} links"]
        d = depth[t]
        for t in reversed(chain):  # failure states before the states failing to them
            d += 1
            depth[t] = d
            inherited = full.get(fail[t], frozenset())
            mine = own.get(t, ())
            if not inherited.isdisjoint(mine):
                return out + [f"state {t:,} lists as its own an output of its failure state"]
            outputs = inherited.union(mine)
            if bool(words[t] & compact.W_MATCH) != bool(outputs):
                return out + [f"state {t:,}: MATCH is "
                              f"{'set' if words[t] & compact.W_MATCH else 'clear'} but it has "
                              f"{len(outputs)} outputs"]
            if outputs:
                full[t] = outputs
                most = max(most, len(outputs))
    if most != h.max_outputs:
        out.append(f"max_outputs is {h.max_outputs}, but the most outputs of a state is {most}")
    return out


def _parts(blob: bytes, h: image.Header) -> list[str]:
    """Part records (section 17) as the compiler writes them: every signature
    has its parts, in order, all with the same count; the first part has no
    spacing; MIN <= MAX; the link of every part but the last has a capacity
    and the links tile the tracker memory in order; a signature record of a
    multi-part signature holds its shortest occurrence's length."""
    from seamscan import tracker

    out: list[str] = []
    raw = _section(blob, h, image.SEC_PARTS)
    records = [image.PART_RECORD.unpack_from(raw, image.PART_RECORD.size * i)
               for i in range(h.nparts)]
    expect_sig, expect_index, slot = 0, 0, 0
    for i, (sig, index, count, _length, cap, low, high, link) in enumerate(records):
        what = f"part record #{i + 1}"
        if (sig, index) != (expect_sig, expect_index):
            out.append(f"{what}: signature #{sig + 1} part {index + 1}, expected signature "
                       f"#{expect_sig + 1} part {expect_index + 1}")
            break
        if index and records[i - 1][2] != count:
            out.append(f"{what}: {count} parts, the record before says {records[i - 1][2]}")
        if index == 0 and (low, high) != (0, 0):
            out.append(f"{what}: a first part with a spacing")
        if index and high != tracker.ANY and low > high:
            out.append(f"{what}: spacing MIN {low} above MAX {high}")
        last = index + 1 == count
        if last and (cap or link):
            out.append(f"{what}: the last part has a link")
        if not last:
            if cap == 0:
                out.append(f"{what}: a link of capacity 0")
            if link != slot:
                out.append(f"{what}: link at byte {link}, expected {slot}")
            slot += tracker.link_bytes(cap)
        expect_sig, expect_index = (sig + 1, 0) if last else (sig, index + 1)
    else:
        longest = max((r[3] for r in records), default=0)
        if longest != h.max_len:
            out.append(f"max_len {h.max_len} is not the longest part, {longest} bytes")
        if expect_sig != h.sigs or expect_index:
            out.append(f"the part records cover {expect_sig} of {h.sigs} signatures")
        if slot != h.track_bytes:
            out.append(f"tracker bytes {h.track_bytes}, the links take {slot}")
    return out
