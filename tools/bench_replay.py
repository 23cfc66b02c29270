"""Benchmark: replaying a capture, stage by stage, against plain dpkt iteration.

    python tools/bench_replay.py [--packets 200000] [--flows 4000] [--sigs 1000]
                                 [--keep DIR] [--seed 1] [--runs 3] [--profile N]

Builds, in a temporary directory (or ``--keep DIR``, left in place):

* a signature set of ``--sigs`` signatures from ``gen_sigs.generate``.  The
  benchmark's background text (HTTP-ish header lines and JSON) contains
  some generated words and header names ("Host: ", "/api", ...); those few
  signatures would fire a dozen times per packet, so signatures found in a
  signature-free sample of the background are passed over and the next
  generated ones taken instead.  The unfiltered first ``--sigs`` signatures
  are kept too (``sigs-unfiltered.toml``) and replayed once for comparison;
* a capture from ``make_bench_capture.py`` with the filtered set planted.

Then times, on the same capture, in ``--runs`` interleaved rounds (each
round runs every stage once; the best round counts):

1. dpkt alone iterating the records (``dpkt.pcap.Reader``, touching ts, buf);
2. our capture reader alone (``seamscan.capture.open_capture``);
3. reader + ``Decoder.decode``;
4. reader + decode + ``FlowTracker`` with a sink that does nothing;
5. ``replay_file`` with the compiled table (records made, not written), and
   the CLI end to end, JSONL to /dev/null (start-up and compile included);

and prints a markdown table ready for the README: CPU seconds (user +
system, of the CLI's process for the CLI: the machine is shared, and CPU
time is what one core spends) and wall seconds, then from the CPU time
µs/packet, packets/s, payload MB/s (payload = the stream bytes the scanner
is given, each byte once) and the ratio to stage 1; with the targets of the
issue: at least 150,000 packets/s on one core and at most 2x the dpkt
iteration.

The match count is checked against an independent count: dpkt decodes the
capture, each flow side's stream is rebuilt from its segments (first copy
of a sequence number wins) and pyahocorasick counts every occurrence, one
automaton for the case-sensitive signatures, one for the ``fold_case``
ones over the ASCII-lowered stream, each UDP datagram on its own (the
default datagram scope; generated signatures carry no side, transport,
port or window limits).  The exit status is 1 if the counts differ.  The
number of signatures ``make_bench_capture`` planted is printed beside it:
the count is rather higher, as a planted signature that extends another
one's whole pattern fires both.

``--profile N`` adds a cProfile of one ``replay_file`` run: its top N
functions by own time.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import importlib.util
import io
import json
import os
import pstats
import re
import resource
import shlex
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
if importlib.util.find_spec("seamscan") is None:  # not installed: use this checkout's
    sys.path.insert(0, str(HERE.parent / "src"))
try:
    import ahocorasick
    import dpkt

    import gen_sigs
    import seamscan
    from seamscan import engine
    from seamscan.capture import CaptureError, open_capture
    from seamscan.decode import Decoder
    from seamscan.flows import FlowTracker
    from seamscan.replay import ReplayOptions, replay_file
    from seamscan.signatures import SignatureError, load_signatures
except ImportError as err:  # dpkt and pyahocorasick come with the test extras
    raise SystemExit(f"bench_replay: cannot import {err.name}: {err}") from None

TARGET_PPS = 150_000
TARGET_RATIO = 2.0
SAMPLE_PACKETS, SAMPLE_FLOWS = 20_000, 400
_TCP_SYN = 0x02
_U32 = 1 << 32


def machine() -> str:
    """The CPU model from ``lscpu`` (else "unknown CPU"), core count and Python."""
    model = "unknown CPU"
    try:
        out = subprocess.run(["lscpu"], capture_output=True, text=True, timeout=10).stdout
        fields = dict(line.split(":", 1) for line in out.splitlines() if ":" in line)
        model = fields.get("Model name", model).strip()
    except (OSError, subprocess.SubprocessError):
        pass
    return f"{model}, {os.cpu_count()} cores, Python {sys.version.split()[0]}"


# -- inputs -------------------------------------------------------------------

def _toml(sigs: list[dict], name: str) -> str:
    """The TOML text of a set of ``gen_sigs`` signature dicts.  The patterns are
    printable ASCII, where a JSON string is also a TOML basic string."""
    lines = ["[set]", f"name = {json.dumps(name)}", 'version = "1"']
    for sig in sigs:
        kind = "text" if "text" in sig else "hex"
        lines += ["", "[[signature]]", f"id = {json.dumps(sig['id'])}",
                  f"{kind} = {json.dumps(sig[kind])}"]
        if sig.get("fold_case"):
            lines.append("fold_case = true")
    return "\n".join(lines) + "\n"


def _key(sig: dict) -> tuple[bool, str]:
    """(fold_case, the pattern as the hex text PatternCounter searches for)."""
    data = sig["text"].encode() if "text" in sig else bytes.fromhex(sig["hex"])
    fold = bool(sig.get("fold_case"))
    return fold, (data.lower() if fold else data).hex()


def _make_capture(out: Path, packets: int, flows: int, seed: int, sigs: Path | None) -> str:
    """Run make_bench_capture.py; its one-line report (SystemExit on failure)."""
    cmd = [sys.executable, str(HERE / "make_bench_capture.py"), str(out), "--packets",
           str(packets), "--flows", str(flows), "--seed", str(seed)]
    if sigs is not None:
        cmd += ["--sigs", str(sigs)]
    run = subprocess.run(cmd, capture_output=True, text=True)
    if run.returncode:
        raise SystemExit(f"make_bench_capture.py failed ({run.returncode}): "
                         f"{run.stderr.strip() or run.stdout.strip()}")
    return run.stdout.strip()


class PatternCounter:
    """Every occurrence of a set's patterns, found with pyahocorasick.

    One automaton holds the case-sensitive patterns, one the ``fold_case``
    ones, run over the data lowered by ``bytes.lower`` (which folds A-Z only,
    as ``fold_case`` does).  Patterns and data go in as hex text: the
    automata's nodes then have at most 16 children (faster than 256 for
    binary patterns), and an occurrence counts only where it starts on a
    byte boundary, i.e. ends at an odd hex position.  Each key's value is
    ``((fold_case, key), signatures with that key)``.
    """

    def __init__(self, sigs: list[dict]):
        weights: dict[tuple[bool, str], int] = {}
        for sig in sigs:
            key = _key(sig)
            weights[key] = weights.get(key, 0) + 1
        self._automata = []
        for fold in (False, True):
            words = {k: w for k, w in weights.items() if k[0] == fold}
            if words:
                a = ahocorasick.Automaton()
                for key, weight in words.items():
                    a.add_word(key[1], (key, weight))
                a.make_automaton()
                self._automata.append((fold, a))

    def occurrences(self, data: bytes):
        """``((fold_case, key), weight)`` per occurrence in ``data``."""
        for fold, a in self._automata:
            text = (data.lower() if fold else data).hex()
            for end, value in a.iter(text):
                if end & 1:
                    yield value

    def count(self, data: bytes) -> int:
        """Signature occurrences in ``data``."""
        return sum(weight for _key, weight in self.occurrences(data))


def choose_signatures(n: int, seed: int, work: Path) -> tuple[list[dict], list[dict], list[str]]:
    """(filtered, unfiltered, ids of the unfiltered ones passed over).  The
    unfiltered set is the first ``n`` of ``gen_sigs.generate``; the filtered
    one its first ``n`` that do not occur in a signature-free sample of the
    benchmark's background traffic (the same generator seed: the same text)."""
    pool = gen_sigs.generate(2 * n + 100, seed=seed)
    sample = work / "background-sample.pcap"
    _make_capture(sample, SAMPLE_PACKETS, SAMPLE_FLOWS, seed, None)
    found = {key for key, _ in PatternCounter(pool).occurrences(sample.read_bytes())}
    sample.unlink()
    quiet = [sig for sig in pool if _key(sig) not in found][:n]
    if len(quiet) < n:
        raise SystemExit(f"only {len(quiet)} of {len(pool)} generated signatures are absent "
                         "from the background sample")
    return quiet, pool[:n], [sig["id"] for sig in pool[:n] if _key(sig) in found]


