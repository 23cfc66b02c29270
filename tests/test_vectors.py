"""The shared vector table against the reference matcher, Python's ``re`` and
the engine (every layout, whole buffers, streams cut anywhere, table images).

"""


import pytest

import re_oracle
import seamscan
from seamscan.reference import reference_matches
from seamscan.signatures import SignatureSet, signature_set
from vectors import LAYOUTS, VECTORS, Vector

VECTOR_IDS = [v.name for v in VECTORS]


def _sigset(vector: Vector) -> SignatureSet:
    return signature_set(vector.sigs, name=vector.name)


def _named(sigset: SignatureSet, matches) -> list[tuple[str, int, int]]:
    return [(sigset[i].id, start, end) for i, start, end in matches]


def _triples(matches) -> list[tuple[str, int, int]]:
    return [(m.sig, m.start, m.end) for m in matches]


def _re_matches(vector: Vector) -> list[tuple[str, int, int]]:
    """Outside oracle: Python's ``re`` (``tests/re_oracle.py``), from the
    signatures as written: each one translated into a bytes regex, and per
    end offset the latest start whose slice it ``fullmatch``-es, inside the
    window.  ``re.IGNORECASE`` on a bytes pattern folds ASCII letters only
    (Python ``re`` documentation), the same pairing as ``fold_case``; the
    fold vectors with ``[``/``{``, ``@``/`` ` ``, 0xC4/0xE4 and 0x89/0xA9
    confirm it.  For literals this is every occurrence, overlapping ones
    included (one literal occurrence per end offset).
    """
    return re_oracle.matches(vector.sigs, vector.haystack)


def _prefix_function(pattern: bytes) -> list[int]:
    """Knuth-Morris-Pratt prefix function (longest proper border of each prefix)."""
    pi = [0] * len(pattern)
    k = 0
    for q in range(1, len(pattern)):
        while k and pattern[k] != pattern[q]:
            k = pi[k - 1]
        if pattern[k] == pattern[q]:
            k += 1
        pi[q] = k
    return pi


# --- the table itself and the oracles (no engine needed) --------------------


def test_vector_table_is_well_formed():
    assert 30 <= len(VECTORS) <= 60
    assert len(set(VECTOR_IDS)) == len(VECTOR_IDS)
    for v in VECTORS:
        ids = [s["id"] for s in v.sigs]
        assert len(set(ids)) == len(ids), v.name
        order = {sig_id: k for k, sig_id in enumerate(ids)}
        keys = [(end, order[sig_id]) for sig_id, _, end in v.expected]
        assert keys == sorted(keys), f"{v.name}: expected list not in (end, signature) order"


def test_textbook_prefix_function():
    # CLRS ch. 32: the prefix function of ababaca is 0,0,1,2,3,0,1 (recalled from memory).
    assert _prefix_function(b"ababaca") == [0, 0, 1, 2, 3, 0, 1]


@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_reference_gives_expected(vector):
    sigset = _sigset(vector)
    assert _named(sigset, reference_matches(sigset, vector.haystack)) == vector.expected


@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_python_re_gives_expected(vector):
    # Outside oracle: Python's re module (see _re_matches).
    assert _re_matches(vector) == vector.expected


# --- reference context filters ------------------------------------------------

CONTEXT_SET = [
    {"id": "any", "text": "rly"},
    {"id": "client", "text": "rly", "side": "client"},
    {"id": "server", "text": "rly", "side": "server"},
    {"id": "tcp", "text": "rly", "transport": "tcp"},
    {"id": "udp", "text": "rly", "transport": "udp"},
    {"id": "port-80", "text": "rly", "ports": [80, 8080]},
    {"id": "port-502", "text": "rly", "ports": [502]},
]


@pytest.mark.parametrize(
    "context, kept",
    [
        ({}, ["any", "client", "server", "tcp", "udp", "port-80", "port-502"]),
        ({"side": "client"}, ["any", "client", "tcp", "udp", "port-80", "port-502"]),
        ({"side": "server"}, ["any", "server", "tcp", "udp", "port-80", "port-502"]),
        ({"transport": "tcp"}, ["any", "client", "server", "tcp", "port-80", "port-502"]),
        ({"transport": "udp"}, ["any", "client", "server", "udp", "port-80", "port-502"]),
        ({"server_port": 8080}, ["any", "client", "server", "tcp", "udp", "port-80"]),
        ({"server_port": 47808}, ["any", "client", "server", "tcp", "udp"]),
        ({"side": "server", "transport": "udp", "server_port": 502},
         ["any", "server", "udp", "port-502"]),
    ],
)
def test_reference_context_filters(context, kept):
    sigset = signature_set(CONTEXT_SET)
    got = _named(sigset, reference_matches(sigset, b"xrlyx", **context))
    assert got == [(sig_id, 1, 4) for sig_id in kept]


@pytest.mark.parametrize(
    "context", [{"side": "either"}, {"transport": "any"}, {"server_port": 70000},
                {"server_port": "80"}]
)
def test_reference_rejects_bad_context(context):
    with pytest.raises(ValueError):
        reference_matches(signature_set(CONTEXT_SET), b"rly", **context)


def test_reference_accepts_a_plain_sequence_and_bytearray():
    sigs = list(signature_set([{"id": "a", "text": "ab"}]))
    assert reference_matches(sigs, bytearray(b"abab")) == [(0, 0, 2), (0, 2, 4)]


# --- the engine ---------------------------------------------------------------


@pytest.fixture(scope="module")
def engine():
    import seamscan.engine

    return seamscan.engine  # our own module: a failed import is a failure, not a skip


def _compile(vector: Vector, layout: str):
    return seamscan.compile(_sigset(vector), layout=layout)


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_engine_scan(engine, vector, layout):
    table = _compile(vector, layout)
    assert _triples(table.scan(vector.haystack)) == vector.expected


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_engine_stream_every_split_point(engine, vector, layout):
    table = _compile(vector, layout)
    hay = vector.haystack
    for cut in range(len(hay) + 1):
        stream = table.stream()
        got = _triples(stream.feed(hay[:cut])) + _triples(stream.feed(hay[cut:]))
        assert got == vector.expected, f"split at {cut}"
        assert stream.offset == len(hay)


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_engine_stream_byte_at_a_time_and_reset(engine, vector, layout):
    table = _compile(vector, layout)
    hay = vector.haystack
    stream = table.stream()
    got = []
    for i in range(len(hay)):
        got += _triples(stream.feed(hay[i : i + 1]))
    assert got == vector.expected
    stream.reset()
    assert stream.offset == 0
    assert _triples(stream.feed(hay)) == vector.expected


@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("vector", VECTORS, ids=VECTOR_IDS)
def test_engine_table_image_round_trip(engine, vector, layout):
    table = _compile(vector, layout)
    image = table.to_bytes()
    again = seamscan.Table.from_bytes(image)
    assert _triples(again.scan(vector.haystack)) == vector.expected
    assert again.to_bytes() == image
    assert (again.nbytes, again.states, again.classes) == (table.nbytes, table.states, table.classes)
