"""Help texts and small surprises: every argument explains itself, defaults
and exit codes are stated, the commands are listed in one order, the compile
size report's columns read as columns, the README's demo excerpt is what a
real run prints (in that order), and every toolchain skip names the Debian
packages that would let the test run.
"""

from __future__ import annotations

import argparse
import ast
import os
import re
import subprocess
import sys
from pathlib import Path

import seamscan
from seamscan import cli, compiler, engine
from toolchains import PACKAGES, packages, skip_message

ROOT = Path(__file__).resolve().parent.parent
DEMO_SET = ROOT / "pcaps_demo" / "demo-signatures.toml"


def subparsers(ap: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    (action,) = [a for a in ap._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(action.choices)


def test_every_argument_has_help():
    ap = cli.build_parser()
    bare = []
    for name, sub in subparsers(ap).items():
        for action in sub._actions:
            if not action.help or action.help == argparse.SUPPRESS:
                bare.append(f"{name} {'/'.join(action.option_strings) or action.dest}")
    assert bare == []


def test_max_states_states_its_default():
    (action,) = [a for a in subparsers(cli.build_parser())["compile"]._actions
                 if "--max-states" in a.option_strings]
    assert f"(default {compiler.DEFAULT_MAX_STATES:,})" in " ".join(action.help.split())


def test_scan_and_rate_help_give_the_exit_codes():
    subs = subparsers(cli.build_parser())
    for name in ("scan", "rate"):
        text = " ".join(subs[name].format_help().split())
        m = re.search(r"Exit codes: 0 [^;]+; 2 [^;]+; 3 ", text)
        assert m, f"{name} --help lacks the exit codes"
    assert {cli.EXIT_OK, cli.EXIT_USAGE, cli.EXIT_DAMAGED} == {0, 2, 3}


def test_commands_listed_in_one_order():
    ap = cli.build_parser()
    described = re.findall(r"^  seamscan (\w+)", cli.DESCRIPTION, re.M)
    assert described == list(subparsers(ap))
    listed = re.findall(r"^    (\w+) {2,}", ap.format_help(), re.M)
    assert listed == described


def test_compile_report_header_is_one_word_group_per_column():
    sigset = seamscan.load_signatures(DEMO_SET)
    _, tables = engine.compile_layouts(sigset)
    text = cli.layout_report(tables, budget=64 * 1024)
    head, *rows = text.splitlines()[:3]
    cells = re.split(r" {2,}", head.strip())
    assert cells == ["layout", "image bytes", "bytes/state", "state ids", "steps/byte", "budget"]
    for row in rows:
        assert len(re.split(r" {2,}", row.strip())) == len(cells), row
    # each value sits under its header: right edges agree (numbers right-aligned)
    end = {c: head.index(c) + len(c) for c in cells[1:5]}
    dense = rows[0]
    assert dense[: end["image bytes"]].rstrip().endswith(f"{tables['dense'].nbytes:,}")


def _excerpt_blocks(readme: str):
    """The README's first command and its demo excerpt, as blocks of lines split at '...'."""
    command = re.search(r"```sh\n(?:pip install \. && )?(seamscan scan [^\n]+)\n```", readme).group(1)
    excerpt = re.search(r"What the demo prints \(abridged\):\n\n```\n(.*?)```", readme, re.S).group(1)
    blocks, cur = [], []
    for line in excerpt.splitlines():
        if line == "...":
            blocks.append(cur)
            cur = []
        else:
            cur.append(line)
    blocks.append(cur)
    return command, [b for b in blocks if b]


def _timeless(line: str) -> str:
    return re.sub(r"scanned in \d+\.\d+ s", "scanned in T s", line)


def test_readme_excerpt_is_an_ordered_abridgement_of_a_real_run():
    command, blocks = _excerpt_blocks((ROOT / "README.md").read_text())
    args = command.split()[1:]
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    expanded = []
    for a in args:
        expanded += sorted(str(p.relative_to(ROOT)) for p in ROOT.glob(a)) if "*" in a else [a]
    r = subprocess.run([sys.executable, "-m", "seamscan", *expanded, "--format", "table"],
                       cwd=ROOT, env=env, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    real = [_timeless(x) for x in r.stdout.splitlines()]
    at = 0
    for block in blocks:
        want = [_timeless(x) for x in block]
        for start in range(at, len(real) - len(want) + 1):
            if real[start:start + len(want)] == want:
                at = start + len(want)
                break
        else:
            raise AssertionError("README excerpt block not found in this order in a real run:\n"
                                 + "\n".join(block))


# --- skip messages ----------------------------------------------------------------

NOT_TOOLCHAIN = {  # skips that are about something else than a missing tool
    ("test_fuzz.py", "update this mutant"),
}


def test_every_toolchain_skip_names_debian_packages():
    found, bad = 0, []
    for path in sorted((ROOT / "tests").glob("*.py")):
        source = path.read_text()
        for node in ast.walk(ast.parse(source)):
            if not (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                    and node.func.attr == "skip" and isinstance(node.func.value, ast.Name)
                    and node.func.value.id == "pytest"):
                continue
            text = ast.get_source_segment(source, node)
            if any(path.name == f and mark in text for f, mark in NOT_TOOLCHAIN):
                continue
            found += 1
            arg = node.args[0] if node.args else None
            if not (isinstance(arg, ast.Call) and getattr(arg.func, "id", "") == "skip_message"
                    and len(arg.args) >= 2):
                bad.append(f"{path.name}:{node.lineno}: {text}")
                continue
            for tool in arg.args[1:]:
                if isinstance(tool, ast.Constant) and tool.value not in PACKAGES:
                    bad.append(f"{path.name}:{node.lineno}: no packages known for {tool.value!r}")
    assert found >= 15 and bad == [], "\n".join(bad)


def test_skip_message_names_the_packages():
    assert skip_message("no clang: libFuzzer needs it", "libFuzzer") == (
        "no clang: libFuzzer needs it; on Debian: apt-get install clang libclang-rt-dev")
    assert packages("arm-linux-gnueabihf-gcc", "qemu-arm") == (
        "gcc-arm-linux-gnueabihf libc6-dev-armhf-cross qemu-user")
    # every tool the parametrised skips may name (compilers, cross tools, qemu)
    from test_cross_arch import TARGETS

    for t in TARGETS:
        assert packages(t.compiler, t.qemu)
    for cc in ("gcc", "clang", "arm-none-eabi-gcc"):
        assert packages(cc)
