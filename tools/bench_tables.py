"""Benchmark: what each layout's table takes, beside pyahocorasick, and how fast it scans.

    python tools/bench_tables.py [--sigs 1000] [--seed 1] [--mb 16] [--runs 3]

Two signature sets of ``--sigs`` literals of 4-32 bytes from
``gen_sigs.generate(sigs, seed=seed)`` (mixed text and binary): once with
every ``fold_case`` flag cleared (``bench_scan.bench_signatures``: the
bytes pyahocorasick searches for too) and once with the flags kept (about
one text signature in five folds case).  For each set and for the ``dense``
and ``compact`` layouts:

* image bytes, and automaton bytes: the image minus its signature records,
  ports and names sections (each with the padding after it), so header,
  directory, classes, transitions and outputs are counted;
* states, automaton bytes per state, byte classes;
* host scan speed on about ``--mb`` MB (10^6 bytes) of packet-like payloads
  (``bench_scan.make_payloads``), best of ``--runs``: one stream
  (``Table.scan`` over the payloads joined) and batch (``ss_scan_batch``
  through ``engine.BatchScanner``, items packed beforehand, each payload its
  own flow side: ``bench_scan.seam_packed``);
* compact only: steps per byte (states visited, ``compact.CompactModel``;
  the layout's bound is 2) on 200 KB each of: the payloads' start, random
  signature first bytes (each byte one level deep, the next mostly leaving
  through a failure link), and signature prefixes each broken off by a
  wrong last byte (deep walks ending in failure chains).

pyahocorasick's own figures for the case-sensitive patterns (latin-1
``str`` keys, integer values: ``Automaton(STORE_INTS)``, its
``get_stats()``: ``nodes_count``, ``total_size``) stand beside them; it has
no case folding, so the second set has no such row.

Both layouts must report identical matches (one stream and batch alike);
a difference is printed and the exit status is 1.  Prints a markdown table
ready for the README.  Targets: compact at most 4 automaton bytes per
state, outputs included; compact one-stream scan at 200 MB/s or more.
"""

from __future__ import annotations

import argparse
import random
import sys

import gen_sigs
from bench_compile import best_of, machine
from bench_scan import bench_signatures, make_payloads, pattern_bytes, seam_packed

MB = 1_000_000
LAYOUTS = ("dense", "compact")
TARGET_BYTES_PER_STATE = 4.0
TARGET_COMPACT_MBPS = 200
STEP_BYTES = 200_000


def automaton_bytes(table) -> int:
    """Image bytes less the signature records, ports and names sections."""
    from seamscan import image
    sections = table.header.sections
    drop = 0
    for kind in (image.SEC_SIGS, image.SEC_PORTS, image.SEC_NAMES):
        if kind in sections:
            size = sections[kind][1]
            drop += size + (-size % image.ALIGN)
    return table.nbytes - drop


def pyahocorasick_stats(patterns: list[bytes]) -> dict | None:
    """pyahocorasick's ``get_stats()`` for the patterns, or None if it is missing."""
    try:
        import ahocorasick
    except ImportError:
        return None
    automaton = ahocorasick.Automaton(ahocorasick.STORE_INTS)
    for i, p in enumerate(patterns):
        automaton.add_word(p.decode("latin-1"), i)
    automaton.make_automaton()
    return automaton.get_stats()


def broken_prefixes(patterns: list[bytes], size: int, seed: int) -> bytes:
    """Pieces of a signature's prefix (all but its last byte) followed by a
    byte other than its last: deep walks that end in failure chains."""
    rng = random.Random(seed)
    out = bytearray()
    while len(out) < size:
        p = rng.choice(patterns)
        wrong = rng.randrange(255)
        out += p[:-1] + bytes((wrong if wrong < p[-1] else wrong + 1,))
    return bytes(out[:size])


def first_bytes(patterns: list[bytes], size: int, seed: int) -> bytes:
    """Random signature first bytes: each byte enters a state one level deep,
    and the next one mostly leaves it through its failure link (two steps)."""
    rng = random.Random(seed)
    alphabet = sorted({p[0] for p in patterns})
    return bytes(rng.choice(alphabet) for _ in range(size))


def steps_per_byte(table, data: bytes) -> float:
    from seamscan.compact import CompactModel
    model = CompactModel(table.to_bytes())
    model.scan(data)
    return model.steps / len(data)


def measure_set(label, sigs, payloads, joined, runs, say) -> tuple[list[dict], list[str]]:
    """Rows for one signature set (one per layout) and any disagreement found."""
    import seamscan
    sigset = seamscan.signature_set(sigs, name=label)
    patterns = [pattern_bytes(s) for s in sigs]
    hostile = (first_bytes(patterns, STEP_BYTES, seed=len(patterns)),
               broken_prefixes(patterns, STEP_BYTES, seed=len(patterns)))
    rows, results = [], {}
    for layout in LAYOUTS:
        say(f"{label}: compiling {layout} ...")
        table = seamscan.compile(sigset, layout=layout)
        say(f"{label}: timing {layout} one stream and batch ...")
        one_s, one = best_of(runs, lambda t=table: t.scan(joined))
        setup, run = seam_packed(table, payloads)
        batch_s, batch = best_of(runs, run, setup=setup)
        results[layout] = ([tuple(m) for m in one], sorted(batch))
        row = {"set": label, "layout": layout, "image": table.nbytes,
               "automaton": automaton_bytes(table), "states": table.states,
               "classes": table.classes, "one": len(joined) / one_s / MB,
               "batch": len(joined) / batch_s / MB, "matches": len(one)}
        if layout == "compact":
            say(f"{label}: counting compact steps on 3 x {STEP_BYTES:,} bytes ...")
            row["steps"] = tuple(steps_per_byte(table, data)
                                 for data in (joined[:STEP_BYTES], *hostile))
        rows.append(row)
    problems = []
    first = results[LAYOUTS[0]]
    for layout in LAYOUTS[1:]:
        for k, what in enumerate(("one-stream", "batch")):
            if results[layout][k] != first[k]:
                problems.append(f"MISMATCH {label}: {layout} {what} scan reports "
                                f"{len(results[layout][k]):,} matches, {LAYOUTS[0]} "
                                f"{len(first[k]):,}")
    return rows, problems


