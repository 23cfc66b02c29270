"""Benchmark: scan speed of the dense table against two Aho–Corasick libraries.

    python tools/bench_scan.py [--sigs 1000] [--mb 64] [--seed 1] [--runs 3]

One case-sensitive signature set (``gen_sigs.generate``, mixed text and
binary, every ``fold_case`` flag cleared so that the libraries, which know
no case folding, search for the same bytes) and one list of packet-like
payloads of 60 to 1460 bytes, about ``--mb`` MB (10^6 bytes) in all:
HTTP-like requests and responses of a building-management lab (headers and
JSON bodies), binary telemetry records and random bytes (encrypted
records), with signature occurrences planted about once per 10 KB.  On
these same bytes, best of ``--runs`` each, all overlapping matches kept:

1. seamscan batch, C only: items packed beforehand as ``ss_item`` records,
   each payload its own flow side (reset at its start), 4096 slots given
   round robin as a capture replay would (``BatchScanner.scan_packed``);
2. seamscan ``Table.scan_batch(payloads)``, Python packing included;
3. seamscan one stream: ``Table.scan`` over all payloads joined (joined
   beforehand);
4. pyahocorasick: ``Automaton`` over the patterns as latin-1 ``str``,
   ``iter()`` over each payload decoded latin-1 (decoded beforehand);
5. ahocorasick-rs: ``BytesAhoCorasick`` (its default automaton choice, and
   again forced to its DFA), ``find_matches_as_indexes(p, overlapping=True)``
   on each payload.

Every method's matches become (payload, signature, start, end) tuples, and
the lists must be identical (the one-stream scan's matches that straddle
two payloads are counted apart).  A difference is printed and the exit
status is 1: it is a bug to report, never to hide.  Prints a markdown table
ready for the README.  Target: the dense scan at 600 MB/s or more.
"""

from __future__ import annotations

import argparse
import bisect
import json
import random
import struct
import sys

import gen_sigs
from bench_compile import best_of, machine

MB = 1_000_000
TARGET_MBPS = 600
SLOTS = 4096
PLANT_EVERY = 16_000  # bytes per planted occurrence: about one match per 10 KB in all
MIN_PAYLOAD, MAX_PAYLOAD = 60, 1460

# Building-lab vocabulary for the HTTP-like payloads.
POINTS = ("ahu-1.sat", "ahu-2.rat", "ahu-2.oat", "vav-3-14.dmp", "vav-3-15.flow", "chw-p1.kw",
          "blr-1.hwst", "lgt-4n.lvl", "iaq-2s.ppm", "iaq-2s.rh", "elv-b.pos", "dr-114.lk")
UNITS = ("degC", "pct", "ppm", "kW", "lps", "lx")
QUALITY = ("ok", "stale", "ovr", "fault")
PATHS = ("/bms/v3/points", "/bms/v3/trends", "/bms/v3/alm/active", "/bms/v3/sched/wk",
         "/bms/v3/devices", "/ota/pkg/manifest", "/edge/q/batch", "/edge/q/ack")
METHODS = ("GET", "GET", "GET", "POST", "PUT")
AGENTS = ("bldg-edge/2.4.1", "trend-puller/0.9", "bms-panel/7.2 (lab)", "ota-client/1.3")
TELEMETRY_MAGIC = b"\x5e\xa1"  # our own lab telemetry record marker (invented)
TELEMETRY_RECORD = struct.Struct("<HHd")  # point id, quality flags, value
TLS_APPDATA = b"\x17\x03\x03"  # TLS 1.2/1.3 application-data record header (RFC 8446 §5.1)


def bench_signatures(n: int, seed: int) -> tuple[list[dict], int]:
    """The generated set with every ``fold_case`` cleared, and how many were set."""
    sigs = gen_sigs.generate(n, seed=seed)
    folded = sum(bool(s.get("fold_case")) for s in sigs)
    return [dict(s, fold_case=False) for s in sigs], folded


def pattern_bytes(sig: dict) -> bytes:
    return sig["text"].encode() if "text" in sig else bytes.fromhex(sig["hex"])


