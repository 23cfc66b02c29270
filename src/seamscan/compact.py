"""The compact layout: each state keeps only its own transitions and a default link.

The automaton is the same as the dense layout's (``compiler.build``); only
its storage differs.  A state's row equals its failure state's row except on
the classes where its deepest nodes advance (``compiler`` explains why), so
a state stores just those *labelled transitions* and its *failure link*, the
prefix-function idea kept explicit.  Scanning a byte follows failure links
until a state has a transition on the byte's class; the start state keeps a
full row.  Every labelled transition goes one level deeper and every failure
link at least one level shallower, so a stream of ``n`` bytes costs at most
``2n`` steps (each step one state visited).

Storage (``csrc/FORMAT.md`` has the byte layout):

- states are numbered in depth-first preorder, so the first child of a state
  is usually the next state: one bit and the child's class say so;
- a 16-bit word per state: the class of the edge into it, that bit, whether
  its failure state is the start state's child on that class (so it needs no
  stored link), and whether it has outputs;
- rank sets (a bitmap and a running count per 64 states) select the states
  with a stored failure link, with further transitions, or with outputs of
  their own, and index their lists.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:  # numpy is imported where it is used: table loading does not need it
    import numpy as np

import struct

from seamscan import image

LAYOUT_COMPACT = 2
SEC_WORDS = 8
SEC_ROOT = 9
SEC_FAIL_RANK = 10
SEC_FAIL_LIST = 11
SEC_EXTRA_RANK = 12
SEC_EXTRA_INDEX = 13
SEC_EXTRA_LIST = 14
SEC_OWN_RANK = 15
SEC_EXTRA_FILTER = 16
FILTER_HASH = 0x9E3779B1
SECTION_NAMES = {SEC_WORDS: "state words", SEC_ROOT: "start row", SEC_FAIL_RANK: "failure rank",
                 SEC_FAIL_LIST: "failure links", SEC_EXTRA_RANK: "transition rank",
                 SEC_EXTRA_INDEX: "transition index", SEC_EXTRA_LIST: "transitions",
                 SEC_OWN_RANK: "output rank", SEC_EXTRA_FILTER: "transition filter"}

W_CHILD = 0x100  # state s + 1 is entered from s on class (word[s + 1] & 0xff)
W_FAIL_ROOT_CHILD = 0x200  # failure state = start row[class of the edge into s]
W_MATCH = 0x400  # s has outputs (its own or its failure chain's)
W_EXTRA = 0x800  # s is in the transition rank set (further labelled transitions)
W_FAIL_STORED = 0x1000  # s is in the failure rank set (a stored failure link)
W_OWN = 0x2000  # s is in the output rank set (outputs of its own)
RANK_BLOCK = 64
RANK_ENTRY = struct.Struct("<IQ")  # count of set bits before the block, the block's bits


def _rank_set(bits: np.ndarray) -> bytes:
    """A rank set over a boolean array: per 64 entries (u32 base, u64 bitmap)."""
    import numpy as np

    n = len(bits)
    blocks = (n + RANK_BLOCK - 1) // RANK_BLOCK
    padded = np.zeros(blocks * RANK_BLOCK, dtype=bool)
    padded[:n] = bits
    words = np.packbits(padded.reshape(blocks, RANK_BLOCK)[:, ::-1], axis=1)
    words = words.view(">u8").ravel().astype(np.uint64)
    counts = padded.reshape(blocks, RANK_BLOCK).sum(axis=1)
    base = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.uint32)
    out = np.zeros(blocks, dtype=[("base", "<u4"), ("bits", "<u8")])
    out["base"] = base
    out["bits"] = words
    return out.tobytes()


def filter_bit(s: int, c: int, bits_log2: int) -> int:
    """Which bit of the transition filter stands for (state, class)."""
    return ((((s << 8) | c) * FILTER_HASH) & 0xFFFFFFFF) >> (32 - bits_log2)


def _filter(entries: list[tuple[int, int]]) -> bytes:
    """A one-hash bit filter over (state, class), at least 6 bits per entry."""
    log2 = 6
    while (1 << log2) < 6 * len(entries):
        log2 += 1
    bits = bytearray((1 << log2) // 8)
    for s, c in entries:
        h = filter_bit(s, c, log2)
        bits[h >> 3] |= 1 << (h & 7)
    return bytes(bits)


def _preorder(trans: np.ndarray, fail: np.ndarray):
    """Depth-first preorder over labelled transitions: (order, each state's
    labelled transitions (class, target) in class order, the class of the
    edge each state was first reached by)."""
    import numpy as np

    n = trans.shape[0]
    labelled: list[list[tuple[int, int]]] = [[] for _ in range(n)]
    diff = trans[1:] != trans[fail[1:]]
    rows, cols = np.nonzero(diff)
    targets = trans[1:][rows, cols]
    for r, c, t in zip(rows.tolist(), cols.tolist(), targets.tolist(), strict=True):
        labelled[r + 1].append((c, t))
    root = [(c, int(t)) for c, t in enumerate(trans[0].tolist()) if t]
    seen = bytearray(n)
    seen[0] = 1
    entered = [0] * n
    order: list[int] = []
    stack = [0]
    while stack:
        s = stack.pop()
        order.append(s)
        edges = root if s == 0 else labelled[s]
        fresh = []
        for c, t in edges:
            if not seen[t]:
                seen[t] = 1
                entered[t] = c
                fresh.append(t)
        stack.extend(reversed(fresh))
    return order, labelled, entered


def encode_compact(automaton, signatures) -> bytes:
    import numpy as np

    a = automaton
    n = a.states
    order, labelled, entered = _preorder(a.trans, a.fail)
    new = np.empty(n, dtype=np.int64)
    new[np.asarray(order)] = np.arange(n)
    fail = new[a.fail.astype(np.int64)]
    root_row = new[a.trans[0].astype(np.int64)]
    outs = [()] * n
    for i, o in enumerate(a.outputs):
        outs[a.first_match + i] = o

    words = np.zeros(n, dtype="<u2")
    own_bits = np.zeros(n, dtype=bool)
    fail_bits = np.zeros(n, dtype=bool)
    extra_bits = np.zeros(n, dtype=bool)
    fail_list: list[int] = []
    extra_index = [0]
    extra_list = bytearray()
    extra_keys: list[tuple[int, int]] = []
    own_index = [0]
    own_list: list[int] = []
    width = image._width(n - 1)
    pack_target = {1: "<B", 2: "<H", 4: "<I"}[width]
    # Each word's low byte: the class of the edge its state was first reached
    # by.  In preorder the first state reached from s is s + 1.
    for old in order:
        words[int(new[old])] = entered[old]
    for old in order:
        s = int(new[old])
        edges = [(c, int(new[t])) for c, t in (labelled[old] if old else [])]
        child_class = next((c for c, t in edges if t == s + 1 and c == entered[order[s + 1]]),
                           None) if s + 1 < n else None
        if child_class is not None:
            words[s] |= W_CHILD
        rest = [(c, t) for c, t in edges if not (t == s + 1 and c == child_class)]
        if s and rest:
            extra_bits[s] = True
            words[s] |= W_EXTRA
            if child_class is not None:  # the filter covers every transition of s
                extra_keys.append((s, child_class))
            for c, t in rest:
                extra_list += struct.pack("<B", c) + struct.pack(pack_target, t)
                extra_keys.append((s, c))
            extra_index.append(extra_index[-1] + len(rest))
    for old in order:
        s = int(new[old])
        if s == 0:
            continue
        f = int(fail[old])
        c = int(words[s]) & 0xFF
        if f == 0:
            pass
        elif f == int(root_row[c]):
            words[s] |= W_FAIL_ROOT_CHILD
        else:
            fail_bits[s] = True
            words[s] |= W_FAIL_STORED
            fail_list.append(f)
        mine = sorted(set(outs[old]) - set(outs[a.fail[old]]))
        if outs[old]:
            words[s] |= W_MATCH
        if mine:
            own_bits[s] = True
            words[s] |= W_OWN
            own_list.extend(mine)
            own_index.append(len(own_list))
    # One width for the output list and both index sections.
    out_width = 2 if max(image.output_count(signatures), len(own_list),
                         extra_index[-1]) < 1 << 16 else 4
    sig_records, ports = image._signature_records(signatures)
    sections = [
        (image.SEC_CLASSES, bytes(a.classes)),
        (SEC_WORDS, words.tobytes()),
        (SEC_ROOT, root_row.astype(image._DTYPES[width]).tobytes()),
        (SEC_FAIL_RANK, _rank_set(fail_bits)),
        (SEC_FAIL_LIST, np.asarray(fail_list, dtype=image._DTYPES[width]).tobytes()),
        (SEC_EXTRA_RANK, _rank_set(extra_bits)),
        (SEC_EXTRA_INDEX, np.asarray(extra_index, dtype=image._DTYPES[out_width]).tobytes()),
        (SEC_EXTRA_LIST, bytes(extra_list)),
        (SEC_OWN_RANK, _rank_set(own_bits)),
        (SEC_EXTRA_FILTER, _filter(extra_keys)),
        (image.SEC_OUT_INDEX, np.asarray(own_index, dtype=image._DTYPES[out_width]).tobytes()),
        (image.SEC_OUT_LIST, np.asarray(own_list, dtype=image._DTYPES[out_width]).tobytes()),
        (image.SEC_SIGS, sig_records),
        (image.SEC_PORTS, ports),
        (image.SEC_NAMES, image._names(signatures)),
    ]
    return image._assemble(LAYOUT_COMPACT, sections, signatures=signatures, states=n,
                           first_match=n,
                           sigs=len(signatures), nclasses=a.nclasses, stride=a.nclasses,
                           trans_width=width, out_width=out_width,
                           max_outputs=max((len(o) for o in a.outputs), default=0),
                           max_len=a.max_len)


class CompactModel:
    """A Python reading of a compact image, step by step: the layout's own
    reference (tests compare it with the C runtime and count its steps)."""

    def __init__(self, blob: bytes):
        import numpy as np

        h = image.read_header(blob)
        self.h = h
        sec = {k: blob[o:o + n] for k, (o, n) in h.sections.items()}
        self.classes = sec[image.SEC_CLASSES]
        self.words = np.frombuffer(sec[SEC_WORDS], dtype="<u2").astype(np.int64)
        dt = image._DTYPES[h.trans_width]
        self.root = np.frombuffer(sec[SEC_ROOT], dtype=dt).astype(np.int64)
        self.fail_list = np.frombuffer(sec[SEC_FAIL_LIST], dtype=dt).astype(np.int64)
        ow = image._DTYPES[h.out_width]
        self.extra_index = np.frombuffer(sec[SEC_EXTRA_INDEX], dtype=ow).astype(np.int64)
        self.extra_list = sec[SEC_EXTRA_LIST]
        self.entry = 1 + h.trans_width
        self.own_index = np.frombuffer(sec[image.SEC_OUT_INDEX], dtype=ow).astype(np.int64)
        self.own_list = np.frombuffer(sec[image.SEC_OUT_LIST],
                                      dtype=image._DTYPES[h.out_width]).astype(np.int64)
        self.ranks = {k: self._unpack_rank(sec[k]) for k in (SEC_FAIL_RANK, SEC_EXTRA_RANK,
                                                            SEC_OWN_RANK)}
        self.filter = sec[SEC_EXTRA_FILTER]
        self.filter_log2 = (8 * len(self.filter)).bit_length() - 1
        self.steps = 0

    @staticmethod
    def _unpack_rank(raw):
        return [RANK_ENTRY.unpack_from(raw, i) for i in range(0, len(raw), RANK_ENTRY.size)]

    def _rank(self, kind, s):
        """(bit of s, number of set bits before s)."""
        base, bits = self.ranks[kind][s // RANK_BLOCK]
        k = s % RANK_BLOCK
        return (bits >> k) & 1, base + bin(bits & ((1 << k) - 1)).count("1")

    def fail(self, s):
        has, r = self._rank(SEC_FAIL_RANK, s)
        if has:
            return int(self.fail_list[r])
        w = int(self.words[s])
        return int(self.root[w & 0xFF]) if w & W_FAIL_ROOT_CHILD else 0

    def _filter_has(self, s, c):
        bit = filter_bit(s, c, self.filter_log2)
        return self.filter[bit >> 3] >> (bit & 7) & 1

    def step(self, s, byte):
        """One byte, as csrc/FORMAT.md's "Scanning one byte" reads; each state
        visited is one step, the start state too when the walk falls back to
        its row."""
        c = self.classes[byte]
        while True:
            self.steps += 1
            w = int(self.words[s])
            if w & W_CHILD and (int(self.words[s + 1]) & 0xFF) == c:
                return s + 1
            if w & W_EXTRA and self._filter_has(s, c):
                _has, r = self._rank(SEC_EXTRA_RANK, s)
                for e in range(self.extra_index[r], self.extra_index[r + 1]):
                    off = e * self.entry
                    if self.extra_list[off] == c:
                        return int.from_bytes(self.extra_list[off + 1:off + self.entry], "little")
            if not w & (W_FAIL_STORED | W_FAIL_ROOT_CHILD):
                self.steps += s != 0  # the start state's row
                return int(self.root[c])
            s = self.fail(s)

    def outputs(self, s):
        found = []
        while s and int(self.words[s]) & W_MATCH:
            has, r = self._rank(SEC_OWN_RANK, s)
            if has:
                found.extend(self.own_list[self.own_index[r]:self.own_index[r + 1]].tolist())
            s = self.fail(s)
        return sorted(found)

    def scan(self, data):
        """(sig index, end) pairs, ignoring windows and filters."""
        s = 0
        found = []
        for i, b in enumerate(data):
            s = self.step(s, b)
            if int(self.words[s]) & W_MATCH:
                found.extend((sig, i + 1) for sig in self.outputs(s))
        return found
