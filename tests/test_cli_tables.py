"""seamscan compile / inspect / scan --table from the command line."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO_SET = ROOT / "pcaps_demo" / "demo-signatures.toml"
DEMO_CAPS = sorted(str(p) for p in (ROOT / "pcaps_demo").glob("*.pcap*"))


def run(*args):
    return subprocess.run([sys.executable, "-m", "seamscan", *map(str, args)],
                          capture_output=True, text=True, timeout=120)


@pytest.fixture(scope="module")
def images(tmp_path_factory):
    d = tmp_path_factory.mktemp("tables")
    out = {}
    for layout in ("dense", "compact"):
        path = d / f"{layout}.seam"
        r = run("compile", DEMO_SET, "-o", path, "--layout", layout, "--no-speed")
        assert r.returncode == 0, r.stderr
        out[layout] = path
    return out


def _records(stdout):
    return [json.loads(line) for line in stdout.splitlines()]


def test_compile_report_names_every_layout(images):
    r = run("compile", DEMO_SET, "-o", images["dense"].parent / "x.seam", "--budget", "64KiB")
    assert r.returncode == 0, r.stderr
    for word in ("dense", "compact", "steps/byte", "host MB/s", "fits", "state words",
                 "transitions"):
        assert word in r.stdout
    assert "wrote" in r.stdout and "(dense," in r.stdout  # auto: the fastest that fits


def test_auto_takes_compact_under_a_small_budget(tmp_path):
    out = tmp_path / "t.seam"
    r = run("compile", DEMO_SET, "-o", out, "--budget", "4KiB", "--no-speed")
    assert r.returncode == 0, r.stderr
    assert "(compact," in r.stdout
    assert "layout compact" in run("inspect", out).stdout


def test_nothing_fits_exits_2_with_the_costliest_signatures(tmp_path):
    out = tmp_path / "t.seam"
    r = run("compile", DEMO_SET, "-o", out, "--budget", "1KiB", "--no-speed")
    assert r.returncode == 2
    assert "no layout fits the budget of 1,024 bytes" in r.stderr
    assert "ty-0002" in r.stderr and "states" in r.stderr and "bytes" in r.stderr
    assert not out.exists()


def test_forced_layout_over_budget_exits_2(tmp_path):
    r = run("compile", DEMO_SET, "-o", tmp_path / "t.seam", "--layout", "dense",
            "--budget", "4KiB", "--no-speed")
    assert r.returncode == 2 and "the dense layout does not fit" in r.stderr


@pytest.mark.parametrize("layout", ["dense", "compact"])
def test_scan_with_an_exported_table_equals_scan_with_rules(images, layout):
    by_rules = run("scan", *DEMO_CAPS, "--rules", DEMO_SET, "--format", "jsonl")
    by_table = run("scan", *DEMO_CAPS, "--table", images[layout], "--format", "jsonl")
    assert by_rules.returncode == by_table.returncode == 0
    strip = [r for r in _records(by_rules.stdout) if r["type"] != "summary"]
    assert strip == [r for r in _records(by_table.stdout) if r["type"] != "summary"]
    assert any(r["type"] == "match" for r in strip)


@pytest.mark.parametrize("layout", ["dense", "compact"])
def test_inspect_a_good_and_a_damaged_image(images, layout, tmp_path):
    good = run("inspect", images[layout])
    assert good.returncode == 0 and f"layout {layout}" in good.stdout
    blob = bytearray(images[layout].read_bytes())
    blob[len(blob) // 2] ^= 0x40
    bad = tmp_path / "bad.seam"
    bad.write_bytes(bytes(blob))
    r = run("inspect", bad)
    assert r.returncode == 3 and "CRC-32 mismatch" in r.stderr and str(bad) in r.stderr
    r = run("scan", DEMO_CAPS[0], "--table", bad)
    assert r.returncode == 3 and "Traceback" not in r.stderr


def test_inspect_missing_and_non_image_files(tmp_path):
    r = run("inspect", tmp_path / "none.seam")
    assert r.returncode == 2 and "cannot read" in r.stderr
    junk = tmp_path / "junk.seam"
    junk.write_bytes(b"this is not a table image at all, just some text" * 3)
    r = run("inspect", junk)
    assert r.returncode == 3 and "not a table image" in r.stderr