def _json_pool(rng: random.Random, k: int = 4000) -> list[str]:
    return [json.dumps({"pt": rng.choice(POINTS), "v": round(rng.uniform(-20, 900), 2),
                        "u": rng.choice(UNITS), "q": rng.choice(QUALITY),
                        "ts": 1_733_000_000 + rng.randrange(10**6)}, separators=(",", ":"))
            for _ in range(k)]


def _body(rng: random.Random, pool: list[str], size: int) -> str:
    parts, got = [], 0
    while got < size:
        item = rng.choice(pool)
        parts.append(item)
        got += len(item) + 1
    return "[" + ",".join(parts) + "]"


def _request(rng: random.Random, pool: list[str]) -> bytes:
    method, path = rng.choice(METHODS), rng.choice(PATHS)
    head = (f"{method} {path}?site=lab{rng.randint(1, 4)}&page={rng.randint(0, 99)} HTTP/1.1\r\n"
            f"host: 192.0.2.{rng.randint(10, 60)}:8443\r\nuser-agent: {rng.choice(AGENTS)}\r\n"
            f"accept: application/json\r\nx-lab-seq: {rng.randrange(10**9)}\r\n")
    if method == "GET":
        return (head + "\r\n").encode()
    body = _body(rng, pool, rng.randint(40, 900))
    return (head + f"content-type: application/json\r\ncontent-length: {len(body)}\r\n\r\n"
            + body).encode()


def _response(rng: random.Random, pool: list[str]) -> bytes:
    size = MAX_PAYLOAD if rng.random() < 0.5 else rng.randint(MIN_PAYLOAD, MAX_PAYLOAD)
    status = rng.choice(("200 OK", "200 OK", "200 OK", "304 Not Modified", "404 Not Found"))
    head = (f"HTTP/1.1 {status}\r\ncontent-type: application/json\r\ncache-control: no-store\r\n"
            f"x-lab-seq: {rng.randrange(10**9)}\r\n\r\n")
    return (head + _body(rng, pool, size - len(head))).encode()


def _telemetry(rng: random.Random) -> bytes:
    count = rng.randint(4, 32)
    head = TELEMETRY_MAGIC + struct.pack("<HI", count, rng.randrange(2**32))
    rec = TELEMETRY_RECORD.pack
    return head + b"".join(rec(rng.randrange(512), rng.randrange(4), rng.uniform(-40, 1200))
                           for _ in range(count))


def _encrypted(rng: random.Random) -> bytes:
    size = MAX_PAYLOAD if rng.random() < 0.7 else rng.randint(MIN_PAYLOAD, MAX_PAYLOAD)
    return TLS_APPDATA + struct.pack(">H", size - 5) + rng.randbytes(size - 5)


def _fit(data: bytes, rng: random.Random) -> bytes:
    """Cut to at most one full segment; pad short ones with random bytes."""
    if len(data) < MIN_PAYLOAD:
        data += rng.randbytes(MIN_PAYLOAD - len(data))
    return data[:MAX_PAYLOAD]


