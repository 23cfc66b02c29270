"""The C runtime on its own, through the ``csrc/seamrun`` harness.

* it compiles warning-free as strict C99 under gcc and clang, and includes
  nothing beyond <stdint.h>, <stddef.h>, <string.h> and its own headers;
* its CRC-32 gives the published check value;
* the harness (the same C a device runs, with a tiny out[] so that the
  "out[] full, call again" path is taken all the time) and the Python engine
  agree on the shared vector table and on a random 300-signature set over a
  200 KB stream cut into pieces of 1, 7 and 4096 bytes;
* damaged images (csrc/FORMAT.md, "Loading"): those breaking a safety rule
  are refused by C and Python with the same code; those breaking only a
  well-formedness rule are refused by Python's host rules naming the rule,
  while C may take them; whatever C takes it scans, and the
  AddressSanitizer + UndefinedBehaviorSanitizer harness never reports.

The harness and its sanitizer build are compiled once per session with
``make -C csrc OUT=...``; the tests skip when there is no C toolchain.
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

import ahocorasick
import pytest

import seamscan
from seamscan.image import TableError
from seamscan.reference import reference_matches
from seamscan.signatures import signature_set
from toolchains import skip_message
from vectors import VECTORS

ROOT = Path(__file__).resolve().parents[1]
CSRC = ROOT / "csrc"
RUNTIME_SOURCES = sorted(CSRC.glob("seam_*.c"))
RUNTIME_HEADERS = sorted(CSRC.glob("seam*.h"))
ALLOWED_SYSTEM_HEADERS = {"stdint.h", "stddef.h", "string.h"}
# Functions of <string.h> a compiler may call for the runtime (memcpy for the
# little-endian loads, memcmp for the magic, memset to clear a table).
ALLOWED_EXTERNALS = {"memcpy", "memmove", "memset", "memcmp"}
SANITIZER_ENV = {"ASAN_OPTIONS": "detect_leaks=0:abort_on_error=0:exitcode=99",
                 "UBSAN_OPTIONS": "print_stacktrace=1:halt_on_error=1"}
SANITIZER_MARKS = ("AddressSanitizer", "runtime error", "UndefinedBehaviorSanitizer", "LeakSanitizer")


def _error_codes() -> dict[str, int]:
    """The SS_ERR_* codes as csrc/seam.h defines them, e.g. ``ERR["CRC"]``."""
    text = (CSRC / "seam.h").read_text()
    return {name: int(value) for name, value in re.findall(r"#define SS_ERR_(\w+) \(?(-\d+)", text)}


ERR = _error_codes()


def _run(cmd, *, env=None, timeout=300) -> subprocess.CompletedProcess:
    full_env = dict(os.environ, **env) if env else None
    return subprocess.run([str(c) for c in cmd], capture_output=True, text=True, env=full_env,
                          timeout=timeout)


def _make(out: Path, *targets: str, **variables: str) -> subprocess.CompletedProcess:
    assigns = [f"{k}={v}" for k, v in variables.items()]
    return _run(["make", "-s", "-C", CSRC, f"OUT={out}", *assigns, *targets])


# --- building the harness ---------------------------------------------------


@pytest.fixture(scope="session")
def build_dir(tmp_path_factory) -> Path:
    if shutil.which("make") is None:
        pytest.skip(skip_message("no `make` on this machine: the C harness cannot be built", "make"))
    if shutil.which(os.environ.get("CC", "cc")) is None:
        pytest.skip(skip_message("no C compiler (cc, or $CC) on this machine", "cc"))
    return tmp_path_factory.mktemp("csrc-build")


@pytest.fixture(scope="session")
def seamrun(build_dir) -> Path:
    r = _make(build_dir, "seamrun")
    assert r.returncode == 0, f"building csrc/seamrun failed:\n{r.stdout}{r.stderr}"
    return build_dir / "seamrun"


@pytest.fixture(scope="session")
def seamrun_asan(build_dir) -> Path:
    r = _make(build_dir, "seamrun-asan")
    if r.returncode != 0 and re.search(r"asan|ubsan|sanitize", r.stderr, re.I):
        pytest.skip(skip_message("the C compiler cannot build with ASan/UBSan here: "
                                  f"{r.stderr.strip()[:300]}", "gcc sanitizers"))
    assert r.returncode == 0, f"building csrc/seamrun-asan failed:\n{r.stdout}{r.stderr}"
    return build_dir / "seamrun-asan"


def _assert_no_sanitizer_report(r: subprocess.CompletedProcess, what: str) -> None:
    for mark in SANITIZER_MARKS:
        assert mark not in r.stderr, f"sanitizer report on {what}:\n{r.stderr[-4000:]}"


def _scan_c(harness: Path, table: Path, stream: Path, chunk: int | None = None,
            options: tuple[str, ...] = ()) -> tuple[list[tuple[int, int, int]], int]:
    """Run the harness: (matches as (signature index, start, end), final offset)."""
    cmd = [harness, *options, table, stream] + ([str(chunk)] if chunk else [])
    r = _run(cmd, env=SANITIZER_ENV)
    _assert_no_sanitizer_report(r, f"{table.name} / {stream.name} (chunk {chunk})")
    assert r.returncode == 0, f"{cmd} exited {r.returncode}:\n{r.stdout[-2000:]}{r.stderr[-2000:]}"
    lines = r.stdout.splitlines()
    assert lines and lines[-1].startswith("end "), f"harness output has no end line: {lines[-3:]}"
    matches = [tuple(int(x) for x in line.split()) for line in lines[:-1]]
    return matches, int(lines[-1].split()[1])


def _indexed(table, matches) -> list[tuple[int, int, int]]:
    """Engine matches (signature id, start, end) as (signature index, start, end),
    the harness's form."""
    index = {sig_id: i for i, sig_id in enumerate(table.ids)}
    return [(index[m.sig], m.start, m.end) for m in matches]


