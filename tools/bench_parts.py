"""Benchmark: scan speed with byte sets, ``??`` and multi-part signatures.

    python tools/bench_parts.py [--sigs 1000] [--mb 16] [--runs 5]

Two sets over the same ``engine.sample_traffic`` bytes, side by side in one
run: the literal set of ``gen_sigs.generate`` and the same set with every
third signature rewritten (alternately): a byte in the middle of a hex
pattern made ``??``, a text pattern's digits turned into ``<30-39>``, or the
pattern cut into two parts with ``spacing = [0, 64]``.  One stream
(``Table.scan``) through the dense and compact layouts, best of ``--runs``.
Prints a markdown table for the README.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import gen_sigs  # noqa: E402
from seamscan import engine  # noqa: E402
from seamscan.signatures import signature_set  # noqa: E402


def rewrite(sig: dict, k: int) -> dict:
    """Every third signature: a wildcard, a byte set, or two parts."""
    if k % 3:
        return sig
    out = {key: v for key, v in sig.items() if key not in ("text", "hex")}
    raw = sig["text"].encode() if "text" in sig else bytes.fromhex(sig["hex"])
    kind = (k // 3) % 3
    if len(raw) < 4 or kind == 2:
        cut = max(1, len(raw) // 2)
        out["part"] = [{"hex": raw[:cut].hex(" ")},
                       {"hex": raw[cut:].hex(" ") or "00", "spacing": [0, 64]}]
    elif kind == 0:
        tokens = raw.hex(" ").split()
        tokens[len(tokens) // 2] = "??"
        out["hex"] = " ".join(tokens)
    else:
        out["hex"] = " ".join("<30-39>" if 0x30 <= b <= 0x39 else f"{b:02x}" for b in raw)
    return out


def speed(table, data, runs):
    best = float("inf")
    for _ in range(runs):
        t0 = time.perf_counter()
        table.scan(data)
        best = min(best, time.perf_counter() - t0)
    return len(data) / best / 1e6


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sigs", type=int, default=1000)
    parser.add_argument("--mb", type=float, default=16)
    parser.add_argument("--runs", type=int, default=5)
    args = parser.parse_args()
    literal = gen_sigs.generate(args.sigs, seed=1)
    mixed = [rewrite(s, k) for k, s in enumerate(literal)]
    data = engine.sample_traffic(int(args.mb * 1e6))
    print("| set | layout | states | image bytes | tracker bytes per flow side | MB/s one stream |")
    print("|---|---|---:|---:|---:|---:|")
    for name, entries in (("literals", literal), ("a third sets / ?? / parts", mixed)):
        _automaton, tables = engine.compile_layouts(signature_set(entries))
        for layout, table in tables.items():
            print(f"| {name} | {layout} | {table.states:,} | {table.nbytes:,} | "
                  f"{table.track_bytes:,} | {speed(table, data, args.runs):,.0f} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