def make_payloads(total: int, patterns: list[bytes], seed: int) -> tuple[list[bytes], int]:
    """Payloads adding up to about ``total`` bytes, and the number of planted
    signature occurrences (one per ``PLANT_EVERY`` bytes, at random places)."""
    rng = random.Random(seed)
    pool = _json_pool(rng)
    makers = (lambda: _request(rng, pool), lambda: _response(rng, pool),
              lambda: _telemetry(rng), lambda: _encrypted(rng))
    weights = (30, 25, 25, 20)  # by count
    payloads: list[bytes] = []
    got = 0
    while got < total:
        maker = rng.choices(makers, weights)[0]
        data = _fit(maker(), rng)
        payloads.append(data)
        got += len(data)
    planted = 0
    for _ in range(got // PLANT_EVERY):
        j = rng.randrange(len(payloads))
        sig = rng.choice(patterns)
        p = payloads[j]
        pos = rng.randint(0, len(p) - len(sig))
        payloads[j] = p[:pos] + sig + p[pos + len(sig):]
        planted += 1
    return payloads, planted


# ---- the five scanners: each returns sorted (payload, sig index, start, end) ----

def seam_packed(table, payloads):
    """Method 1: (setup, run) over pre-packed ``ss_item`` records."""
    from seamscan import engine
    template = bytearray(engine.ITEM.size * len(payloads))
    off = 0
    for i, p in enumerate(payloads):
        engine.ITEM.pack_into(template, i * engine.ITEM.size, i % SLOTS, engine.ITEM_RESET,
                              0, 0, 0, 0, len(p), 0, off, 0)
        off += len(p)
    data = b"".join(payloads)
    scanner = engine.BatchScanner(table, SLOTS)
    n = len(payloads)

    def setup():  # ss_scan_batch keeps progress in the items: a fresh copy per run
        return bytearray(template)

    def run(packed):
        return scanner.scan_packed(packed, n, data)
    return setup, run


def seam_batch(table, payloads):
    """Method 2: ``Table.scan_batch`` as a user calls it (packing included)."""
    return lambda: table.scan_batch(payloads)


def seam_stream(table, joined):
    """Method 3: every payload back to back as one stream."""
    return lambda: table.scan(joined)


def pyahocorasick_run(patterns, payloads):
    """Method 4: pyahocorasick's ``iter`` (every overlapping match) on latin-1
    text, whose character offsets are the byte offsets."""
    import ahocorasick
    automaton = ahocorasick.Automaton()
    for i, p in enumerate(patterns):
        automaton.add_word(p.decode("latin-1"), (i, len(p)))
    automaton.make_automaton()
    texts = [p.decode("latin-1") for p in payloads]

    def run():
        found = []
        it = automaton.iter
        for j, text in enumerate(texts):
            for end, (sig, n) in it(text):
                found.append((j, sig, end - n + 1, end + 1))
        return found
    return run


def ahocorasick_rs_run(patterns, payloads, dfa: bool):
    """Method 5: ahocorasick-rs, its standard match kind, overlapping matches."""
    import ahocorasick_rs
    kwargs = {"implementation": ahocorasick_rs.Implementation.DFA} if dfa else {}
    automaton = ahocorasick_rs.BytesAhoCorasick(patterns, **kwargs)

    def run():
        found = []
        find = automaton.find_matches_as_indexes
        for j, p in enumerate(payloads):
            for sig, start, end in find(p, overlapping=True):
                found.append((j, sig, start, end))
        return found
    return run


def _split_stream(matches, index, starts) -> tuple[list, int]:
    """One-stream matches as per-payload tuples, and how many straddle payloads."""
    inside, straddle = [], 0
    for m in matches:
        j = bisect.bisect_right(starts, m.start) - 1
        if m.end <= starts[j + 1]:
            inside.append((j, index[m.sig], m.start - starts[j], m.end - starts[j]))
        else:
            straddle += 1
    return inside, straddle


def _differences(name, got, want, limit=5) -> list[str]:
    """Lines saying how ``got`` differs from the reference ``want``."""
    g, w = set(got), set(want)
    lines = [f"MISMATCH {name}: {len(got):,} matches vs {len(want):,} for ahocorasick-rs; "
             f"{len(g - w):,} only here, {len(w - g):,} missing (payload, sig, start, end)"]
    lines += [f"  only in {name}: {m}" for m in sorted(g - w)[:limit]]
    lines += [f"  missing from {name}: {m}" for m in sorted(w - g)[:limit]]
    if len(got) != len(g):
        lines.append(f"  {name} reports {len(got) - len(g):,} duplicate matches")
    return lines


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Compare scan speeds on packet-like payloads.")
    parser.add_argument("--sigs", type=int, default=1000, help="signatures (default 1000)")
    parser.add_argument("--mb", type=float, default=64, help="payload MB, 10^6 bytes (default 64)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--runs", type=int, default=3, help="repeats; the best is kept (default 3)")
    args = parser.parse_args(argv)
    if args.sigs < 1 or args.runs < 1 or args.mb <= 0:
        parser.error("--sigs and --runs must be at least 1 and --mb above 0")
    try:
        import seamscan
        import seamscan.engine  # noqa: F401  (the C extension must be built)
    except ImportError as exc:
        print(f"bench_scan: seamscan is not importable ({exc}); build it first", file=sys.stderr)
        return 2

    def say(text):
        print(text, file=sys.stderr, flush=True)

    sigs, folded = bench_signatures(args.sigs, args.seed)
    patterns = [pattern_bytes(s) for s in sigs]
    table = seamscan.compile(seamscan.signature_set(sigs))
    index = {sig_id: i for i, sig_id in enumerate(table.ids)}
    if [index[s["id"]] for s in sigs] != list(range(len(sigs))):
        print("bench_scan: the table does not keep the set's signature order", file=sys.stderr)
        return 1
    say(f"{table!r}; making {args.mb:g} MB of payloads ...")
    payloads, planted = make_payloads(int(args.mb * MB), patterns, args.seed)
    joined = b"".join(payloads)
    total = len(joined)
    starts = [0]
    for p in payloads:
        starts.append(starts[-1] + len(p))

    rows = []  # (number, label, seconds, per-payload tuples, note)

    def measure(number, label, fn, setup=None, convert=None):
        """Time ``fn``; ``convert`` turns its result into (tuples, note)."""
        say(f"timing {label} ...")
        seconds, result = best_of(args.runs, fn, setup=setup)
        found, note = convert(result) if convert else (result, "")
        rows.append((number, label, seconds, sorted(found), note))

    def from_stream(result):
        inside, straddle = _split_stream(result, index, starts)
        return inside, (f"+ {straddle:,} across payloads" if straddle else "")

    setup, run = seam_packed(table, payloads)
    measure("1", f"seamscan batch, C only ({SLOTS} slots round robin)", run, setup=setup,
            convert=lambda r: (r, ""))
    measure("2", "seamscan `scan_batch` (Python packing)", seam_batch(table, payloads),
            convert=lambda r: ([(j, index[m.sig], m.start, m.end)
                                for j, ms in enumerate(r) for m in ms], ""))
    measure("3", "seamscan one stream (`scan`)", seam_stream(table, joined), convert=from_stream)
    measure("4", "pyahocorasick (latin-1 str, `iter`)", pyahocorasick_run(patterns, payloads))
    measure("5", "ahocorasick-rs (default automaton, overlapping)",
            ahocorasick_rs_run(patterns, payloads, dfa=False))
    measure("5b", "ahocorasick-rs (DFA, overlapping)",
            ahocorasick_rs_run(patterns, payloads, dfa=True))

    # The reference lies outside the project: ahocorasick-rs (registry package, the
    # Rust aho-corasick crate) with its default automaton; pyahocorasick (another
    # registry package) and the forced DFA must agree with it as well.
    want = rows[-2][3]
    problems = []
    for _k, label, _s, found, _n in rows:
        if found != want:
            problems += _differences(label, found, want)

    command = f"python tools/bench_scan.py --sigs {args.sigs} --mb {args.mb:g} --seed {args.seed}"
    if args.runs != 3:
        command += f" --runs {args.runs}"
    text = sum("text" in s for s in sigs)
    lines = [
        f"Machine: {machine()}",
        f"Command: `{command}` (best of {args.runs}; MB = 10^6 bytes; wall clock)",
        f"Signatures: {len(sigs):,} ({text:,} text, {len(sigs) - text:,} binary, "
        f"4-32 bytes; {folded:,} fold_case flags cleared), table: {table.states:,} states, "
        f"{table.classes} classes, {table.nbytes:,} bytes",
        f"Payloads: {len(payloads):,}, {total:,} bytes (mean {total / len(payloads):.0f} B); "
        f"{planted:,} planted occurrences; {len(want):,} matches in all "
        f"(one per {total / max(1, len(want)) / 1000:.1f} KB)",
        "",
        "| # | scanner | MB/s | seconds | matches | agrees |",
        "| ---: | --- | ---: | ---: | ---: | --- |",
    ]
    for number, label, seconds, found, note in rows:
        agree = "yes" if found == want else "**NO**"
        count = f"{len(found):,}" + (f" {note}" if note else "")
        lines.append(f"| {number} | {label} | {total / seconds / MB:,.0f} | {seconds:.3f} "
                     f"| {count} | {agree} |")
    dense = total / rows[0][2] / MB
    lines += ["", f"Target: dense batch scan >= {TARGET_MBPS} MB/s: "
                  f"{'met' if dense >= TARGET_MBPS else 'NOT met'} ({dense:,.0f} MB/s)."]
    lines += [""] + problems if problems else ["Match lists: identical across all scanners."]
    print("\n".join(lines))
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
