"""The C runtime on device architectures: armhf and big-endian MIPS under qemu-user.

``csrc/seamrun`` is built statically with the cross compilers
(``make -C csrc seamrun-armhf seamrun-mips``) and run under ``qemu-arm`` /
``qemu-mips`` on images compiled on this (little-endian) host, byte for byte
the images the host scans with.  Checked, on each target and each layout of
``tests/vectors.py``:

* the binaries are what they claim (ELF class, byte order, machine);
* the CRC-32 check value, and the CRC of random data equal to zlib's;
* every vector, whole and in pieces of 1 and 7 bytes: the target's matches
  equal the vector's hand-worked list, the host engine's and the host
  harness's;
* 1,000 generated signatures (``tools/gen_sigs.py``, some given sides,
  transports, ports, windows and datagram scope) over 3 MB of packet-like
  bytes with planted occurrences, in four scan contexts and several piece
  sizes: identical match lists on host engine, host harness and target;
  pyahocorasick agrees on the plain signatures;
* the loader's verdict (accepted, or the refusal code) on intact and
  randomly damaged images is the same on the target as on the host;
* the runtime as a device builds it (``-DSS_SMALL`` and one layout:
  ``-DSS_NO_DENSE`` or ``-DSS_NO_COMPACT``, the code ``make sizes-m4``
  measures), on the host and on armhf: the vector table of its layout gives
  the same matches, and damaged images the same verdicts, as the full build;
  images of the layout it leaves out are refused as such.

Many harness runs are batched into one shell script per target, so qemu's
start-up (some 20 ms) is paid without Python in between.  Tests skip with
the reason when a cross compiler, its C library or qemu-user is missing.
"""

from __future__ import annotations

import os
import random
import re
import shlex
import shutil
import struct
import subprocess
import sys
import zlib
from dataclasses import dataclass
from pathlib import Path

import ahocorasick
import pytest

import seamscan
from seamscan.signatures import signature_set
from toolchains import skip_message
from vectors import LAYOUTS, VECTORS

ROOT = Path(__file__).resolve().parents[1]
CSRC = ROOT / "csrc"
sys.path.insert(0, str(ROOT / "tools"))
import gen_sigs  # noqa: E402

# The cross harnesses' file buffers (csrc/Makefile: -DSEAMRUN_MAX_FILE=8388608u).
CROSS_MAX_FILE = 8 * 1024 * 1024
CHUNKS = (None, 1, 7)


@dataclass(frozen=True)
class Target:
    name: str
    compiler: str
    qemu: str
    make_target: str
    # ELF header facts, from the System V ABI's ELF chapter: e_ident[EI_DATA]
    # (offset 5) 1 = little-, 2 = big-endian; e_machine (offset 18) EM_ARM = 40,
    # EM_MIPS = 8 (recalled from memory).
    elf_data: int
    elf_machine: int


TARGETS = [
    Target("armhf", "arm-linux-gnueabihf-gcc", "qemu-arm", "seamrun-armhf", 1, 40),
    Target("mips-be", "mips-linux-gnu-gcc", "qemu-mips", "seamrun-mips", 2, 8),
]


def _run(cmd, *, timeout=600) -> subprocess.CompletedProcess:
    return subprocess.run([str(c) for c in cmd], capture_output=True, text=True, timeout=timeout,
                          errors="replace")


def _make(out: Path, target: str, defs: str = "") -> subprocess.CompletedProcess:
    return _run(["make", "-s", "-C", CSRC, f"OUT={out}", f"DEFS={defs}", target])


