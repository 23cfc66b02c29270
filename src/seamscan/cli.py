"""The ``seamscan`` command line.

Exit codes: 0 success; 2 usage error or a bad signature set; 3 damaged input
(a capture or table image), with everything found before the damage written.
"""

from __future__ import annotations

import argparse
import os
import sys

EXIT_OK, EXIT_USAGE, EXIT_DAMAGED = 0, 2, 3

DESCRIPTION = """\
Exact multi-signature matching in packet payloads, across packet boundaries.

  seamscan scan CAPTURE... --rules SET.toml     replay captures, print per-flow matches
  seamscan compile SET.toml -o TABLE.seam      build the table image a device scans with
  seamscan inspect TABLE.seam                  validate an image and show what it holds
  seamscan rate CAPTURE... --rules SET.toml     judge a set's hit rate on a lab capture

Exit codes: 0 success, 2 usage or signature-set error, 3 damaged input
(partial results written)."""

SCAN_EPILOG = """\
Output formats:
  table  flows that matched, each with its matches (default on a terminal)
  jsonl  one JSON object per line: match, gap, overlap, flow, error, and a
         final summary record (default when writing to a file or pipe)
  csv    match records only, with a header row

Offsets (start, end) are 0-based byte offsets in the stream of the side that
sent the bytes, end exclusive; frame is the 1-based record number, in its
file, of the packet that completed the match (carried its last byte; with
reordered segments that can precede the packet that filled the hole).

Several captures are one continuous capture, read in the order given (the
files of a rotated ring): flows and streams carry on from one file into the
next; --each-file replays each on its own.

The table format lists at most 1000 lines per flow (100000 over all open
flows) and summarises the rest per side and signature (count, first start,
last end, frames), so memory stays bounded; jsonl and csv have every record.

File names that are not UTF-8 appear with each such byte as \\xNN (Python's
backslashreplace form: the bytes caf\\xe9.pcap show as caf\\xe9.pcap) in
every format and message; every output is valid UTF-8.

Exit codes: 0 success; 2 usage error, a missing or unreadable file, or a bad
signature set; 3 damaged input, a capture or table image (every record found
before the damage is written, then an error record).

Examples:
  seamscan scan pcaps_demo/*.pcap* --rules pcaps_demo/demo-signatures.toml
  seamscan scan lab.pcapng --table device.seam --format jsonl -o out.jsonl
"""


