"""The C header export, compiled and run.

* Headers for every vector-table set and a random 300-signature set
  (``tools/gen_sigs.py``), in every layout, go into one C driver compiled
  strict C99 (``-std=c99 -Wall -Wextra -Werror -pedantic``) with gcc and
  with clang.  The driver checks that each image is 8-byte aligned, loads it
  with ``ss_load``, scans a stream read from a file with ``ss_scan`` (out[]
  sized by the header's own ``MAX_OUTPUTS`` macro) and prints the matches
  with ids taken from ``SYMBOL_ids``: they equal ``Table.scan`` (and the
  hand-worked vector lists, and the brute-force reference for the random
  set).  The CRC macro equals the image's CRC field, zlib's CRC-32 of bytes
  16..size and the runtime's ``ss_crc32``.
* Ids and labels with quotes, backslashes, trigraph sequences, UTF-8
  followed by hex digits, control characters, an empty label and a label
  longer than a portable string literal come back from C byte for byte.
* A file using only part of a header (image only, names only, names left
  out) compiles quietly even with the header pasted into it, where no
  compiler exempts it from unused warnings.
* Compile-only for a Cortex-M4 (``arm-none-eabi-gcc``): header and runtime,
  and the image lands in read-only data.
"""

from __future__ import annotations

import random
import re
import shutil
import subprocess
import sys
import zlib
from pathlib import Path

import pytest

import seamscan
from seamscan import export
from seamscan.export import c_header, c_string, valid_symbol
from seamscan.reference import reference_matches
from seamscan.signatures import signature_set
from toolchains import skip_message
from vectors import LAYOUTS, VECTORS

ROOT = Path(__file__).resolve().parents[1]
CSRC = ROOT / "csrc"
RUNTIME_SOURCES = sorted(CSRC.glob("seam_*.c"))
sys.path.insert(0, str(ROOT / "tools"))
import gen_sigs  # noqa: E402

STRICT = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic"]
# Beyond STRICT, for the partial-use files: gcc's level 2 also reports unused
# static consts of headers, which level 1 (the -Wall one) exempts.
UNUSED_FLAGS = {"gcc": ["-Wunused-const-variable=2"], "clang": ["-Wunused-const-variable"]}
M4_FLAGS = ["-mcpu=cortex-m4", "-mthumb", "-Os", *STRICT]


def _run(cmd, timeout=300) -> subprocess.CompletedProcess:
    return subprocess.run([str(c) for c in cmd], capture_output=True, text=True, timeout=timeout)


def _need(compiler: str) -> str:
    if shutil.which(compiler) is None:
        pytest.skip(skip_message(f"{compiler} is not installed", compiler))
    return compiler


def _compile(cmd, what: str) -> None:
    r = _run(cmd)
    assert r.returncode == 0, f"{what} does not compile:\n{' '.join(map(str, cmd))}\n{r.stderr[-4000:]}"
    assert "warning" not in r.stderr, r.stderr[-4000:]


def _macro(text: str, name: str) -> str:
    m = re.search(rf"^#define {name} (.+)$", text, re.M)
    assert m, f"no macro {name}"
    return m.group(1)


# --- the cases: (symbol, table, stream, expected from outside the engine) -------


def _lab_stream(sigset, rng: random.Random, size: int) -> bytes:
    """Lab-like noise with planted signatures, case-flipped where they fold case."""
    parts, n = [], 0
    sigs = list(sigset)
    while n < size:
        kind = rng.random()
        if kind < 0.25:
            sig = rng.choice(sigs)
            piece = sig.data
            if sig.fold_case:
                piece = bytes(b ^ 0x20 if chr(b).isalpha() and rng.random() < 0.5 else b
                              for b in piece)
        elif kind < 0.6:
            piece = rng.randbytes(rng.randint(1, 40))
        else:
            piece = rng.choice((b"GET /bms/v3/points ", b"zone=3;temp=21.5;", b"relay/4 on\r\n",
                                b"\x5e\xa1\x04\x00", b"Host: 192.0.2.17\r\n"))
        parts.append(piece)
        n += len(piece)
    return b"".join(parts)


