"""Fuzzing the C loader and scanner with ``csrc/fuzz_seam.c``.

The fuzz input is a 4-byte prefix (image length, control bits), a table
image and a stream; the target's own comment gives the layout and every
contract it checks (matches inside the scanned bytes, signature filters,
split invariance, an independent walk of the dense table, ss_scan_batch
equal to ss_scan, progress, bounded out[]).

* the seed corpus ``tests/fuzz_corpus/`` is made by :func:`seed_inputs`
  (valid images of every layout with streams, plus damaged ones), written
  when missing, and stays small;
* a replay build of the target (gcc, AddressSanitizer, UndefinedBehavior-
  Sanitizer) runs every seed as made now (valid ones accepted, damaged ones
  refused with the expected code) and every committed seed (which may
  predate a format change), and nothing trips;
* the checks are live: the same replay over a copy of the runtime with one
  planted bug (match end, side filter, batch progress) stops with "runtime
  contract broken";
* libFuzzer (clang ``-fsanitize=fuzzer,address,undefined``) runs for
  ``SEAMSCAN_FUZZ_SECONDS`` seconds (default 60; ``0`` skips it) on one core
  over a copy of the corpus plus the seeds as made now, and must end clean.
"""

from __future__ import annotations

import os
import random
import re
import shutil
import struct
import subprocess
import zlib
from pathlib import Path

import pytest

import seamscan
from seamscan.signatures import signature_set
from toolchains import skip_message
from vectors import LAYOUTS

ROOT = Path(__file__).resolve().parents[1]
CSRC = ROOT / "csrc"
CORPUS = Path(__file__).resolve().parent / "fuzz_corpus"
CORPUS_BUDGET = 200_000  # bytes, all seeds together
FUZZ_SECONDS = int(os.environ.get("SEAMSCAN_FUZZ_SECONDS", "60") or "0")
SANITIZER_MARKS = ("ERROR: AddressSanitizer", "runtime error", "UndefinedBehaviorSanitizer",
                   "LeakSanitizer", "runtime contract broken", "deadly signal")
SANITIZER_ENV = {"ASAN_OPTIONS": "abort_on_error=0:exitcode=99",
                 "UBSAN_OPTIONS": "print_stacktrace=1:halt_on_error=1"}

# Control bits of the fuzz input's byte 3 (csrc/fuzz_seam.c).
FIX_CRC, OFFSET_1000, OFFSET_U32_EDGE, EMPTY_RESETS = 0x01, 0x02, 0x04, 0x08
NOT_RUN = 1  # the replay driver's code for an input shorter than its prefix
SEC_CLASSES = 1


def _error_codes() -> dict[str, int]:
    """The SS_ERR_* codes as csrc/seam.h defines them."""
    text = (CSRC / "seam.h").read_text()
    return {name: int(value) for name, value in re.findall(r"#define SS_ERR_(\w+) \(?(-\d+)", text)}


ERR = _error_codes()


def fuzz_input(image: bytes, stream: bytes = b"", control: int = 0,
               image_len: int | None = None) -> bytes:
    """One input of the fuzz target: 24-bit image length, control byte, image, stream."""
    length = len(image) if image_len is None else image_len
    return length.to_bytes(3, "little") + bytes([control]) + image + stream


# --- the seed corpus -------------------------------------------------------------

LAB_SIGNATURES = [
    {"id": "relay", "text": "POST /relay/", "side": "client", "transport": "tcp", "ports": [80, 8080]},
    {"id": "temp", "text": "temp=", "fold_case": True, "window": [0, 512]},
    {"id": "bvlc", "hex": "81 0a 00", "transport": "udp", "ports": [47808]},
    {"id": "lay", "text": "lay"},
    {"id": "ay", "text": "ay", "side": "server"},
]
UDP_SIGNATURES = [
    {"id": "who-is", "hex": "81 0b 00 0c 01 20", "transport": "udp", "ports": [47808]},
    {"id": "lux", "text": "lux=", "transport": "udp", "window": [0, 64]},
    {"id": "zone", "text": "zone/", "transport": "udp", "scope": "stream"},
    {"id": "co2", "text": "CO2=", "fold_case": True, "transport": "udp", "ports": [5683, 47808]},
]
LAB_STREAM = (b"POST /relay/3 HTTP/1.1\r\nHost: 192.0.2.10\r\n\r\nTEMP=21.5;relay=on;temp=22.0\x81\x0a"
              b"\x00\x11\x81\x0a\x00 play lay away ayay \x00\xff\x81")
