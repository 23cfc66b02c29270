"""Byte sets, ``??`` and multi-part signatures against Python's ``re``.

Random signature sets mix literals, byte sets, ``??``, fold_case (at the
signature and per part) and 1-4 parts with random spacings; haystacks are
spliced from pieces of the parts (case flipped at times) and random bytes
from the whole 0-255 range.  Every result is compared with the brute force
of ``re_oracle`` (Python's ``re``: the contract's own definition), for the
Python reference, both layouts of the C runtime, ``Stream.feed`` at random
splits and the batch scanner with interleaved slots.
"""

from __future__ import annotations

import random
import sys
from functools import partial
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import re_oracle
from seamscan import engine
from seamscan.reference import reference_matches
from seamscan.signatures import SignatureError, signature_set
from vectors import LAYOUTS

SETTINGS = settings(max_examples=200, deadline=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
HOT = b"aAbB0\x00\xff\n"  # bytes the tokens below favour, so that matches happen


def _byte(draw) -> int:
    if draw(st.integers(0, 3)):
        return draw(st.sampled_from(HOT))
    return draw(st.integers(0, 255))


@st.composite
def hex_tokens(draw) -> tuple[str, list[int]]:
    """(hex text, one example byte per token) with pairs, ?? and sets."""
    tokens, example = [], []
    for _ in range(draw(st.integers(1, 4))):
        kind = draw(st.sampled_from(["pair", "pair", "any", "set"]))
        if kind == "pair":
            b = _byte(draw)
            tokens.append(f"{b:02x}")
            example.append(b)
        elif kind == "any":
            tokens.append("??")
            example.append(_byte(draw))
        else:
            items, members = [], set()
            for _ in range(draw(st.integers(1, 3))):
                lo = _byte(draw)
                if draw(st.booleans()):
                    hi = min(255, lo + draw(st.integers(0, 40)))
                    items.append(f"{lo:02x}-{hi:02x}")
                    members.update(range(lo, hi + 1))
                else:
                    items.append(f"{lo:02x}")
                    members.add(lo)
            neg = draw(st.booleans())
            chosen = set(range(256)) - members if neg else members
            if not chosen or len(chosen) == 256:
                tokens.append("??")
                example.append(_byte(draw))
                continue
            tokens.append("<" + ("!" if neg else "") + " ".join(items) + ">")
            example.append(draw(st.sampled_from(sorted(chosen))))
    return " ".join(tokens), example


@st.composite
def parts(draw) -> tuple[dict, bytes]:
    if draw(st.booleans()):
        text = draw(st.text(alphabet="aAbB0\n", min_size=1, max_size=4))
        return {"text": text}, text.encode()
    text, example = draw(hex_tokens())
    return {"hex": text}, bytes(example)


@st.composite
def cases(draw, windows: bool = True):
    sigs, pieces = [], []
    for k in range(draw(st.integers(1, 5))):
        sig: dict = {"id": f"s{k}", "fold_case": draw(st.booleans())}
        nparts = draw(st.sampled_from([1, 1, 2, 2, 3, 4]))
        drawn = [draw(parts()) for _ in range(nparts)]
        if nparts == 1:
            sig.update(drawn[0][0])
        else:
            tables = []
            for j, (table, _ex) in enumerate(drawn):
                table = dict(table)
                if j and draw(st.integers(0, 3)):
                    low = draw(st.integers(0, 4))
                    high = draw(st.one_of(st.just("any"), st.integers(low, low + 6)))
                    table["spacing"] = [low, high]
                if draw(st.integers(0, 4)) == 0:
                    table["fold_case"] = draw(st.booleans())
                tables.append(table)
            sig["part"] = tables
        if windows and draw(st.integers(0, 4)) == 0:
            start = draw(st.integers(0, 20))
            sig["window"] = [start, start + draw(st.integers(30, 60))]
        sigs.append(sig)
        pieces.extend(ex for _t, ex in drawn)
    piece = st.one_of(
        st.binary(max_size=3),
        st.lists(st.sampled_from(HOT), max_size=3).map(bytes),
        st.tuples(st.sampled_from(pieces), st.booleans()).map(
            lambda pf: pf[0].swapcase() if pf[1] else pf[0]),
    )
    haystack = b"".join(draw(st.lists(piece, max_size=16)))[:80]
    return sigs, haystack


def _sigset(sigs):
    try:
        return signature_set(sigs)
    except SignatureError as err:  # a drawn set the format refuses: say which
        raise AssertionError(f"drawn signatures refused: {err}") from None


def _named(sigset, found):
    ids = sigset.ids
    return [(ids[i], s, e) for i, s, e in found]


def _triples(matches):
    return [(m.sig, m.start, m.end) for m in matches]


@SETTINGS
@given(cases())
def test_reference_equals_re(case):
    sigs, haystack = case
    sigset = _sigset(sigs)
    assert _named(sigset, reference_matches(sigset, haystack)) == re_oracle.matches(sigs, haystack)


@SETTINGS
@given(cases(), st.randoms(use_true_random=False))
def test_c_runtime_equals_re_every_layout_and_split(case, rnd):
    sigs, haystack = case
    sigset = _sigset(sigs)
    expected = re_oracle.matches(sigs, haystack)
    _automaton, tables = engine.compile_layouts(sigset)
    for layout in LAYOUTS:
        table = tables[layout]
        assert _triples(table.scan(haystack)) == expected, layout
        stream = table.stream()
        got, pos = [], 0
        while pos < len(haystack):
            step = rnd.randint(1, 9)
            got += stream.feed(haystack[pos:pos + step])
            pos += step
        assert _triples(got) == expected, layout


@SETTINGS
@given(st.lists(cases(windows=False), min_size=1, max_size=4), st.randoms(use_true_random=False))
def test_batch_slots_interleaved_equal_re(cases_, rnd):
    # One table for every case's signatures together (ids made unique);
    # each haystack is one slot, cut into chunks and interleaved with the
    # other slots' chunks in one batch, as a replay does.
    sigs = [dict(s, id=f"c{k}-{s['id']}") for k, (case_sigs, _h) in enumerate(cases_)
            for s in case_sigs]
    sigset = _sigset(sigs)
    table = engine.compile(sigset, rnd.choice(LAYOUTS))
    scanner = engine.BatchScanner(table, len(cases_))
    queues = []
    for slot, (_s, haystack) in enumerate(cases_):
        cuts = sorted(rnd.sample(range(1, len(haystack)), min(3, max(0, len(haystack) - 1))))
        bounds = [0, *cuts, len(haystack)]
        queues.append([(slot, haystack[a:b]) for a, b in zip(bounds, bounds[1:], strict=False)])
    items = []
    while any(queues):
        q = rnd.choice([q for q in queues if q])
        slot, chunk = q.pop(0)
        items.append((slot, engine.ITEM_RESET if not any(i[0] == slot for i in items) else 0,
                      0, 0, chunk, 0))
    found = scanner.scan(items)
    per_slot = {slot: [] for slot in range(len(cases_))}
    for item, sig, start, end in found:
        per_slot[items[item][0]].append((table.ids[sig], start, end))
    for slot, (_s, haystack) in enumerate(cases_):
        want = re_oracle.matches(sigs, haystack)
        assert sorted(per_slot[slot], key=lambda m: (m[2], sigset.index(m[0]))) == want


def test_chain_never_spans_a_reset():
    # A gap (ss_reset and ss_track_reset) between two parts: no match.
    sigset = signature_set([{"id": "p", "part": [{"text": "AB"}, {"text": "CD"}]}])
    for layout in LAYOUTS:
        stream = engine.compile(sigset, layout).stream()
        assert stream.feed(b"xxAB") == []
        stream.reset(10)
        assert stream.feed(b"CD") == []
        assert _triples(stream.feed(b"ABCD")) == [("p", 12, 16)]


@pytest.mark.parametrize("seed", range(3))
def test_long_stream_many_chains(seed):
    # Chains over a few thousand bytes of dense hot bytes, fed in random
    # pieces: the rings never overflow (capacities from tracker.py).
    rnd = random.Random(seed)
    sigs = [
        {"id": "w", "part": [{"hex": "61 ??"}, {"hex": "<30-39> 62", "spacing": [3, 9]},
                             {"text": "a", "spacing": [0, "any"]}]},
        {"id": "v", "fold_case": True, "part": [{"text": "a"}, {"text": "aa", "spacing": [0, 2]}]},
        {"id": "u", "part": [{"hex": "??"}, {"hex": "??", "spacing": [4, 4]}]},
    ]
    data = bytes(rnd.choice(b"aA0b5") for _ in range(600))
    expected = re_oracle.matches(sigs, data)
    for layout in LAYOUTS:
        stream = engine.compile(signature_set(sigs), layout).stream()
        got, pos = [], 0
        while pos < len(data):
            step = rnd.randint(1, 40)
            got += stream.feed(data[pos:pos + step])
            pos += step
        assert _triples(got) == expected, layout


# --- bad input: file, line, id, part and token in every message ----------------

BAD = [
    ('hex = "a5 <39-30>"', "token '<39-30>' at character 4: the range '39-30' is reversed"),
    ('hex = "a5 <>"', "token '<>' at character 4: the set is empty"),
    ('hex = "<!>"', "token '<!>' at character 1: the set holds every byte"),
    ('hex = "<00-ff>"', "token '<00-ff>' at character 1: the set holds every byte"),
    ('hex = "<0d 0a"', "token '<0d' at character 1: a byte set '<' is not closed"),
    ('hex = "0d >"', "token '>' at character 4"),
    ('hex = "a5 ?"', "token '?' at character 4: '?' only comes as '??'"),
    ('hex = "a5 ???"', "token '???' at character 4"),
    ('hex = "a5 <0g>"', "token '<0g>' at character 4: '0g' is neither a byte pair"),
    ('hex = "a5 <30--39>"', "token '<30--39>' at character 4"),
    ('hex = "a5 <30  39>"', "token '<30  39>' at character 4: items of a set are separated by single"),
    # plain byte pairs keep the messages they always had (tests/test_signatures.py)
    ('hex = "a5 5"', "odd number of hex digits (3)"),
    ('hex = "a5 zz"', "'z' at character 4 is not a hex digit"),
    ('hex = "?? 5"', "token '5' at character 4: odd number of hex digits"),
    ('hex = "?? zz"', "token 'zz' at character 4: 'z' is not a hex digit"),
]


@pytest.mark.parametrize("line, message", BAD, ids=[b[0] for b in BAD])
def test_bad_tokens_name_file_line_id_part_and_token(line, message):
    from seamscan.signatures import loads_signatures

    text = ('[[signature]]\nid = "ok"\ntext = "fine"\n\n[[signature]]\nid = "lab-7"\n'
            '[[signature.part]]\ntext = "A"\n[[signature.part]]\n' + line + "\n")
    with pytest.raises(SignatureError) as err:
        loads_signatures(text, "lab.toml")
    shown = str(err.value)
    assert shown.startswith("lab.toml:5: signature 'lab-7' (#2): part 2: field 'hex': "), shown
    assert message in shown, shown


BAD_SPACING = [
    ("[0]", "expected [MIN, MAX] with MAX an integer or \"any\""),
    ("[3, 1]", "MAX 1 is less than MIN 3"),
    ("[-1, 4]", "MIN -1 is out of range 0..65535"),
    ("[0, 65536]", "MAX 65536 is out of range"),
    ('[0, "all"]', "expected [MIN, MAX]"),
    ("[1.5, 3]", "expected [MIN, MAX]"),
]


@pytest.mark.parametrize("value, message", BAD_SPACING, ids=[b[0] for b in BAD_SPACING])
def test_bad_spacing(value, message):
    from seamscan.signatures import loads_signatures

    text = ('[[signature]]\nid = "lab-8"\n[[signature.part]]\ntext = "A"\n'
            f"[[signature.part]]\ntext = \"B\"\nspacing = {value}\n")
    with pytest.raises(SignatureError) as err:
        loads_signatures(text, "lab.toml")
    shown = str(err.value)
    assert shown.startswith("lab.toml:1: signature 'lab-8' (#1): part 2: field 'spacing': "), shown
    assert message in shown, shown


@pytest.mark.parametrize("entry, message", [
    ({"id": "x", "text": "A", "part": [{"text": "B"}]}, "give either parts or one pattern"),
    ({"id": "x", "part": []}, "expected [[signature.part]] tables"),
    ({"id": "x", "part": [{"text": "A", "spacing": [0, 2]}]}, "the first part has no spacing"),
    ({"id": "x", "part": [{"text": "A", "hex": "41"}]}, "both given"),
    ({"id": "x", "part": [{"fold_case": True}]}, "missing; give exactly one"),
    ({"id": "x", "part": [{"text": "A", "gap": 1}]}, "unknown field"),
    ({"id": "x", "part": [{"text": "A"}] * 17}, "17 parts; the limit is 16"),
    ({"id": "x", "part": [{"hex": "??"}, {"hex": "??", "spacing": [300, 300]}]},
     "the part tracker would need"),
    ({"id": "x", "window": [0, 5], "part": [{"text": "AB"}, {"text": "CD", "spacing": [2, 4]}]},
     "fewer than the 6-byte pattern"),
])
def test_bad_parts(entry, message):
    with pytest.raises(SignatureError) as err:
        signature_set([entry])
    assert message in str(err.value), str(err.value)


def test_readable_patterns():
    sigset = signature_set([
        {"id": "a", "text": "GET /"},
        {"id": "b", "hex": "a5 5a ?? <30-39> <!0d 0a>"},
        {"id": "c", "fold_case": True,
         "part": [{"hex": "a5 5a"}, {"text": "FORCE", "spacing": [0, 40]},
                  {"text": "COMMIT", "fold_case": False}]},
    ])
    assert [s.readable() for s in sigset] == [
        '"GET /"',
        "hex a5 5a ?? <30-39> <!0d 0a>",
        'hex a5 5a (fold_case) [0,40] "FORCE"i [0,any] "COMMIT"',
    ]


def test_image_versions(tmp_path):
    # A set without multi-part signatures is written as version 1 (byte sets
    # included), and the runtime reads it; a set with parts is version 2 and
    # says what its flow sides need.  A runtime built without the tracker
    # (SS_NO_PARTS) refuses version 2 with SS_ERR_VERSION (-3) and reads 1.
    import subprocess

    plain = engine.compile(signature_set([{"id": "a", "hex": "41 ?? <30-39>"}]))
    parts = engine.compile(signature_set([{"id": "p", "part": [{"text": "AB"}, {"text": "CD"}]}]))
    assert (plain.header.version, plain.track_bytes) == (1, 0)
    # link after "AB": D = 0 + len("CD") = 2, self-overlap of AB is 2, so
    # floor((2 - 1) / 2) + 1 = 1 waiting chain: 24 + 16 bytes
    assert parts.header.version == 2 and parts.track_bytes == 24 + 16 * 1
    root = __import__("pathlib").Path(__file__).resolve().parent.parent
    r = subprocess.run(["make", "-s", "-C", str(root / "csrc"), f"OUT={tmp_path}",
                        "DEFS=-DSS_NO_PARTS", "seamrun"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    (tmp_path / "1.seam").write_bytes(plain.to_bytes())
    (tmp_path / "2.seam").write_bytes(parts.to_bytes())
    r = subprocess.run([str(tmp_path / "seamrun"), "--check", str(tmp_path / "1.seam"),
                        str(tmp_path / "2.seam")], capture_output=True, text=True)
    assert r.stdout.split("\n")[:2] == [f"0 {tmp_path / '1.seam'}", f"-3 {tmp_path / '2.seam'}"]


def test_rate_report_shows_each_pattern():
    # report.json's signatures carry the readable pattern; the CSV has it as
    # its last column.
    from seamscan import evaluate, report

    sigset = signature_set([
        {"id": "t", "text": "GET /"},
        {"id": "p", "part": [{"hex": "a5 ??"}, {"text": "OK", "spacing": [0, 4]}]},
    ])
    stats = evaluate.signature_stats(evaluate.Run(), sigset)
    assert [s["pattern"] for s in stats] == ['"GET /"', 'hex a5 ?? [0,4] "OK"']
    assert report.CSV_COLUMNS[-1] == "pattern"


def test_compile_and_inspect_print_the_tracker_and_costly_states(tmp_path):
    import os
    import subprocess

    rules = tmp_path / "set.toml"
    rules.write_text('[[signature]]\nid = "ty-0102"\nfold_case = true\n'
                     '[[signature.part]]\nhex = "a5 5a ?? 06"\n'
                     '[[signature.part]]\ntext = "FORCE"\nspacing = [0, 40]\n'
                     '[[signature]]\nid = "plain"\ntext = "GET /"\n')
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent / "src"))
    run = partial(subprocess.run, capture_output=True, text=True, env=env)
    out = run([sys.executable, "-m", "seamscan", "compile", str(rules), "-o",
               str(tmp_path / "t.seam"), "--no-speed"])
    assert out.returncode == 0, out.stderr
    # link after "a5 5a ?? 06" (no self-overlap: shift 4), D = 0 + 5: 2 chains, 24 + 32 bytes
    assert "per flow side: 16 bytes of state + 56 bytes of part tracker" in out.stdout
    assert "states only one signature needs (the costliest): ty-0102 " in out.stdout
    out = run([sys.executable, "-m", "seamscan", "inspect", str(tmp_path / "t.seam")])
    assert out.returncode == 0, out.stderr
    assert "format version 2" in out.stdout and "56 bytes of part tracker" in out.stdout


@SETTINGS
@given(cases(), st.randoms(use_true_random=False))
def test_datagrams_confine_every_occurrence(case, rnd):
    # Datagram scope (the default): an occurrence lies in one datagram and
    # its window counts from the datagram's first byte, so the matches are
    # the oracle's on each datagram alone, shifted by where it starts.
    sigs, haystack = case
    sigset = _sigset(sigs)
    cuts = sorted(rnd.sample(range(1, len(haystack)), min(4, max(0, len(haystack) - 1))))
    bounds = [0, *cuts, len(haystack)]
    expected = [(sid, s + a, e + a) for a, b in zip(bounds, bounds[1:], strict=False)
                for sid, s, e in re_oracle.matches(sigs, haystack[a:b])]
    for layout in LAYOUTS:
        stream = engine.compile(sigset, layout).stream(transport="udp", datagram=True)
        got = [m for a, b in zip(bounds, bounds[1:], strict=False)
               for m in stream.feed(haystack[a:b])]
        assert _triples(got) == expected, layout