NAMES_SET = [
    {"id": 'say "hi"', "text": "hi", "label": ""},
    {"id": "C:\\dir\\", "text": "dir", "label": "ends with a backslash\\"},
    {"id": "??=trigraph??/", "text": "tri", "label": "??(??)??<??>??!??-??'"},
    {"id": "what???", "text": "what", "label": "x?y ?? z"},
    {"id": "caf\u00e9", "text": "cafe", "label": "Zone 3 at 21 \u00b0C"},
    {"id": "\u00e91abF", "text": "hexy", "label": "\u00e9\u00e9cafe"},
    {"id": "tab\there", "text": "tab", "label": "line\nbreak\r\n\x01\x7f end"},
    {"id": "*/ not a comment end /*", "text": "star", "label": "\\x41 is not A"},
    {"id": "bldg \U0001f3e2 lab", "text": "bldg", "label": "\U0001f3e2" * 3},
    # Longer than the 4095 bytes a C99 string literal is guaranteed: a char array.
    {"id": "long-label", "text": "long", "label": "\u00e9t\u00e9 " * 1000 + "end"},
]
NAMES_SOURCE = "rules/*/lab??/\n\u00e9t\u00e9.toml"  # nothing in it may break the comment


@pytest.fixture(scope="module")
def cases(tmp_path_factory):
    """Headers and streams on disk; [(symbol, table, stream, expected or None)]."""
    where = tmp_path_factory.mktemp("export-cases")
    out = []
    for i, vector in enumerate(VECTORS):
        sigset = signature_set(vector.sigs, name=vector.name)
        for layout in LAYOUTS:
            # Expected: the hand-worked list of tests/vectors.py (sources named there).
            out.append((f"v{i:02d}_{layout}", seamscan.compile(sigset, layout=layout),
                        vector.haystack, vector.expected))
    rng = random.Random(20250301)
    big = signature_set(gen_sigs.generate(300, seed=11), name="random-300")
    stream = _lab_stream(big, rng, 60_000)
    # Expected: our brute-force reference (bytes.find per signature).
    want = [(big[i].id, s, e) for i, s, e in reference_matches(big, stream)]
    assert len(want) > 1000
    for layout in LAYOUTS:
        out.append((f"rand_{layout}", seamscan.compile(big, layout=layout), stream, want))
    names = signature_set(NAMES_SET, name="names")
    out.append(("names_tbl", seamscan.compile(names, layout="compact"), b"hi dir what cafe", None))
    for symbol, table, data, _want in out:
        source = NAMES_SOURCE if symbol == "names_tbl" else f"tests/vectors.py ({symbol})"
        (where / f"{symbol}.h").write_text(c_header(table, symbol, source=source), "ascii")
        (where / f"{symbol}.bin").write_bytes(data)
    return where, out


DRIVER = r"""
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "seam.h"
@INCLUDES@

typedef struct {
    const char *symbol;
    const uint8_t *image;
    uint32_t size, crc, nsigs, max_outputs;
    const char *layout;
    const char *const *ids;
    const char *const *labels;
} export_case;

static const export_case cases[] = {
@ROWS@
};

static ss_match out[4096];

static void print_hex(const char *s)
{
    for (; *s; s++)
        printf("%02x", (unsigned)(unsigned char)*s);
}

static int run_case(unsigned k, const char *path)
{
    const export_case *c = &cases[k];
    ss_table t;
    ss_state st;
    ss_ctx ctx;
    FILE *f;
    long len;
    uint8_t *data;
    void *track;
    size_t done = 0, nout, i, used;
    int rc = ss_load(&t, c->image, c->size);

    printf("case %u %s aligned=%d load=%d size=%lu crc=%08lx loaded_layout=%lu layout=%s "
           "nsigs=%lu/%lu max_outputs=%lu/%lu\n",
           k, c->symbol, (int)(((uintptr_t)c->image % 8) == 0), rc, (unsigned long)c->size,
           (unsigned long)ss_crc32(c->image + 16, c->size - 16), (unsigned long)t.layout,
           c->layout, (unsigned long)c->nsigs, (unsigned long)t.nsigs,
           (unsigned long)c->max_outputs, (unsigned long)t.max_outputs);
    for (i = 0; i < c->nsigs; i++) {
        printf("name %u %lu id=", k, (unsigned long)i);
        print_hex(c->ids[i]);
        printf(" label=");
        print_hex(c->labels[i]);
        printf("\n");
    }
    if (rc != SS_OK || c->max_outputs > sizeof out / sizeof out[0])
        return 1;
    f = fopen(path, "rb");
    if (f == NULL || fseek(f, 0, SEEK_END) != 0 || (len = ftell(f)) < 0)
        return 2;
    rewind(f);
    data = malloc((size_t)len + 1);
    if (data == NULL || fread(data, 1, (size_t)len, f) != (size_t)len)
        return 2;
    fclose(f);
    memset(&ctx, 0, sizeof ctx);
    ss_reset(&st, 0);
    track = calloc(1, ss_track_bytes(&t) + 8u); /* the part tracker's memory, cleared */
    if (track == NULL)
        return 2;
    while (done < (size_t)len) {
        used = ss_scan_parts(&t, &st, track, &ctx, data + done, (size_t)len - done, out,
                             c->max_outputs, &nout);
        for (i = 0; i < nout; i++) {
            printf("match %u ", k);
            print_hex(c->ids[out[i].sig]);
            printf(" %llu %llu\n", (unsigned long long)out[i].start,
                   (unsigned long long)out[i].end);
        }
        if (used == 0 && nout == 0) {
            printf("stuck %u at %lu\n", k, (unsigned long)done);
            return 3;
        }
        done += used;
    }
    free(track);
    free(data);
    return 0;
}

int main(int argc, char **argv)
{
    unsigned k, n = (unsigned)(sizeof cases / sizeof cases[0]);
    if ((unsigned)argc != n + 1) {
        fprintf(stderr, "driver: %u stream files expected\n", n);
        return 2;
    }
    for (k = 0; k < n; k++)
        if (run_case(k, argv[k + 1]) != 0)
            return 1;
    printf("done %u\n", n);
    return 0;
}
"""