# --- compiling the runtime -----------------------------------------------------


@pytest.mark.parametrize("compiler", ["gcc", "clang"])
def test_runtime_compiles_warning_free(compiler, build_dir):
    if shutil.which(compiler) is None:
        pytest.skip(skip_message(f"{compiler} is not installed", compiler))
    r = _make(build_dir, "check-warnings", WARN_CCS=compiler)
    assert r.returncode == 0, f"{compiler} -std=c99 -Wall -Wextra -Werror -pedantic:\n{r.stdout}{r.stderr}"
    assert "warning" not in r.stderr


def test_runtime_includes_only_the_three_headers(build_dir):
    own = {p.name for p in RUNTIME_HEADERS}
    assert RUNTIME_SOURCES, "no csrc/seam_*.c found"
    bad = []
    for path in RUNTIME_SOURCES + RUNTIME_HEADERS:
        for number, line in enumerate(path.read_text().splitlines(), start=1):
            m = re.match(r"\s*#\s*include\s*([<\"])([^>\"]+)[>\"]", line)
            if m is None:
                continue
            kind, name = m.groups()
            if (kind == "<" and name not in ALLOWED_SYSTEM_HEADERS) or (kind == '"' and name not in own):
                bad.append(f"{path.name}:{number}: {line.strip()}")
    assert not bad, "the runtime includes more than <stdint.h> <stddef.h> <string.h>:\n" + "\n".join(bad)
    r = _make(build_dir, "check-includes")
    assert r.returncode == 0, r.stdout + r.stderr


def test_runtime_calls_nothing_beyond_string_h(build_dir):
    """The objects' undefined symbols: only <string.h> functions (no libc otherwise)."""
    cc = os.environ.get("CC", "cc")
    if shutil.which("nm") is None:
        pytest.skip(skip_message("no `nm` to list undefined symbols", "nm"))
    undefined, defined = set(), set()
    for src in RUNTIME_SOURCES:
        obj = build_dir / f"free-{src.stem}.o"
        r = _run([cc, "-std=c99", "-O2", "-ffreestanding", "-fno-stack-protector", "-c", src, "-o", obj])
        assert r.returncode == 0, r.stderr
        undefined |= set(_run(["nm", "-u", "--format=just-symbols", obj]).stdout.split())
        defined |= set(_run(["nm", "--defined-only", "--format=just-symbols", obj]).stdout.split())
    undefined -= defined  # calls from one runtime file into another
    assert undefined <= ALLOWED_EXTERNALS, f"runtime calls {sorted(undefined - ALLOWED_EXTERNALS)}"


def _m4_sizes(build_dir) -> dict[str, tuple[int, int, int]]:
    if shutil.which("arm-none-eabi-gcc") is None or shutil.which("arm-none-eabi-size") is None:
        pytest.skip(skip_message("no arm-none-eabi toolchain", "arm-none-eabi-gcc",
                                  "arm-none-eabi-size"))
    r = _make(build_dir, "sizes-m4")
    assert r.returncode == 0, r.stdout + r.stderr
    found = re.findall(r"(\w+)\s+code (\d+) B, read-only data (\d+) B, \.data\+\.bss (\d+) B",
                       r.stdout)
    assert {name for name, *_ in found} == {"dense", "compact", "both", "dense_parts",
                                            "compact_parts", "both_parts"}, r.stdout
    return {name: (int(c), int(ro), int(d)) for name, c, ro, d in found}


def test_cortex_m4_runtime_has_no_data_or_bss(build_dir):
    for name, (_code, _rodata, data) in _m4_sizes(build_dir).items():
        assert data == 0, name


@pytest.mark.parametrize("layout", ["dense", "compact"])
def test_cortex_m4_runtime_fits_2_kib_of_code(build_dir, layout):
    # The device target: a device links the one layout it ships, built with
    # SS_SMALL; either layout's runtime is at most 2 KiB of code.
    code, _rodata, _data = _m4_sizes(build_dir)[layout]
    assert code <= 2048


@pytest.mark.parametrize("layout", ["dense", "compact"])
def test_cortex_m4_runtime_with_the_part_tracker_fits_2_5_kib_of_code(build_dir, layout):
    # With the part tracker (multi-part signatures) and its entry points
    # (ss_scan_parts, ss_track_bytes, ss_track_reset): at most 2.5 KiB.
    code, _rodata, _data = _m4_sizes(build_dir)[f"{layout}_parts"]
    assert code <= 2560


# --- CRC-32 -------------------------------------------------------------------


