"""Layouts: the compact one against its own Python reading, step bounds, sizes, auto."""

import random
import sys
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import seamscan
from seamscan import compact, compiler, image
from seamscan.reference import reference_matches

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tools"))
import gen_sigs  # noqa: E402


def _set(patterns, fold=False):
    return seamscan.signature_set(
        [{"id": f"p{i}", "hex": p.hex(), "fold_case": fold} for i, p in enumerate(patterns)])


@given(st.lists(st.tuples(st.binary(min_size=1, max_size=7), st.booleans()), min_size=1,
                max_size=15),
       st.binary(max_size=300))
@settings(max_examples=100, deadline=None)
def test_compact_model_c_runtime_and_reference_agree(entries, noise):
    sigs = seamscan.signature_set(
        [{"id": f"p{i}", "hex": p.hex(), "fold_case": f} for i, (p, f) in enumerate(entries)])
    rnd = random.Random(len(noise))
    data = bytearray(noise)
    for _ in range(5):  # splice occurrences in
        p = sigs[rnd.randrange(len(sigs))].data
        at = rnd.randrange(len(data) + 1)
        data[at:at] = p
    data = bytes(data)
    table = seamscan.compile(sigs, layout="compact")
    model = compact.CompactModel(table.to_bytes())
    want = [(i, e) for i, _s, e in reference_matches(sigs, data)]
    assert model.scan(data) == want
    assert [(sigs.index(m.sig), m.end) for m in table.scan(data)] == want


@pytest.mark.parametrize("patterns, haystack", [
    ([b"a" * 20 + b"b"], b"a" * 5000),  # a long run of a pattern's prefix
    ([b"ab" * 10 + b"c"], b"ab" * 3000),
    ([b"aaab", b"aab", b"ab", b"b", b"aaaa"], b"a" * 999 + b"b" + b"a" * 1000),
    ([bytes([i]) * 7 + b"\xff" for i in range(30)], bytes(range(30)) * 200),
])
def test_compact_steps_stay_within_two_per_byte(patterns, haystack):
    # FORMAT.md: n bytes cost at most 2n steps (each step visits one state).
    table = seamscan.compile(_set(patterns), layout="compact")
    model = compact.CompactModel(table.to_bytes())
    model.scan(haystack)
    assert model.steps <= 2 * len(haystack)


def test_compact_steps_on_random_traffic():
    sigs = seamscan.signature_set(gen_sigs.generate(300, seed=5))
    model = compact.CompactModel(seamscan.compile(sigs, layout="compact").to_bytes())
    rnd = random.Random(9)
    data = bytes(rnd.randrange(256) for _ in range(20000))
    model.scan(data)
    assert model.steps <= 2 * len(data)


def _automaton_bytes(table) -> int:
    """The image less the signature records, ports and names (not the automaton)."""
    h = table.header
    other = sum(h.sections[k][1] for k in (image.SEC_SIGS, image.SEC_PORTS, image.SEC_NAMES))
    return table.nbytes - other


def test_compact_takes_at_most_four_bytes_per_state_on_literals():
    # The device-table target: 1,000 literals of 4-32 bytes, outputs included.
    entries = gen_sigs.generate(1000, seed=1)
    for e in entries:
        e["fold_case"] = False
    table = seamscan.compile(seamscan.signature_set(entries), layout="compact")
    assert _automaton_bytes(table) <= 4 * table.states


def test_auto_picks_the_fastest_layout_that_fits():
    sigs = seamscan.signature_set(gen_sigs.generate(200, seed=2))
    dense = seamscan.compile(sigs, layout="dense")
    small = seamscan.compile(sigs, layout="compact")
    assert seamscan.compile(sigs, layout="auto").layout == "dense"
    assert seamscan.compile(sigs, layout="auto", budget=dense.nbytes).layout == "dense"
    assert seamscan.compile(sigs, layout="auto", budget=dense.nbytes - 1).layout == "compact"
    with pytest.raises(compiler.CompileError) as err:
        seamscan.compile(sigs, layout="auto", budget=small.nbytes - 1)
    text = str(err.value)
    assert "no layout fits" in text and "dense takes" in text and "compact takes" in text
    worst = err.value.costliest[0]
    assert worst[0] in sigs.ids and worst[1] > 0 and worst[2] > 0
