"""Benchmark: how long a random signature set takes to load and compile.

    python tools/bench_compile.py [--sigs 10000] [--seed 1] [--runs 3]

For N signatures of 4 to 32 bytes (``gen_sigs.generate``, mixed text and
binary) and, for reference, 1,000, prints the best of ``--runs`` timings of

* loading the set's TOML text (``seamscan.loads_signatures``),
* ``seamscan.compile`` (dense layout), and its steps: building the
  automaton, encoding the table image, loading and validating the image,

with the table's states, byte classes and image bytes, as a markdown table
ready for the README.  The target is 10,000 signatures compiled in at most
5 s on the project's 2-core machine.  Nothing is written to disk.
"""

from __future__ import annotations

import argparse
import gc
import os
import platform
import subprocess
import sys
import time

import gen_sigs

TARGET_SIGS, TARGET_SECONDS = 10_000, 5.0
REFERENCE_SIGS = 1_000


def machine() -> str:
    """CPU model and core count (from ``lscpu``, else ``/proc/cpuinfo``), and Python."""
    model, cores = "unknown CPU", os.cpu_count()
    try:
        out = subprocess.run(["lscpu"], capture_output=True, text=True, timeout=10).stdout
        fields = dict(line.split(":", 1) for line in out.splitlines() if ":" in line)
        model = fields.get("Model name", model).strip()
    except (OSError, subprocess.SubprocessError):
        try:
            with open("/proc/cpuinfo", encoding="ascii", errors="replace") as f:
                model = next((line.split(":", 1)[1].strip() for line in f
                              if line.startswith("model name")), model)
        except OSError:
            pass
    return f"{model}, {cores} cores, Python {platform.python_version()}"


def best_of(runs: int, fn, times: list[float] | None = None, setup=None):
    """(best wall-clock seconds, last result) of ``runs`` calls of ``fn``,
    with the garbage collector off during each call (as ``timeit`` does).
    Every call's seconds are appended to ``times`` when it is given.  With
    ``setup``, each call is ``fn(setup())`` and only ``fn`` is timed."""
    best, result = float("inf"), None
    for _ in range(runs):
        result = None
        args = () if setup is None else (setup(),)
        gc.collect()
        gc.disable()
        try:
            t0 = time.perf_counter()
            result = fn(*args)
            took = time.perf_counter() - t0
        finally:
            gc.enable()
        best = min(best, took)
        if times is not None:
            times.append(took)
    return best, result


def measure(n: int, seed: int, runs: int) -> dict:
    """Timings and table size for ``n`` generated signatures."""
    import seamscan
    from seamscan import compiler, engine, image

    dicts = gen_sigs.generate(n, seed=seed)
    toml_text = gen_sigs.to_toml(dicts, f"bench-{n}-seed{seed}")
    load_s, sigset = best_of(runs, lambda: seamscan.loads_signatures(toml_text))
    compile_times: list[float] = []
    compile_s, table = best_of(runs, lambda: seamscan.compile(sigset), compile_times)
    states, classes, nbytes = table.states, table.classes, table.nbytes

    # The same three steps engine.compile takes, timed one by one.
    sigs = list(sigset)
    patterns = [s.byte_sets() for s in sigs]
    names = [s.id for s in sigs]
    build_s, automaton = best_of(runs, lambda: compiler.build(patterns, names=names))
    encode_s, blob = best_of(runs, lambda: image.encode_dense(automaton, sigs))
    validate_s, _ = best_of(runs, lambda: engine.Table.from_bytes(blob))
    return {
        "n": n, "text": sum("text" in d for d in dicts),
        "fold": sum(bool(d.get("fold_case")) for d in dicts),
        "states": states, "classes": classes, "nbytes": nbytes,
        "load": load_s, "compile": compile_s, "first": compile_times[0],
        "build": build_s, "encode": encode_s, "validate": validate_s,
    }


def report(rows: list[dict], command: str, runs: int) -> str:
    """The markdown block printed at the end: machine, command, table, verdict."""
    lines = [
        f"Machine: {machine()}",
        f"Command: `{command}` (best of {runs}; seconds are wall clock)",
        "",
        "| signatures | text / fold_case | states | classes | image bytes | TOML load s "
        "| compile s | first run s | = build s | + encode s | + load image s |",
        "| ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: |",
    ]
    for r in rows:
        lines.append(
            f"| {r['n']:,} | {r['text']:,} / {r['fold']:,} | {r['states']:,} | {r['classes']} "
            f"| {r['nbytes']:,} | {r['load']:.3f} | **{r['compile']:.3f}** | {r['first']:.3f} "
            f"| {r['build']:.3f} "
            f"| {r['encode']:.3f} | {r['validate']:.3f} |")
    for r in rows:
        if r["n"] == TARGET_SIGS:
            verdict = "met" if r["compile"] <= TARGET_SECONDS else "NOT met"
            lines += ["", f"Target: {TARGET_SIGS:,} signatures compiled in <= {TARGET_SECONDS:g} s:"
                          f" {verdict} ({r['compile']:.2f} s)."]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(
        description="Time loading and compiling a random signature set.")
    parser.add_argument("--sigs", type=int, default=TARGET_SIGS, help="signatures (default 10000)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--runs", type=int, default=3, help="repeats; the best is kept (default 3)")
    args = parser.parse_args(argv)
    if args.sigs < 1 or args.runs < 1:
        parser.error("--sigs and --runs must be at least 1")
    try:
        import seamscan.engine  # noqa: F401  (the C extension must be built)
    except ImportError as exc:
        print(f"bench_compile: seamscan is not importable ({exc}); build it first", file=sys.stderr)
        return 2
    rows = []
    for n in sorted({REFERENCE_SIGS, args.sigs}):
        print(f"compiling {n:,} signatures ...", file=sys.stderr, flush=True)
        rows.append(measure(n, args.seed, args.runs))
    command = f"python tools/bench_compile.py --sigs {args.sigs} --seed {args.seed}"
    if args.runs != 3:
        command += f" --runs {args.runs}"
    print(report(rows, command, args.runs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
