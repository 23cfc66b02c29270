"""Randomised checks: reference == definition, reference == pyahocorasick,
engine == reference, and split invariance of streams.

Signature bytes are drawn mostly from a small alphabet (0x00, 0xff, letters
in both cases, and '[' / '{' which differ by 0x20 but are not a case pair) so
that patterns share prefixes and suffixes, and a quarter of the time from the
whole byte range 0..255; haystacks are partly spliced from the patterns
themselves, sometimes with their case flipped.
"""

from itertools import pairwise

import ahocorasick
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import seamscan
from seamscan.reference import reference_matches
from seamscan.signatures import signature_set
from vectors import LAYOUTS

ALPHABET = b"aAbB\x00\xff[{"
SETTINGS = settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)

# 3 in 4 bytes from the colliding alphabet, 1 in 4 from the whole byte range
_byte = st.one_of(st.sampled_from(ALPHABET), st.sampled_from(ALPHABET), st.sampled_from(ALPHABET),
                  st.integers(0, 255))
_symbols = st.lists(_byte, min_size=1, max_size=6).map(bytes)


@st.composite
def cases(draw, *, exact=False, windows=True):
    """(signature set, haystack) with related patterns and spliced haystacks."""
    patterns: list[bytes] = []
    entries = []
    for k in range(draw(st.integers(1, 7))):
        how = draw(st.sampled_from(["fresh", "prefix", "suffix", "extend"])) if patterns else "fresh"
        if how == "fresh":
            pattern = draw(_symbols)
        else:
            base = draw(st.sampled_from(patterns))
            cut = draw(st.integers(1, len(base)))
            pattern = {
                "prefix": base[:cut],
                "suffix": base[-cut:],
                "extend": base + draw(_symbols),
            }[how]
        patterns.append(pattern)
        entry = {"id": f"s{k}", "hex": pattern.hex(), "fold_case": not exact and draw(st.booleans())}
        if windows and draw(st.integers(0, 3)) == 0:
            start = draw(st.integers(0, 24))
            entry["window"] = [start, start + draw(st.integers(len(pattern), len(pattern) + 24))]
        entries.append(entry)
    piece = st.one_of(
        st.lists(_byte, max_size=4).map(bytes),
        st.tuples(st.sampled_from(patterns), st.booleans()).map(
            lambda pf: pf[0].swapcase() if pf[1] else pf[0]
        ),
    )
    haystack = b"".join(draw(st.lists(piece, max_size=12)))
    return signature_set(entries), haystack


def _by_definition(sigset, haystack):
    """Brute force straight from Signature.byte_sets: every offset, every byte."""
    found = []
    for index, sig in enumerate(sigset):
        sets = sig.byte_sets()
        low, high = sig.window or (0, len(haystack))
        for start in range(len(haystack) - len(sets) + 1):
            end = start + len(sets)
            if low <= start and end <= high and all(
                haystack[start + i] in sets[i] for i in range(len(sets))
            ):
                found.append((index, start, end))
    return sorted(found, key=lambda t: (t[2], t[0]))


def _pyahocorasick(sigset, haystack):
    """Outside oracle: pyahocorasick (``import ahocorasick``), keys as byte sequences."""
    automaton = ahocorasick.Automaton(ahocorasick.STORE_ANY, ahocorasick.KEY_SEQUENCE)
    for index, sig in enumerate(sigset):
        key = tuple(sig.data)
        length, indices = automaton.get(key, (len(key), []))
        automaton.add_word(key, (length, indices + [index]))
    automaton.make_automaton()
    found = [
        (index, last + 1 - length, last + 1)
        for last, (length, indices) in automaton.iter(tuple(haystack))
        for index in indices
    ]
    return sorted(found, key=lambda t: (t[2], t[0]))


def _triples(sigset, matches):
    order = {sig.id: i for i, sig in enumerate(sigset)}
    return [(order[m.sig], m.start, m.end) for m in matches]


# --- reference (no engine needed) -------------------------------------------


@SETTINGS
@given(cases())
def test_reference_equals_definition(case):
    sigset, haystack = case
    assert reference_matches(sigset, haystack) == _by_definition(sigset, haystack)


@SETTINGS
@given(cases(exact=True, windows=False))
def test_reference_agrees_with_pyahocorasick(case):
    sigset, haystack = case
    assert reference_matches(sigset, haystack) == _pyahocorasick(sigset, haystack)


# --- engine -------------------------------------------------------------------


@pytest.fixture(scope="module")
def engine():
    import seamscan.engine

    return seamscan.engine  # our own module: a failed import is a failure, not a skip


@pytest.mark.parametrize("layout", LAYOUTS)
@SETTINGS
@given(case=cases())
def test_engine_scan_equals_reference(engine, layout, case):
    sigset, haystack = case
    table = seamscan.compile(sigset, layout=layout)
    assert _triples(sigset, table.scan(haystack)) == reference_matches(sigset, haystack)


@pytest.mark.parametrize("layout", LAYOUTS)
@SETTINGS
@given(case=cases(), data=st.data())
def test_engine_stream_split_invariance(engine, layout, case, data):
    sigset, haystack = case
    cuts = sorted(data.draw(st.lists(st.integers(0, len(haystack)), max_size=6)))
    bounds = [0, *cuts, len(haystack)]
    table = seamscan.compile(sigset, layout=layout)
    stream = table.stream()
    fed = []
    for a, b in pairwise(bounds):
        fed += stream.feed(haystack[a:b])
    assert _triples(sigset, fed) == _triples(sigset, table.scan(haystack))
    assert _triples(sigset, fed) == reference_matches(sigset, haystack)


@pytest.mark.parametrize("layout", LAYOUTS)
@SETTINGS
@given(case=cases(exact=True, windows=False))
def test_engine_agrees_with_pyahocorasick(engine, layout, case):
    sigset, haystack = case
    table = seamscan.compile(sigset, layout=layout)
    # Outside oracle: pyahocorasick.
    assert _triples(sigset, table.scan(haystack)) == _pyahocorasick(sigset, haystack)