def _driver_source(symbols: list[str]) -> str:
    includes = "\n".join(f'#include "{s}.h"' for s in symbols)
    rows = "\n".join(
        f'    {{"{s}", {s}, {s.upper()}_SIZE, {s.upper()}_CRC32, {s.upper()}_SIGNATURES, '
        f"{s.upper()}_MAX_OUTPUTS, {s.upper()}_LAYOUT, {s}_ids, {s}_labels}},"
        for s in symbols)
    return DRIVER.replace("@INCLUDES@", includes).replace("@ROWS@", rows)


@pytest.fixture(scope="module", params=["gcc", "clang"])
def driver_output(request, cases, tmp_path_factory):
    """Build and run the driver with one compiler; its output parsed as
    {symbol: {"case": fields, "names": [(id, label)], "matches": [...]}}."""
    cc = _need(request.param)
    where, items = cases
    build = tmp_path_factory.mktemp(f"driver-{cc}")
    objects = []
    for src in RUNTIME_SOURCES:
        obj = build / f"{src.stem}.o"
        _compile([cc, *STRICT, "-O1", "-c", src, "-o", obj], f"{src.name} ({cc})")
        objects.append(obj)
    symbols = [s for s, *_ in items]
    driver = build / "driver.c"
    driver.write_text(_driver_source(symbols))
    exe = build / "driver"
    _compile([cc, *STRICT, "-O0", f"-I{CSRC}", f"-I{where}", driver, *objects, "-o", exe],
             f"the driver including {len(symbols)} headers ({cc})")
    r = _run([exe, *(where / f"{s}.bin" for s in symbols)])
    assert r.returncode == 0, f"driver ({cc}) exited {r.returncode}:\n{r.stdout[-2000:]}{r.stderr}"
    parsed = {s: {"case": None, "names": [], "matches": []} for s in symbols}
    for line in r.stdout.splitlines():
        kind, _, rest = line.partition(" ")
        if kind == "case":
            fields = rest.split()
            parsed[fields[1]]["case"] = dict(f.split("=", 1) for f in fields[2:])
        elif kind == "name":
            k, _i, id_hex, label_hex = rest.split(" ")
            parsed[symbols[int(k)]]["names"].append(
                (bytes.fromhex(id_hex[3:]).decode(), bytes.fromhex(label_hex[6:]).decode()))
        elif kind == "match":
            k, id_hex, start, end = rest.split()
            parsed[symbols[int(k)]]["matches"].append(
                (bytes.fromhex(id_hex).decode(), int(start), int(end)))
    assert r.stdout.splitlines()[-1] == f"done {len(symbols)}"
    return parsed


def test_c_scan_equals_engine(cases, driver_output):
    _where, items = cases
    for symbol, table, data, want in items:
        got = driver_output[symbol]["matches"]
        engine = [tuple(m) for m in table.scan(data)]
        assert got == engine, f"{symbol}: C through the header differs from Table.scan"
        if want is not None:
            assert got == [tuple(m) for m in want], f"{symbol}: differs from the expected list"
    assert sum(len(v["matches"]) for v in driver_output.values()) > 2000