def independent_count(capture: Path, counter: PatternCounter) -> int:
    """Signature occurrences in the capture's streams, without seamscan.

    dpkt decodes each frame; a TCP side's stream offset is the sequence
    number less its SYN's + 1 (else less its first data segment's), the
    first segment at an offset wins and later copies are dropped; a run of
    contiguous bytes is searched as a whole (matches never span a hole).
    Each UDP datagram is searched on its own.
    """
    found = 0
    segments: dict[tuple, dict[int, bytes]] = defaultdict(dict)
    bases: dict[tuple, int] = {}
    with open(capture, "rb") as f:
        for _ts, buf in dpkt.pcap.Reader(f):
            ip = dpkt.ethernet.Ethernet(buf).data
            l4 = getattr(ip, "data", None)
            if isinstance(l4, dpkt.tcp.TCP):
                side = (ip.src, l4.sport, ip.dst, l4.dport)
                if l4.flags & _TCP_SYN:
                    bases[side] = (l4.seq + 1) % _U32
                elif l4.data:
                    base = bases.setdefault(side, l4.seq)
                    segments[side].setdefault((l4.seq - base) % _U32, bytes(l4.data))
            elif isinstance(l4, dpkt.udp.UDP) and l4.data:
                found += counter.count(bytes(l4.data))
    for segs in segments.values():
        run: list[bytes] = []
        end = 0
        for off in sorted(segs):
            data = segs[off]
            if off > end:
                found += counter.count(b"".join(run))
                run, end = [], off
            if off + len(data) > end:
                run.append(data[end - off:])
                end = off + len(data)
        found += counter.count(b"".join(run))
    return found


