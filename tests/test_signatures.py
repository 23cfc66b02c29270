"""The signature set format: values, defaults, and every validation rule."""

import pickle
from pathlib import Path

import pytest

from seamscan.signatures import (
    Signature,
    SignatureError,
    SignatureSet,
    load_signatures,
    loads_signatures,
    signature_set,
)

DATA = Path(__file__).parent / "data" / "sigsets"


def one(body: str) -> Signature:
    """Load a one-signature file whose table body is ``body``."""
    return loads_signatures('[[signature]]\nid = "t-1"\n' + body)[0]


def problems_of(text: str) -> list[str]:
    with pytest.raises(SignatureError) as info:
        loads_signatures(text)
    return info.value.problems


def single_problem(body: str) -> str:
    """The one problem of a one-signature file whose table body is ``body``."""
    found = problems_of('[[signature]]\nid = "t-1"\n' + body)
    assert len(found) == 1, found
    return found[0]


# --- values and defaults ------------------------------------------------------


def test_defaults():
    sig = one('text = "GET /zones/"')
    assert sig == Signature(id="t-1", data=b"GET /zones/")
    assert (sig.fold_case, sig.side, sig.transport, sig.ports, sig.window, sig.scope) == (
        False, "either", "any", None, None, "datagram")
    assert (sig.label, sig.tags, len(sig)) == ("", (), 11)


def test_every_field_from_the_format_example():
    sigset = load_signatures(DATA / "bldg-lab-baseline.toml")
    assert (sigset.name, sigset.version) == ("bldg-lab-baseline", "3")
    assert sigset.source == str(DATA / "bldg-lab-baseline.toml")
    relay = sigset[0]
    assert relay == Signature(
        id="bldg-0001", data=b"POST /relay/", side="client", transport="tcp",
        ports=(80, 8080), window=(0, 1024), label="relay override request",
        tags=("hvac", "write"))
    assert sigset[2].data == bytes.fromhex("deadbeef00")
    assert (sigset[2].transport, sigset[2].scope) == ("udp", "stream")


def test_set_table_is_optional():
    sigset = loads_signatures('[[signature]]\nid = "a"\ntext = "x"\n')
    assert (sigset.name, sigset.version, sigset.source) == ("", "", "<string>")


def test_literal_string_backslash_x00_is_four_bytes():
    # TOML 1.0: literal (single-quoted) strings have no escapes at all.
    assert one("text = '\\x00'").data == b"\\x00"
    assert len(one("text = '\\x00'").data) == 4


def test_basic_string_unicode_escape_becomes_utf8():
    # TOML 1.0 basic-string escape \u00e9 is U+00E9, which UTF-8 encodes as c3 a9 (RFC 3629).
    assert one('text = "\\u00e9"').data == b"\xc3\xa9"
    assert one('text = "tab\\there"').data == b"tab\there"


def test_basic_string_backslash_x_is_a_toml_syntax_error():
    # TOML 1.0 defines no \x escape in basic strings.
    (problem,) = problems_of('[[signature]]\nid = "a"\ntext = "\\x00"\n')
    assert problem.startswith("line 3: TOML syntax error:")


def test_hex_digits_in_either_case_with_spaces():
    assert one('hex = "DE ad Be eF 00"').data == b"\xde\xad\xbe\xef\x00"
    assert one('hex = "deadbeef"').data == b"\xde\xad\xbe\xef"
    assert one('hex = "dead beef"').data == b"\xde\xad\xbe\xef"
    assert one('hex = " de  ad "').data == b"\xde\xad"


@pytest.mark.parametrize(
    "digits, message",
    [
        ("d ead", "a space at character 2 splits a byte pair"),
        ("de\tad", "'\\t' at character 3 is not a hex digit"),
        ("0xde", "'x' at character 2 is not a hex digit"),
        ("de ag", "'g' at character 5 is not a hex digit"),
        ("dea", "odd number of hex digits (3)"),
    ],
)
def test_bad_hex(digits, message):
    problem = single_problem(f'hex = "{digits}"')
    assert f"field 'hex': {message}" in problem


def test_fold_case_byte_sets_pair_ascii_letters_only():
    sig = one('hex = "41 7a 5b 40 c4 31"\nfold_case = true')  # A z [ @ 0xC4 1
    assert sig.byte_sets() == (
        frozenset(b"Aa"), frozenset(b"zZ"), frozenset(b"["), frozenset(b"@"),
        frozenset({0xC4}), frozenset(b"1"))


def test_byte_sets_without_fold_are_single_bytes():
    assert one('text = "Ab["').byte_sets() == (frozenset(b"A"), frozenset(b"b"), frozenset(b"["))