def test_crc32_check_value(seamrun, tmp_path):
    # Greg Cook, "Catalogue of parametrised CRC algorithms", CRC-32/ISO-HDLC
    # (the CRC of IEEE 802.3, zlib, PNG): check = 0xcbf43926 for "123456789".
    path = tmp_path / "check.txt"
    path.write_bytes(b"123456789")
    r = _run([seamrun, "--crc", path])
    assert (r.returncode, r.stdout.strip()) == (0, "cbf43926")


def test_crc32_equals_zlib(seamrun, tmp_path):
    # Outside oracle: Python's zlib.crc32 computes the same CRC-32/ISO-HDLC.
    rng = random.Random(32)
    for size in (0, 1, 15, 16, 17, 4096, 65537):
        path = tmp_path / f"r{size}.bin"
        data = rng.randbytes(size)
        path.write_bytes(data)
        r = _run([seamrun, "--crc", path])
        assert r.stdout.strip() == f"{zlib.crc32(data):08x}", size


def test_harness_usage_errors(seamrun, tmp_path):
    image = tmp_path / "t.seam"
    image.write_bytes(seamscan.compile(signature_set([{"id": "a", "text": "a"}])).to_bytes())
    stream = tmp_path / "s.bin"
    stream.write_bytes(b"aaa")
    for args in ([], [image], [image, stream, "0"], [image, stream, "x"], ["--side", image, stream],
                 [image, tmp_path / "missing.bin"], ["--crc"], ["--check"]):
        r = _run([seamrun, *args])
        assert r.returncode == 2, (args, r.stdout, r.stderr)
        assert "seamrun" in r.stderr or "usage" in r.stderr


def test_harness_reports_a_refused_image(seamrun, tmp_path):
    path = tmp_path / "zero.seam"
    path.write_bytes(b"\0" * 100)
    stream = tmp_path / "s.bin"
    stream.write_bytes(b"abc")
    r = _run([seamrun, path, stream])
    assert r.returncode == 3
    assert re.fullmatch(rf"error {ERR['MAGIC']} .*bad magic.*\n", r.stdout), r.stdout


# --- agreement with the Python engine -----------------------------------------------


@pytest.mark.parametrize("vector", VECTORS, ids=[v.name for v in VECTORS])
def test_vectors_c_equals_python(vector, seamrun, seamrun_asan, tmp_path):
    sigset = signature_set(vector.sigs, name=vector.name)
    table = seamscan.compile(sigset)
    image, stream = tmp_path / "t.seam", tmp_path / "s.bin"
    image.write_bytes(table.to_bytes())
    stream.write_bytes(vector.haystack)
    expected = [(table.ids.index(sig_id), start, end) for sig_id, start, end in vector.expected]

    python_whole = _indexed(table, table.scan(vector.haystack))
    feeder = table.stream()
    python_bytes = _indexed(table, [m for b in range(len(vector.haystack))
                                    for m in feeder.feed(vector.haystack[b:b + 1])])
    assert python_whole == python_bytes == expected
    for harness in (seamrun, seamrun_asan):
        for chunk in (None, 1, 3):
            got, end = _scan_c(harness, image, stream, chunk)
            assert got == expected, f"{harness.name}, chunk {chunk}"
            assert end == len(vector.haystack)


LAB_WORDS = [b"temp=", b"relay/", b"zone/", b"setpoint", b"co2=", b"damper", b"fan-speed",
             b"GET /api/v1/", b"lux=", b"occupied", b"BACnet", b"\x81\x0a\x00"]
SERVER_PORTS = [80, 502, 1883, 8080, 47808]


def _lab_stream(rng: random.Random, size: int) -> bytes:
    """Random bytes, lab words (sometimes upper-cased) with readings, and runs over few values."""
    parts, n = [], 0
    while n < size:
        kind = rng.random()
        if kind < 0.35:
            piece = rng.randbytes(rng.randint(1, 48))
        elif kind < 0.8:
            word = rng.choice(LAB_WORDS)
            piece = (word.upper() if rng.random() < 0.25 else word) + str(rng.randint(0, 999)).encode()
        else:
            piece = bytes(rng.choice(b"ab\x00\xff") for _ in range(rng.randint(1, 12)))
        parts.append(piece)
        n += len(piece)
    return b"".join(parts)[:size]