def _size_arg(text):
    from seamscan.engine import parse_size

    try:
        return parse_size(text)
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err)) from None


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(prog="seamscan", description=DESCRIPTION,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--version", action="store_true", help="print the version and exit")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND")

    sc = sub.add_parser("scan", help="replay captures and report every signature match per flow",
                        description="Replay pcap / pcapng captures (.gz too) offline: reassemble "
                        "each flow side's stream and report every signature that fires, and "
                        "exactly where.", epilog=SCAN_EPILOG,
                        formatter_class=argparse.RawDescriptionHelpFormatter)
    sc.add_argument("captures", nargs="+", metavar="CAPTURE", help="pcap or pcapng files")
    src = sc.add_mutually_exclusive_group(required=True)
    src.add_argument("--rules", metavar="SET.toml", help="signature set to compile and scan with")
    src.add_argument("--table", metavar="TABLE.seam", help="an exported table image to scan with")
    sc.add_argument("--format", choices=("table", "jsonl", "csv"),
                    help="output format (default: table on a terminal, else jsonl)")
    sc.add_argument("-o", "--output", metavar="FILE", help="write records here (default: stdout)")
    sc.add_argument("--each-file", action="store_true",
                    help="replay each capture on its own (unrelated captures); by default the "
                    "captures given are one continuous capture, read in the order given (the "
                    "files of a rotated ring): flows, streams and fragments carry on from one "
                    "file into the next")
    sc.add_argument("--jobs", type=int, default=1, metavar="N",
                    help="with --each-file: replay N capture files in parallel processes; "
                    "output stays in file order (default 1)")
    sc.add_argument("--quiet", action="store_true", help="no progress bar")
    sc.add_argument("--show-clean", action="store_true",
                    help="table format: also list flows without matches")
    lim = sc.add_argument_group("flow limits (every drop and eviction is counted in the summary)")
    lim.add_argument("--hold-bytes", type=_size_arg, default=65536, metavar="SIZE",
                     help="out-of-order payload bytes held per flow before a hole becomes a "
                     "gap, as a device counts them (default 64KiB; the memory they take is "
                     "bounded by --hold-total)")
    lim.add_argument("--hold-total", type=_size_arg, default=64 * 2**20, metavar="SIZE",
                     help="memory for out-of-order bytes over all flows: each held segment "
                     "counts its payload plus 208 bytes, so this is the most held bytes take "
                     "however small the segments (default 64MiB)")
    lim.add_argument("--max-flows", type=int, default=65536, metavar="N",
                     help="live flows; beyond it the longest-idle flow is evicted (default "
                     "65536). Each live flow costs up to about 24KB (the last 8KiB delivered "
                     "per side, once in the tracker and once in the fast lane): about 1.6GB "
                     "for a flood of 65536 flows")
    lim.add_argument("--tcp-idle", type=float, default=300.0, metavar="SECONDS",
                     help="capture seconds after which an idle TCP flow ends (default 300)")
    lim.add_argument("--udp-idle", type=float, default=60.0, metavar="SECONDS",
                     help="capture seconds after which an idle UDP flow ends (default 60)")

    co = sub.add_parser("compile", help="compile a signature set into a table image",
                        description="Compile a signature set into a table image (.seam): the "
                        "exact bytes the host scans with and a device loads.")
    co.add_argument("rules", metavar="SET.toml", help="the signature set (TOML) to compile")
    co.add_argument("-o", "--output", metavar="TABLE.seam", required=True,
                    help="where to write the table image (required): the exact bytes "
                    "'scan --table' and a device load")
    co.add_argument("--layout", default="auto", choices=("dense", "compact", "auto"),
                    help="dense: one lookup per byte, largest; compact: own transitions and "
                    "failure links, a few bytes per state, at most 2 steps per byte amortised; "
                    "auto (default): the fastest that fits --budget")
    co.add_argument("--budget", type=_size_arg, metavar="SIZE",
                    help="the most bytes the image may take, e.g. 32KiB or 2MiB")
    co.add_argument("--c-header", metavar="FILE.h",
                    help="also write the image as a C header for firmware (aligned const "
                    "array, size and CRC macros, signature ids and labels)")
    co.add_argument("--symbol", metavar="NAME",
                    help="C identifier for the header's array (default: from the output name)")
    co.add_argument("--max-states", type=int, metavar="N",
                    help="give up when the automaton needs more than N states, naming the "
                    "signatures that cost the most (default 2,000,000)")
    co.add_argument("--no-speed", action="store_true",
                    help="skip the host speed measurement in the report")

    ins = sub.add_parser("inspect", help="validate a table image and print its header",
                         description="Validate a table image (CRC, every bound) and print its "
                         "header and statistics. A damaged image exits 3.")
    ins.add_argument("table", metavar="TABLE.seam",
                     help="a table image written by 'seamscan compile' (or read off a device)")

    from seamscan.evaluate import add_rate_parser

    add_rate_parser(sub)  # last, as in DESCRIPTION
    return ap


def _escape_names_on_console() -> None:
    """Text we print that holds a file name which is not UTF-8 shows it as
    ``\\xNN`` (``seamscan.filenames``) instead of failing or writing raw bytes."""
    from seamscan.filenames import ERRORS

    for stream in (sys.stdout, sys.stderr):
        if hasattr(stream, "reconfigure"):
            stream.reconfigure(errors=ERRORS)


