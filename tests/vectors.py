"""The one table of named match vectors, run against every layout, the Python
reference matcher and the C runtime.

Each vector gives signatures (dicts in the TOML field names), a haystack and
the expected matches as ``(signature id, start, end)``, end exclusive,
sorted by end and then by signature order.  Every expected list was worked
out by hand; ``tests/test_vectors.py`` re-derives it with the reference
matcher and with Python's ``re`` module.  ``source`` names an outside
origin where there is one.
"""

from __future__ import annotations

from dataclasses import dataclass, field

# Layouts every engine test runs over; a new layout joins by being added here.
LAYOUTS = ["dense", "compact"]


@dataclass(frozen=True)
class Vector:
    name: str
    sigs: list[dict]
    haystack: bytes
    expected: list[tuple[str, int, int]]
    source: str = field(default="")


def _text(sig_id: str, text: str, **fields) -> dict:
    return {"id": sig_id, "text": text, **fields}


def _hex(sig_id: str, digits: str, **fields) -> dict:
    return {"id": sig_id, "hex": digits, **fields}


def _same_text(*texts: str) -> list[dict]:
    """Signatures whose id is their own text."""
    return [_text(t, t) for t in texts]


AHO_CORASICK_1975 = (
    'A. V. Aho and M. J. Corasick, "Efficient string matching: an aid to '
    'bibliographic search", CACM 18(6), 1975: keywords he, she, his, hers '
    'in "ushers" (recalled from memory)'
)
CLRS_CH32 = (
    'Cormen, Leiserson, Rivest, Stein, "Introduction to Algorithms", ch. 32: '
    "the pattern ababaca, prefix function 0,0,1,2,3,0,1 (recalled from memory); "
    "text constructed for two overlapping occurrences"
)
WIKIPEDIA_AC = (
    'Wikipedia, "Aho-Corasick algorithm": dictionary {a, ab, bab, bc, bca, c, caa} '
    'on the input "abccab" (recalled from memory)'
)


