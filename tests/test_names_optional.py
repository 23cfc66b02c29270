"""An image without its names section is a valid image (``csrc/FORMAT.md``:
section 7 is optional; unknown section kinds are ignored).  The device
loader takes it, and so must every host path: ``Table.from_bytes``,
``seamscan inspect`` and ``seamscan scan --table``.  The CRC is zlib's
CRC-32 (the one ``FORMAT.md`` specifies)."""

from __future__ import annotations

import struct
import subprocess
import sys
import zlib
from pathlib import Path

import pytest

import seamscan
from seamscan import image
from seamscan.engine import Table

DEMO = Path(__file__).resolve().parent.parent / "pcaps_demo"


def without_names(blob: bytes) -> bytes:
    """The image with its names directory entry given an unknown kind (99),
    so that the names bytes are an ignored section, and the CRC redone."""
    out = bytearray(blob)
    (nsect,) = struct.unpack_from("<H", out, 38)
    for i in range(nsect):
        at = 64 + 12 * i
        if struct.unpack_from("<H", out, at)[0] == image.SEC_NAMES:
            struct.pack_into("<H", out, at, 99)
            break
    else:
        raise AssertionError("no names section")
    size = struct.unpack_from("<I", out, 8)[0]
    struct.pack_into("<I", out, 12, zlib.crc32(bytes(out[16:size])))
    return bytes(out)


@pytest.mark.parametrize("layout", ["dense", "compact"])
def test_an_image_without_names_loads_and_scans(layout, tmp_path):
    sigset = seamscan.load_signatures(DEMO / "demo-signatures.toml")
    table = seamscan.compile(sigset, layout=layout)
    bare = Table.from_bytes(without_names(table.to_bytes()))
    assert image.SEC_NAMES not in bare.header.sections
    assert bare.ids == [f"#{i + 1}" for i in range(len(table.ids))]
    assert bare.labels == [""] * len(table.ids)
    data = b"xx" + b"POST /hvac/v2/zones/3/setpoint HTTP/1.1" * 2
    assert [m[1:] for m in bare.scan(data)] == [m[1:] for m in table.scan(data)]

    path = tmp_path / "bare.seam"
    path.write_bytes(without_names(table.to_bytes()))
    ins = subprocess.run([sys.executable, "-m", "seamscan", "inspect", str(path)],
                         capture_output=True, text=True)
    assert ins.returncode == 0, ins.stderr
    out = subprocess.run([sys.executable, "-m", "seamscan", "scan", str(DEMO / "lab-http.pcap"),
                          "--table", str(path), "--format", "jsonl"],
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert '"sig": "#1"' in out.stdout