@dataclass
class Harness:
    """A seamrun binary and the command prefix that runs it (qemu or nothing)."""

    name: str
    prefix: list[str]

    def run_many(self, cases: dict[str, list], where: Path) -> dict[str, tuple[int, list[str]]]:
        """Run many harness commands from one shell script: key -> (exit status,
        output lines, stderr included)."""
        script = where / f"run-{self.name}.sh"
        lines = []
        for key, args in cases.items():
            cmd = " ".join(shlex.quote(str(a)) for a in [*self.prefix, *args])
            lines += [f"echo '@@begin {key}'", f"{cmd} 2>&1", f"echo \"@@rc {key} $?\""]
        script.write_text("\n".join(lines) + "\n")
        r = _run(["sh", script])
        assert r.returncode == 0, f"{script}: {r.stderr[-2000:]}"
        results: dict[str, tuple[int, list[str]]] = {}
        key, body = None, []
        for line in r.stdout.splitlines():
            if line.startswith("@@begin "):
                key, body = line[8:], []
            elif line.startswith("@@rc ") and key is not None:
                results[key] = (int(line.rsplit(" ", 1)[1]), body)
                key = None
            else:
                body.append(line)
        assert set(results) == set(cases), f"{script}: output incomplete"
        return results


def _matches(status: int, lines: list[str], what: str, length: int) -> list[tuple[int, int, int]]:
    """The harness's match lines as (signature index, start, end); checks the end line."""
    assert status == 0, f"{what}: exit {status}:\n" + "\n".join(lines[-20:])
    assert lines and lines[-1] == f"end {length}", f"{what}: last lines {lines[-3:]}"
    return [tuple(int(x) for x in line.split()) for line in lines[:-1]]


def _indexed(table, matches) -> list[tuple[int, int, int]]:
    index = {sig_id: i for i, sig_id in enumerate(table.ids)}
    return [(index[m.sig], m.start, m.end) for m in matches]


def _first_difference(got, want) -> str:
    for k, (a, b) in enumerate(zip(got, want, strict=False)):
        if a != b:
            return f"#{k}: target {a}, host {b}"
    return f"lengths: target {len(got)}, host {len(want)}"


# --- building ------------------------------------------------------------------


@pytest.fixture(scope="module")
def build_dir(tmp_path_factory) -> Path:
    if shutil.which("make") is None:
        pytest.skip(skip_message("no `make` on this machine: the C harness cannot be built", "make"))
    return tmp_path_factory.mktemp("cross-build")


@pytest.fixture(scope="module")
def host(build_dir) -> Harness:
    if shutil.which(os.environ.get("CC", "cc")) is None:
        pytest.skip(skip_message("no host C compiler (cc, or $CC)", "cc"))
    r = _make(build_dir, "seamrun")
    assert r.returncode == 0, f"building csrc/seamrun failed:\n{r.stdout}{r.stderr}"
    return Harness("host", [str(build_dir / "seamrun")])


_MISSING_LIBC = ("stdio.h: No such file", "cannot find -lc", "crt1.o: No such file")


@pytest.fixture(scope="module", params=TARGETS, ids=[t.name for t in TARGETS])
def target(request, build_dir) -> tuple[Target, Harness]:
    spec: Target = request.param
    for tool in (spec.compiler, spec.qemu):
        if shutil.which(tool) is None:
            pytest.skip(skip_message(f"{tool} is not installed", spec.compiler, spec.qemu))
    r = _make(build_dir, spec.make_target)
    if r.returncode != 0 and any(mark in r.stderr for mark in _MISSING_LIBC):
        pytest.skip(skip_message(f"{spec.compiler} has no static C library here: "
                                  f"{r.stderr.strip()[:300]}", spec.compiler))
    assert r.returncode == 0, f"make {spec.make_target} failed:\n{r.stdout}{r.stderr}"
    binary = build_dir / spec.make_target
    return spec, Harness(spec.name, [spec.qemu, str(binary)])


# --- the binaries and the CRC ------------------------------------------------------


def test_binary_is_the_target_architecture(target):
    spec, harness = target
    head = Path(harness.prefix[1]).read_bytes()[:20]
    assert head[:4] == b"\x7fELF", "not an ELF file"
    assert head[5] == spec.elf_data, f"byte order {head[5]}, expected {spec.elf_data}"
    order = "<" if spec.elf_data == 1 else ">"
    assert struct.unpack_from(order + "H", head, 18)[0] == spec.elf_machine


