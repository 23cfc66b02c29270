"""Generate random signature sets for benchmarks.

    python tools/gen_sigs.py N -o FILE.toml [--seed S] [--binary-share 0.5]

Writes N signatures of 4 to 32 bytes in our TOML format: text ones
(HTTP-ish paths, request lines, header names, words; about one in five
with ``fold_case``) and binary ones (``hex``, any of the 256 byte values,
some starting with a protocol-like magic).  About a quarter of the
signatures extend a prefix of an earlier one of the same kind, as real sets
do.  No two signatures have the same bytes.  Deterministic for a seed.
Importable: ``generate(n, seed=..., binary_share=...) -> list[dict]``.
"""

from __future__ import annotations

import argparse
import random
import sys
from pathlib import Path

MIN_LEN, MAX_LEN = 4, 32

WORDS = (
    "api v1 v2 zone room floor hvac lights relay scene door badge meter sensor "
    "status config setpoint schedule firmware update upload download login logout "
    "admin user token session health metrics alarm event log debug shell reboot "
    "reset factory backup restore telemetry gateway controller valve damper fan "
    "pump chiller boiler boost override hold auto manual occupancy lux co2 "
    "humidity temperature energy tariff demand export import cert key"
).split()
METHODS = ("GET", "POST", "PUT", "DELETE", "PATCH", "HEAD")
HEADERS = (
    "Host", "Authorization", "Content-Type", "Content-Length", "Cookie", "Set-Cookie",
    "User-Agent", "Accept", "X-Device-Id", "X-Site-Token", "X-Firmware-Rev",
    "X-Forwarded-For", "Upgrade", "Transfer-Encoding",
)
MAGICS = (b"\xd1\x5c\x0a\x7e", b"\xf7\x0a\x50\x4b", b"\x7fELF", b"PK\x03\x04", b"\x1f\x8b\x08",
          b"\x00\x00\x00\x01", b"\xff\xfe", b"\x89PNG")


def _text(rng: random.Random) -> bytes:
    kind = rng.random()
    if kind < 0.35:
        path = "/" + "/".join(rng.choice(WORDS) for _ in range(rng.randint(1, 4)))
        if rng.random() < 0.3:
            path += f"/{rng.randint(0, 999)}"
        text = path
    elif kind < 0.55:
        text = f"{rng.choice(METHODS)} /{rng.choice(WORDS)}/{rng.choice(WORDS)}"
    elif kind < 0.75:
        text = f"{rng.choice(HEADERS)}: "
        if rng.random() < 0.5:
            text += rng.choice(WORDS)
    else:
        text = rng.choice(("", "=", "_", "-", " ")).join(
            rng.choice(WORDS) for _ in range(rng.randint(1, 3)))
    return text.encode()[:MAX_LEN]


def _binary(rng: random.Random) -> bytes:
    n = rng.randint(MIN_LEN, MAX_LEN)
    if rng.random() < 0.3:
        head = rng.choice(MAGICS)
        return (head + rng.randbytes(n))[:max(n, len(head) + 1)]
    return rng.randbytes(n)


def _extend(rng: random.Random, base: bytes, text: bool) -> bytes:
    """A new signature sharing a prefix of ``base``."""
    keep = rng.randint(min(3, len(base)), len(base))
    if text:
        tail = rng.choice(("/", "-", "_", "")) + rng.choice(WORDS)
        return (base[:keep] + tail.encode())[:MAX_LEN]
    return (base[:keep] + rng.randbytes(rng.randint(1, 12)))[:MAX_LEN]


def generate(n: int, seed: int = 0, binary_share: float = 0.5) -> list[dict]:
    """``n`` random signatures as dicts in our TOML's ``[[signature]]`` shape.

    Each dict has ``id`` ("gen-000001"...), exactly one of ``text`` (str)
    or ``hex`` (space-separated byte pairs), and ``fold_case`` (bool).
    ``binary_share`` in [0, 1] is the probability of a ``hex`` signature.
    """
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    if not 0.0 <= binary_share <= 1.0:
        raise ValueError(f"binary_share must be in [0, 1], got {binary_share}")
    rng = random.Random(seed)
    seen: set[bytes] = set()
    made: dict[str, list[bytes]] = {"hex": [], "text": []}
    out = []
    while len(out) < n:
        binary = rng.random() < binary_share
        earlier = made["hex" if binary else "text"]
        if earlier and rng.random() < 0.25:
            data = _extend(rng, rng.choice(earlier), text=not binary)
        else:
            data = _binary(rng) if binary else _text(rng)
        if len(data) < MIN_LEN or data in seen:
            continue
        seen.add(data)
        earlier.append(data)
        sig = {"id": f"gen-{len(out) + 1:06d}"}
        if binary:
            sig["hex"] = data.hex(" ")
            sig["fold_case"] = False
        else:
            sig["text"] = data.decode("ascii")
            sig["fold_case"] = rng.random() < 0.2
        out.append(sig)
    return out


def _toml_string(s: str) -> str:
    """A TOML basic string (printable ASCII in, escapes for quote and backslash)."""
    return '"' + s.replace("\\", "\\\\").replace('"', '\\"') + '"'


def to_toml(signatures: list[dict], name: str, version: str = "1") -> str:
    """The TOML text of a signature set holding ``signatures``."""
    lines = ["[set]", f"name = {_toml_string(name)}", f"version = {_toml_string(version)}"]
    for sig in signatures:
        lines += ["", "[[signature]]", f"id = {_toml_string(sig['id'])}"]
        if "text" in sig:
            lines.append(f"text = {_toml_string(sig['text'])}")
        else:
            lines.append(f"hex = {_toml_string(sig['hex'])}")
        if sig.get("fold_case"):
            lines.append("fold_case = true")
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Write N random benchmark signatures (TOML).")
    parser.add_argument("n", type=int, help="number of signatures")
    parser.add_argument("-o", "--output", type=Path, required=True, help="TOML file to write")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--binary-share", type=float, default=0.5,
                        help="share of hex signatures, 0..1 (default 0.5)")
    args = parser.parse_args(argv)
    try:
        sigs = generate(args.n, seed=args.seed, binary_share=args.binary_share)
    except ValueError as exc:
        parser.error(str(exc))
    name = f"generated-{args.n}-seed{args.seed}"
    try:
        args.output.write_text(to_toml(sigs, name), encoding="ascii")
    except OSError as exc:
        raise SystemExit(f"{args.output}: cannot write: {exc.strerror}") from None
    binary = sum("hex" in s for s in sigs)
    print(f"{args.output}: {len(sigs)} signatures ({len(sigs) - binary} text, {binary} hex)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