UDP_STREAM = (b"\x81\x0b\x00\x0c\x01\x20 lux=410 zone/3 co2=612 CO2=615 \x81\x0b\x00\x0c\x01\x20"
              b"lux=9 zone/zone/ Co2=1" + bytes(range(0, 256, 5)))


def _wide_signatures() -> list[dict]:
    """Over 256 states (16-bit transitions): 12-byte patterns over few byte values."""
    rng = random.Random(256)
    return ([{"id": f"w{k}", "hex": bytes(rng.choice(b"abcdef\x00\xff") for _ in range(12)).hex(),
              "ports": [502]} for k in range(40)] + [{"id": "end", "text": "bldg-lab"}])


def _wide_stream() -> bytes:
    sigs = _wide_signatures()
    return b"".join(bytes.fromhex(s["hex"])[:9] + bytes.fromhex(s["hex"]) for s in sigs[:12]) + b"bldg-lab"


def _section_offset(blob: bytes, kind: int) -> int:
    """Where section ``kind`` starts (csrc/FORMAT.md: the 12-byte directory
    entries kind, flags, offset, size from byte 64; the count at byte 38)."""
    (count,) = struct.unpack_from("<H", blob, 38)
    for i in range(count):
        entry_kind, _flags, offset, _size = struct.unpack_from("<HHII", blob, 64 + 12 * i)
        if entry_kind == kind:
            return offset
    raise AssertionError(f"no section {kind} in the image")


def _section_span(blob: bytes, kind: int) -> tuple[int, int]:
    (count,) = struct.unpack_from("<H", blob, 38)
    for i in range(count):
        entry_kind, _flags, offset, size = struct.unpack_from("<HHII", blob, 64 + 12 * i)
        if entry_kind == kind:
            return offset, size
    raise AssertionError(f"no section {kind} in the image")


def _with_crc(blob: bytearray) -> bytes:
    struct.pack_into("<I", blob, 12, zlib.crc32(blob[16:]))
    return bytes(blob)


# Multi-part signatures with byte sets and spacings (format version 2).
PART_SIGNATURES = [
    {"id": "force-commit", "fold_case": True,
     "part": [{"hex": "a5 5a ?? 06"}, {"text": "FORCE", "spacing": [0, 40]},
              {"text": "COMMIT", "fold_case": False}]},
    {"id": "a-a", "part": [{"hex": "61 ??"}, {"hex": "<30-39> 61", "spacing": [1, 6]}]},
    {"id": "udp-two", "transport": "udp", "part": [{"text": "ab"}, {"text": "ab"}]},
    {"id": "digits", "hex": "3d <30-39> <30-39>", "window": [0, 200]},
]
PART_STREAM = (b"\xa5\x5a\x01\x06 force COMMIT a1xx5a a.9a ababab =42 " * 3
               + b"\xa5\x5a\x02\x06" + b"-" * 41 + b"FORCE COMMIT")