def test_c_sees_the_macros_and_the_image(cases, driver_output):
    where, items = cases
    for symbol, table, _data, _want in items:
        fields = driver_output[symbol]["case"]
        text = (where / f"{symbol}.h").read_text()
        blob = table.to_bytes()
        up = symbol.upper()
        assert fields["aligned"] == "1", f"{symbol}: the image is not 8-byte aligned"
        assert fields["load"] == "0", symbol
        # The CRC: the image header's field, zlib's CRC-32 (an outside
        # implementation of the same IEEE 802.3 CRC) of bytes 16..size, the
        # runtime's ss_crc32 over the compiled-in bytes, and the macro.
        crc = table.header.crc
        assert crc == zlib.crc32(blob[16:]) & 0xFFFFFFFF
        assert int(fields["crc"], 16) == crc
        assert _macro(text, f"{up}_CRC32") == f"0x{crc:08x}u"
        assert fields["size"] == str(len(blob)) and _macro(text, f"{up}_SIZE") == f"{len(blob)}u"
        assert fields["nsigs"] == f"{len(table)}/{len(table)}"
        assert fields["max_outputs"] == f"{table.max_outputs}/{table.max_outputs}"
        assert fields["layout"] == table.layout
        assert int(fields["loaded_layout"]) == table.header.layout


def test_c_names_equal_python(cases, driver_output):
    _where, items = cases
    for symbol, table, _data, _want in items:
        assert driver_output[symbol]["names"] == list(zip(table.ids, table.labels, strict=True))
    names = driver_output["names_tbl"]["names"]
    assert [i for i, _ in names] == [e["id"] for e in NAMES_SET]
    assert [lb for _, lb in names] == [e["label"] for e in NAMES_SET]


# --- the header's text ----------------------------------------------------------


def _small_table(layout="compact"):
    sigset = signature_set([{"id": "relay-on", "text": "relay/4 on", "label": "relay override"},
                            {"id": "temp", "text": "temp=", "fold_case": True}])
    return seamscan.compile(sigset, layout=layout)


def test_header_text_holds_the_image_byte_for_byte():
    for layout in LAYOUTS:
        table = _small_table(layout)
        text = c_header(table, "bldg_lab", source="lab.toml")
        body = text.split("bldg_lab_image BLDG_LAB_IMAGE_ATTR = {{\n", 1)[1].split("\n}};", 1)[0]
        lines = body.splitlines()
        assert all(len(re.findall(r"0x[0-9a-f]{2}", line)) == export.BYTES_PER_LINE
                   for line in lines[:-1])
        assert 12 <= export.BYTES_PER_LINE <= 16
        assert bytes(int(x, 16) for x in re.findall(r"0x([0-9a-f]{2})", body)) == table.to_bytes()
        assert text.count("#ifndef BLDG_LAB_H\n#define BLDG_LAB_H\n") == 1
        assert text.rstrip().endswith("#endif /* BLDG_LAB_H */")
        head = text.split("*/", 1)[0]
        for part in (f"seamscan {seamscan.__version__}", "from lab.toml", "Do not edit",
                     f"Layout {layout}", f"{table.nbytes:,} bytes", f"0x{table.header.crc:08x}"):
            assert part in head, part
        assert _macro(text, "BLDG_LAB_SIGNATURES") == "2u"
        assert _macro(text, "BLDG_LAB_LAYOUT") == f'"{layout}"'
        assert _macro(text, "bldg_lab") == "(bldg_lab_image.bytes)"
        assert "#ifndef BLDG_LAB_NO_NAMES" in text


def test_c_string_escapes():
    assert c_string(b"") == '""'
    assert c_string(b'say "hi" \\') == r'"say \"hi\" \\"'
    # A hex escape takes every hex digit after it (C99 6.4.4.4): split there.
    assert c_string("é1".encode()) == r'"\xc3\xa9" "1"'
    assert c_string("éx".encode()) == r'"\xc3\xa9x"'
    # Trigraphs (C99 5.2.1.1) are replaced before escapes are read: no two raw '?'.
    assert c_string(b"??=") == r'"\?\?="'
    assert c_string(b"a?b") == '"a?b"'
    assert c_string(b"\t\n\x00") == r'"\t\n\x00"'
    long = c_string(b"x" * 200, "  ")
    assert long.count('"\n  "') == 2 and long.replace('"\n  "', "") == '"' + "x" * 200 + '"'


def test_bad_symbol_is_a_clear_error():
    with pytest.raises(ValueError, match="'int' is a C99 keyword"):
        c_header(_small_table(), "int")
    with pytest.raises(ValueError, match="not a C identifier"):
        c_header(_small_table(), "bldg-lab")


