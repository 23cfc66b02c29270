"""File names that are not UTF-8: every output stays valid UTF-8 and names such
a file in one escaped form, ``\\xNN`` per byte that is not UTF-8.

Outside reference: Python's ``backslashreplace`` decoding of the name's bytes
(``bytes.decode("utf-8", "backslashreplace")``, the codecs documentation),
the form README and ``--help`` promise; the outputs are read back with
Python's strict UTF-8 decoder, ``json`` and ``csv``.  The files exist on disk
under names made of bytes (``os.fsencode`` paths), as on an old share.
"""

from __future__ import annotations

import csv
import io
import json
import os
import random
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from seamscan import filenames

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "pcaps_demo"
CAPTURE = b"caf\xe9.pcap"  # Latin-1 e-acute: not UTF-8
RULES = b"r\xe8gles \xff.toml"


def expected(name: bytes) -> str:
    """The promised form: Python's backslashreplace decoding of the bytes."""
    return name.decode("utf-8", "backslashreplace")


@pytest.fixture
def where(tmp_path):
    """A directory holding the demo HTTP capture and the demo set under byte names."""
    base = os.fsencode(tmp_path)
    shutil.copyfile(DEMO / "lab-http.pcap", os.path.join(base, CAPTURE))
    shutil.copyfile(DEMO / "demo-signatures.toml", os.path.join(base, RULES))
    whole = (DEMO / "lab-http.pcap").read_bytes()
    with open(os.path.join(base, b"cut \xe9.pcap"), "wb") as f:
        f.write(whole[: len(whole) * 2 // 3])
    return base


def run(cwd: bytes, *args, strict=False):
    """``python -m seamscan ARGS`` in ``cwd`` (arguments may be bytes): (code, stdout, stderr)
    as bytes, stdout and stderr through pipes as a user's redirection would."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    if strict:
        env["PYTHONIOENCODING"] = "utf-8:strict"
    r = subprocess.run([sys.executable, "-m", "seamscan", *args], cwd=cwd, env=env,
                       capture_output=True, timeout=300)
    return r.returncode, r.stdout, r.stderr


def text(data: bytes) -> str:
    """``data`` decoded as strict UTF-8 (raises if it is not)."""
    return data.decode("utf-8")


def test_the_form_is_pythons_backslashreplace_on_any_name():
    rng = random.Random(9)
    alphabet = [b for b in range(1, 256) if b != ord("/")]
    names = [bytes(rng.choice(alphabet) for _ in range(rng.randint(1, 24))) for _ in range(2000)]
    names += [b"caf\xc3\xa9.pcap", b"\xed\xa0\x80.pcap", b"\xf0\x9f\x90\x8d", b"plain.pcap"]
    for name in names:
        got = filenames.shown(os.fsdecode(name))
        assert got == expected(name), name
        got.encode("utf-8")  # valid UTF-8 text
    obj = {"file": os.fsdecode(CAPTURE), "list": [os.fsdecode(RULES), 3], os.fsdecode(b"\xff"): None}
    assert filenames.shown_all(obj) == {"file": "caf\\xe9.pcap", "list": ["r\\xe8gles \\xff.toml", 3],
                                        "\\xff": None}


@pytest.mark.parametrize("fmt", ["jsonl", "csv", "table"])
@pytest.mark.parametrize("to_file", [True, False], ids=["file", "stdout"])
def test_scan_names_the_capture_in_every_format(where, fmt, to_file):
    out = b"out \xe9." + fmt.encode()
    args = ["scan", CAPTURE, "--rules", RULES, "--format", fmt, "--quiet"]
    code, stdout, stderr = run(where, *args, *(["-o", out] if to_file else []), strict=not to_file)
    assert code == 0 and b"Traceback" not in stderr, stderr
    data = open(os.path.join(where, out), "rb").read() if to_file else stdout
    body = text(data)
    name = expected(CAPTURE)
    if fmt == "jsonl":
        recs = [json.loads(line) for line in body.splitlines()]
        files = {r["file"] for r in recs if "file" in r}
        assert files == {name} and recs[-1]["type"] == "summary"
        assert sum(r["type"] == "match" for r in recs) == recs[-1]["matches"] > 0
    elif fmt == "csv":
        rows = list(csv.DictReader(io.StringIO(body)))
        assert rows and {r["file"] for r in rows} == {name}
    else:
        assert f"[{name}]" in body and "matches" in body.splitlines()[-3]


def test_a_damaged_capture_and_missing_files_are_named_the_same_way(where):
    cut = b"cut \xe9.pcap"
    for fmt in ("jsonl", "table", "csv"):
        code, stdout, stderr = run(where, "scan", cut, "--rules", RULES, "--format", fmt)
        assert code == 3 and b"Traceback" not in stderr
        body, err = text(stdout), text(stderr)
        assert f"damaged capture: {expected(cut)}: record" in err
        if fmt == "jsonl":
            (error,) = [r for r in map(json.loads, body.splitlines()) if r["type"] == "error"]
            assert error["file"] == expected(cut) and error["message"].startswith(expected(cut))
        elif fmt == "table":
            assert f"!! {expected(cut)}: record" in body
    code, _, stderr = run(where, "scan", b"gone \xe9.pcap", "--rules", RULES)
    assert code == 2 and text(stderr) == "seamscan: gone \\xe9.pcap: no such capture file\n"
    code, _, stderr = run(where, "scan", CAPTURE, "--rules", b"gone \xe9.toml")
    assert code == 2 and "gone \\xe9.toml: cannot read" in text(stderr)
    assert b"Traceback" not in stderr


def test_rate_report_names_capture_and_rules(where):
    rep = b"report \xe9"
    code, stdout, stderr = run(where, "rate", CAPTURE, "--rules", RULES, "--report", rep,
                               strict=True)
    assert code == 0 and b"Traceback" not in stderr, stderr
    assert text(stdout).startswith(expected(RULES) + " (tern-yard-lab-demo")
    assert text(stderr).startswith(f"wrote {expected(rep)}/report.json")
    saved = json.loads(text(open(os.path.join(where, rep, b"report.json"), "rb").read()))
    assert saved["rules"]["path"] == expected(RULES)
    assert [c["path"] for c in saved["captures"]] == [expected(CAPTURE)]
    assert {p for f in saved["flows"] for p in f["files"]} == {expected(CAPTURE)}
    page = text(open(os.path.join(where, rep, b"report.html"), "rb").read())
    assert expected(CAPTURE) in page and expected(RULES) in page
    text(open(os.path.join(where, rep, b"signatures.csv"), "rb").read())
    code, stdout, stderr = run(where, "rate", CAPTURE, "--rules", RULES, "--format", "json")
    assert code == 0 and json.loads(text(stdout)) == saved
    code, stdout, stderr = run(where, "rate", b"cut \xe9.pcap", "--rules", RULES)
    assert code == 3 and "!! cut \\xe9.pcap: record" in text(stdout)
    assert "damaged capture: cut \\xe9.pcap" in text(stderr)