def seed_inputs() -> dict[str, bytes]:
    """File name -> fuzz input: valid images of every layout with streams and
    control bits, and damaged images (refused, or accepted only through the
    target's CRC rewrite)."""
    seeds: dict[str, bytes] = {}
    for layout in LAYOUTS:
        lab = seamscan.compile(signature_set(LAB_SIGNATURES, name="lab"), layout=layout).to_bytes()
        udp = seamscan.compile(signature_set(UDP_SIGNATURES, name="udp"), layout=layout).to_bytes()
        wide = seamscan.compile(signature_set(_wide_signatures(), name="wide"), layout=layout).to_bytes()
        one = seamscan.compile(signature_set([{"id": "a", "text": "a"}]), layout=layout).to_bytes()
        seeds[f"{layout}-lab.bin"] = fuzz_input(lab, LAB_STREAM)
        seeds[f"{layout}-lab-offset-1000.bin"] = fuzz_input(lab, LAB_STREAM * 3, OFFSET_1000 | 0x30)
        seeds[f"{layout}-udp-u32-edge.bin"] = fuzz_input(udp, UDP_STREAM, OFFSET_U32_EDGE | EMPTY_RESETS)
        seeds[f"{layout}-wide.bin"] = fuzz_input(wide, _wide_stream(), 0x50)
        seeds[f"{layout}-one-sig.bin"] = fuzz_input(one, b"aaaa" * 40, EMPTY_RESETS | 0x10)
        seeds[f"{layout}-empty-stream.bin"] = fuzz_input(lab, b"")
        parts = seamscan.compile(signature_set(PART_SIGNATURES, name="parts"),
                                 layout=layout).to_bytes()
        seeds[f"{layout}-parts.bin"] = fuzz_input(parts, PART_STREAM, 0x30)
        seeds[f"{layout}-parts-offset-u32-edge.bin"] = fuzz_input(parts, PART_STREAM * 2,
                                                                  OFFSET_U32_EDGE | 0x10)
        seeds[f"{layout}-trailing-bytes.bin"] = fuzz_input(lab + b"\0" * 8, LAB_STREAM, 0,
                                                           image_len=len(lab) + 8)
        # Damaged: refused as they are; the CRC-rewrite bit lets the
        # structural checks judge the re-CRC'd ones.
        flipped = bytearray(lab)
        flipped[len(lab) // 2] ^= 0x40
        seeds[f"{layout}-damaged-crc.bin"] = fuzz_input(bytes(flipped), LAB_STREAM)
        seeds[f"{layout}-damaged-truncated.bin"] = fuzz_input(lab[:len(lab) // 2], LAB_STREAM,
                                                              image_len=len(lab))
        bad_class = bytearray(lab)
        bad_class[_section_offset(lab, SEC_CLASSES) + 200] = 0xFF
        seeds[f"{layout}-damaged-class-fixcrc.bin"] = fuzz_input(bytes(bad_class), LAB_STREAM, FIX_CRC)
        bad_sections = bytearray(lab)  # a directory running past the image
        struct.pack_into("<H", bad_sections, 38, (len(lab) - 64) // 12 + 1)
        seeds[f"{layout}-damaged-sections.bin"] = fuzz_input(_with_crc(bad_sections), LAB_STREAM)
        huge_max = bytearray(lab)  # callers size out[] by max_outputs: at most nsigs
        struct.pack_into("<I", huge_max, 40, 0x7FFFFFFF)
        seeds[f"{layout}-damaged-max-outputs-fixcrc.bin"] = fuzz_input(bytes(huge_max), LAB_STREAM,
                                                                       FIX_CRC)
    # Accepted by ss_load though not well-formed (the host refuses them): a
    # max_outputs below a state's outputs, and one signature twice along a
    # failure chain.  The runtime still reports each once, in order, at most
    # max_outputs per byte (both once broke the target's batch and order checks).
    lab = seamscan.compile(signature_set(LAB_SIGNATURES, name="lab"), layout="compact").to_bytes()
    low_max = bytearray(lab)
    struct.pack_into("<I", low_max, 40, struct.unpack_from("<I", lab, 40)[0] - 1)
    seeds["compact-ill-formed-max-outputs.bin"] = fuzz_input(_with_crc(low_max), LAB_STREAM)
    same_sig = bytearray(lab)
    off, size = _section_span(lab, 4)  # the output list: every entry "ay", the last signature
    for k in range(off, off + size, 2):
        struct.pack_into("<H", same_sig, k, len(LAB_SIGNATURES) - 1)
    seeds["compact-ill-formed-outputs-twice.bin"] = fuzz_input(_with_crc(same_sig), LAB_STREAM)
    seeds["short-prefix.bin"] = b"\x10\x00"
    seeds["not-an-image.bin"] = fuzz_input(b"SEAX" + b"\0" * 60, b"abc")
    return seeds


def expected_codes() -> dict[str, int]:
    """What the replay driver must print for each seed (ss_load's code)."""
    codes = {}
    for name in seed_inputs():
        if name == "short-prefix.bin":
            codes[name] = NOT_RUN
        elif name == "not-an-image.bin":
            codes[name] = ERR["MAGIC"]
        elif "damaged-crc" in name:
            codes[name] = ERR["CRC"]
        elif "damaged-truncated" in name:
            codes[name] = ERR["SHORT"]
        elif "damaged-class" in name:
            codes[name] = ERR["CLASSES"]
        elif "damaged-sections" in name:
            codes[name] = ERR["SECTION"]
        elif "damaged-max-outputs" in name:
            codes[name] = ERR["HEADER"]
        else:
            codes[name] = 0
    return codes


def write_seeds(where: Path) -> list[Path]:
    """Write every seed into ``where`` (made now, by this tree's compiler)."""
    where.mkdir(parents=True, exist_ok=True)
    paths = []
    for name, data in seed_inputs().items():
        paths.append(where / name)
        paths[-1].write_bytes(data)
    return paths


def ensure_corpus(where: Path = CORPUS) -> list[Path]:
    """Write the seeds that are missing from ``where``; the corpus files."""
    where.mkdir(parents=True, exist_ok=True)
    for name, data in seed_inputs().items():
        path = where / name
        if not path.exists():
            path.write_bytes(data)
    return sorted(p for p in where.iterdir() if p.is_file())


# --- building -------------------------------------------------------------------


def _run(cmd, *, env=None, timeout=600) -> subprocess.CompletedProcess:
    full_env = dict(os.environ, **(env or {}))
    return subprocess.run([str(c) for c in cmd], capture_output=True, text=True, env=full_env,
                          timeout=timeout, errors="replace")


def _make(out: Path, target: str, **variables: str) -> subprocess.CompletedProcess:
    return _run(["make", "-s", "-C", CSRC, f"OUT={out}",
                 *(f"{k}={v}" for k, v in variables.items()), target])


def _assert_clean(r: subprocess.CompletedProcess, what: str) -> None:
    text = r.stdout + r.stderr
    for mark in SANITIZER_MARKS:
        assert mark not in text, f"{what}: {mark!r} reported:\n{text[-6000:]}"


@pytest.fixture(scope="module")
def build_dir(tmp_path_factory) -> Path:
    if shutil.which("make") is None:
        pytest.skip(skip_message("no `make` on this machine: the fuzz target cannot be built",
                                  "make"))
    return tmp_path_factory.mktemp("fuzz-build")


@pytest.fixture(scope="module")
def replay(build_dir) -> Path:
    if shutil.which("gcc") is None:
        pytest.skip(skip_message("no gcc for the replay build of the fuzz target", "gcc"))
    r = _make(build_dir, "fuzz-seam-replay", CC="gcc")
    if r.returncode != 0 and re.search(r"asan|ubsan|sanitize", r.stderr, re.I):
        pytest.skip(skip_message(f"gcc cannot build with ASan/UBSan here: {r.stderr.strip()[:300]}",
                                  "gcc sanitizers"))
    assert r.returncode == 0, f"building the fuzz replay driver failed:\n{r.stdout}{r.stderr}"
    return build_dir / "fuzz-seam-replay"


@pytest.fixture(scope="module")
def fuzzer(build_dir) -> Path:
    if shutil.which("clang") is None:
        pytest.skip(skip_message("no clang: libFuzzer needs it", "libFuzzer"))
    r = _make(build_dir, "fuzz-seam")
    if r.returncode != 0 and re.search(r"fuzzer|libclang_rt|asan|sanitize", r.stderr, re.I):
        pytest.skip(skip_message("clang has no libFuzzer / sanitizer runtime here: "
                                  f"{r.stderr.strip()[:300]}", "libFuzzer"))
    assert r.returncode == 0, f"building the libFuzzer target failed:\n{r.stdout}{r.stderr}"
    return build_dir / "fuzz-seam"


def _replay_codes(driver: Path, paths: list[Path]) -> dict[str, int]:
    r = _run([driver, *paths], env=SANITIZER_ENV)
    _assert_clean(r, f"replay of {len(paths)} inputs")
    assert r.returncode == 0, f"replay exited {r.returncode}:\n{r.stdout[-2000:]}{r.stderr[-4000:]}"
    codes = {}
    for line in r.stdout.splitlines():
        code, path = line.split(" ", 1)
        codes[Path(path).name] = int(code)
    return codes


# --- tests ------------------------------------------------------------------------


def test_seed_corpus_is_complete_and_small():
    files = ensure_corpus()
    names = {p.name for p in files}
    assert set(seed_inputs()) <= names
    total = sum(p.stat().st_size for p in files)
    assert total < CORPUS_BUDGET, f"tests/fuzz_corpus/ holds {total:,} bytes, over {CORPUS_BUDGET:,}"


def test_wide_seed_has_16_bit_transitions():
    table = seamscan.compile(signature_set(_wide_signatures()))
    assert table.header.trans_width == 2, table


def test_replay_over_fresh_seeds(replay, tmp_path):
    """The seeds as this tree's compiler makes them, through every check under
    ASan/UBSan: each image accepted or refused as it was made to be."""
    codes = _replay_codes(replay, write_seeds(tmp_path))
    want = expected_codes()
    wrong = {name: (codes[name], code) for name, code in want.items() if codes[name] != code}
    assert not wrong, f"seeds loaded otherwise than made (got, wanted): {wrong}"
    assert sum(code == 0 for code in codes.values()) >= 7 * len(LAYOUTS)


def test_replay_over_the_committed_corpus(replay):
    """The committed seeds (some may predate a format change: then they are
    damaged inputs like any other) never trip a check or a sanitizer."""
    files = ensure_corpus()
    assert len(_replay_codes(replay, files)) == len(files)


# One planted bug per case in a copy of the runtime: (file, original text,
# replacement, what breaks).  The replay must catch each.
MUTANTS = [
    ("seam_scan.c", "ln->offset + i + 1u", "ln->offset + i", "match end one byte early"),
    ("seam_scan.c", "r[0] != ctx->side", "r[0] == ctx->side", "side filter inverted"),
    ("seam_scan.c", "it->done += (uint32_t)got;", "it->done += (uint32_t)got + (got > 1u);",
     "batch skips a byte"),
]


@pytest.mark.parametrize("source,original,replacement,what", MUTANTS, ids=[m[3] for m in MUTANTS])
def test_checks_catch_a_planted_bug(source, original, replacement, what, replay, tmp_path):
    text = (CSRC / source).read_text()
    if text.count(original) != 1:
        pytest.skip(f"csrc/{source} no longer holds {original!r} once: update this mutant")
    for path in [*CSRC.glob("seam*.[ch]"), CSRC / "fuzz_seam.c"]:
        shutil.copy(path, tmp_path / path.name)
    (tmp_path / source).write_text(text.replace(original, replacement))
    r = _make(tmp_path / "out", "fuzz-seam-replay", CC="gcc", SRCDIR=str(tmp_path))
    assert r.returncode == 0, r.stdout + r.stderr
    seeds = [p for p in write_seeds(tmp_path / "seeds") if expected_codes()[p.name] == 0]
    r = _run([tmp_path / "out" / "fuzz-seam-replay", *seeds], env=SANITIZER_ENV)
    assert r.returncode != 0 and "runtime contract broken" in r.stderr, \
        f"the fuzz checks missed a planted bug ({what}):\n{r.stdout[-1000:]}{r.stderr[-1000:]}"


@pytest.mark.skipif(FUZZ_SECONDS <= 0, reason="SEAMSCAN_FUZZ_SECONDS=0: the libFuzzer run is skipped")
def test_libfuzzer_run_is_clean(fuzzer, tmp_path):
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    for path in ensure_corpus():
        shutil.copy(path, corpus / path.name)
    for path in write_seeds(tmp_path / "fresh"):  # what the committed ones may lag behind
        if path.read_bytes() != (corpus / path.name).read_bytes():
            shutil.copy(path, corpus / f"fresh-{path.name}")
    artifacts = tmp_path / "artifacts"
    artifacts.mkdir()
    r = _run([fuzzer, f"-max_total_time={FUZZ_SECONDS}", "-rss_limit_mb=2048", "-timeout=30",
              "-max_len=16384", "-print_final_stats=1", f"-artifact_prefix={artifacts}/", corpus],
             env={"ASAN_OPTIONS": "abort_on_error=0:quarantine_size_mb=32",
                  "UBSAN_OPTIONS": "print_stacktrace=1:halt_on_error=1"},
             timeout=FUZZ_SECONDS + 300)
    found = sorted(p.name for p in artifacts.iterdir())
    _assert_clean(r, f"libFuzzer run (artifacts: {found})")
    assert r.returncode == 0 and not found, \
        f"libFuzzer exited {r.returncode}, artifacts {found} in {artifacts}:\n{r.stderr[-6000:]}"
    runs = re.search(r"stat::number_of_executed_units:\s*(\d+)", r.stderr)
    assert runs and int(runs.group(1)) >= len(seed_inputs()), r.stderr[-2000:]
