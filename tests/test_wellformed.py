"""The split of csrc/FORMAT.md's rules ("Loading"), for the compact layout.

* every image the compiler writes, of every layout and vector, breaks no rule;
* images breaking a *safety* rule (one the scanner's reads depend on) are
  refused by ss_load, and by Python with the same code;
* images breaking one *well-formedness* rule each (``seamscan.wellformed``)
  are refused by Python with a message naming the rule, while ss_load takes
  them, and the harness scans them under AddressSanitizer and
  UndefinedBehaviorSanitizer without a report: the C loader leaves no
  safety to these rules;
* ``Table.from_bytes(..., well_formed=False)`` scans such an image as a
  device would.

The header, directory and signature-record rules, shared by both layouts,
are in ``test_c_runtime.py`` (``_damaged`` and ``_ill_formed``).
"""

from __future__ import annotations

import re
import struct
import zlib
from pathlib import Path

import pytest

import seamscan
from seamscan import compact, image, wellformed
from seamscan.image import TableError
from seamscan.signatures import signature_set
from test_c_runtime import _check_c, build_dir, seamrun_asan  # noqa: F401  (fixtures)
from vectors import LAYOUTS, VECTORS

ERR = {name: int(value) for name, value in re.findall(
    r"#define SS_ERR_(\w+) \(?(-\d+)", (Path(__file__).resolve().parents[1] / "csrc" / "seam.h").read_text())}

# "lay" and "ay" chain (the failure state of "lay" is "ay"); "lay" twice gives
# a state with two outputs of its own; a branching start for the filter.
LAB = [
    {"id": "relay", "text": "POST /relay/", "side": "client", "transport": "tcp", "ports": [80, 8080]},
    {"id": "temp", "text": "temp=", "fold_case": True, "window": [0, 512]},
    {"id": "lay", "text": "lay"},
    {"id": "ay", "text": "ay", "side": "server"},
    {"id": "lay-again", "text": "lay", "transport": "udp"},
    {"id": "tab", "text": "tab"},
    {"id": "tac", "text": "tac"},
    {"id": "tad", "text": "tad"},
]
PROBE = b"POST /relay/ temp=1 play lay away tab tac tad TEMP=" * 8


class Compact:
    """A compact image with its sections at hand, for making changed copies."""

    def __init__(self, blob: bytes):
        self.blob = bytes(blob)
        self.h = image.read_header(self.blob)
        self.model = compact.CompactModel(self.blob)
        self.tw, self.ow = self.h.trans_width, self.h.out_width

    def at(self, kind: int) -> int:
        return self.h.sections[kind][0]

    def size(self, kind: int) -> int:
        return self.h.sections[kind][1]

    def word(self, s: int) -> int:
        return struct.unpack_from("<H", self.blob, self.at(compact.SEC_WORDS) + 2 * s)[0]

    def states_with(self, bit: int) -> list[int]:
        return [s for s in range(self.h.states) if self.word(s) & bit]

    def patched(self, *edits: tuple[int, str, int]) -> bytes:
        """Values written at offsets, the CRC recomputed."""
        out = bytearray(self.blob)
        for offset, fmt, value in edits:
            struct.pack_into(fmt, out, offset, value)
        struct.pack_into("<I", out, 12, zlib.crc32(out[16:]))
        return bytes(out)

    def word_set(self, s: int, value: int) -> tuple[int, str, int]:
        return (self.at(compact.SEC_WORDS) + 2 * s, "<H", value)

    def rebuilt(self, changes: dict[int, bytes], **header) -> bytes:
        """The image laid out again with some sections replaced (sizes may change)."""
        sections = []
        for i in range(self.h.nsections):
            kind, _f, off, size = struct.unpack_from("<HHII", self.blob, 64 + 12 * i)
            sections.append((kind, changes.get(kind, self.blob[off:off + size])))
        fields = {"states": self.h.states, "first_match": self.h.first_match, "sigs": self.h.sigs,
                  "nclasses": self.h.nclasses, "stride": self.h.stride,
                  "trans_width": self.tw, "out_width": self.ow,
                  "max_outputs": self.h.max_outputs, "max_len": self.h.max_len}
        fields.update(header)
        return image._assemble(self.h.layout, sections, **fields)