# -- the stages ---------------------------------------------------------------

def dpkt_records(path: Path) -> int:
    n = 0
    with open(path, "rb") as f:
        for _ts, _buf in dpkt.pcap.Reader(f):
            n += 1
    return n


def reader_records(path: Path) -> int:
    n = 0
    with open_capture(path) as reader:
        for _frame, _ts, _linktype, _buf in reader:
            n += 1
    return n


def decoded_packets(path: Path) -> int:
    n = 0
    decode = Decoder().decode
    with open_capture(path) as reader:
        for frame, ts, linktype, buf in reader:
            if decode(frame, ts, linktype, buf) is not None:
                n += 1
    return n


class NullSink:
    """A flow tracker sink that drops every event."""

    def data(self, flow, side, offset, payload, frame, ts, datagram):
        pass

    def gap(self, flow, side, offset, length, frame, ts, reason):
        pass

    def overlap(self, flow, side, offset, length, frame, ts):
        pass

    def end(self, flow):
        pass


def tracked_flows(path: Path) -> int:
    o = ReplayOptions()
    tracker = FlowTracker(NullSink(), hold_bytes=o.hold_bytes, hold_total=o.hold_total,
                          max_flows=o.max_flows, tcp_idle=o.tcp_idle, udp_idle=o.udp_idle)
    decode = Decoder().decode
    packet = tracker.packet
    with open_capture(path) as reader:
        for frame, ts, linktype, buf in reader:
            pkt = decode(frame, ts, linktype, buf)
            if pkt is not None:
                packet(pkt)
    tracker.finish()
    return tracker.counters["flows"]


def _discard(record):
    pass


def replayed(path: Path, table: engine.Table):
    result = replay_file(path, table, emit=_discard)
    if result.error:
        raise SystemExit(f"replay stopped: {result.error}")
    return result