VECTORS: list[Vector] = [
    # --- textbook examples ---------------------------------------------------
    # The paper reports she and he together at position 4; our order for a
    # shared end is signature order, so he (listed first) comes before she.
    Vector(
        "ac-paper-ushers",
        _same_text("he", "she", "his", "hers"),
        b"ushers",
        [("he", 2, 4), ("she", 1, 4), ("hers", 2, 6)],
        AHO_CORASICK_1975,
    ),
    Vector(
        "ac-dictionary-abccab",
        _same_text("a", "ab", "bab", "bc", "bca", "c", "caa"),
        b"abccab",
        [("a", 0, 1), ("ab", 0, 2), ("bc", 1, 3), ("c", 2, 3), ("c", 3, 4),
         ("a", 4, 5), ("ab", 4, 6)],
        WIKIPEDIA_AC,
    ),
    Vector(
        "kmp-ababaca-overlapping",
        _same_text("ababaca"),
        b"abababacababaca",
        [("ababaca", 2, 9), ("ababaca", 8, 15)],
        CLRS_CH32,
    ),
    Vector(
        "kmp-restart-after-mismatch",
        _same_text("aab"),
        b"aaab",
        [("aab", 1, 4)],
    ),
    # --- self-overlap and nesting -------------------------------------------
    Vector(
        "self-overlap-aaaa",
        _same_text("aaaa"),
        b"aaaaaaa",
        [("aaaa", 0, 4), ("aaaa", 1, 5), ("aaaa", 2, 6), ("aaaa", 3, 7)],
    ),
    Vector(
        "self-overlap-abab",
        _same_text("abab"),
        b"abababab",
        [("abab", 0, 4), ("abab", 2, 6), ("abab", 4, 8)],
    ),
    Vector(
        "nested-runs-a-aa-aaa",
        _same_text("a", "aa", "aaa"),
        b"aaaa",
        [("a", 0, 1),
         ("a", 1, 2), ("aa", 0, 2),
         ("a", 2, 3), ("aa", 1, 3), ("aaa", 0, 3),
         ("a", 3, 4), ("aa", 2, 4), ("aaa", 1, 4)],
    ),
    Vector(
        "suffix-chain-hers",
        _same_text("hers", "ers", "rs", "s"),
        b"hershers",
        [("hers", 0, 4), ("ers", 1, 4), ("rs", 2, 4), ("s", 3, 4),
         ("hers", 4, 8), ("ers", 5, 8), ("rs", 6, 8), ("s", 7, 8)],
    ),
    # --- shared prefixes / suffixes, substrings, duplicates ------------------
    Vector(
        "shared-prefix",
        _same_text("bld", "bldg", "bldg-lab"),
        b"bldg-lab-7",
        [("bld", 0, 3), ("bldg", 0, 4), ("bldg-lab", 0, 8)],
    ),
    Vector(
        "shared-suffix",
        _same_text("relay", "lay", "ay"),
        b"xrelayx",
        [("relay", 1, 6), ("lay", 3, 6), ("ay", 4, 6)],
    ),
    Vector(
        "substring-of-another",
        _same_text("fan-speed", "speed", "an"),
        b"set fan-speed=3",
        [("an", 5, 7), ("fan-speed", 4, 13), ("speed", 8, 13)],
    ),
    Vector(
        "fall-back-into-other-pattern",
        _same_text("abcd", "bce", "c"),
        b"abce",
        [("c", 2, 3), ("bce", 1, 4)],
    ),
    Vector(
        "same-end-ordered-by-signature",
        _same_text("c", "bc", "abc"),
        b"abc",
        [("c", 2, 3), ("bc", 1, 3), ("abc", 0, 3)],
    ),
    Vector(
        "identical-patterns-two-ids",
        [_text("temp-a", "temp"), _text("temp-b", "temp")],
        b"temp=21;temp=22",
        [("temp-a", 0, 4), ("temp-b", 0, 4), ("temp-a", 8, 12), ("temp-b", 8, 12)],
    ),
    Vector(
        "end-order-not-start-order",
        _same_text("a", "b", "c"),
        b"cab",
        [("c", 0, 1), ("a", 1, 2), ("b", 2, 3)],
    ),
    # --- positions --------------------------------------------------------
    Vector(
        "pattern-is-whole-haystack",
        _same_text("setpoint"),
        b"setpoint",
        [("setpoint", 0, 8)],
    ),
    Vector(
        "matches-at-both-ends",
        _same_text("co2"),
        b"co2 level co2",
        [("co2", 0, 3), ("co2", 10, 13)],
    ),
    Vector(
        "near-misses-only",
        _same_text("damper"),
        b"dampe dampr damped",
        [],
    ),
    Vector(
        "long-pattern-after-partial-copy",
        [_text("zone-setpoint", "/api/v1/zones/3/thermostat/setpoint")],
        b"/api/v1/zones/3/thermo/api/v1/zones/3/thermostat/setpoint",
        [("zone-setpoint", 22, 57)],
    ),
    # --- one-byte and binary patterns --------------------------------------
    Vector(
        "one-byte-patterns",
        [_text("eq", "="), _hex("nul", "00")],
        b"a=\x00=\x00\x00",
        [("eq", 1, 2), ("nul", 2, 3), ("eq", 3, 4), ("nul", 4, 5), ("nul", 5, 6)],
    ),
    Vector(
        "binary-00-ff",
        [_hex("nul-ff-nul", "00 ff 00"), _hex("ff-ff", "FFFF")],
        b"\xff\xff\x00\xff\x00\xff\x00\xff\xff",
        [("ff-ff", 0, 2), ("nul-ff-nul", 2, 5), ("nul-ff-nul", 4, 7), ("ff-ff", 7, 9)],
    ),
    Vector(
        "binary-zero-run",
        [_hex("nul-nul", "00 00")],
        b"\x00\x00\x00\x00",
        [("nul-nul", 0, 2), ("nul-nul", 1, 3), ("nul-nul", 2, 4)],
    ),
    Vector(
        "binary-high-bytes",
        [_hex("fe-ff", "fe ff"), _hex("ff-fe", "ff fe")],
        b"\xfe\xff\xfe\xff",
        [("fe-ff", 0, 2), ("ff-fe", 1, 3), ("fe-ff", 2, 4)],
    ),
    Vector(
        "utf8-text-and-hex",
        [_text("kueche", "Küche"), _hex("u-umlaut", "C3 BC")],
        "Raum: Küche 2".encode(),
        [("u-umlaut", 7, 9), ("kueche", 6, 12)],
    ),
    Vector(
        "backslash-x00-is-four-characters",
        [_text("escape-text", r"\x00")],
        b"a\\x00b\x00",
        [("escape-text", 1, 5)],
    ),
    # --- fold_case --------------------------------------------------------
    Vector(
        "fold-mixed-with-exact",
        [_text("exact-Get", "Get"), _text("fold-get", "get", fold_case=True),
         _text("exact-GET", "GET")],
        b"GET get Get gEt",
        [("fold-get", 0, 3), ("exact-GET", 0, 3), ("fold-get", 4, 7),
         ("exact-Get", 8, 11), ("fold-get", 8, 11), ("fold-get", 12, 15)],
    ),
    Vector(
        "fold-same-pattern-exact-and-folded",
        [_text("exact-ab", "ab"), _text("fold-ab", "ab", fold_case=True)],
        b"ab AB Ab",
        [("exact-ab", 0, 2), ("fold-ab", 0, 2), ("fold-ab", 3, 5), ("fold-ab", 6, 8)],
    ),
    Vector(
        "fold-exact-shared-prefix",
        [_text("exact-Temp", "Temp"), _text("fold-TEMP=", "TEMP=", fold_case=True)],
        b"temp=TEMP=Temp=",
        [("fold-TEMP=", 0, 5), ("fold-TEMP=", 5, 10), ("exact-Temp", 10, 14),
         ("fold-TEMP=", 10, 15)],
    ),
    Vector(
        "fold-letter-range-edges",
        [_text("fold-AZ", "AZ", fold_case=True), _text("exact-z[", "z[")],
        b"azAZaZ@z[zA{",
        [("fold-AZ", 0, 2), ("fold-AZ", 2, 4), ("fold-AZ", 4, 6), ("exact-z[", 7, 9)],
    ),
    Vector(
        "fold-brackets-not-paired",
        [_text("fold-a[", "a[", fold_case=True)],
        b"A{ a[ A[ a{",
        [("fold-a[", 3, 5), ("fold-a[", 6, 8)],
    ),
    Vector(
        "fold-at-sign-backtick-not-paired",
        [_text("fold-@x", "@x", fold_case=True)],
        b"`X @X @x `x",
        [("fold-@x", 3, 5), ("fold-@x", 6, 8)],
    ),
    Vector(
        "fold-underscore-del-not-paired",
        [_text("fold-_1", "_1", fold_case=True)],
        b"\x7f1_1",
        [("fold-_1", 2, 4)],
    ),
    Vector(
        "fold-space-nul-not-paired",
        [_text("fold-space-a", " a", fold_case=True), _hex("fold-nul-A", "00 41", fold_case=True)],
        b"\x00A A\x00a",
        [("fold-nul-A", 0, 2), ("fold-space-a", 2, 4), ("fold-nul-A", 4, 6)],
    ),
    Vector(
        "fold-non-ascii-c4-e4-not-paired",
        [_hex("fold-c4", "c4", fold_case=True), _hex("exact-e4", "e4")],
        b"\xe4\xc4\xe4",
        [("exact-e4", 0, 1), ("fold-c4", 1, 2), ("exact-e4", 2, 3)],
    ),
    Vector(
        "fold-utf8-accents-not-paired",
        [_text("fold-CAFE-acute-upper", "CAFÉ", fold_case=True),
         _text("fold-CAFe-acute-lower", "CAFé", fold_case=True)],
        "café".encode(),
        [("fold-CAFe-acute-lower", 0, 5)],
    ),
    Vector(
        "fold-hex-letters",
        [_hex("fold-hex-AB", "41 42", fold_case=True)],
        b"ab",
        [("fold-hex-AB", 0, 2)],
    ),
    # --- window -----------------------------------------------------------
    Vector(
        "window-inside",
        [_text("ab-in-2-6", "ab", window=[2, 6])],
        b"abababab",
        [("ab-in-2-6", 2, 4), ("ab-in-2-6", 4, 6)],
    ),
    Vector(
        "window-straddling-both-edges",
        [_text("bab-in-2-6", "bab", window=[2, 6])],
        b"abababab",
        [("bab-in-2-6", 3, 6)],
    ),
    Vector(
        "window-exactly-the-match",
        [_text("on-in-3-5", "ON", window=[3, 5])],
        b"ON ON ON",
        [("on-in-3-5", 3, 5)],
    ),
    Vector(
        "window-straddling-end",
        [_text("abc-in-0-5", "abc", window=[0, 5])],
        b"xxabcabc",
        [("abc-in-0-5", 2, 5)],
    ),
    Vector(
        "window-head-tail-and-none",
        [_text("relay-head", "relay", window=[0, 5]),
         _text("relay-tail", "relay", window=[5, 10]),
         _text("relay-any", "relay")],
        b"relayrelay",
        [("relay-head", 0, 5), ("relay-any", 0, 5), ("relay-tail", 5, 10), ("relay-any", 5, 10)],
    ),
    Vector(
        "window-open-ended",
        [_text("x-from-4", "x", window=[4, 4294967295])],
        b"xxxxxx",
        [("x-from-4", 4, 5), ("x-from-4", 5, 6)],
    ),
    Vector(
        "window-beyond-haystack",
        [_text("x-from-10", "x", window=[10, 20])],
        b"xxxxxx",
        [],
    ),
    Vector(
        "window-with-fold",
        [_text("fold-get-in-4-8", "get", fold_case=True, window=[4, 8])],
        b"GET GET GET",
        [("fold-get-in-4-8", 4, 7)],
    ),
    # --- degenerate haystacks ---------------------------------------------
    Vector(
        "empty-haystack",
        [_text("a", "a"), _hex("nul", "00")],
        b"",
        [],
    ),
    Vector(
        "haystack-shorter-than-every-pattern",
        _same_text("heating", "lighting"),
        b"heat",
        [],
    ),
    # --- byte sets, ?? and parts (issue 10); worked by hand from the
    # contract: re.fullmatch of the translated regex, one match per end at
    # the latest start ------------------------------------------------------
    Vector(
        "set-digit-range",
        [_hex("t-digit", "74 3d <30-39>")],
        b"t=5 t=x t=9",
        [("t-digit", 0, 3), ("t-digit", 8, 11)],
    ),
    Vector(
        "set-complement-of-cr-lf",
        [_hex("not-eol", "3a <!0d 0a>")],
        b":\r:a:\n:",
        [("not-eol", 2, 4)],
    ),
    Vector(
        "wildcard-sequence-byte",
        [_hex("frame", "a5 5a ?? 06")],
        b"\xa5\x5a\x01\x06\xa5\x5a\xa5\x5a\x06\x06",
        [("frame", 0, 4), ("frame", 6, 10)],
    ),
    Vector(
        "set-range-with-fold",
        [_hex("abc-z", "<61-63> 7a", fold_case=True)],
        b"Az bZ dz cz",
        [("abc-z", 0, 2), ("abc-z", 3, 5), ("abc-z", 9, 11)],
    ),
    Vector(
        "parts-in-order-any-spacing",
        [{"id": "ab-cd", "part": [{"text": "AB"}, {"text": "CD"}]}],
        b"CD AB xx CD CD",
        [("ab-cd", 3, 11), ("ab-cd", 3, 14)],
    ),
    Vector(
        "parts-spacing-max-met-and-missed",
        [{"id": "ab-cd", "part": [{"text": "AB"}, {"text": "CD", "spacing": [0, 2]}]}],
        b"ABxxCD ABxxxCD",
        [("ab-cd", 0, 6)],
    ),
    Vector(
        "parts-spacing-min",
        [{"id": "a-b", "part": [{"text": "A"}, {"text": "B", "spacing": [2, 3]}]}],
        b"AB AxB AxxB AxxxB",
        [("a-b", 7, 11), ("a-b", 12, 17)],
    ),
    Vector(
        "parts-shortest-occurrence",
        [{"id": "ab-cd", "part": [{"text": "AB"}, {"text": "CD"}]}],
        b"ABABCD",
        [("ab-cd", 2, 6)],
    ),
    Vector(
        "parts-never-overlap",
        [{"id": "ab-bc", "part": [{"text": "AB"}, {"text": "BC"}]}],
        b"ABC ABBC",
        [("ab-bc", 4, 8)],
    ),
    Vector(
        "parts-same-part-twice",
        [{"id": "ab-ab", "part": [{"text": "ab"}, {"text": "ab"}]}],
        b"ababab",
        [("ab-ab", 0, 4), ("ab-ab", 2, 6)],
    ),
    Vector(
        "parts-with-window",
        [{"id": "a-b", "window": [2, 8], "part": [{"text": "A"}, {"text": "B"}]}],
        b"AB AB AB",
        [("a-b", 3, 5), ("a-b", 6, 8)],
    ),
    Vector(
        "three-parts-sets-and-fold-override",
        [{"id": "zone-force", "fold_case": True,
          "part": [{"hex": "a5 5a ?? 06"}, {"text": "FORCE", "spacing": [0, 40]},
                   {"text": "COMMIT", "fold_case": False}]},
         _text("commit", "COMMIT")],
        b"\xa5\x5a\x07\x06 force=1 COMMIT commit",
        [("zone-force", 0, 19), ("commit", 13, 19)],
    ),
]