@pytest.fixture(scope="module")
def lab() -> Compact:
    table = seamscan.compile(signature_set(LAB, name="lab"), layout="compact")
    return Compact(table.to_bytes())


def _own_state(c: Compact, sig_id: str) -> int:
    """The state whose own outputs hold signature `sig_id` (by its index)."""
    index = [s["id"] for s in LAB].index(sig_id)
    for s in c.states_with(compact.W_OWN):
        has, r = c.model._rank(compact.SEC_OWN_RANK, s)
        if index in c.model.own_list[c.model.own_index[r]:c.model.own_index[r + 1]].tolist():
            return s
    raise AssertionError(sig_id)


def _own_entry_offset(c: Compact, s: int, k: int = 0) -> int:
    _has, r = c.model._rank(compact.SEC_OWN_RANK, s)
    return c.at(image.SEC_OUT_LIST) + c.ow * (int(c.model.own_index[r]) + k)


# --- every image the compiler writes -------------------------------------------


@pytest.mark.parametrize("layout", LAYOUTS)
def test_compiled_images_break_no_rule(layout):
    for vector in VECTORS:
        blob = seamscan.compile(signature_set(vector.sigs, name=vector.name), layout=layout).to_bytes()
        assert wellformed.problems(blob) == [], vector.name


def test_lab_image_as_built(lab):
    # The rules below need these shapes in the lab set.
    assert lab.states_with(compact.W_EXTRA) and lab.states_with(compact.W_FAIL_STORED)
    assert lab.h.max_outputs == 3  # "lay": lay, lay-again and, through its failure state, ay
    assert wellformed.problems(lab.blob) == []


# --- safety: ss_load refuses ----------------------------------------------------


def _unsafe(c: Compact) -> list[tuple[str, bytes, int]]:
    n, tw, ow = c.h.states, c.tw, c.ow
    ids = {1: "<B", 2: "<H", 4: "<I"}[tw]
    owf = {2: "<H", 4: "<I"}[ow]
    failx = c.states_with(compact.W_FAIL_STORED)[0]
    _has, r = c.model._rank(compact.SEC_FAIL_RANK, failx)
    extra_list, extra_entries = c.at(compact.SEC_EXTRA_LIST), c.size(compact.SEC_EXTRA_LIST) // (1 + tw)
    own_index, outs = c.at(image.SEC_OUT_INDEX), c.size(image.SEC_OUT_LIST) // ow
    rank = c.at(compact.SEC_EXTRA_RANK)
    filt = c.blob[c.at(compact.SEC_EXTRA_FILTER):][:c.size(compact.SEC_EXTRA_FILTER)]
    return [
        ("start-row-past-states", c.patched((c.at(compact.SEC_ROOT), ids, n)), ERR["TRANS"]),
        ("failure-link-past-states", c.patched((c.at(compact.SEC_FAIL_LIST) + tw * r, ids, n)),
         ERR["TRANS"]),
        ("transition-target-past-states", c.patched((extra_list + (1 + tw) * (extra_entries - 1) + 1, ids, n)),
         ERR["TRANS"]),
        ("word-class-past-classes", c.patched(c.word_set(n - 1, (c.word(n - 1) & ~0xFF) | c.h.nclasses)),
         ERR["TRANS"]),
        ("last-state-child", c.patched(c.word_set(n - 1, c.word(n - 1) | compact.W_CHILD)), ERR["TRANS"]),
        ("rank-count-wrong", c.patched((rank, "<I", 1)), ERR["SECTION"]),
        ("transition-index-past-list", c.patched((c.at(compact.SEC_EXTRA_INDEX) + ow, owf, extra_entries + 1)),
         ERR["TRANS"]),
        ("output-index-past-list", c.patched((own_index + ow, owf, outs + 1)), ERR["OUTPUTS"]),
        ("output-names-missing-sig", c.patched((c.at(image.SEC_OUT_LIST), owf, c.h.sigs)), ERR["OUTPUTS"]),
        ("max-outputs-past-sigs", c.patched((40, "<I", c.h.sigs + 1)), ERR["HEADER"]),
        ("max-outputs-huge", c.patched((40, "<I", 0x7FFFFFFF)), ERR["HEADER"]),
        ("words-short", c.patched((64 + 12 * _entry_index(c, compact.SEC_WORDS) + 8, "<I",
                                   c.size(compact.SEC_WORDS) - 2)), ERR["SECTION"]),
        ("filter-not-a-power-of-two", c.rebuilt({compact.SEC_EXTRA_FILTER: filt + bytes(8)}),
         ERR["SECTION"]),
        ("filter-too-small", c.rebuilt({compact.SEC_EXTRA_FILTER: bytes(4)}), ERR["SECTION"]),
        ("failure-list-short", c.rebuilt({compact.SEC_FAIL_LIST: c.blob[
            c.at(compact.SEC_FAIL_LIST):][:c.size(compact.SEC_FAIL_LIST) - tw]}), ERR["SECTION"]),
    ]