def cli_run(path: Path, sigs: Path) -> None:
    """The CLI end to end in a fresh interpreter; SystemExit if it fails."""
    env = dict(os.environ)
    src = str(Path(seamscan.__file__).resolve().parents[1])  # the code measured in-process
    env["PYTHONPATH"] = os.pathsep.join(p for p in (src, env.get("PYTHONPATH")) if p)
    cmd = [sys.executable, "-m", "seamscan", "scan", str(path), "--rules", str(sigs),
           "--format", "jsonl", "-o", os.devnull, "--quiet"]
    run = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if run.returncode:
        raise SystemExit(f"the CLI exited {run.returncode}: {run.stderr.strip()}")


def cpu_seconds() -> float:
    """User + system CPU seconds of this process and of its waited-for children."""
    me, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(
        resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


@dataclass
class Timing:
    """Fewest CPU and wall-clock seconds seen for a stage, and its last result."""

    cpu: float = float("inf")
    wall: float = float("inf")
    result: object = None


def measure(stages: dict[str, tuple], rounds: int) -> dict[str, Timing]:
    """Time each ``name: (function, *args)`` stage ``rounds`` times.  A round
    runs every stage once, in order, so that load from other processes that
    comes and goes falls on all stages alike; the best of the rounds counts."""
    out = {name: Timing() for name in stages}
    for _ in range(rounds):
        for name, (fn, *args) in stages.items():
            gc.collect()
            cpu, wall = cpu_seconds(), time.perf_counter()
            result = fn(*args)
            wall, cpu = time.perf_counter() - wall, cpu_seconds() - cpu
            t = out[name]
            t.cpu, t.wall, t.result = min(t.cpu, cpu), min(t.wall, wall), result
    return out


def compiled(sigs: Path) -> engine.Table:
    try:
        return engine.compile(load_signatures(sigs))
    except SignatureError as err:
        raise SystemExit(str(err)) from None


# -- the report ---------------------------------------------------------------

def table_rows(rows, packets: int, payload: int, reference: float) -> list[str]:
    """Markdown rows from ``(label, Timing, chained)``: CPU and wall seconds,
    then from the CPU seconds µs/packet, µs over the previous chained stage,
    packets/s, payload MB/s and the ratio to ``reference`` CPU seconds."""
    out = ["| stage | CPU s | wall s | µs/packet | + µs | packets/s | payload MB/s | x dpkt |",
           "|---|---:|---:|---:|---:|---:|---:|---:|"]
    prev = None
    for label, t, chained in rows:
        us = t.cpu / packets * 1e6
        added = f"{us - prev:+.2f}" if chained and prev is not None else ""
        out.append(f"| {label} | {t.cpu:.3f} | {t.wall:.3f} | {us:.2f} | {added} "
                   f"| {packets / t.cpu:,.0f} | {payload / t.cpu / 1e6:,.1f} "
                   f"| {t.cpu / reference:.2f} |")
        if chained:
            prev = us
    return out


def profile(path: Path, table: engine.Table, top: int) -> str:
    prof = cProfile.Profile()
    prof.runcall(replay_file, path, table, emit=_discard)
    text = io.StringIO()
    pstats.Stats(prof, stream=text).sort_stats("tottime").print_stats(top)
    return text.getvalue()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Benchmark the replay pipeline stage by stage.")
    ap.add_argument("--packets", type=int, default=200_000)
    ap.add_argument("--flows", type=int, default=4000)
    ap.add_argument("--sigs", type=int, default=1000, help="signatures in the set")
    ap.add_argument("--keep", type=Path, metavar="DIR", help="build the inputs here and keep them")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--runs", type=int, default=3, help="interleaved rounds; the best counts (default 3)")
    ap.add_argument("--profile", type=int, default=0, metavar="N",
                    help="also print the top N functions of a cProfile of replay_file")
    args = ap.parse_args(argv)
    if args.sigs < 1 or args.runs < 1:
        ap.error("--sigs and --runs must be at least 1")
    print(f"machine: {machine()}")
    print(f"command: {shlex.join([sys.executable, *sys.argv])}")
    if args.keep:
        args.keep.mkdir(parents=True, exist_ok=True)
        return bench(args, args.keep)
    with tempfile.TemporaryDirectory(prefix="bench_replay.") as tmp:
        return bench(args, Path(tmp))


def bench(args, work: Path) -> int:
    quiet, raw, passed = choose_signatures(args.sigs, args.seed, work)
    sigs_path, raw_path = work / "sigs.toml", work / "sigs-unfiltered.toml"
    sigs_path.write_text(_toml(quiet, f"bench-{args.sigs}"), encoding="ascii")
    raw_path.write_text(_toml(raw, f"bench-{args.sigs}-unfiltered"), encoding="ascii")
    capture = work / "bench.pcap"
    made = _make_capture(capture, args.packets, args.flows, args.seed, sigs_path)
    print(f"signatures: {sigs_path} ({len(quiet)}; passed over {len(passed)} of the first "
          f"{args.sigs} generated, found in the background: {', '.join(passed) or 'none'})")
    print(f"capture: {made}")
    t0 = time.perf_counter()
    table = compiled(sigs_path)
    print(f"compile: {time.perf_counter() - t0:.2f} s, {table!r}")
    try:
        got = measure({"dpkt": (dpkt_records, capture), "reader": (reader_records, capture),
                       "decode": (decoded_packets, capture), "flows": (tracked_flows, capture),
                       "replay": (replayed, capture, table), "cli": (cli_run, capture, sigs_path)},
                      args.runs)
        raw = measure({"raw": (replayed, capture, compiled(raw_path))}, 1)["raw"]
    except CaptureError as err:
        raise SystemExit(str(err)) from None
    records, dpkt_cpu, replay = got["dpkt"].result, got["dpkt"].cpu, got["replay"]
    c = replay.result.counters
    payload = c["bytes_scanned"]
    print(f"records: dpkt {records}, ours {got['reader'].result}; decoded "
          f"{got['decode'].result}; flows {got['flows'].result}; matches {c['matches']}; "
          f"stream bytes scanned {payload:,}; best of {args.runs} interleaved rounds")
    rows = [("1. dpkt.pcap.Reader iteration", got["dpkt"], False),
            ("2. capture reader", got["reader"], True),
            ("3. reader + decode", got["decode"], True),
            ("4. + flow tracker (null sink)", got["flows"], True),
            (f"5. replay_file, {args.sigs} signatures", replay, True),
            ("5. CLI scan, JSONL to /dev/null", got["cli"], False),
            (f"replay_file, unfiltered set ({raw.result.counters['matches']:,} matches)", raw,
             False)]
    print()
    print("\n".join(table_rows(rows, records, payload, dpkt_cpu)))
    print()
    pps, cli_pps = records / replay.cpu, records / got["cli"].cpu
    print(f"target >= {TARGET_PPS:,} packets/s (CPU time): replay_file {pps:,.0f} "
          f"({'met' if pps >= TARGET_PPS else 'NOT met'}), CLI {cli_pps:,.0f}")
    ratio = replay.cpu / dpkt_cpu
    print(f"target <= {TARGET_RATIO:g}x dpkt iteration (CPU time): replay_file {ratio:.2f}x "
          f"({'met' if ratio <= TARGET_RATIO else 'NOT met'}), CLI "
          f"{got['cli'].cpu / dpkt_cpu:.2f}x")
    planted = re.search(r"(\d+) signatures injected", made)
    t0 = time.perf_counter()
    expected = independent_count(capture, PatternCounter(quiet))
    verdict = "equal" if expected == c["matches"] else "DIFFERENT"
    print(f"matches: replay_file {c['matches']}, independent count (dpkt + pyahocorasick) "
          f"{expected}: {verdict}; planted by make_bench_capture: "
          f"{planted.group(1) if planted else 'not reported'} "
          f"(checked in {time.perf_counter() - t0:.1f} s)")
    if args.profile:
        print()
        print(profile(capture, table, args.profile))
    return 0 if verdict == "equal" else 1


if __name__ == "__main__":
    sys.exit(main())
