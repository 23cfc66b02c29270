"""The compiler's automaton and the batch scheduler, against their definitions."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import seamscan
from seamscan import compiler, engine
from seamscan.reference import reference_matches
from vectors import LAYOUTS


def _build(*patterns, fold=False):
    sigs = seamscan.signature_set(
        [{"id": f"p{i}", "hex": p.hex(), "fold_case": fold} for i, p in enumerate(patterns)])
    return compiler.build([s.byte_sets() for s in sigs]), sigs


def _run(a, data, state=0):
    for b in data:
        state = a.step(state, b)
    return state


def _borders(p: bytes) -> list[int]:
    """Longest proper border of each prefix, by brute force over all lengths."""
    return [max(k for k in range(q) if p[:k] == p[q - k:q]) for q in range(1, len(p) + 1)]


@pytest.mark.parametrize("pattern", [b"ababaca", b"aabaaab", b"abcabcabd", b"aaaa", b"abab"])
def test_failure_depth_is_the_prefix_function(pattern):
    # One literal: the failure state of the state after P[:q] stands for the
    # longest proper border of P[:q] (the prefix function).  For ababaca the
    # values are 0,0,1,2,3,0,1 (Cormen et al., Introduction to Algorithms,
    # ch. 32; recalled from memory), checked here against brute force.
    a, _ = _build(pattern)
    got = []
    for q in range(1, len(pattern) + 1):
        s = _run(a, pattern[:q])
        assert a.depth[s] == q
        got.append(int(a.depth[a.fail[s]]))
    assert got == _borders(pattern)
    if pattern == b"ababaca":
        assert got == [0, 0, 1, 2, 3, 0, 1]


def test_aho_corasick_1975_example_has_the_papers_ten_states():
    # Aho and Corasick, "Efficient string matching", CACM 18(6) 1975: the goto
    # graph of he, she, his, hers has states 0..9 (recalled from memory), and
    # output(5) = {she, he}.
    a, _ = _build(b"he", b"she", b"his", b"hers")
    assert a.states == 10
    s = _run(a, b"she")
    assert s >= a.first_match
    assert a.outputs[s - a.first_match] == (0, 1)


@given(st.lists(st.binary(min_size=1, max_size=8), min_size=1, max_size=25))
@settings(max_examples=80, deadline=None)
def test_plain_literals_give_one_state_per_trie_node(patterns):
    a, _ = _build(*patterns)
    prefixes = {p[:k] for p in patterns for k in range(1, len(p) + 1)}
    assert a.states == len(prefixes) + 1


_alphabet = st.sampled_from(b"aAbB\x00\xff")


@given(st.lists(st.tuples(st.binary(min_size=1, max_size=6).map(bytes), st.booleans()),
                min_size=1, max_size=12),
       st.lists(st.integers(0, 255), min_size=0, max_size=12))
@settings(max_examples=80, deadline=None)
def test_state_after_max_len_minus_one_bytes_forgets_the_past(entries, tail):
    # The property that makes carried state, resynchronisation after gaps and
    # chunked scanning exact: after max_len - 1 bytes every start state has
    # reached a state with the same transitions (they differ at most in the
    # outputs of a match that began before those bytes), and after max_len
    # bytes the very same state.
    sigs = seamscan.signature_set(
        [{"id": f"p{i}", "hex": p.hex(), "fold_case": f} for i, (p, f) in enumerate(entries)])
    a = compiler.build([s.byte_sets() for s in sigs])
    data = (bytes(tail) * 3)[: a.max_len] if tail else bytes(a.max_len)
    states = np.arange(a.states)
    for b in data[:-1]:
        states = a.trans[states, a.classes[b]]
    assert len({a.trans[s].tobytes() for s in set(states.tolist())}) == 1
    states = a.trans[states, a.classes[data[-1]]]
    assert len(set(states.tolist())) == 1


def test_byte_classes_respect_fold_case_and_exact_bytes():
    _, sigs = _build(b"get", fold=True)
    classes, n = compiler.byte_classes([s.byte_sets() for s in sigs])
    assert classes[ord("g")] == classes[ord("G")]
    mixed = seamscan.signature_set([{"id": "a", "text": "[get", "fold_case": True},
                                    {"id": "b", "text": "G"}])
    classes, _ = compiler.byte_classes([s.byte_sets() for s in mixed])
    assert classes[ord("g")] != classes[ord("G")]
    assert classes[ord("[")] != classes[ord("{")]  # 0x20 apart but not letters


def test_state_cap_names_the_costliest_signatures():
    sigs = seamscan.signature_set([{"id": "long-one", "text": "x" * 200},
                                   {"id": "short", "text": "ab"}])
    with pytest.raises(compiler.CompileError) as err:
        seamscan.compile(sigs, max_states=50)
    assert "long-one" in str(err.value) and "50" in str(err.value)


def test_unknown_layout_and_budget_are_clear_errors():
    sigs = seamscan.signature_set([{"id": "a", "text": "abc"}])
    with pytest.raises(compiler.CompileError, match="layout 'tiny' is not available"):
        seamscan.compile(sigs, layout="tiny")
    with pytest.raises(compiler.CompileError, match="no layout fits the budget"):
        seamscan.compile(sigs, budget="64B")
    assert seamscan.compile(sigs, budget="1MiB").nbytes < 1 << 20


# -- the batch scheduler (ss_scan_batch) against one Stream per slot --------

_SET = seamscan.signature_set(
    [{"id": "ab", "text": "ab"}, {"id": "aba", "text": "aba"}, {"id": "b", "text": "b"},
     {"id": "bab", "text": "bab", "window": [0, 40]},
     {"id": "dg", "text": "aab", "transport": "udp"},
     {"id": "srv", "text": "ba", "side": "server"}])

_BARE = seamscan.signature_set(
    [{k: v for k, v in zip(("id", "text", "transport", "side"), (s.id, s.data.decode(), s.transport, s.side),
                           strict=True)} for s in _SET])

_item = st.tuples(st.integers(0, 9),  # slot
                  st.booleans(),  # reset before
                  st.sampled_from([(0, 0, 0, 0), (1, 1, 80, 1), (2, 2, 53, 3)]),  # ctx
                  st.binary(max_size=70).map(lambda b: bytes(x % 3 + 97 for x in b)))


@pytest.mark.parametrize("layout", LAYOUTS)
@given(items=st.lists(_item, max_size=60))
@settings(max_examples=120, deadline=None)
def test_batch_scan_equals_one_stream_per_slot(layout, items):
    table = seamscan.compile(_SET, layout=layout)
    scanner = engine.BatchScanner(table, 10)
    streams = {}
    expected = []
    batch = []
    for i, (slot, reset, ctx, payload) in enumerate(items):
        side, transport, port, flags = ctx
        s = streams.get(slot)
        if s is None or reset:
            reset = True
            streams[slot] = s = [0, b""]  # offset, bytes since reset
        start = s[0] - len(s[1])
        batch.append((slot, engine.ITEM_RESET if reset else 0, ctx, 0, payload, s[0]))
        # Expected: the reference on the bytes since the last reset, keeping the
        # matches that end inside this payload (and, for a datagram, start in it).
        before = len(s[1])
        s[1] += payload
        s[0] += len(payload)
        sd = {0: None, 1: "client", 2: "server"}[side]
        tr = {0: None, 1: "tcp", 2: "udp"}[transport]
        for sig, a, b in reference_matches(_BARE, s[1], side=sd, transport=tr,
                                           server_port=port if flags & 1 else None):
            if b <= before:
                continue  # found by an earlier item
            base = 0
            if flags & 2:  # a datagram: matches lie inside it, windows count from it
                if a < before:
                    continue
                base = before
            window = _SET[sig].window
            if window is not None and not (window[0] <= a - base and b - base <= window[1]):
                continue
            expected.append((i, sig, start + a, start + b))
    got = scanner.scan(batch)
    assert sorted(got) == sorted(expected)