def test_ports_are_sorted_and_deduplicated():
    assert one('text = "x"\nports = [8080, 80, 8080, 0, 65535]').ports == (0, 80, 8080, 65535)


def test_largest_window_and_pattern_are_accepted():
    assert one('text = "x"\nwindow = [0, 4294967295]').window == (0, 4294967295)
    assert len(one(f'hex = "{"ab" * 65535}"')) == 65535


def test_scope_is_allowed_on_udp_and_any():
    assert one('text = "x"\ntransport = "udp"\nscope = "stream"').scope == "stream"
    assert one('text = "x"\nscope = "datagram"').scope == "datagram"


# --- one problem each -----------------------------------------------------------


def test_missing_id_names_the_index():
    problem = problems_of('[[signature]]\ntext = "a"\n[[signature]]\ntext = "b"\n')[1]
    assert problem == "line 3: signature #2: field 'id': missing: every signature needs a unique id"


def test_duplicate_id_names_the_first_use():
    found = problems_of('[[signature]]\nid = "a"\ntext = "x"\n\n[[signature]]\nid = "a"\ntext = "y"\n')
    assert found == [
        "line 5: signature 'a' (#2): field 'id': duplicate id, already used by signature #1 (line 1)"]


@pytest.mark.parametrize("value", ['""', '"   "'])
def test_empty_id(value):
    assert "field 'id': must not be empty" in problems_of(f'[[signature]]\nid = {value}\ntext = "x"\n')[0]


def test_both_text_and_hex():
    assert single_problem('text = "a"\nhex = "61"') == (
        "line 1: signature 't-1' (#1): fields 'text' and 'hex': both given; use exactly one")


def test_neither_text_nor_hex():
    assert single_problem('label = "no pattern"').endswith(
        "field 'text' or 'hex': missing; give exactly one")


@pytest.mark.parametrize("body, field", [('text = ""', "text"), ('hex = ""', "hex"),
                                          ('hex = "   "', "hex")])
def test_empty_pattern(body, field):
    assert single_problem(body).endswith(f"field '{field}': empty pattern")


def test_pattern_longer_than_65535_bytes():
    assert single_problem(f'text = "{"a" * 65536}"').endswith(
        "field 'text': pattern is 65536 bytes long; the limit is 65535")


@pytest.mark.parametrize(
    "typo, meant", [("fold-case", "fold_case"), ("txt", "text"), ("port", "ports"),
                    ("windows", "window")])
def test_unknown_field_did_you_mean(typo, meant):
    problem = single_problem(f'text = "x"\n"{typo}" = 1')
    assert problem.endswith(f"field '{typo}': unknown field; did you mean '{meant}'?")


def test_unknown_field_without_a_close_match_lists_the_fields():
    assert "field 'colour': unknown field; known: id, text, hex," in single_problem(
        'text = "x"\ncolour = "red"')


@pytest.mark.parametrize(
    "body, message",
    [
        ('side = "both"', "field 'side': 'both' is not one of 'client', 'server', 'either'"),
        ('side = "clients"',
         "field 'side': 'clients' is not one of 'client', 'server', 'either'; did you mean 'client'?"),
        ('transport = "sctp"', "field 'transport': 'sctp' is not one of 'tcp', 'udp', 'any'"),
        ('transport = "udp"\nscope = "packet"',
         "field 'scope': 'packet' is not one of 'datagram', 'stream'"),
        ("side = 1", "field 'side': expected one of 'client', 'server', 'either', got integer 1"),
    ],
)
def test_bad_enum_value_lists_the_allowed_values(body, message):
    assert single_problem(f'text = "x"\n{body}').endswith(message)


@pytest.mark.parametrize(
    "ports, message",
    [
        ("[80, 70000]", "element 2: port 70000 is out of range 0..65535"),
        ("[-1]", "element 1: port -1 is out of range 0..65535"),
        ('["80"]', "element 1: expected an integer, got string '80'"),
        ("[true]", "element 1: expected an integer, got boolean True"),
        ("80", "expected an array of port numbers, got integer 80"),
        ("[]", "empty array matches no flow; leave the field out to allow any port"),
    ],
)
def test_bad_ports(ports, message):
    assert single_problem(f'text = "x"\nports = {ports}').endswith(f"field 'ports': {message}")