def test_crc32_on_target(target, tmp_path):
    _spec, harness = target
    check = tmp_path / "check.txt"
    check.write_bytes(b"123456789")
    data = random.Random(802).randbytes(100_003)
    blob = tmp_path / "random.bin"
    blob.write_bytes(data)
    results = harness.run_many({"check": ["--crc", check], "random": ["--crc", blob]}, tmp_path)
    # Greg Cook, "Catalogue of parametrised CRC algorithms", CRC-32/ISO-HDLC:
    # check = 0xcbf43926 over "123456789" (the value csrc/FORMAT.md cites).
    assert results["check"] == (0, ["cbf43926"])
    # Outside oracle: Python's zlib.crc32 is the same CRC.
    assert results["random"] == (0, [f"{zlib.crc32(data):08x}"])


# --- (a) the vector table ---------------------------------------------------------


def _write_vectors(where: Path, layout: str):
    """Every vector's image (this layout) and haystack on disk: (harness
    arguments per run, (vector, expected matches) per run), runs for CHUNKS.
    The host engine's matches on each image are checked against the
    hand-worked list on the way."""
    cases, expected = {}, {}
    for k, vector in enumerate(VECTORS):
        table = seamscan.compile(signature_set(vector.sigs, name=vector.name), layout=layout)
        image, stream = where / f"v{k:03d}.seam", where / f"v{k:03d}.bin"
        image.write_bytes(table.to_bytes())
        stream.write_bytes(vector.haystack)
        want = [(table.ids.index(sig_id), start, end) for sig_id, start, end in vector.expected]
        assert _indexed(table, table.scan(vector.haystack)) == want, vector.name
        for chunk in CHUNKS:
            key = f"{k}/{chunk}"
            cases[key] = [image, stream] + ([chunk] if chunk else [])
            expected[key] = (vector, want)
    return cases, expected


@pytest.fixture(scope="module", params=LAYOUTS)
def vector_files(request, tmp_path_factory, host):
    """Every vector's image (this layout) and haystack on disk, with the
    expected matches and the host harness's results for CHUNKS."""
    layout = request.param
    where = tmp_path_factory.mktemp(f"vectors-{layout}")
    cases, expected = _write_vectors(where, layout)
    host_results = host.run_many(cases, where)
    for key, (vector, want) in expected.items():
        got = _matches(*host_results[key], f"host {vector.name} chunk {key}", len(vector.haystack))
        assert got == want, f"host harness, {vector.name}, {key}"
    return layout, where, cases, expected


def test_vectors_on_target(target, vector_files):
    _spec, harness = target
    layout, where, cases, expected = vector_files
    results = harness.run_many(cases, where)
    wrong = []
    for key, (vector, want) in expected.items():
        got = _matches(*results[key], f"{harness.name} {vector.name} chunk {key}", len(vector.haystack))
        if got != want:
            wrong.append(f"{vector.name} ({key}): {_first_difference(got, want)}")
    assert not wrong, f"{harness.name}, layout {layout}: {len(wrong)} of {len(cases)} runs differ:\n" + \
        "\n".join(wrong[:30])


# --- (b) 1,000 generated signatures over a large stream ---------------------------

BIG_SEED = 20250306
STREAM_BYTES = 3_000_000
PACKET = 1460  # a typical TCP payload on Ethernet (common practice)
# (name, harness options, host scan context, datagram, piece sizes)
BIG_RUNS = [
    ("no-context", (), {}, False, (None, 1, PACKET)),
    ("client-tcp-80", ("--side", "1", "--transport", "1", "--port", "80"),
     {"side": "client", "transport": "tcp", "server_port": 80}, False, (7,)),
    ("server-tcp-502", ("--side", "2", "--transport", "1", "--port", "502"),
     {"side": "server", "transport": "tcp", "server_port": 502}, False, (4096,)),
    ("client-udp-47808-datagrams", ("--side", "1", "--transport", "2", "--port", "47808", "--datagram"),
     {"side": "client", "transport": "udp", "server_port": 47808}, True, (PACKET, 97)),
]
PORTS = [80, 502, 1883, 47808]