def test_valid_symbol():
    for name in ("bldg_lab", "_x1", "BLDG2", "a"):
        assert valid_symbol(name), name
    for name in ("1abc", "int", "a-b", "", "while", "_Bool", "__lab", "_Lab", "uint8_t",
                 "seam", "SEAM_INT", "ss_table", "caf\u00e9", "a b", None, 7):
        assert not valid_symbol(name), name


# --- partial use ------------------------------------------------------------------

USES = {
    "image-only": ("", "ss_table t;\n    return ss_load(&t, bldg_lab, BLDG_LAB_SIZE) != SS_OK;"),
    "names-only": ("", "return bldg_lab_ids[0][0] == bldg_lab_labels[0][0];"),
    "no-names": ("#define BLDG_LAB_NO_NAMES\n",
                 "ss_table t;\n    return ss_load(&t, bldg_lab, BLDG_LAB_SIZE) != SS_OK;"),
}


@pytest.mark.parametrize("cc", ["gcc", "clang"])
def test_partial_use_is_warning_free(cc, tmp_path):
    """The header's text pasted into the file (no header exemption from unused
    warnings applies), with only part of it used."""
    _need(cc)
    header = c_header(_small_table(), "bldg_lab")
    for name, (before, body) in USES.items():
        path = tmp_path / f"{name}.c"
        path.write_text(f'#include "seam.h"\n{before}{header}\nint main(void)\n{{\n    {body}\n}}\n')
        _compile([cc, *STRICT, *UNUSED_FLAGS[cc], f"-I{CSRC}", "-c", path, "-o", tmp_path / "x.o"],
                 f"{name} ({cc})")
    path = tmp_path / "names-gone.c"
    path.write_text(f"#define BLDG_LAB_NO_NAMES\n{header}\n"
                    "int main(void)\n{\n    return bldg_lab_ids[0][0];\n}\n")
    r = _run([cc, *STRICT, "-c", path, "-o", tmp_path / "y.o"])
    assert r.returncode != 0 and "bldg_lab_ids" in r.stderr, "BLDG_LAB_NO_NAMES left the names in"


# --- a Cortex-M4 build ---------------------------------------------------------------

DEVICE = r"""
#include "seam.h"
#include "rand_compact.h"

static ss_table table;
static ss_state state;

/* What a device does with a payload: scan it, return the last id seen. */
const char *device_scan(const uint8_t *data, size_t len);

const char *device_scan(const uint8_t *data, size_t len)
{
    ss_match out[RAND_COMPACT_MAX_OUTPUTS];
    ss_ctx ctx = {0, 0, 0, 0};
    const char *last = "";
    size_t done = 0, nout, i;
    if (table.image == NULL) {
        if (ss_load(&table, rand_compact, RAND_COMPACT_SIZE) != SS_OK)
            return "refused";
        ss_reset(&state, 0);
    }
    while (done < len) {
        done += ss_scan(&table, &state, &ctx, data + done, len - done, out,
                        RAND_COMPACT_MAX_OUTPUTS, &nout);
        for (i = 0; i < nout; i++)
            last = rand_compact_ids[out[i].sig];
    }
    return last;
}
"""


def test_cortex_m4_compiles_header_and_runtime(cases, tmp_path):
    cc = _need("arm-none-eabi-gcc")
    where, _items = cases
    for src in RUNTIME_SOURCES:
        _compile([cc, *M4_FLAGS, "-c", src, "-o", tmp_path / f"{src.stem}.o"], f"{src.name} (M4)")
    device = tmp_path / "device.c"
    device.write_text(DEVICE)
    obj = tmp_path / "device.o"
    _compile([cc, *M4_FLAGS, f"-I{CSRC}", f"-I{where}", "-c", device, "-o", obj],
             "a device file including rand_compact.h (M4)")
    size_tool = shutil.which("arm-none-eabi-size")
    if size_tool is None:
        return
    sections = {}
    for line in _run([size_tool, "-A", obj]).stdout.splitlines():
        fields = line.split()
        if len(fields) == 3 and fields[1].isdigit():
            sections[fields[0]] = int(fields[1])
    image_size = int(_macro((where / "rand_compact.h").read_text(), "RAND_COMPACT_SIZE")[:-1])
    # The image and the name tables are read-only data (flash); RAM holds only
    # the device file's own table and state (.bss).
    assert sum(v for k, v in sections.items() if k.startswith(".rodata")) >= image_size
    assert sections.get(".data", 0) == 0