def _table_lines(rows: list[dict]) -> list[str]:
    lines = [
        "| set | layout | image bytes | automaton bytes | states | bytes/state | classes "
        "| one stream MB/s | batch MB/s | steps/byte: payloads / first bytes / broken prefixes |",
        "| --- | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        if r["layout"] == "pyahocorasick":
            lines.append(f"| {r['set']} | pyahocorasick (its `get_stats`) | - "
                         f"| {r['automaton']:,} (`total_size`) | {r['states']:,} nodes "
                         f"| {r['automaton'] / r['states']:.1f} per node | - | - | - | - |")
            continue
        steps = "/".join(f"{s:.2f}" for s in r["steps"]) if "steps" in r else "1 (one lookup)"
        lines.append(f"| {r['set']} | {r['layout']} | {r['image']:,} | {r['automaton']:,} "
                     f"| {r['states']:,} | {r['automaton'] / r['states']:.2f} | {r['classes']} "
                     f"| {r['one']:,.0f} | {r['batch']:,.0f} | {steps} |")
    return lines


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Table sizes per layout, and scan speed.")
    parser.add_argument("--sigs", type=int, default=1000, help="signatures (default 1000)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--mb", type=float, default=16, help="payload MB, 10^6 bytes (default 16)")
    parser.add_argument("--runs", type=int, default=3, help="repeats; the best is kept (default 3)")
    args = parser.parse_args(argv)
    if args.sigs < 1 or args.runs < 1 or args.mb <= 0:
        parser.error("--sigs and --runs must be at least 1 and --mb above 0")
    try:
        import seamscan.engine  # noqa: F401  (the C extension must be built)
    except ImportError as exc:
        print(f"bench_tables: seamscan is not importable ({exc}); build it first", file=sys.stderr)
        return 2

    def say(text):
        print(text, file=sys.stderr, flush=True)

    plain, folded = bench_signatures(args.sigs, args.seed)
    kept = gen_sigs.generate(args.sigs, seed=args.seed)
    patterns = [pattern_bytes(s) for s in plain]
    say(f"making {args.mb:g} MB of payloads ...")
    payloads, planted = make_payloads(int(args.mb * MB), patterns, args.seed)
    joined = b"".join(payloads)

    rows, problems = measure_set("case-sensitive", plain, payloads, joined, args.runs, say)
    stats = pyahocorasick_stats(patterns)
    if stats is not None:
        rows.append({"set": "case-sensitive", "layout": "pyahocorasick",
                     "automaton": stats["total_size"], "states": stats["nodes_count"]})
    more, problems2 = measure_set("fold_case kept", kept, payloads, joined, args.runs, say)
    rows += more
    problems += problems2

    command = f"python tools/bench_tables.py --sigs {args.sigs} --seed {args.seed}"
    if args.mb != 16:
        command += f" --mb {args.mb:g}"
    if args.runs != 3:
        command += f" --runs {args.runs}"
    text = sum("text" in s for s in plain)
    lines = [
        f"Machine: {machine()}",
        f"Command: `{command}` (best of {args.runs}; MB = 10^6 bytes; wall clock)",
        f"Signatures: {len(plain):,} literals of 4-32 bytes ({text:,} text, "
        f"{len(plain) - text:,} binary; `gen_sigs.generate({args.sigs}, seed={args.seed})`): "
        f"\"case-sensitive\" has every fold_case flag cleared, \"fold_case kept\" keeps the "
        f"{folded:,} set ones.",
        f"Payloads: {len(payloads):,}, {len(joined):,} bytes, {planted:,} planted occurrences "
        f"({rows[0]['matches']:,} matches on one stream, case-sensitive).",
        "Automaton bytes: the image less its signature records, ports and names sections.",
        "",
    ]
    lines += _table_lines(rows)
    lines.append("")
    if stats is not None:
        same = stats["nodes_count"] == rows[0]["states"]
        lines.append(f"States against pyahocorasick's trie nodes (case-sensitive): "
                     f"{rows[0]['states']:,} vs {stats['nodes_count']:,}"
                     + (": equal, the Aho-Corasick automaton." if same else ": DIFFERENT."))
    for r in rows:
        if r["layout"] != "compact":
            continue
        per_state = r["automaton"] / r["states"]
        lines.append(f"Target, {r['set']}: compact <= {TARGET_BYTES_PER_STATE:g} bytes per state "
                     f"(outputs included): {'met' if per_state <= TARGET_BYTES_PER_STATE else 'NOT met'}"
                     f" ({per_state:.2f}); compact >= {TARGET_COMPACT_MBPS} MB/s one stream: "
                     f"{'met' if r['one'] >= TARGET_COMPACT_MBPS else 'NOT met'} "
                     f"({r['one']:,.0f} MB/s; batch {r['batch']:,.0f} MB/s).")
    lines += [""] + problems if problems else ["Match lists: identical for both layouts."]
    print("\n".join(lines))
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