def _big_signatures(rng: random.Random) -> list[dict]:
    """gen_sigs' 1,000 signatures, a share of them given filters."""
    sigs = gen_sigs.generate(1000, seed=BIG_SEED)
    for k, sig in enumerate(sigs):
        length = len(bytes.fromhex(sig["hex"])) if "hex" in sig else len(sig["text"])
        if k % 9 == 1:
            sig["side"] = rng.choice(["client", "server"])
        if k % 7 == 2:
            sig["transport"] = rng.choice(["tcp", "udp"])
        if k % 11 == 3:
            sig["ports"] = rng.sample(PORTS, rng.randint(1, 2))
        if k % 13 == 4:
            low = rng.randrange(0, STREAM_BYTES // 2)
            sig["window"] = [low, low + length + rng.randrange(STREAM_BYTES // 2)]
        if k % 17 == 5:
            sig["transport"] = "udp"
            sig["scope"] = rng.choice(["datagram", "stream"])
    return sigs


def _occurrence(rng: random.Random, sig: dict) -> bytes:
    if "hex" in sig:
        return bytes.fromhex(sig["hex"])
    text = sig["text"]
    if sig.get("fold_case"):
        text = "".join(c.upper() if rng.random() < 0.5 else c.lower() for c in text)
    return text.encode()


LAB_TEXT = [b"GET /zone/3/temp HTTP/1.1\r\nHost: 192.0.2.17\r\n\r\n", b"relay/7=on;", b"co2=612;",
            b"setpoint=21.5;", b"POST /api/v1/scene HTTP/1.1\r\n", b"lux=410 occupied=1\n"]


def _packet_stream(rng: random.Random, sigs: list[dict], size: int) -> bytes:
    """Packets of a smart-building lab: a binary header (documentation addresses,
    ports, counters), then lab text, random bytes and planted occurrences, some
    cut across a packet boundary."""
    parts, n = [], 0
    while n < size:
        src, dst = rng.choice([(192, 0, 2), (198, 51, 100)]), (203, 0, 113)
        header = bytes([0x45, 0, *rng.randbytes(6), 64, 6, 0, 0, *src, rng.randrange(1, 255),
                        *dst, rng.randrange(1, 255)]) + struct.pack(">HH", rng.choice(PORTS),
                                                                     rng.randrange(1024, 65536))
        body = []
        for _ in range(rng.randint(1, 8)):
            kind = rng.random()
            if kind < 0.45:
                body.append(_occurrence(rng, rng.choice(sigs)))
            elif kind < 0.75:
                body.append(rng.choice(LAB_TEXT))
            else:
                body.append(rng.randbytes(rng.randint(1, 200)))
        packet = header + b"".join(body)
        parts.append(packet)
        n += len(packet)
    return b"".join(parts)[:size]


@pytest.fixture(scope="module", params=LAYOUTS)
def big_case(request, tmp_path_factory, host):
    """Image, stream and expected matches per run (host engine, checked against
    the host harness and pyahocorasick)."""
    layout = request.param
    rng = random.Random(BIG_SEED)
    entries = _big_signatures(rng)
    sigset = signature_set(entries, name="gen-1000")
    table = seamscan.compile(sigset, layout=layout)
    assert table.nbytes <= CROSS_MAX_FILE, \
        f"the {layout} image takes {table.nbytes:,} bytes, over the cross harness's {CROSS_MAX_FILE:,}"
    stream = _packet_stream(rng, entries, STREAM_BYTES)
    where = tmp_path_factory.mktemp(f"big-{layout}")
    image, data = where / "t.seam", where / "s.bin"
    image.write_bytes(table.to_bytes())
    data.write_bytes(stream)

    cases, expected = {}, {}
    for name, options, ctx, datagram, pieces in BIG_RUNS:
        for chunk in pieces:
            if datagram:
                feeder = table.stream(datagram=True, **ctx)
                found = [m for k in range(0, len(stream), chunk) for m in feeder.feed(stream[k:k + chunk])]
            else:
                found = table.scan(stream, **ctx)
            key = f"{name}/{chunk}"
            cases[key] = [*options, image, data] + ([chunk] if chunk else [])
            expected[key] = _indexed(table, found)
    assert len(expected["no-context/None"]) > 20_000
    assert len(expected["client-udp-47808-datagrams/1460"]) > 100

    # Outside oracle: pyahocorasick over the signatures no plain scan filters
    # (no fold_case, no window), bytes as latin-1 code points.
    automaton = ahocorasick.Automaton()
    plain: dict[str, list[int]] = {}
    for i, sig in enumerate(sigset):
        if not sig.fold_case and sig.window is None:
            plain.setdefault(sig.data.decode("latin-1"), []).append(i)
    for key, indices in plain.items():
        automaton.add_word(key, (len(key), indices))
    automaton.make_automaton()
    oracle = sorted(((i, last + 1 - n, last + 1) for last, (n, indices) in
                     automaton.iter(stream.decode("latin-1")) for i in indices),
                    key=lambda m: (m[2], m[0]))
    chosen = {i for indices in plain.values() for i in indices}
    assert len(chosen) > 500
    assert [m for m in expected["no-context/None"] if m[0] in chosen] == oracle

    host_results = host.run_many(cases, where)
    for key, want in expected.items():
        got = _matches(*host_results[key], f"host {key}", len(stream))
        assert got == want, f"host harness, {key}: {_first_difference(got, want)}"
    return layout, where, cases, expected, len(stream)


def test_generated_set_on_target(target, big_case):
    _spec, harness = target
    layout, where, cases, expected, length = big_case
    results = harness.run_many(cases, where)
    wrong = []
    for key, want in expected.items():
        got = _matches(*results[key], f"{harness.name} {key}", length)
        if got != want:
            wrong.append(f"{key}: {_first_difference(got, want)}")
    assert not wrong, f"{harness.name}, layout {layout}:\n" + "\n".join(wrong)


# --- the loader's verdicts --------------------------------------------------------


def _damaged_images(rng: random.Random, blob: bytes, count: int) -> list[bytes]:
    """Random byte changes, most with the CRC recomputed (so that the structural
    checks judge them), a few left with a stale CRC or cut short."""
    out = []
    for k in range(count):
        img = bytearray(blob)
        for _ in range(rng.randint(1, 3)):
            pos = rng.randrange(16, len(img))
            img[pos] = rng.choice([0, 0xFF, img[pos] ^ (1 << rng.randrange(8)), rng.randrange(256)])
        if k % 10 == 0:
            img = img[:rng.randrange(len(img))]
        elif k % 10 != 1:
            struct.pack_into("<I", img, 12, zlib.crc32(img[16:]))
        out.append(bytes(img))
    return out


@pytest.mark.parametrize("layout", LAYOUTS)
def test_loader_verdicts_match_the_host(layout, target, host, tmp_path):
    _spec, harness = target
    rng = random.Random(5150)
    blobs = [seamscan.compile(signature_set(v.sigs), layout=layout).to_bytes() for v in VECTORS]
    lab = seamscan.compile(signature_set([
        {"id": "relay", "text": "POST /relay/", "side": "client", "transport": "tcp", "ports": [80, 8080]},
        {"id": "temp", "text": "temp=", "fold_case": True, "window": [0, 512]},
        {"id": "bvlc", "hex": "81 0a 00", "transport": "udp", "ports": [47808]},
        {"id": "lay", "text": "lay"},
    ]), layout=layout).to_bytes()
    blobs += _damaged_images(rng, lab, 300)
    paths = []
    for k, blob in enumerate(blobs):
        paths.append(tmp_path / f"i{k:03d}.seam")
        paths[-1].write_bytes(blob)
    verdicts = {}
    for who in (host, harness):
        status, lines = who.run_many({"check": ["--check", *paths]}, tmp_path)["check"]
        assert status == 0, f"{who.name} --check exited {status}:\n" + "\n".join(lines[-10:])
        verdicts[who.name] = lines
    assert verdicts[harness.name] == verdicts["host"]
    codes = [int(line.split()[0]) for line in verdicts["host"]]
    assert codes[:len(VECTORS)] == [0] * len(VECTORS)
    assert len(set(codes)) >= 5  # the damage reaches several of the loader's checks


# --- the device builds -----------------------------------------------------------


def _error_code(name: str) -> int:
    """SS_ERR_<name> as csrc/seam.h defines it."""
    m = re.search(rf"#define SS_ERR_{name} \(?(-\d+)", (CSRC / "seam.h").read_text())
    assert m, name
    return int(m.group(1))


# (layout kept, the other one, -D options): what `make sizes-m4` measures.
DEVICE_BUILDS = [("compact", "dense", "-DSS_SMALL -DSS_NO_DENSE"),
                 ("dense", "compact", "-DSS_SMALL -DSS_NO_COMPACT")]


@pytest.fixture(scope="module", params=DEVICE_BUILDS, ids=[b[0] for b in DEVICE_BUILDS])
def device_build(request, tmp_path_factory):
    """The harness built as a device builds the runtime: on the host, and on
    armhf under qemu when the cross tools are there."""
    layout, other, defs = request.param
    out = tmp_path_factory.mktemp(f"device-{layout}")
    r = _make(out, "seamrun", defs)
    assert r.returncode == 0, f"building the {layout} device harness failed:\n{r.stdout}{r.stderr}"
    harnesses = [Harness(f"host-{layout}-device", [str(out / "seamrun")])]
    arm = TARGETS[0]
    if shutil.which(arm.compiler) and shutil.which(arm.qemu):
        r = _make(out, arm.make_target, defs)
        if r.returncode == 0:
            harnesses.append(Harness(f"armhf-{layout}-device", [arm.qemu, str(out / arm.make_target)]))
        elif not any(mark in r.stderr for mark in _MISSING_LIBC):
            raise AssertionError(f"make {arm.make_target} {defs} failed:\n{r.stdout}{r.stderr}")
    return layout, other, harnesses


def test_device_build_scans_the_vectors(device_build, tmp_path):
    layout, _other, harnesses = device_build
    cases, expected = _write_vectors(tmp_path, layout)
    for harness in harnesses:
        results = harness.run_many(cases, tmp_path)
        wrong = []
        for key, (vector, want) in expected.items():
            got = _matches(*results[key], f"{harness.name} {vector.name} chunk {key}",
                           len(vector.haystack))
            if got != want:
                wrong.append(f"{vector.name} ({key}): {_first_difference(got, want)}")
        assert not wrong, f"{harness.name}: {len(wrong)} of {len(cases)} runs differ:\n" + \
            "\n".join(wrong[:30])


def test_device_build_loader_verdicts(device_build, host, tmp_path):
    layout, other, harnesses = device_build
    rng = random.Random(4242)
    lab = seamscan.compile(signature_set([
        {"id": "relay", "text": "POST /relay/", "side": "client", "transport": "tcp", "ports": [80, 8080]},
        {"id": "temp", "text": "temp=", "fold_case": True, "window": [0, 512]},
        {"id": "lay", "text": "lay"},
        {"id": "ay", "text": "ay"},
    ]), layout=layout).to_bytes()
    blobs = [lab, *_damaged_images(rng, lab, 200)]
    paths = []
    for k, blob in enumerate(blobs):
        paths.append(tmp_path / f"d{k:03d}.seam")
        paths[-1].write_bytes(blob)
    left_out = tmp_path / "other-layout.seam"
    left_out.write_bytes(seamscan.compile(signature_set([{"id": "a", "text": "a"}]), layout=other).to_bytes())
    status, full = host.run_many({"check": ["--check", *paths]}, tmp_path)["check"]
    assert status == 0
    for harness in harnesses:
        status, lines = harness.run_many({"check": ["--check", *paths, left_out]}, tmp_path)["check"]
        assert status == 0, f"{harness.name} --check exited {status}:\n" + "\n".join(lines[-10:])
        assert lines[:-1] == full, harness.name
        assert lines[-1].split()[0] == str(_error_code("LAYOUT")), lines[-1]