@pytest.mark.parametrize(
    "window, message",
    [
        ("[0]", "expected [start, end], two integers, got array [0]"),
        ("[0, 1, 2]", "expected [start, end], two integers, got array [0, 1, 2]"),
        ('[0, "9"]', "expected [start, end], two integers"),
        ("[0.0, 9]", "expected [start, end], two integers"),
        ("{ start = 0, end = 9 }", "expected [start, end], two integers, got table"),
        ("[-1, 9]", "start -1 is negative"),
        ("[9, 9]", "start 9 must be less than end 9"),
        ("[10, 9]", "start 10 must be less than end 9"),
        ("[0, 4294967296]", "end 4294967296 is larger than 4294967295"),
        ("[0, 3]", "[0, 3) holds 3 bytes, fewer than the 4-byte pattern: it could never match"),
    ],
)
def test_bad_window(window, message):
    assert f"field 'window': {message}" in single_problem(f'text = "abcd"\nwindow = {window}')


@pytest.mark.parametrize(
    "body, message",
    [
        ('id = 7\ntext = "x"', "field 'id': expected a string, got integer 7"),
        ('id = "t-1"\ntext = 5', "field 'text': expected a string, got integer 5"),
        ('id = "t-1"\nhex = ["de"]', "field 'hex': expected a string, got array ['de']"),
        ('id = "t-1"\ntext = "x"\nfold_case = "yes"',
         "field 'fold_case': expected true or false, got string 'yes'"),
        ('id = "t-1"\ntext = "x"\nfold_case = 1',
         "field 'fold_case': expected true or false, got integer 1"),
        ('id = "t-1"\ntext = "x"\nlabel = 3', "field 'label': expected a string, got integer 3"),
        ('id = "t-1"\ntext = "x"\ntags = "hvac"',
         "field 'tags': expected an array of strings, got string 'hvac'"),
        ('id = "t-1"\ntext = "x"\ntags = ["hvac", 2]',
         "field 'tags': element 2: expected a string, got integer 2"),
    ],
)
def test_wrong_types(body, message):
    (problem,) = problems_of(f"[[signature]]\n{body}\n")
    assert problem.endswith(message)


def test_scope_on_a_tcp_signature():
    assert single_problem('text = "x"\ntransport = "tcp"\nscope = "datagram"').endswith(
        "field 'scope': only applies to UDP, but this signature has transport = 'tcp'")


def test_unknown_set_key_and_wrong_set_type():
    found = problems_of('[set]\nnmae = "x"\nversion = 3\n[[signature]]\nid = "a"\ntext = "x"\n')
    assert found == [
        "line 1: [set]: field 'nmae': unknown field; did you mean 'name'?",
        "line 1: [set]: field 'version': expected a string, got integer 3",
    ]


def test_unknown_top_level_key_did_you_mean():
    with pytest.raises(SignatureError) as info:
        load_signatures(DATA / "typo_top_level.toml")
    assert info.value.problems == [
        "line 4: top level: unknown key 'signatures'; did you mean 'signature'?",
        "no signatures: the set needs at least one [[signature]] table",
    ]


def test_signature_must_be_an_array_of_tables():
    (problem,) = problems_of('signature = "GET"\n')
    assert problem.startswith("line 1: top level: 'signature' must be an array of tables")


@pytest.mark.parametrize("text", ["", "# nothing\n", '[set]\nname = "x"\n'])
def test_no_signatures(text):
    assert problems_of(text) == ["no signatures: the set needs at least one [[signature]] table"]


# --- whole files ------------------------------------------------------------------


def test_all_problems_of_a_file_at_once():
    path = DATA / "four_problems.toml"
    with pytest.raises(SignatureError) as info:
        load_signatures(path)
    err = info.value
    assert err.source == str(path)
    assert err.problems == [
        "line 2: signature 'bldg-0001' (#1): field 'fold-case': unknown field; did you mean 'fold_case'?",
        "line 7: signature 'bldg-0002' (#2): field 'side': 'both' is not one of 'client', 'server', 'either'",
        "line 12: signature 'bldg-0003' (#3): field 'hex': odd number of hex digits (7)",
        "line 16: signature #4: field 'id': missing: every signature needs a unique id",
    ]
    assert str(err) == f"{path}: 4 problem(s) in the signature set:\n  " + "\n  ".join(err.problems)


def test_line_is_that_of_the_signature_header():
    text = (
        '[set]\nname = "x"\n\n'
        '[[signature]]\nid = "a"\ntext = "x"\n\n'
        '  [[ signature ]]   # indented, spaced, commented\nid = "b"\n\n\ntext = "x"\nside = "up"\n'
    )
    (problem,) = problems_of(text)
    assert problem.startswith("line 8: signature 'b' (#2): field 'side'")


def test_line_numbers_with_crlf_and_a_byte_order_mark(tmp_path):
    path = tmp_path / "crlf.toml"
    path.write_bytes(b'\xef\xbb\xbf[[signature]]\r\nid = "a"\r\ntext = "x"\r\n'
                     b'[[signature]]\r\nid = "b"\r\nhex = "zz"\r\n')
    with pytest.raises(SignatureError) as info:
        load_signatures(path)
    assert info.value.problems[0].startswith("line 4: signature 'b' (#2): field 'hex'")