def _entry_index(c: Compact, kind: int) -> int:
    for i in range(c.h.nsections):
        if struct.unpack_from("<H", c.blob, 64 + 12 * i)[0] == kind:
            return i
    raise AssertionError(kind)


def _c_codes(harness, where, cases) -> dict[str, int]:
    """ss_load's code for each case's image (harness --check: accepted ones
    are scanned there too), by case name."""
    paths = []
    for name, blob, _expected in cases:
        paths.append(where / f"{name}.seam")
        paths[-1].write_bytes(blob)
    return {name[:-len(".seam")]: code for name, code in _check_c(harness, paths).items()}


def test_unsafe_compact_images_refused_by_c_and_python(lab, seamrun_asan, tmp_path):  # noqa: F811
    cases = _unsafe(lab)
    codes = _c_codes(seamrun_asan, tmp_path, cases)
    wrong = []
    for name, blob, code in cases:
        try:
            seamscan.Table.from_bytes(blob, well_formed=False)
            python = "accepted"
        except TableError as err:
            python = str(err)
        if codes[name] != code or f"(code {code})" not in python:
            wrong.append(f"{name}: C {codes[name]}, Python {python!r}, expected {code}")
    assert not wrong, "\n".join(wrong)


# --- well-formedness: the host refuses, the runtime scans safely -------------------