def main(argv=None) -> int:
    _escape_names_on_console()
    ap = build_parser()
    args = ap.parse_args(argv)
    if args.version:
        from seamscan import __version__

        print(f"seamscan {__version__}")
        return EXIT_OK
    if not args.command:
        ap.print_help()
        return EXIT_USAGE
    try:
        if args.command == "rate":
            from seamscan.evaluate import cmd_rate

            return cmd_rate(args)
        return {"scan": cmd_scan, "compile": cmd_compile, "inspect": cmd_inspect}[args.command](args)
    except KeyboardInterrupt:
        print("seamscan: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK


def _fail(message: str, code: int) -> int:
    from seamscan.filenames import shown

    print(f"seamscan: {shown(message)}", file=sys.stderr)
    return code


def _load_table(args):
    """(table, exit code or None) from --rules or --table."""
    from seamscan.image import TableError

    if getattr(args, "rules", None):
        from seamscan import engine
        from seamscan.compiler import CompileError
        from seamscan.signatures import SignatureError, load_signatures

        try:
            sigset = load_signatures(args.rules)
            kw = {"max_states": args.max_states} if getattr(args, "max_states", None) else {}
            return engine.compile(sigset, **kw), None
        except SignatureError as err:
            return None, _fail(str(err), EXIT_USAGE)
        except CompileError as err:
            return None, _fail(f"{args.rules}: {err}", EXIT_USAGE)
    from seamscan.engine import Table

    try:
        with open(args.table, "rb") as f:
            blob = f.read()
    except OSError as err:
        return None, _fail(f"{args.table}: cannot read: {err.strerror}", EXIT_USAGE)
    try:
        return Table.from_bytes(blob), None
    except TableError as err:
        return None, _fail(f"{args.table}: {err}", EXIT_DAMAGED)


def cmd_scan(args) -> int:
    for path in args.captures:
        if not os.path.isfile(path):
            return _fail(f"{path}: no such capture file", EXIT_USAGE)
    if args.jobs < 1:
        return _fail("--jobs must be at least 1", EXIT_USAGE)
    if args.jobs > 1 and not args.each_file:
        return _fail("--jobs applies only with --each-file: without it the captures are one "
                     "continuous capture, replayed in one process", EXIT_USAGE)
    if args.max_flows < 1:
        return _fail("--max-flows must be at least 1", EXIT_USAGE)
    table, code = _load_table(args)
    if table is None:
        return code
    from seamscan import records, replay

    options = replay.ReplayOptions(hold_bytes=args.hold_bytes, hold_total=args.hold_total,
                                   max_flows=args.max_flows, tcp_idle=args.tcp_idle,
                                   udp_idle=args.udp_idle)
    try:
        out = open(args.output, "w", encoding="utf-8", newline="") if args.output else sys.stdout
    except OSError as err:
        return _fail(f"{args.output}: cannot write: {err.strerror}", EXIT_USAGE)
    fmt = args.format or ("table" if out is sys.stdout and sys.stdout.isatty() else "jsonl")
    labels = dict(zip(table.ids, table.labels, strict=True))
    writer = records.make_writer(fmt, out, show_clean=args.show_clean, labels=labels) \
        if fmt == "table" else records.make_writer(fmt, out)
    bar = _progress(args)
    total = replay.Counter()
    damaged = []
    import time

    t0 = time.perf_counter()
    try:
        for result in _results(args, table, options, writer.write, bar):
            replay.add_counters(total, result.counters)
            if result.error:
                damaged.append(result.error)
                writer.write({"type": "error", "file": result.path, "message": result.error})
        if bar is not None:
            bar.close()
        writer.write(records.summary_record(total, time.perf_counter() - t0))
        writer.close()
    finally:
        if out is not sys.stdout:
            out.close()
    for message in damaged:
        print(f"seamscan: damaged capture: {message}; everything before the damage was "
              "reported", file=sys.stderr)
    return EXIT_DAMAGED if damaged else EXIT_OK


def _progress(args):
    if args.quiet or not sys.stderr.isatty():
        return None
    from tqdm import tqdm

    total = sum(os.path.getsize(p) for p in args.captures)
    return tqdm(total=total, unit="B", unit_scale=True, desc="scanning", file=sys.stderr,
                leave=False)


def _results(args, table, options, write, bar):
    """Each file's result, in file order: one continuous replay of all the
    captures, or with --each-file a replay per file (with --jobs, files in
    parallel processes)."""
    from seamscan import replay

    sizes = [os.path.getsize(p) for p in args.captures]

    def progress(i, pos):
        if bar is not None:
            bar.n = sum(sizes[:i]) + pos
            bar.refresh()

    if not args.each_file:
        yield from replay.replay_files(args.captures, table, options, emit=write,
                                       progress=progress)
        return
    if args.jobs == 1 or len(args.captures) == 1:
        for i, path in enumerate(args.captures):
            yield replay.replay_file(path, table, options, emit=write,
                                     progress=lambda pos, i=i: progress(i, pos))
        return
    import marshal
    import tempfile
    from concurrent.futures import ProcessPoolExecutor

    blob = table.to_bytes()
    with tempfile.TemporaryDirectory(prefix="seamscan-") as tmp, \
            ProcessPoolExecutor(max_workers=args.jobs) as pool:
        futures = [pool.submit(_replay_worker, path, blob, options,
                               os.path.join(tmp, f"{i}.records"))
                   for i, path in enumerate(args.captures)]
        for size, fut in zip(sizes, futures, strict=True):
            result, spool = fut.result()
            with open(spool, "rb") as f:  # the file's records, streamed, not held
                while True:
                    try:
                        write(marshal.load(f))
                    except EOFError:
                        break
            os.unlink(spool)
            if bar is not None:
                bar.update(size)
            yield result


def _replay_worker(path, blob, options, spool):
    """Replay one file in a worker process; its records go to the file
    ``spool`` (one marshal dump each) for the parent to stream in order."""
    import marshal

    from seamscan import replay
    from seamscan.engine import Table

    with open(spool, "wb") as f:
        result = replay.replay_file(path, Table.from_bytes(blob), options,
                                    emit=lambda rec: marshal.dump(rec, f))
    return result, spool


def cmd_compile(args) -> int:
    import time

    from seamscan import engine
    from seamscan.compiler import CompileError
    from seamscan.signatures import SignatureError, load_signatures

    symbol = args.symbol or _symbol_from(args.c_header or args.output)
    if args.c_header:
        from seamscan.export import symbol_problem

        problem = symbol_problem(symbol)
        if problem:
            return _fail(f"--symbol {symbol!r}: {problem}", EXIT_USAGE)
    t0 = time.perf_counter()
    try:
        sigset = load_signatures(args.rules)
        kw = {"max_states": args.max_states} if args.max_states else {}
        automaton, tables = engine.compile_layouts(sigset, **kw)
    except SignatureError as err:
        return _fail(str(err), EXIT_USAGE)
    except CompileError as err:
        return _fail(f"{args.rules}: {err}", EXIT_USAGE)
    elapsed = time.perf_counter() - t0
    sample = None if args.no_speed else engine.sample_traffic()
    print(f"{args.rules}: {len(sigset)} signatures, {automaton.states:,} states, "
          f"{automaton.nclasses} byte classes, compiled in {elapsed:.2f} s")
    print(layout_report(tables, args.budget, sample))
    if any(not sig.is_literal for sig in sigset):  # byte sets, ?? and parts can cost states
        sizes = {n: t.nbytes for n, t in tables.items()}
        worst = engine.costliest_signatures(automaton, list(sigset), sizes)[:5]
        print("  states only one signature needs (the costliest): "
              + ", ".join(f"{sid} {states:,}" for sid, states, _saved in worst))
    fits = [n for n in engine.AUTO_ORDER
            if args.budget is None or tables[n].nbytes <= args.budget]
    chosen = args.layout if args.layout != "auto" else (fits[0] if fits else None)
    if chosen is None or chosen not in fits:
        what = "no layout fits" if chosen is None else f"the {chosen} layout does not fit"
        lines = [f"{what} the budget of {args.budget:,} bytes. The signatures costing the most "
                 "states, and what dropping each would save (about):"]
        sizes = {n: t.nbytes for n, t in tables.items()}
        for sid, states, saved in engine.costliest_signatures(automaton, list(sigset), sizes)[:10]:
            lines.append(f"    {sid:<24} {states:>8,} states  {saved:>12,} bytes")
        return _fail("\n".join(lines), EXIT_USAGE)
    table = tables[chosen]
    try:
        with open(args.output, "wb") as f:
            f.write(table.to_bytes())
        if args.c_header:
            from seamscan.export import c_header

            with open(args.c_header, "w", encoding="utf-8") as f:
                f.write(c_header(table, symbol, source=os.path.basename(args.rules)))
    except OSError as err:
        return _fail(f"{err.filename}: cannot write: {err.strerror}", EXIT_USAGE)
    print(f"wrote {args.output} ({chosen}, {table.nbytes:,} bytes, CRC-32 {table.header.crc:08x})"
          + (f" and {args.c_header} (symbol {symbol})" if args.c_header else ""))
    return EXIT_OK


def _symbol_from(path: str) -> str:
    import re

    stem = os.path.splitext(os.path.basename(path))[0]
    name = re.sub(r"\W", "_", stem).strip("_") or "seam_table"
    return ("t_" + name) if name[0].isdigit() else name


STEPS = {"dense": "1", "compact": "2 amortised"}


def layout_report(tables: dict, budget=None, sample=None) -> str:
    """Per layout: bytes, automaton bytes per state, steps per byte, host speed, fit."""
    from seamscan import engine

    # two spaces between columns, so that no two headers read as one
    head = (f"  {'layout':<8}  {'image bytes':>11}  {'bytes/state':>11}  {'state ids':>9}  "
            f"{'steps/byte':>11}")
    head += f"  {'host MB/s':>9}" if sample is not None else ""
    head += "  budget" if budget is not None else ""
    lines = [head]
    for name, table in tables.items():
        row = (f"  {name:<8}  {table.nbytes:>11,}  {automaton_bytes(table) / table.states:>11.2f}"
               f"  {table.header.trans_width * 8:>5}-bit  {STEPS.get(name, '?'):>11}")
        if sample is not None:
            row += f"  {engine.measure_speed(table, sample):>9.0f}"
        if budget is not None:
            row += "  fits" if table.nbytes <= budget else "  does not fit"
        lines.append(row)
    lines.append("  (bytes/state: the image less signature records, ports and names, over the "
                 "states; steps/byte: state visits per byte)")
    lines.append(flow_side_memory(next(iter(tables.values()))))
    for name, table in tables.items():
        lines.append(f"  {name} sections:")
        lines.extend(_sections(table))
    return "\n".join(lines)


def automaton_bytes(table) -> int:
    from seamscan import image

    h = table.header
    return table.nbytes - sum(h.sections.get(k, (0, 0))[1]
                              for k in (image.SEC_SIGS, image.SEC_PORTS, image.SEC_NAMES))


def _sections(table) -> list[str]:
    from seamscan.compact import SECTION_NAMES as COMPACT_NAMES
    from seamscan.image import SECTION_NAMES

    names = {**SECTION_NAMES, **COMPACT_NAMES}
    return [f"    {names.get(kind, f'section {kind}'):<20} {size:>12,} bytes"
            for kind, (_off, size) in sorted(table.header.sections.items())]


def cmd_inspect(args) -> int:
    args.rules = None
    table, code = _load_table(args)
    if table is None:
        return code
    h = table.header
    print(f"{args.table}: valid table image (CRC-32 {h.crc:08x} checked, every index in "
          f"bounds, well-formed), format version {h.version}")
    print(f"  layout {table.layout}, {table.nbytes:,} bytes, {table.states:,} states, "
          f"{table.classes} byte classes, {h.trans_width * 8}-bit state ids")
    print(f"  {len(table)} signatures, longest {h.max_len} bytes, at most {h.max_outputs} "
          f"outputs per state; {automaton_bytes(table) / table.states:.2f} automaton bytes "
          "per state")
    print(flow_side_memory(table))
    print("  sections:")
    print("\n".join(_sections(table)))
    return EXIT_OK


def flow_side_memory(table) -> str:
    """The RAM a flow side needs: the 16-byte state, plus the part tracker's bytes."""
    track = table.track_bytes
    if not track:
        return "  per flow side: 16 bytes of state (no multi-part signatures)"
    return (f"  per flow side: 16 bytes of state + {track:,} bytes of part tracker "
            f"(ss_track_bytes; {table.header.nparts} parts)")