def test_toml_syntax_error_names_file_and_line():
    path = DATA / "syntax_error.toml"
    with pytest.raises(SignatureError) as info:
        load_signatures(path)
    assert str(info.value).startswith(f"{path}:6: TOML syntax error: ")
    assert info.value.problems[0].startswith("line 6: TOML syntax error: ")


def test_toml_error_at_the_end_of_the_document():
    (problem,) = problems_of('[[signature]]\nid = "a"\ntext = """x\n')
    assert problem.startswith("line 3: TOML syntax error:")


def test_missing_file():
    with pytest.raises(SignatureError) as info:
        load_signatures(DATA / "no-such-file.toml")
    assert str(info.value) == f"{DATA / 'no-such-file.toml'}: cannot read the file: no such file"


def test_directory_is_not_a_file():
    with pytest.raises(SignatureError, match="cannot read the file: it is a directory"):
        load_signatures(DATA)


def test_not_utf8_names_the_line_and_byte():
    path = DATA / "not_utf8.toml"
    with pytest.raises(SignatureError) as info:
        load_signatures(path)
    assert str(info.value) == f"{path}:3: the file is not UTF-8 text (byte 0xe9 at offset 40)"


def test_error_is_a_value_error_and_pickles():
    err = SignatureError("x.toml", ["line 1: a", "b"])
    assert isinstance(err, ValueError)
    again = pickle.loads(pickle.dumps(err))
    assert (again.source, again.problems, str(again)) == (err.source, err.problems, str(err))


def test_single_problem_without_a_line():
    assert str(SignatureError("x.toml", ["no signatures"])) == "x.toml: no signatures"


def test_ten_thousand_signatures_load():
    text = "".join(
        f'[[signature]]\nid = "bldg-{i:05d}"\ntext = "POST /relay/{i}"\nports = [80]\n'
        for i in range(10_000)
    )
    sigset = loads_signatures(text)
    assert len(sigset) == 10_000 and sigset.index("bldg-09999") == 9999


# --- building sets in Python -------------------------------------------------------


def test_signature_set_from_dicts_and_signatures():
    sigset = signature_set(
        [{"id": "a", "text": "GET", "ports": [8080, 80]}, Signature(id="b", data=b"\x00\xff")],
        name="lab", version="2")
    assert sigset.ids == ("a", "b")
    assert sigset[0].ports == (80, 8080) and sigset[1].data == b"\x00\xff"
    assert (sigset.name, sigset.version, sigset.source) == ("lab", "2", "<python>")


def test_signature_set_applies_the_same_rules():
    with pytest.raises(SignatureError) as info:
        signature_set([
            {"id": "a", "txt": "GET"},
            Signature(id="b", data=b"x", side="both"),
            Signature(id="c", data="not bytes"),
            Signature(id="a", data=b"x", transport="tcp", scope="stream"),
            42,
        ])
    assert info.value.source == "<python>"
    assert info.value.problems == [
        "signature 'a' (#1): field 'txt': unknown field; did you mean 'text'?",
        "signature 'a' (#1): field 'text' or 'hex': missing; give exactly one",
        "signature 'b' (#2): field 'side': 'both' is not one of 'client', 'server', 'either'",
        "signature 'c' (#3): field 'data': expected bytes, got string 'not bytes'",
        "signature 'a' (#4): field 'scope': only applies to UDP, but this signature has transport = 'tcp'",
        "signature 'a' (#4): field 'id': duplicate id, already used by signature #1",
        "signature #5: expected a table of fields or a Signature, got integer",
    ]


def test_signature_set_with_no_entries():
    with pytest.raises(SignatureError, match="no signatures"):
        signature_set([])


def test_set_container():
    sigset = signature_set([{"id": "a", "text": "x"}, {"id": "b", "text": "y"}])
    assert isinstance(sigset, SignatureSet)
    assert len(sigset) == 2 and [s.id for s in sigset] == ["a", "b"] and sigset[1].id == "b"
    assert sigset.index("b") == 1 and sigset.ids == ("a", "b")
    with pytest.raises(KeyError):
        sigset.index("zz")


def test_inline_array_of_signature_tables():
    sigset = loads_signatures('signature = [{ id = "a", text = "x" }, { id = "b", hex = "00" }]\n')
    assert sigset.ids == ("a", "b")
    (problem,) = problems_of('signature = [{ id = "a", text = "x" }, 5]\n')
    assert problem == "signature #2: expected a table of fields or a Signature, got integer"