def _random_entries(rng: random.Random, stream: bytes, count: int) -> list[dict]:
    entries = []
    for k in range(count):
        kind = rng.random()
        if kind < 0.4:  # a piece of the stream: at least one match
            start = rng.randrange(len(stream) - 32)
            pattern = stream[start:start + rng.randint(3, 24)]
        elif kind < 0.65:
            word = rng.choice(LAB_WORDS)
            pattern = word[:rng.randint(2, len(word))]
        else:
            pattern = bytes(rng.choice(b"ab\x00\xff\x81") for _ in range(rng.randint(2, 6)))
        entry = {"id": f"lab-{k:03d}", "hex": pattern.hex()}
        if rng.random() < 0.3:
            entry["fold_case"] = True
        if rng.random() < 0.15:
            low = rng.randrange(len(stream))
            entry["window"] = [low, low + len(pattern) + rng.randrange(len(stream) // 4)]
        if rng.random() < 0.25:
            entry["side"] = rng.choice(["client", "server"])
        if rng.random() < 0.25:
            entry["transport"] = rng.choice(["tcp", "udp"])
        if rng.random() < 0.2:
            entry["ports"] = rng.sample(SERVER_PORTS, rng.randint(1, 3))
        entries.append(entry)
    return entries


@pytest.fixture(scope="module")
def random_case(tmp_path_factory):
    """A random 300-signature set and a 200 KB stream, written for the harness."""
    rng = random.Random(20240611)
    stream = _lab_stream(rng, 200_000)
    sigset = signature_set(_random_entries(rng, stream, 300), name="random-300")
    table = seamscan.compile(sigset)
    where = tmp_path_factory.mktemp("random-300")
    (where / "t.seam").write_bytes(table.to_bytes())
    (where / "s.bin").write_bytes(stream)
    return sigset, table, stream, where


# (ctx options for the harness, the same context for Python)
CONTEXTS = [
    ((), {}),
    (("--side", "1", "--transport", "2", "--port", "502"),
     {"side": "client", "transport": "udp", "server_port": 502}),
    (("--side", "2", "--transport", "1"), {"side": "server", "transport": "tcp"}),
]


@pytest.mark.parametrize("options,context", CONTEXTS, ids=["no-context", "client-udp-502", "server-tcp"])
def test_random_set_c_equals_python(options, context, random_case, seamrun):
    sigset, table, stream, where = random_case
    python = _indexed(table, table.scan(stream, **context))
    # Our own brute-force reference (bytes.find per signature).
    assert python == reference_matches(sigset, stream, **context)
    assert len(python) > 1000 and table.max_outputs >= 2  # the test means something
    for chunk in (None, 1, 7, 4096):
        got, end = _scan_c(seamrun, where / "t.seam", where / "s.bin", chunk, options)
        assert end == len(stream)
        assert got == python, f"chunk {chunk}: first difference at " + _first_difference(got, python)


def test_random_set_python_streams_and_pyahocorasick(random_case):
    sigset, table, stream, _where = random_case
    whole = _indexed(table, table.scan(stream))
    for chunk in (1, 7, 4096):
        feeder = table.stream()
        fed = [m for k in range(0, len(stream), chunk) for m in feeder.feed(stream[k:k + chunk])]
        assert _indexed(table, fed) == whole, f"Stream.feed in pieces of {chunk}"
    # Outside oracle: pyahocorasick over the plain signatures (no fold, no window),
    # bytes mapped one-to-one onto code points with latin-1.
    automaton = ahocorasick.Automaton()
    plain: dict[str, list[int]] = {}
    for i, sig in enumerate(sigset):
        if not sig.fold_case and sig.window is None:
            plain.setdefault(sig.data.decode("latin-1"), []).append(i)
    for key, indices in plain.items():
        automaton.add_word(key, (len(key), indices))
    automaton.make_automaton()
    oracle = sorted(((i, last + 1 - n, last + 1)
                     for last, (n, indices) in automaton.iter(stream.decode("latin-1"))
                     for i in indices), key=lambda m: (m[2], m[0]))
    chosen = {i for indices in plain.values() for i in indices}
    assert len(chosen) > 100
    assert [m for m in whole if m[0] in chosen] == oracle


def test_random_set_under_sanitizers(random_case, seamrun_asan):
    _sigset, table, stream, where = random_case
    python = _indexed(table, table.scan(stream))
    got, _end = _scan_c(seamrun_asan, where / "t.seam", where / "s.bin", 7)
    assert got == python


def _first_difference(got, want) -> str:
    for k, (a, b) in enumerate(zip(got, want, strict=False)):
        if a != b:
            return f"#{k}: C {a}, Python {b}"
    return f"lengths C {len(got)}, Python {len(want)}"


def test_datagram_match_survives_a_full_out_buffer(seamrun, tmp_path):
    # Two UDP signatures, one output each: max_outputs = 1, so the harness's
    # out[] holds one match and the scan of "aab" resumes twice.
    sigset = signature_set([{"id": "a", "text": "a", "transport": "udp"},
                            {"id": "ab", "text": "ab", "transport": "udp"}])
    table = seamscan.compile(sigset)
    image, stream = tmp_path / "t.seam", tmp_path / "s.bin"
    image.write_bytes(table.to_bytes())
    stream.write_bytes(b"aab")
    python = _indexed(table, table.stream(datagram=True).feed(b"aab"))
    assert python == [(0, 0, 1), (0, 1, 2), (1, 1, 3)]
    got, _end = _scan_c(seamrun, image, stream, None, ("--datagram",))
    assert got == python


# --- damaged images -------------------------------------------------------------

HEADER_SIZE, SECTION_ENTRY, SIG_RECORD = 64, 12, 20
SEC_CLASSES, SEC_DENSE, SEC_OUT_INDEX, SEC_OUT_LIST, SEC_SIGS, SEC_PORTS, SEC_NAMES = range(1, 8)


class Image:
    """A table image with its fields located, for making damaged copies.

    Offsets follow csrc/seam.h and seam_load.c (header fields, the 12-byte
    section entries kind/flags/offset/size, the 20-byte signature records)."""

    def __init__(self, blob: bytes):
        self.blob = bytes(blob)
        (self.size,) = struct.unpack_from("<I", blob, 8)
        self.states, self.first_match, self.nsigs = struct.unpack_from("<III", blob, 20)
        self.nclasses, self.stride, self.trans_width, self.out_width, self.nsec = \
            struct.unpack_from("<HHBBH", blob, 32)
        self.sections = {}  # kind -> (directory entry offset, data offset, size)
        for i in range(self.nsec):
            entry = HEADER_SIZE + SECTION_ENTRY * i
            kind, _flags, off, size = struct.unpack_from("<HHII", blob, entry)
            self.sections[kind] = (entry, off, size)
        self.directory_end = HEADER_SIZE + SECTION_ENTRY * self.nsec

    def at(self, kind: int) -> int:
        return self.sections[kind][1]

    def entry(self, kind: int) -> int:
        return self.sections[kind][0]

    def patched(self, *edits: tuple[int, str, int], fix_crc: bool = True) -> bytes:
        """A copy with struct-format values written at offsets, CRC recomputed."""
        out = bytearray(self.blob)
        for offset, fmt, value in edits:
            struct.pack_into(fmt, out, offset, value)
        if fix_crc:
            end = min(struct.unpack_from("<I", out, 8)[0], len(out))
            struct.pack_into("<I", out, 12, zlib.crc32(out[16:end]))
        return bytes(out)


def _base_images() -> dict[str, Image]:
    """Two well-formed images: 8-bit transitions, and 16-bit (over 256 states)."""
    small = signature_set([
        {"id": "relay", "text": "POST /relay/", "side": "client", "transport": "tcp", "ports": [80, 8080]},
        {"id": "temp", "text": "temp=", "fold_case": True, "window": [0, 512]},
        {"id": "bvlc", "hex": "81 0a 00", "transport": "udp", "ports": [47808]},
        {"id": "lay", "text": "lay"},
        {"id": "ay", "text": "ay", "side": "server"},
    ])
    rng = random.Random(256)
    wide = signature_set([{"id": f"w{k}", "hex": bytes(rng.choice(b"abcdef\x00\xff") for _ in range(12)).hex(),
                           "ports": [502]} for k in range(40)] + [{"id": "end", "text": "bldg-lab"}])
    images = {"small": Image(seamscan.compile(small).to_bytes()),
              "wide": Image(seamscan.compile(wide).to_bytes())}
    assert images["small"].trans_width == 1 and images["wide"].trans_width == 2
    return images


def _damaged(base: Image) -> list[tuple[str, bytes, int | None]]:
    """Images breaking a safety rule: (name, image, expected ss_load code or
    None for 'any refusal')."""
    b, size = base, base.size
    cases: list[tuple[str, bytes, int | None]] = []

    def flip(pos: int, mask: int) -> bytes:
        out = bytearray(b.blob)
        out[pos] ^= mask
        return bytes(out)

    # Every single-byte flip over the header and the section directory; the
    # CRC covers bytes 16.. of the image, so from there on it is what must object.
    for pos in range(b.directory_end):
        for mask in (0xFF, 0x01):
            cases.append((f"flip-{pos}-{mask:02x}", flip(pos, mask), ERR["CRC"] if pos >= 16 else None))
    # A sample of flips in each section.
    for kind, (_entry, off, length) in sorted(b.sections.items()):
        for pos in sorted({off, off + length // 3, off + length // 2, off + length - 1}):
            if length:
                cases.append((f"flip-section{kind}-{pos}", flip(pos, 0x40), ERR["CRC"]))
    for length in sorted({0, 1, 15, 16, 63, 64, 65, b.directory_end, size // 2, size - 8, size - 1}):
        cases.append((f"truncated-{length}", b.blob[:length], ERR["SHORT"]))
    cases += [
        ("magic-SEAX", b"SEAX" + b.blob[4:], ERR["MAGIC"]),
        ("magic-lowercase", b"seam" + b.blob[4:], ERR["MAGIC"]),
        ("version-0", b.patched((4, "<H", 0)), ERR["VERSION"]),
        ("version-3", b.patched((4, "<H", 3)), ERR["VERSION"]),
        ("version-ffff", b.patched((4, "<H", 0xFFFF)), ERR["VERSION"]),
        ("layout-0", b.patched((6, "<H", 0)), ERR["LAYOUT"]),
        ("layout-ffff", b.patched((6, "<H", 0xFFFF)), ERR["LAYOUT"]),
    ]

    # Re-CRC'd damage: the CRC is right, so the structural checks must catch it.
    classes, trans = b.at(SEC_CLASSES), b.at(SEC_DENSE)
    out_index, out_list = b.at(SEC_OUT_INDEX), b.at(SEC_OUT_LIST)
    sigs, ports_size = b.at(SEC_SIGS), b.sections[SEC_PORTS][2]
    tw = {1: "<B", 2: "<H", 4: "<I"}[b.trans_width]
    ow = {2: "<H", 4: "<I"}[b.out_width]
    nmatch = b.states - b.first_match
    entries = b.sections[SEC_OUT_LIST][2] // b.out_width
    index = list(struct.unpack_from(f"<{nmatch + 1}I", b.blob, out_index))
    most = struct.unpack_from("<I", b.blob, 40)[0]
    assert nmatch >= 2 and index[1] >= 1
    last_entry = b.states * b.stride - 1
    ported = next(i for i in range(b.nsigs) if struct.unpack_from("<H", b.blob, sigs + SIG_RECORD * i + 6)[0])
    rec = sigs + SIG_RECORD * ported
    cases += [
        ("class-equals-count", b.patched((classes + 200, "<B", b.nclasses)), ERR["CLASSES"]),
        ("class-255", b.patched((classes, "<B", 255)), ERR["CLASSES"]),
        ("transition-equals-states", b.patched((trans, tw, b.states)), ERR["TRANS"]),
        ("transition-max-last", b.patched((trans + last_entry * b.trans_width, tw, 2 ** (8 * b.trans_width) - 1)),
         ERR["TRANS"]),
        ("out-index-first-not-0", b.patched((out_index, "<I", 1)), ERR["OUTPUTS"]),
        ("out-index-decreasing", b.patched((out_index + 8, "<I", index[1] - 1)), ERR["OUTPUTS"]),
        ("out-index-past-list", b.patched((out_index + 4 * nmatch, "<I", entries + 1)), ERR["OUTPUTS"]),
        ("out-index-middle-past-list", b.patched((out_index + 4, "<I", entries + 1000)), ERR["OUTPUTS"]),
        ("out-index-short-of-list", b.patched((out_index + 4 * nmatch, "<I", entries - 1)), ERR["OUTPUTS"]),
        ("output-names-missing-sig", b.patched((out_list, ow, b.nsigs)), ERR["OUTPUTS"]),
        ("output-names-sig-ffff", b.patched((out_list + (entries - 1) * b.out_width, ow, 0xFFFF)), ERR["OUTPUTS"]),
        ("max-outputs-minus-1", b.patched((40, "<I", most - 1)), ERR["OUTPUTS"]),
        ("max-outputs-plus-1", b.patched((40, "<I", most + 1)), ERR["OUTPUTS"]),
        ("section-offset-past-end", b.patched((b.entry(SEC_PORTS) + 4, "<I", size)), ERR["SECTION"]),
        ("section-offset-huge", b.patched((b.entry(SEC_DENSE) + 4, "<I", 0xFFFFFFF8)), ERR["SECTION"]),
        ("section-missing", b.patched((b.entry(SEC_DENSE), "<H", 99)), ERR["SECTION"]),
        ("sections-none", b.patched((38, "<H", 0)), ERR["SECTION"]),
        ("directory-past-image", b.patched((38, "<H", (size - HEADER_SIZE) // SECTION_ENTRY + 1)),
         ERR["SECTION"]),
        ("classes-size-255", b.patched((b.entry(SEC_CLASSES) + 8, "<I", 255)), ERR["SECTION"]),
        ("transitions-size-short", b.patched((b.entry(SEC_DENSE) + 8, "<I", b.sections[SEC_DENSE][2] - 1)),
         ERR["SECTION"]),
        ("image-size-63", b.patched((8, "<I", 63), fix_crc=False), ERR["SHORT"]),
        ("image-size-past-file", b.patched((8, "<I", size + 8), fix_crc=False), ERR["SHORT"]),
        ("sig-ports-first-past-section", b.patched((rec + 8, "<I", ports_size // 2)), ERR["SIGS"]),
        ("sig-ports-count-past-section", b.patched((rec + 6, "<H", ports_size // 2 + 1)), ERR["SIGS"]),
        ("sig-ports-first-wraps", b.patched((rec + 8, "<I", 0xFFFFFFFF)), ERR["SIGS"]),
        ("sigs-count-plus-1", b.patched((28, "<I", b.nsigs + 1)), ERR["SECTION"]),
        ("header-states-0", b.patched((20, "<I", 0)), ERR["HEADER"]),
        ("header-states-plus-1", b.patched((20, "<I", b.states + 1)), ERR["SECTION"]),
        ("header-first-match-0", b.patched((24, "<I", 0)), ERR["HEADER"]),
        ("header-first-match-past-states", b.patched((24, "<I", b.states + 1)), ERR["HEADER"]),
        ("header-first-match-minus-1", b.patched((24, "<I", b.first_match - 1)), ERR["SECTION"]),
        ("header-classes-0", b.patched((32, "<H", 0)), ERR["CLASSES"]),  # no class is below 0
        ("header-classes-257", b.patched((32, "<H", 257), (34, "<H", 257)), ERR["SECTION"]),
        ("header-stride-below-classes", b.patched((34, "<H", b.nclasses - 1)), ERR["HEADER"]),
        ("header-trans-width-3", b.patched((36, "<B", 3)), ERR["HEADER"]),
        ("header-trans-width-0", b.patched((36, "<B", 0)), ERR["HEADER"]),
        ("header-out-width-1", b.patched((37, "<B", 1)), ERR["HEADER"]),
        ("header-max-len-0", b.patched((44, "<I", 0)), ERR["SIGS"]),  # not the longest record
        ("header-max-len-plus-1", b.patched((44, "<I", struct.unpack_from("<I", b.blob, 44)[0] + 1)), ERR["SIGS"]),
        ("header-max-len-huge", b.patched((44, "<I", 0x10000)), ERR["HEADER"]),
    ]
    if b.trans_width == 1:
        cases.append(("header-states-257-width-1", b.patched((20, "<I", 257)), ERR["SECTION"]))
    return cases


def _ill_formed(base: Image) -> list[tuple[str, bytes, str]]:
    """Re-CRC'd images breaking only a well-formedness rule (csrc/FORMAT.md,
    "What the host enforces as well"): (name, image, words of the host's
    message).  ss_load may take them: nothing it reads is out of bounds."""
    b, size = base, base.size
    classes, sigs = b.at(SEC_CLASSES), b.at(SEC_SIGS)
    no_window = next(i for i in range(b.nsigs) if not b.blob[sigs + SIG_RECORD * i + 2] & 1)
    rec = sigs + SIG_RECORD * no_window
    return [
        ("section-size-huge", b.patched((b.entry(SEC_NAMES) + 8, "<I", 0xFFFFFFFF)), "run past"),
        ("section-size-past-end", b.patched((b.entry(SEC_NAMES) + 8, "<I", size - b.at(SEC_NAMES) + 1)),
         "run past"),
        ("section-in-header", b.patched((b.entry(SEC_CLASSES) + 4, "<I", 0)), "header or the directory"),
        ("section-in-directory", b.patched((b.entry(SEC_CLASSES) + 4, "<I", (b.directory_end - 4) & ~7)),
         "header or the directory"),
        ("section-unaligned-1", b.patched((b.entry(SEC_CLASSES) + 4, "<I", classes + 1)), "multiple of 8"),
        ("section-unaligned-4", b.patched((b.entry(SEC_SIGS) + 4, "<I", sigs + 4)), "multiple of 8"),
        ("section-flags", b.patched((b.entry(SEC_SIGS) + 2, "<H", 1)), "directory flags"),
        ("section-duplicated", b.patched((b.entry(SEC_NAMES), "<H", SEC_PORTS)), "twice"),
        ("sections-65", b.patched((38, "<H", 65)), "65 sections"),
        ("image-size-cuts-names", b.patched((8, "<I", b.at(SEC_NAMES) + 8)), "run past"),
        ("names-over-signatures", b.patched((b.entry(SEC_NAMES) + 4, "<I", sigs)), "overlap"),
        ("ports-over-signatures", b.patched((b.entry(SEC_PORTS) + 4, "<I", sigs)), "overlap"),
        ("header-flags", b.patched((16, "<I", 1)), "header flags"),
        ("reserved-header-byte", b.patched((50, "<B", 1)), "reserved bytes"),
        ("sig-side-7", b.patched((sigs, "<B", 7)), "side 7"),
        ("sig-side-3", b.patched((sigs, "<B", 3)), "side 3"),
        ("sig-transport-3", b.patched((sigs + 1, "<B", 3)), "transport 3"),
        ("sig-flags-unknown", b.patched((sigs + 2, "<B", 0x80)), "unknown flag bits"),
        ("sig-reserved-byte", b.patched((sigs + 3, "<B", 1)), "pad byte"),
        ("sig-length-0", b.patched((rec + 4, "<H", 0)), "length 0"),
        ("sig-window-start-equals-end", b.patched((sigs + 2, "<B", 1), (sigs + 12, "<I", 9), (sigs + 16, "<I", 9)),
         "is empty"),
        ("sig-window-start-after-end", b.patched((sigs + 2, "<B", 1), (sigs + 12, "<I", 10), (sigs + 16, "<I", 9)),
         "is empty"),
        # "Without the flag: 0, 0xFFFFFFFF"
        ("no-window-values", b.patched((rec + 12, "<I", 5)), "no window flag"),
    ]


@pytest.fixture(scope="module")
def damage_cases() -> list[tuple[str, bytes, int | None]]:
    return [(f"{name}-{case}", blob, code) for name, base in _base_images().items()
            for case, blob, code in _damaged(base)]


PYTHON_ONLY = "refused by the Python reader"


def _python_refusal(blob: bytes) -> int | str | None:
    """The ss_load code named by the TableError; PYTHON_ONLY if Python's own
    reading (names) refused it; None if the image loads."""
    try:
        seamscan.Table.from_bytes(blob)
    except TableError as err:
        assert str(err), "TableError without a message"
        m = re.search(r"\(code (-\d+)\)", str(err))
        return int(m.group(1)) if m else PYTHON_ONLY
    return None


def test_base_images_are_accepted(seamrun_asan, tmp_path):
    paths = []
    for name, base in _base_images().items():
        assert _python_refusal(base.blob) is None
        paths.append(tmp_path / f"{name}.seam")
        paths[-1].write_bytes(base.blob)
    assert _check_c(seamrun_asan, paths) == {p.name: 0 for p in paths}


def test_damaged_images_refused_by_python(damage_cases):
    wrong = []
    for name, blob, code in damage_cases:
        got = _python_refusal(blob)
        if got is None or (code is not None and got != code):
            wrong.append(f"{name}: expected {code if code is not None else 'a refusal'}, got {got}")
    assert not wrong, f"{len(wrong)} of {len(damage_cases)} damaged images:\n" + "\n".join(wrong[:40])


def _check_c(harness: Path, paths: list[Path]) -> dict[str, int]:
    """One `seamrun --check` run over many images: file name -> ss_load code."""
    r = _run([harness, "--check", *paths], env=SANITIZER_ENV)
    _assert_no_sanitizer_report(r, "--check run")
    assert r.returncode == 0, f"seamrun --check exited {r.returncode}:\n{r.stdout[-2000:]}{r.stderr[-2000:]}"
    codes = {}
    for line in r.stdout.splitlines():
        code, path = line.split(" ", 1)
        codes[Path(path).name] = int(code)
    assert len(codes) == len(paths)
    return codes


def test_damaged_images_refused_by_c_under_sanitizers(damage_cases, seamrun_asan, tmp_path):
    paths = []
    for k, (_name, blob, _code) in enumerate(damage_cases):
        paths.append(tmp_path / f"d{k:04d}.seam")
        paths[-1].write_bytes(blob)
    codes = _check_c(seamrun_asan, paths)
    wrong = []
    for k, (name, blob, code) in enumerate(damage_cases):
        got = codes[f"d{k:04d}.seam"]
        if got == 0 or (code is not None and got != code) or got != _python_refusal(blob):
            wrong.append(f"{name}: expected {code}, C gave {got}, Python {_python_refusal(blob)}")
    assert not wrong, f"{len(wrong)} of {len(damage_cases)} damaged images:\n" + "\n".join(wrong[:40])


@pytest.fixture(scope="module")
def ill_formed_cases() -> list[tuple[str, bytes, str]]:
    return [(f"{name}-{case}", blob, words) for name, base in _base_images().items()
            for case, blob, words in _ill_formed(base)]


def test_ill_formed_images_refused_by_the_host_rules(ill_formed_cases, seamrun_asan, tmp_path):
    """Each breaks one well-formedness rule: Python refuses it, its message
    naming the rule when ss_load took the image; C takes it or refuses it,
    and scans what it takes (seamrun --check) under the sanitizers."""
    paths = []
    for k, (_name, blob, _words) in enumerate(ill_formed_cases):
        paths.append(tmp_path / f"w{k:04d}.seam")
        paths[-1].write_bytes(blob)
    codes = _check_c(seamrun_asan, paths)
    wrong = []
    for k, (name, blob, words) in enumerate(ill_formed_cases):
        c_code = codes[f"w{k:04d}.seam"]
        try:
            seamscan.Table.from_bytes(blob)
            wrong.append(f"{name}: Python took it")
            continue
        except TableError as err:
            message = str(err)
        if c_code != 0:
            if f"(code {c_code})" not in message:
                wrong.append(f"{name}: C refused with {c_code}, Python said {message!r}")
        elif "not well-formed" not in message or words not in message:
            wrong.append(f"{name}: expected the host rule {words!r}, got {message!r}")
        else:
            # As a device takes it: scanning stays inside the image.
            seamscan.Table.from_bytes(blob, well_formed=False).scan(b"POST /relay/ temp=1 lay" * 20)
    assert not wrong, f"{len(wrong)} of {len(ill_formed_cases)}:\n" + "\n".join(wrong)
    assert sum(code == 0 for code in codes.values()) >= len(ill_formed_cases) // 2, codes


def test_format_rules_the_loader_keeps_for_dense_outputs(seamrun_asan, tmp_path):
    # "List entries ... are signature indices < nsigs, ascending within each
    # state": the C loader checks the dense output list in full.
    base = _base_images()["small"]
    out_index, out_list = base.at(SEC_OUT_INDEX), base.at(SEC_OUT_LIST)
    nmatch = base.states - base.first_match
    index = struct.unpack_from(f"<{nmatch + 1}I", base.blob, out_index)
    k = next(k for k in range(nmatch) if index[k + 1] - index[k] >= 2)  # a state with 2+ outputs
    fmt = {2: "<H", 4: "<I"}[base.out_width]
    first = out_list + base.out_width * index[k]
    a, b = (struct.unpack_from(fmt, base.blob, first + base.out_width * j)[0] for j in (0, 1))
    blob = base.patched((first, fmt, b), (first + base.out_width, fmt, a))
    path = tmp_path / "outputs-not-ascending.seam"
    path.write_bytes(blob)
    assert _check_c(seamrun_asan, [path])[path.name] == ERR["OUTPUTS"]
    assert _python_refusal(blob) == ERR["OUTPUTS"]


def test_random_recrc_damage_never_trips_the_sanitizers(seamrun_asan, tmp_path):
    """Random byte changes with the CRC fixed up: C and Python agree on every
    image; accepted ones are scanned (by the harness and by Table.scan)."""
    rng = random.Random(4711)
    paths, blobs = [], []
    for name, base in _base_images().items():
        for k in range(200):
            out = bytearray(base.blob)
            for _ in range(rng.randint(1, 4)):
                pos = rng.randrange(16, base.size)
                out[pos] = rng.choice([0, 1, 0xFF, out[pos] ^ (1 << rng.randrange(8)), rng.randrange(256)])
            struct.pack_into("<I", out, 12, zlib.crc32(out[16:base.size]))
            paths.append(tmp_path / f"{name}-{k:03d}.seam")
            paths[-1].write_bytes(out)
            blobs.append(bytes(out))
    codes = _check_c(seamrun_asan, paths)
    probe = bytes(range(256)) + b"temp=POST /relay/bldg-lab\x81\x0a\x00 relay" * 4
    accepted = 0
    for path, blob in zip(paths, blobs, strict=True):
        c_code, py_code = codes[path.name], _python_refusal(blob)
        if c_code == 0:  # Python may refuse more (its names reader), never less
            accepted += 1
            assert py_code in (None, PYTHON_ONLY), f"{path.name}: C accepts, Python {py_code}"
            seamscan.Table.from_bytes(blob, well_formed=False).scan(probe)  # as a device would
        else:
            assert py_code == c_code, f"{path.name}: C {c_code}, Python {py_code}"
    assert accepted < len(paths)