def _ill_formed(c: Compact) -> list[tuple[str, bytes, str]]:
    n, tw = c.h.states, c.tw
    ids = {1: "<B", 2: "<H", 4: "<I"}[tw]
    owf = {2: "<H", 4: "<I"}[c.ow]
    extra = c.states_with(compact.W_EXTRA)[0]
    failx = c.states_with(compact.W_FAIL_STORED)[0]
    _has, r = c.model._rank(compact.SEC_FAIL_RANK, failx)
    match = c.states_with(compact.W_MATCH)[0]
    lay, ay = _own_state(c, "lay"), _own_state(c, "ay")
    # a rank set with a member past the last state (and a link for it)
    fail_rank = bytearray(c.blob[c.at(compact.SEC_FAIL_RANK):][:c.size(compact.SEC_FAIL_RANK)])
    last = len(fail_rank) - 12
    count, bits = compact.RANK_ENTRY.unpack_from(fail_rank, last)
    assert n % 64, "the lab set must not fill its last rank block"
    compact.RANK_ENTRY.pack_into(fail_rank, last, count, bits | 1 << 63)
    fail_list = c.blob[c.at(compact.SEC_FAIL_LIST):][:c.size(compact.SEC_FAIL_LIST)] + bytes(tw)
    # an index that does not rise (values still inside the list)
    extra_index = bytearray(c.blob[c.at(compact.SEC_EXTRA_INDEX):][:c.size(compact.SEC_EXTRA_INDEX)])
    struct.pack_into(owf, extra_index, 0, 1)
    # the filter without any bit
    empty_filter = bytes(c.size(compact.SEC_EXTRA_FILTER))
    return [
        ("word-bit-14", c.patched(c.word_set(match, c.word(match) | 0x4000)), "bit 14 or 15"),
        ("start-word-not-0", c.patched(c.word_set(0, 1)), "start state has no flags"),
        ("failx-and-failroot", c.patched(c.word_set(failx, c.word(failx) | compact.W_FAIL_ROOT_CHILD)),
         "both FAILX and FAILROOT"),
        ("extra-bit-without-member", c.patched(c.word_set(extra, c.word(extra) & ~compact.W_EXTRA)),
         "EXTRA bits"),
        ("rank-member-past-states", c.rebuilt({compact.SEC_FAIL_RANK: bytes(fail_rank),
                                               compact.SEC_FAIL_LIST: fail_list}), "past the last state"),
        ("index-not-rising", c.rebuilt({compact.SEC_EXTRA_INDEX: bytes(extra_index)}),
         "never decreasing"),
        ("own-outputs-descending", c.patched((_own_entry_offset(c, lay, 0), owf, 4),
                                             (_own_entry_offset(c, lay, 1), owf, 2)), "ascending"),
        ("filter-misses", c.rebuilt({compact.SEC_EXTRA_FILTER: empty_filter}), "filter misses"),
        ("failure-cycle", c.patched((c.at(compact.SEC_FAIL_LIST) + tw * r, ids, failx)),
         "does not reach the start state"),
        ("own-output-of-failure-state", c.patched((_own_entry_offset(c, lay, 1), owf, 3),
                                                  (_own_entry_offset(c, ay, 0), owf, 3)),
         "an output of its failure state"),
        ("match-bit-clear", c.patched(c.word_set(ay, c.word(ay) & ~compact.W_MATCH)), "MATCH is clear"),
        ("max-outputs-understated", c.patched((40, "<I", c.h.max_outputs - 1)), "max_outputs"),
        ("first-match-not-states", c.patched((24, "<I", n - 1)), "first_match"),
    ]


def test_ill_formed_compact_images_refused_by_the_host_only(lab, seamrun_asan, tmp_path):  # noqa: F811
    cases = _ill_formed(lab)
    codes = _c_codes(seamrun_asan, tmp_path, cases)  # scanned there, sanitizers on
    wrong = []
    for name, blob, words in cases:
        if codes[name] != 0:
            wrong.append(f"{name}: ss_load refused it ({codes[name]}): a safety rule?")
            continue
        found = wellformed.problems(blob)
        if not found or words not in found[0]:
            wrong.append(f"{name}: expected a problem naming {words!r}, got {found}")
        with pytest.raises(TableError, match="not well-formed"):
            seamscan.Table.from_bytes(blob)
        seamscan.Table.from_bytes(blob, well_formed=False).scan(PROBE)  # as a device takes it
    assert not wrong, "\n".join(wrong)


def test_damaged_emission_stays_bounded_and_ordered(lab):
    """What the fuzz target once found: an understated max_outputs and a
    signature listed along a chain twice.  The runtime reports each signature
    once, in order, at most max_outputs per byte, whatever out[] holds."""
    lay, ay = _own_state(lab, "lay"), _own_state(lab, "ay")
    ay_index = [s["id"] for s in LAB].index("ay")
    twice = lab.patched((_own_entry_offset(lab, lay, 0), {2: "<H", 4: "<I"}[lab.ow], ay_index))
    for blob in (twice, lab.patched((40, "<I", 1))):
        table = seamscan.Table.from_bytes(blob, well_formed=False)
        whole = table.scan(b"play lay")
        ends = [(m.end, table.ids.index(m.sig)) for m in whole]
        assert ends == sorted(set(ends))
        per_end = {}
        for end, _sig in ends:
            per_end[end] = per_end.get(end, 0) + 1
        assert max(per_end.values()) <= table.max_outputs
        stream = table.stream()
        assert [m for k in range(len(b"play lay")) for m in stream.feed(b"play lay"[k:k + 1])] == whole
    assert ay in lab.states_with(compact.W_OWN)
