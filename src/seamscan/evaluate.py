"""Hit-rate evaluation of a signature set on lab captures (``seamscan rate``).

:func:`rate` replays the captures once per signature set (one compiled
table each, through :func:`seamscan.replay.replay_file`) and turns the
match, gap and flow records into one report object, a JSON-ready dict.
Its schema is in ``REPORT_SCHEMA`` below; :mod:`seamscan.report` renders it.

Units and definitions:

* A *flow* is a 5-tuple: (transport, client address and port, server address
  and port), over all the captures given.  Every flow record of that tuple
  (a connection reopened, a flow evicted and picked up again, the same tuple
  in two captures) belongs to the one flow; ``connections`` counts them.
* A signature *hits* a flow when it matches at least once in it.  *Share*
  is the flows it hits over the flows seen.  A signature is *noisy* when its
  share is strictly more than ``noisy_share`` (default 0.5).
* Labels (:func:`load_labels`): each row expects one verdict for one flow,
  a signature id, ``tag:NAME`` or ``clean``.  A flow with at least one row
  is *labelled*.  On a labelled flow found in the captures:

  - a signature that hits it is a true positive (TP) when the flow expects
    its id or one of its tags, else a false positive (FP) (the flow is
    ``clean``, or expects other verdicts);
  - an expected id that does not hit is a false negative (FN) of that
    signature; an expected ``tag:NAME`` that no signature carrying the tag
    hits is a false negative of the set (it names no one signature);
  - precision = TP / (TP + FP), recall = TP / (TP + FN), ``null`` when the
    denominator is 0.  Per set, TP, FP and FN are the sums over signatures
    plus the tag FNs (a micro-average; units are (flow, signature) pairs
    and unmet expectations).

  Flows are also judged whole: ``flagged_expected`` (something hit, a
  verdict other than clean was expected), ``flagged_clean``, ``missed``
  (nothing hit, something was expected) and ``clean_ok``.  Labelled flows
  absent from the captures and unlabelled flows are listed (their hits
  count as ``unlabelled``, neither TP nor FP); they never enter the scores.
* A/B (``against``): the old set replays the same captures; per signature
  id: added, removed, changed (match or flow counts differ), unchanged, and
  redefined (pattern or scope differ, whatever the counts); per flow: the
  signature verdicts it gained and lost.
* Device profile (:func:`load_profile`): the captures replay again under
  the profile's ``max_flows`` and ``hold_bytes`` (the rest as on the host)
  and are compared with the host run (``scan``'s default limits), per flow
  and signature by match counts (a device flow whose roles came out swapped,
  picked up mid-stream after an eviction, counts as the host flow it is);
  the table is compiled with the profile's ``layout`` and ``budget`` to say
  whether it fits.
"""

from __future__ import annotations

import csv
import dataclasses
import difflib
import io
import ipaddress
import math
import os
import re
import sys
import tomllib
from collections import Counter
from dataclasses import dataclass, field

NOISY_SHARE = 0.5
LABEL_COLUMNS = ("transport", "client_ip", "client_port", "server_ip", "server_port", "expect")
PROFILE_KEYS = ("name", "max_flows", "hold_bytes", "layout", "budget")
LAYOUTS = ("dense", "compact", "auto")
FLOW_FIELDS = ("transport", "client_ip", "client_port", "server_ip", "server_port")
FORMAT_NAME, FORMAT_VERSION = "seamscan-rate", 1
EXIT_OK, EXIT_USAGE, EXIT_DAMAGED = 0, 2, 3

REPORT_SCHEMA = """\
report.json (also what ``--format json`` prints) is one object:

  format, version    "seamscan-rate", 1
  rules              {path, name, version, signatures}
  captures           [{path, frames, flows, bytes_scanned, matches, error}]
                     flows: flow records of that file; error: null or what
                     damaged it (the records before the damage count)
  options            {noisy_share, hold_bytes, max_flows}  (the host run)
  set                {flows, connections, flows_flagged, flagged_share,
                      bytes_scanned, matches, frames, gaps, first_ts,
                      last_ts, signatures, fired, never_fired, noisy}
  signatures         [{id, label, pattern, tags, matches, flows, share, clients,
                       servers, first_ts, last_ts,
                       sides: {client: {matches, flows}, server: {...}},
                       noisy, scores}]   in set order; scores: null without
                     labels, else {tp, fp, fn, unlabelled, precision, recall};
                     pattern: the signature as a person reads it ("text",
                     hex with ?? and <sets>, parts joined by [MIN,MAX]);
                     parts: null, or per part of a multi-part signature
                     {pattern, occurred, reached, near_misses}: matches of
                     the part alone, of the parts up to it (chains that got
                     there, counted per end offset), and reached minus the
                     next part's reached (chains that got no further; 0 for
                     the last part); counted by a second replay
  never_fired        [id]
  noisy              [id]
  flows              [{transport, client_ip, client_port, server_ip,
                       server_port, files, connections, first_ts, last_ts,
                       client_bytes, server_bytes, matches, gaps, ends,
                       first_match_ts, signatures: {id: matches},
                       expect, verdict}]   by first_ts; expect: null when
                     unlabelled; verdict: null without labels, else
                     flagged_expected | flagged_clean | missed | clean_ok |
                     unlabelled
  labels             null, or {path, rows, flows_labelled,
                       set: {tp, fp, fn, precision, recall},
                       flows: {flagged_expected, flagged_clean, missed,
                               clean_ok, unlabelled, absent},
                       false_positives: [{flow fields, signature}],
                       false_negatives: [{flow fields, expect}],
                       absent: [{flow fields, expect}],
                       unlabelled: [{flow fields, signatures}]}
  against            null, or {rules: {path, name, version, signatures},
                       signatures: {added: [{id, matches, flows}],
                                    removed: [{id, matches, flows}],
                                    changed: [{id, old_matches, new_matches,
                                               delta, old_flows, new_flows,
                                               redefined}],
                                    unchanged: [id], redefined: [id]},
                       flows: {gained: [{flow fields, signatures}],
                               lost: [{flow fields, signatures}]},
                       summary: {matches, flows_flagged, fired, never_fired,
                                 precision, recall: {old, new, delta}}}
  device             null, or {profile: {path, name, max_flows, hold_bytes,
                                         layout, budget},
                       table: {fits, layout, bytes, budget, message},
                       flows: {host, device, evicted, swapped,
                               evicted_flows: [{flow fields, times}]},
                       (swapped: device flow records whose client and
                        server came out reversed, picked up mid-stream
                        after an eviction; they count as the host's flow)
                       gaps: {host, device, hold_cap, hold_total,
                              new: [{flow fields, side, start, end, file,
                                     frame}]},
                       matches: {host, device, missed, extra},
                       missed: {by_signature: {id: n},
                                by_flow: [{flow fields, signature, host,
                                           device}]},
                       extra: {same shape as missed}}

Times are capture seconds (UTC epoch); shares, precision and recall are
fractions in [0, 1]; a flow's fields are those of the scan records."""


class RateError(ValueError):
    """A labels or profile file that cannot be used.

    ``source`` is the path; ``problems`` one line each, ``"line N: ..."``
    where a line is known.  ``str(err)`` is ``"SOURCE:LINE: problem"`` for
    one problem, else a count and one indented line per problem.
    """

    def __init__(self, source, problems):
        self.source = os.fsdecode(source)
        self.problems = list(problems)
        super().__init__(self.source, self.problems)

    def __str__(self) -> str:
        if len(self.problems) == 1:
            only = self.problems[0]
            m = re.match(r"line (\d+): ", only)
            return f"{self.source}:{m.group(1)}: {only[m.end():]}" if m else \
                f"{self.source}: {only}"
        return f"{self.source}: {len(self.problems)} problems:\n  " + "\n  ".join(self.problems)


# --- flows -----------------------------------------------------------------

def flow_key(rec) -> tuple:
    """The flow (5-tuple) of a record: (transport, client_ip, client_port, server_ip, server_port)."""
    return (rec["transport"], rec["client_ip"], rec["client_port"], rec["server_ip"],
            rec["server_port"])


def key_fields(key) -> dict:
    """A flow key as the record fields it came from."""
    return dict(zip(FLOW_FIELDS, key, strict=True))


# --- labels ------------------------------------------------------------------

@dataclass
class Labels:
    """A labels file: per flow key, its expectations ``(kind, value, line)``;
    kind is ``"sig"`` (value a signature id), ``"tag"`` (a tag) or ``"clean"``."""

    path: str
    rows: int = 0
    expect: dict = field(default_factory=dict)


def _suggest(word, choices) -> str:
    close = difflib.get_close_matches(word, list(choices), n=1)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _read_text(path, what) -> str:
    try:
        with open(path, "rb") as f:
            raw = f.read()
    except FileNotFoundError:
        raise RateError(path, [f"cannot read the {what}: no such file"]) from None
    except IsADirectoryError:
        raise RateError(path, [f"cannot read the {what}: it is a directory"]) from None
    except OSError as err:
        raise RateError(path, [f"cannot read the {what}: {err.strerror}"]) from None
    try:
        return raw.decode("utf-8").removeprefix("\ufeff")
    except UnicodeDecodeError as err:
        line = raw.count(b"\n", 0, err.start) + 1
        raise RateError(path, [f"line {line}: not UTF-8 text (byte 0x{raw[err.start]:02x} at "
                               f"offset {err.start})"]) from None


def _address(text):
    try:
        return str(ipaddress.ip_address(text))
    except ValueError:
        return None


def _port(text):
    if not (text.isascii() and text.isdigit()) or int(text) > 65535:
        return None
    return int(text)


def load_labels(path, sigset) -> Labels:
    """Read a labels CSV and check every row against ``sigset``.

    The first row is the header: the columns of ``LABEL_COLUMNS`` in any
    order.  Each further row is one expected verdict for one flow:
    ``transport`` (tcp | udp), the two addresses (IPv4 or IPv6, one family),
    the two ports (0-65535), and ``expect``: a signature id of the set,
    ``tag:NAME`` for a tag some signature carries, or ``clean``.  Blank lines
    are skipped.  Raises :class:`RateError` with every problem and its line:
    a missing header, an unknown or missing column, a row of the wrong
    length, a bad transport, address or port, an unknown signature id or
    tag, a repeated row, or a flow labelled ``clean`` that also expects a
    verdict.
    """
    source = os.fsdecode(path)
    text = _read_text(path, "labels file")
    ids = {s.id for s in sigset}
    tags = {t for s in sigset for t in s.tags}
    reader = csv.reader(io.StringIO(text))
    problems = []
    labels = Labels(source)
    header = None
    seen = {}
    try:
        for cells in reader:
            line = reader.line_num
            if not any(c.strip() for c in cells):
                continue
            if header is None:
                header = _header(cells, line, problems)
                if header is None:
                    break
                continue
            labels.rows += 1
            row = _label_row(cells, header, line, ids, tags, problems)
            if row is None:
                continue
            key, kind, value = row
            first = seen.setdefault((key, kind, value), line)
            if first != line:
                problems.append(f"line {line}: repeats line {first}")
                continue
            labels.expect.setdefault(key, []).append((kind, value, line))
    except csv.Error as err:
        problems.append(f"line {reader.line_num}: not valid CSV: {err}")
    if header is None and not problems:
        problems.append("line 1: empty file: expected a header row "
                        f"{','.join(LABEL_COLUMNS)}")
    for rows in labels.expect.values():
        clean = [r for r in rows if r[0] == "clean"]
        other = [r for r in rows if r[0] != "clean"]
        if clean and other:
            problems.append(f"line {max(clean[0][2], other[0][2])}: the flow is labelled clean "
                            f"(line {clean[0][2]}) and also expects "
                            f"{_expect_text(other[0])} (line {other[0][2]})")
    if problems:
        raise RateError(source, _by_line(problems))
    return labels


def _by_line(problems) -> list[str]:
    """Problems in line order (those without a line first), stable."""
    def line(p):
        m = re.match(r"line (\d+): ", p)
        return int(m.group(1)) if m else 0

    return sorted(problems, key=line)


def _header(cells, line, problems) -> dict | None:
    """Column name -> index, or None with the problems appended."""
    names = [c.strip().lower() for c in cells]
    if not set(names) & set(LABEL_COLUMNS):
        problems.append(f"line {line}: missing header row: the first row must name the "
                        f"columns {','.join(LABEL_COLUMNS)}")
        return None
    found = []
    for name in names:
        if name not in LABEL_COLUMNS:
            found.append(f"line {line}: unknown column {name!r}" + _suggest(name, LABEL_COLUMNS))
    for dup in sorted({n for n in names if names.count(n) > 1}):
        found.append(f"line {line}: column {dup!r} appears twice")
    missing = [c for c in LABEL_COLUMNS if c not in names]
    if missing:
        found.append(f"line {line}: missing column{'s' if len(missing) > 1 else ''} "
                     + ", ".join(repr(c) for c in missing))
    problems.extend(found)
    return None if found else {name: i for i, name in enumerate(names)}


def _label_row(cells, header, line, ids, tags, problems):
    """(flow key, kind, value) of one data row, or None with its problems appended."""
    if len(cells) != len(header):
        problems.append(f"line {line}: {len(cells)} fields, the header has {len(header)}")
        return None
    get = {name: cells[i].strip() for name, i in header.items()}
    found = []
    transport = get["transport"].lower()
    if transport not in ("tcp", "udp"):
        found.append(f"transport {get['transport']!r}: expected tcp or udp")
    addrs = []
    for col in ("client_ip", "server_ip"):
        addr = _address(get[col])
        if addr is None:
            found.append(f"{col} {get[col]!r}: bad address (expected IPv4 or IPv6)")
        addrs.append(addr)
    if None not in addrs and (":" in addrs[0]) != (":" in addrs[1]):
        found.append("client_ip and server_ip are of different address families")
    ports = []
    for col in ("client_port", "server_port"):
        port = _port(get[col])
        if port is None:
            found.append(f"{col} {get[col]!r}: bad port (expected 0-65535)")
        ports.append(port)
    expect = get["expect"]
    kind = value = None
    if expect == "clean":
        kind, value = "clean", ""
    elif expect.startswith("tag:"):
        kind, value = "tag", expect[4:]
        if value not in tags:
            found.append(f"expect {expect!r}: unknown tag {value!r}" + _suggest(value, tags))
    elif not expect:
        found.append("expect is empty: give a signature id, tag:NAME or clean")
    else:
        kind, value = "sig", expect
        if expect not in ids:
            found.append(f"expect {expect!r}: unknown signature id" + _suggest(expect, ids))
    if found:
        problems.extend(f"line {line}: {p}" for p in found)
        return None
    return (transport, addrs[0], ports[0], addrs[1], ports[1]), kind, value


def _expect_text(row) -> str:
    kind, value = row[0], row[1]
    return {"sig": value, "tag": f"tag:{value}", "clean": "clean"}[kind]


# --- device profile --------------------------------------------------------

@dataclass
class Profile:
    """A device's limits: flow table size, held bytes per flow, table layout and budget."""

    path: str
    name: str = ""
    max_flows: int = 65536
    hold_bytes: int = 65536
    layout: str = "auto"
    budget: int | None = None


def load_profile(path) -> Profile:
    """Read a device profile (TOML, top-level keys of ``PROFILE_KEYS``, all optional).

    ``max_flows``: integer >= 1; ``hold_bytes``: bytes >= 0 (integer or text
    like ``"4KiB"``); ``layout``: dense | compact | auto; ``budget``: bytes
    > 0 the table image may take; ``name``: text.  Missing limits are the
    host's (scan's defaults).  Raises :class:`RateError` with every problem.
    """
    from seamscan.engine import parse_size

    source = os.fsdecode(path)
    text = _read_text(path, "profile")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        msg = str(err)
        m = re.search(r" \(at line (\d+), column \d+\)$", msg)
        raise RateError(source, [f"line {m.group(1)}: not valid TOML: {msg[:m.start()]}" if m
                                 else f"not valid TOML: {msg}"]) from None
    problems = []
    prof = Profile(source)

    def at(key):
        m = re.search(rf"^\s*{re.escape(key)}\s*=", text, re.M)
        return f"line {text.count(chr(10), 0, m.start()) + 1}: " if m else ""

    for key in doc:
        if key not in PROFILE_KEYS:
            problems.append(f"{at(key)}unknown key {key!r}" + _suggest(key, PROFILE_KEYS))
    if "name" in doc:
        if isinstance(doc["name"], str):
            prof.name = doc["name"]
        else:
            problems.append(f"{at('name')}name: expected a string")
    if "max_flows" in doc:
        v = doc["max_flows"]
        if isinstance(v, int) and not isinstance(v, bool) and v >= 1:
            prof.max_flows = v
        else:
            problems.append(f"{at('max_flows')}max_flows: expected an integer >= 1, got {v!r}")
    for key, least in (("hold_bytes", 0), ("budget", 1)):
        if key not in doc:
            continue
        v = doc[key]
        try:
            if isinstance(v, bool) or not isinstance(v, int | str):
                raise ValueError
            size = parse_size(v)
            if size < least:
                raise ValueError
            setattr(prof, key, size)
        except ValueError:
            problems.append(f"{at(key)}{key}: expected a byte count >= {least} (an integer or "
                            f"text like \"4KiB\"), got {v!r}")
    if "layout" in doc:
        v = doc["layout"]
        if v in LAYOUTS:
            prof.layout = v
        else:
            problems.append(f"{at('layout')}layout: {v!r} is not one of {', '.join(LAYOUTS)}")
    if problems:
        raise RateError(source, _by_line(problems))
    return prof


# --- one replay of the captures ----------------------------------------------

class _Flow:
    __slots__ = ("files", "connections", "first_ts", "last_ts", "client_bytes", "server_bytes",
                 "matches", "gaps", "ends", "first_match_ts", "hits")

    def __init__(self):
        self.files = []
        self.connections = 0
        self.first_ts = self.last_ts = self.first_match_ts = None
        self.client_bytes = self.server_bytes = self.matches = self.gaps = 0
        self.ends = Counter()
        self.hits = Counter()


class _Sig:
    __slots__ = ("matches", "side_matches", "flows", "side_flows", "clients", "servers",
                 "first_ts", "last_ts")

    def __init__(self):
        self.matches = 0
        self.side_matches = Counter()
        self.flows = set()
        self.side_flows = {"client": set(), "server": set()}
        self.clients = set()
        self.servers = set()
        self.first_ts = math.inf
        self.last_ts = -math.inf


class Run:
    """What one signature set found on the captures, gathered record by record
    (:meth:`write` is the replay's ``emit``): per flow, per signature, the
    gaps, the evicted flow records, counters and per-capture totals."""

    def __init__(self):
        self.flows: dict[tuple, _Flow] = {}
        self.sigs: dict[str, _Sig] = {}
        self.gaps: list[dict] = []
        self.evicted: list[dict] = []
        self.counters = Counter()
        self.captures: list[dict] = []

    def _flow(self, key) -> _Flow:
        f = self.flows.get(key)
        if f is None:
            f = self.flows[key] = _Flow()
        return f

    def write(self, rec: dict) -> None:
        kind = rec["type"]
        if kind == "match":
            key = flow_key(rec)
            f = self._flow(key)
            sid, ts, side = rec["sig"], rec["ts"], rec["side"]
            f.hits[sid] += 1
            if f.first_match_ts is None or ts < f.first_match_ts:
                f.first_match_ts = ts
            s = self.sigs.get(sid)
            if s is None:
                s = self.sigs[sid] = _Sig()
            s.matches += 1
            s.side_matches[side] += 1
            s.flows.add(key)
            s.side_flows[side].add(key)
            s.clients.add(rec["client_ip"])
            s.servers.add(rec["server_ip"])
            s.first_ts = min(s.first_ts, ts)
            s.last_ts = max(s.last_ts, ts)
        elif kind == "flow":
            f = self._flow(flow_key(rec))
            if rec["file"] not in f.files:
                f.files.append(rec["file"])
            f.connections += 1
            f.first_ts = rec["first_ts"] if f.first_ts is None else min(f.first_ts,
                                                                        rec["first_ts"])
            f.last_ts = rec["last_ts"] if f.last_ts is None else max(f.last_ts, rec["last_ts"])
            f.client_bytes += rec["client_bytes"]
            f.server_bytes += rec["server_bytes"]
            f.matches += rec["matches"]
            f.gaps += rec["gaps"]
            f.ends[rec["end"]] += 1
            if rec["end"] == "evicted":
                self.evicted.append(rec)
        elif kind == "gap":
            self.gaps.append(rec)

    def add_file(self, result) -> None:
        c = result.counters
        from seamscan.replay import add_counters

        add_counters(self.counters, c)
        self.captures.append({"path": result.path, "frames": c.get("frames", 0),
                              "flows": c.get("flows", 0),
                              "bytes_scanned": c.get("bytes_scanned", 0),
                              "matches": c.get("matches", 0), "error": result.error})

    @property
    def flagged(self) -> set:
        return {k for k, f in self.flows.items() if f.hits}


def run_captures(paths, table, options=None, *, each_file=False) -> Run:
    """Replay the captures with ``table`` under ``options`` into one :class:`Run`:
    as one continuous capture in the order given (a rotated ring), or with
    ``each_file`` each on its own."""
    from seamscan.replay import replay_file, replay_files

    run = Run()
    if each_file:
        for path in paths:
            run.add_file(replay_file(path, table, options, emit=run.write))
    else:
        for result in replay_files(paths, table, options, emit=run.write):
            run.add_file(result)
    return run


# --- the report ------------------------------------------------------------

def _finite(x):
    return None if x is None or not math.isfinite(x) else x


def _ratio(a, b):
    return a / b if b else None


def signature_stats(run: Run, sigset, noisy_share: float = NOISY_SHARE) -> list[dict]:
    """Per signature of ``sigset``, in set order (see ``REPORT_SCHEMA``, scores left null)."""
    nflows = len(run.flows)
    out = []
    for sig in sigset:
        s = run.sigs.get(sig.id) or _Sig()
        share = len(s.flows) / nflows if nflows else 0.0
        out.append({
            "id": sig.id, "label": sig.label, "pattern": sig.readable(), "tags": list(sig.tags),
            "matches": s.matches,
            "flows": len(s.flows), "share": share, "clients": len(s.clients),
            "servers": len(s.servers), "first_ts": _finite(s.first_ts),
            "last_ts": _finite(s.last_ts),
            "sides": {side: {"matches": s.side_matches[side], "flows": len(s.side_flows[side])}
                      for side in ("client", "server")},
            "noisy": share > noisy_share, "scores": None})
    return out


def part_probes(sigset) -> list[tuple[int, str, int, dict]]:
    """For each multi-part signature: (signature index, kind, part number,
    probe signature): ``occurred`` probes are one part alone, ``reached``
    probes the parts up to it (for part 2 and on; the last one is the
    signature itself), each with the signature's side, transport, ports and
    scope and no window.  Probe ids cannot clash with a set's ids."""
    probes = []
    for index, sig in enumerate(sigset):
        parts = sig.pattern_parts()
        if len(parts) < 2:
            continue
        common = {"side": sig.side, "transport": sig.transport}
        if sig.ports is not None:
            common["ports"] = list(sig.ports)
        if sig.transport != "tcp":
            common["scope"] = sig.scope

        def table(part, k):
            entry = {part.field: part.source, "fold_case": part.fold_case}
            if k:
                entry["spacing"] = [part.low, "any" if part.high is None else part.high]
            return entry

        for k, part in enumerate(parts):
            probes.append((index, "occurred", k, {"id": f"\0{index}/o/{k}", **common,
                                                  part.field: part.source,
                                                  "fold_case": part.fold_case}))
            if 0 < k < len(parts) - 1:
                probes.append((index, "reached", k, {
                    "id": f"\0{index}/r/{k}", **common,
                    "part": [table(p, j) for j, p in enumerate(parts[:k + 1])]}))
    return probes


def add_part_stats(sigs: list[dict], sigset, captures, options) -> None:
    """Fill ``parts`` of each multi-part signature's stats (see ``REPORT_SCHEMA``):
    one more replay, of the probes of :func:`part_probes`, when the set has any."""
    for s in sigs:
        s["parts"] = None
    probes = part_probes(sigset)
    if not probes:
        return
    from seamscan import engine
    from seamscan.signatures import signature_set

    run = run_captures(captures, engine.compile(signature_set([p for *_x, p in probes])),
                       options)
    found = {p["id"]: (run.sigs[p["id"]].matches if p["id"] in run.sigs else 0)
             for *_x, p in probes}
    for index, sig in enumerate(sigset):
        parts = sig.pattern_parts()
        if len(parts) < 2:
            continue
        rows = []
        for k, part in enumerate(parts):
            reached = (found[f"\0{index}/o/0"] if k == 0 else sigs[index]["matches"]
                       if k == len(parts) - 1 else found[f"\0{index}/r/{k}"])
            rows.append({"pattern": part.readable(), "occurred": found[f"\0{index}/o/{k}"],
                         "reached": reached})
        for k, row in enumerate(rows):
            further = rows[k + 1]["reached"] if k + 1 < len(rows) else row["reached"]
            row["near_misses"] = max(0, row["reached"] - further)
        sigs[index]["parts"] = rows


def set_stats(run: Run, sigs: list[dict]) -> dict:
    """Per set totals (see ``REPORT_SCHEMA``)."""
    c = run.counters
    flagged = len(run.flagged)
    firsts = [f.first_ts for f in run.flows.values() if f.first_ts is not None]
    lasts = [f.last_ts for f in run.flows.values() if f.last_ts is not None]
    return {"flows": len(run.flows), "connections": sum(f.connections for f in run.flows.values()),
            "flows_flagged": flagged, "flagged_share": _ratio(flagged, len(run.flows)) or 0.0,
            "bytes_scanned": c.get("bytes_scanned", 0), "matches": c.get("matches", 0),
            "frames": c.get("frames", 0), "gaps": c.get("gaps", 0),
            "first_ts": min(firsts, default=None), "last_ts": max(lasts, default=None),
            "signatures": len(sigs), "fired": sum(1 for s in sigs if s["matches"]),
            "never_fired": sum(1 for s in sigs if not s["matches"]),
            "noisy": sum(1 for s in sigs if s["noisy"])}


def score_labels(run: Run, sigset, labels: Labels) -> dict:
    """TP / FP / FN per signature and per set, flow verdicts and the lists
    (see the module doc for the definitions).  Returns ``{"per_signature":
    {id: scores}, "verdicts": {key: verdict}, **the labels section}``."""
    tags_of = {s.id: set(s.tags) for s in sigset}
    per = {s.id: Counter() for s in sigset}
    verdicts = {}
    fps, fns, absent, unlabelled = [], [], [], []
    tag_fn = 0
    for key, f in sorted(run.flows.items()):
        rows = labels.expect.get(key)
        fired = set(f.hits)
        if rows is None:
            verdicts[key] = "unlabelled"
            if fired:
                unlabelled.append({**key_fields(key), "signatures": sorted(fired)})
                for sid in fired:
                    per.setdefault(sid, Counter())["unlabelled"] += 1
            continue
        want_ids = {v for k, v, _ in rows if k == "sig"}
        want_tags = {v for k, v, _ in rows if k == "tag"}
        for sid in sorted(fired):
            if sid in want_ids or want_tags & tags_of.get(sid, set()):
                per.setdefault(sid, Counter())["tp"] += 1
            else:
                per.setdefault(sid, Counter())["fp"] += 1
                fps.append({**key_fields(key), "signature": sid})
        for kind, value, _line in rows:
            if kind == "sig" and value not in fired:
                per.setdefault(value, Counter())["fn"] += 1
                fns.append({**key_fields(key), "expect": value})
            elif kind == "tag" and not any(value in tags_of.get(s, ()) for s in fired):
                tag_fn += 1
                fns.append({**key_fields(key), "expect": f"tag:{value}"})
        expected = bool(want_ids or want_tags)
        verdicts[key] = (("flagged_expected" if expected else "flagged_clean") if fired
                         else ("missed" if expected else "clean_ok"))
    for key, rows in sorted(labels.expect.items()):
        if key not in run.flows:
            absent.append({**key_fields(key), "expect": [_expect_text(r) for r in rows]})
    scores = {}
    for sid, c in per.items():
        tp, fp, fn = c["tp"], c["fp"], c["fn"]
        scores[sid] = {"tp": tp, "fp": fp, "fn": fn, "unlabelled": c["unlabelled"],
                       "precision": _ratio(tp, tp + fp), "recall": _ratio(tp, tp + fn)}
    tp = sum(c["tp"] for c in per.values())
    fp = sum(c["fp"] for c in per.values())
    fn = sum(c["fn"] for c in per.values()) + tag_fn
    counts = Counter(verdicts.values())
    return {
        "per_signature": scores, "verdicts": verdicts,
        "path": labels.path, "rows": labels.rows, "flows_labelled": len(labels.expect),
        "set": {"tp": tp, "fp": fp, "fn": fn, "precision": _ratio(tp, tp + fp),
                "recall": _ratio(tp, tp + fn)},
        "flows": {k: counts.get(k, 0) for k in ("flagged_expected", "flagged_clean", "missed",
                                                "clean_ok", "unlabelled")}
        | {"absent": len(absent)},
        "false_positives": fps, "false_negatives": fns, "absent": absent,
        "unlabelled": unlabelled}


def flow_list(run: Run, labels: Labels | None, verdicts: dict | None) -> list[dict]:
    """Every flow of ``run``, by first capture time (see ``REPORT_SCHEMA``)."""
    out = []
    for key, f in sorted(run.flows.items(), key=lambda kv: (kv[1].first_ts or 0, kv[0])):
        rows = labels.expect.get(key) if labels else None
        out.append({**key_fields(key), "files": f.files, "connections": f.connections,
                    "first_ts": f.first_ts, "last_ts": f.last_ts,
                    "client_bytes": f.client_bytes, "server_bytes": f.server_bytes,
                    "matches": f.matches, "gaps": f.gaps, "ends": dict(f.ends),
                    "first_match_ts": f.first_match_ts,
                    "signatures": dict(sorted(f.hits.items())),
                    "expect": [_expect_text(r) for r in rows] if rows else None,
                    "verdict": verdicts.get(key) if verdicts is not None else None})
    return out


def _redefined(a, b) -> bool:
    """Whether two signatures of one id differ in anything but label and tags."""
    return dataclasses.replace(a, label="", tags=()) != dataclasses.replace(b, label="", tags=())


def _delta(old, new):
    return {"old": old, "new": new,
            "delta": None if old is None or new is None else new - old}


def compare_sets(new: Run, new_set, new_sigs, old: Run, old_set, old_sigs,
                 new_scores=None, old_scores=None) -> dict:
    """The A/B section (see ``REPORT_SCHEMA``): what ``new_set`` gains and loses
    against ``old_set`` on the same captures."""
    new_by = {s["id"]: s for s in new_sigs}
    old_by = {s["id"]: s for s in old_sigs}
    old_def = {s.id: s for s in old_set}
    added = [{"id": i, "matches": s["matches"], "flows": s["flows"]}
             for i, s in new_by.items() if i not in old_by]
    removed = [{"id": i, "matches": s["matches"], "flows": s["flows"]}
               for i, s in old_by.items() if i not in new_by]
    changed, unchanged, redefined = [], [], []
    for sig in new_set:
        if sig.id not in old_by:
            continue
        n, o = new_by[sig.id], old_by[sig.id]
        redef = _redefined(sig, old_def[sig.id])
        if redef:
            redefined.append(sig.id)
        if (n["matches"], n["flows"]) != (o["matches"], o["flows"]):
            changed.append({"id": sig.id, "old_matches": o["matches"],
                            "new_matches": n["matches"], "delta": n["matches"] - o["matches"],
                            "old_flows": o["flows"], "new_flows": n["flows"],
                            "redefined": redef})
        else:
            unchanged.append(sig.id)
    gained, lost = [], []
    for key in sorted(set(new.flows) | set(old.flows)):
        nf = set(new.flows[key].hits) if key in new.flows else set()
        of = set(old.flows[key].hits) if key in old.flows else set()
        if nf - of:
            gained.append({**key_fields(key), "signatures": sorted(nf - of)})
        if of - nf:
            lost.append({**key_fields(key), "signatures": sorted(of - nf)})
    ns, os_ = set_stats(new, new_sigs), set_stats(old, old_sigs)
    summary = {k: _delta(os_[k], ns[k]) for k in ("matches", "flows_flagged", "fired",
                                                  "never_fired")}
    for k in ("precision", "recall"):
        summary[k] = _delta(old_scores["set"][k] if old_scores else None,
                            new_scores["set"][k] if new_scores else None)
    return {"rules": {"path": old_set.source, "name": old_set.name, "version": old_set.version,
                      "signatures": len(old_set)},
            "signatures": {"added": added, "removed": removed, "changed": changed,
                           "unchanged": unchanged, "redefined": redefined},
            "flows": {"gained": gained, "lost": lost}, "summary": summary}


def table_fit(sigset, profile: Profile):
    """(fit section, the device table or None): compile with the profile's
    layout and budget; a budget nothing fits is reported, not raised."""
    from seamscan import engine

    try:
        table = engine.compile(sigset, layout=profile.layout, budget=profile.budget)
    except engine.BudgetError as err:
        return {"fits": False, "layout": profile.layout, "bytes": min(err.sizes.values()),
                "budget": profile.budget, "message": str(err)}, None
    budget = f" within the budget of {profile.budget:,} bytes" if profile.budget else \
        " (no budget given)"
    return {"fits": True, "layout": table.layout, "bytes": table.nbytes,
            "budget": profile.budget,
            "message": f"the {table.layout} table takes {table.nbytes:,} bytes{budget}"}, table


def _host_key(host_flows):
    """Device flow key -> (the host's key for that flow, whether client and server
    swapped): a flow picked up mid-stream after an eviction takes its roles by
    port, so the device may see a host flow reversed."""
    def canon(key):
        if key in host_flows:
            return key, False
        t, cip, cport, sip, sport = key
        rev = (t, sip, sport, cip, cport)
        return (rev, True) if rev in host_flows else (key, False)

    return canon


_OTHER_SIDE = {"client": "server", "server": "client"}


def compare_device(host: Run, device: Run, profile: Profile, fit: dict) -> dict:
    """The device section (see ``REPORT_SCHEMA``): the device run against the
    host run, flow by flow (device flows whose roles came out swapped are
    matched to the host flow they are, and counted in ``flows.swapped``)."""
    canon = _host_key(host.flows)
    dev_hits, swapped = {}, 0
    for k, f in device.flows.items():
        ck, flipped = canon(k)
        dev_hits.setdefault(ck, Counter()).update(f.hits)
        swapped += f.connections if flipped else 0
    evicted = Counter(canon(flow_key(r))[0] for r in device.evicted)
    host_gaps = Counter((flow_key(g), g["side"], g["start"], g["end"], g["file"])
                        for g in host.gaps)
    new_gaps = []
    for g in device.gaps:
        ck, flipped = canon(flow_key(g))
        side = _OTHER_SIDE[g["side"]] if flipped else g["side"]
        k = (ck, side, g["start"], g["end"], g["file"])
        if host_gaps[k]:
            host_gaps[k] -= 1
        else:
            new_gaps.append({**key_fields(ck), "side": side, "start": g["start"],
                             "end": g["end"], "file": g["file"], "frame": g["frame"]})
    missed = {"by_signature": Counter(), "by_flow": []}
    extra = {"by_signature": Counter(), "by_flow": []}
    for key in sorted(set(host.flows) | set(dev_hits)):
        h = host.flows[key].hits if key in host.flows else Counter()
        d = dev_hits.get(key, Counter())
        for sid in sorted(set(h) | set(d)):
            diff = h[sid] - d[sid]
            if diff:
                part = missed if diff > 0 else extra
                part["by_signature"][sid] += abs(diff)
                part["by_flow"].append({**key_fields(key), "signature": sid, "host": h[sid],
                                        "device": d[sid]})
    for part in (missed, extra):
        part["by_signature"] = dict(sorted(part["by_signature"].items(),
                                           key=lambda kv: (-kv[1], kv[0])))
    hc, dc = host.counters, device.counters
    return {
        "profile": {"path": profile.path, "name": profile.name, "max_flows": profile.max_flows,
                    "hold_bytes": profile.hold_bytes, "layout": profile.layout,
                    "budget": profile.budget},
        "table": fit,
        "flows": {"host": len(host.flows), "device": len(dev_hits),
                  "evicted": dc.get("ended_evicted", 0), "swapped": swapped,
                  "evicted_flows": [{**key_fields(k), "times": n}
                                    for k, n in sorted(evicted.items())]},
        "gaps": {"host": hc.get("gaps", 0), "device": dc.get("gaps", 0),
                 "hold_cap": dc.get("hold_cap_gaps", 0), "hold_total": dc.get("hold_total_gaps", 0),
                 "new": new_gaps},
        "matches": {"host": hc.get("matches", 0), "device": dc.get("matches", 0),
                    "missed": sum(missed["by_signature"].values()),
                    "extra": sum(extra["by_signature"].values())},
        "missed": missed, "extra": extra}


def rate(captures, sigset, *, labels: Labels | None = None, against=None,
         profile: Profile | None = None, noisy_share: float = NOISY_SHARE,
         options=None, each_file: bool = False) -> dict:
    """The report object for ``sigset`` on ``captures`` (see ``REPORT_SCHEMA``).

    ``labels`` from :func:`load_labels`, ``against`` an older
    :class:`~seamscan.signatures.SignatureSet`, ``profile`` from
    :func:`load_profile`; ``options`` are the host run's
    :class:`~seamscan.replay.ReplayOptions` (default: scan's).  The captures
    are one continuous capture in the order given, or with ``each_file``
    each replayed on its own.  Raises
    :class:`~seamscan.compiler.CompileError` when a set cannot be compiled at
    all; damaged captures are reported in ``captures[].error``.  Every string
    is valid UTF-8: a file name that is not shows its other bytes as ``\\xNN``
    (:mod:`seamscan.filenames`).
    """
    from seamscan import engine
    from seamscan.filenames import shown_all
    from seamscan.replay import ReplayOptions

    options = options or ReplayOptions()
    captures = [os.fsdecode(p) for p in captures]
    table = engine.compile(sigset)
    run = run_captures(captures, table, options, each_file=each_file)
    sigs = signature_stats(run, sigset, noisy_share)
    add_part_stats(sigs, sigset, captures, options)
    scored = score_labels(run, sigset, labels) if labels else None
    if scored:
        for s in sigs:
            s["scores"] = scored["per_signature"].get(s["id"])
    report = {
        "format": FORMAT_NAME, "version": FORMAT_VERSION,
        "rules": {"path": sigset.source, "name": sigset.name, "version": sigset.version,
                  "signatures": len(sigset)},
        "captures": run.captures,
        "options": {"noisy_share": noisy_share, "hold_bytes": options.hold_bytes,
                    "max_flows": options.max_flows},
        "set": set_stats(run, sigs), "signatures": sigs,
        "never_fired": [s["id"] for s in sigs if not s["matches"]],
        "noisy": [s["id"] for s in sigs if s["noisy"]],
        "flows": flow_list(run, labels, scored["verdicts"] if scored else None),
        "labels": None, "against": None, "device": None}
    if scored:
        report["labels"] = {k: v for k, v in scored.items()
                            if k not in ("per_signature", "verdicts")}
    if against is not None:
        old_run = run_captures(captures, engine.compile(against), options,
                               each_file=each_file)
        old_sigs = signature_stats(old_run, against, noisy_share)
        old_scored = score_labels(old_run, against, labels) if labels else None
        report["against"] = compare_sets(run, sigset, sigs, old_run, against, old_sigs,
                                         scored, old_scored)
    if profile is not None:
        fit, device_table = table_fit(sigset, profile)
        dev_opts = dataclasses.replace(options, max_flows=profile.max_flows,
                                       hold_bytes=profile.hold_bytes)
        dev_run = run_captures(captures, device_table or table, dev_opts,
                               each_file=each_file)
        report["device"] = compare_device(run, dev_run, profile, fit)
    return shown_all(report)


# --- command line ------------------------------------------------------------

RATE_EPILOG = """\
Labels (--labels): a CSV file with the header row
  transport,client_ip,client_port,server_ip,server_port,expect
and one row per expected verdict of a flow; expect is a signature id,
tag:NAME (some signature with that tag fires) or clean (nothing fires).

Device profile (--profile): a TOML file with any of
  name = "edge-gw-2"   max_flows = 256   hold_bytes = "4KiB"
  layout = "compact"   budget = "32KiB"

Exit codes: 0 done; 2 usage error or a bad signature set, labels file or
profile (file and line named); 3 a damaged capture (rated up to the damage).

File names that are not UTF-8 appear with each such byte as \\xNN (Python's
backslashreplace form) in the tables, report.json, report.html and messages.

Examples:
  seamscan rate pcaps_demo/*.pcap* --rules pcaps_demo/demo-signatures.toml \\
      --labels pcaps_demo/labels.csv
  seamscan rate lab.pcapng --rules v4.toml --against v3.toml --report out/
"""


def _share_arg(text):
    import argparse

    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not 0.0 <= value <= 1.0:
        raise argparse.ArgumentTypeError(f"expected a share between 0 and 1, got {text!r}")
    return value


def add_rate_parser(subparsers):
    """Add the ``rate`` subcommand to ``subparsers`` (an argparse subparsers action)."""
    import argparse

    ra = subparsers.add_parser(
        "rate", help="judge a signature set on lab captures: hit rates, labels, A/B, a device",
        description="Replay lab captures with a signature set and report what fires, where and\n"
        "how often, what never fires and what is noisy; with labels, true and false\n"
        "positives, precision and recall; against an older set, what changed; under a\n"
        "device profile, what the device would miss.", epilog=RATE_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    ra.add_argument("captures", nargs="+", metavar="CAPTURE", help="pcap or pcapng files")
    ra.add_argument("--rules", required=True, metavar="SET.toml", help="the signature set to rate")
    ra.add_argument("--labels", metavar="LABELS.csv", help="expected verdicts per flow")
    ra.add_argument("--against", metavar="OLD.toml",
                    help="an older signature set to compare with on the same captures")
    ra.add_argument("--profile", metavar="DEVICE.toml",
                    help="device limits to replay under (max_flows, hold_bytes, layout, budget)")
    ra.add_argument("--report", metavar="DIR",
                    help="write report.json, signatures.csv and report.html into DIR")
    ra.add_argument("--each-file", action="store_true",
                    help="replay each capture on its own; by default the captures are one "
                    "continuous capture in the order given (a rotated ring)")
    ra.add_argument("--format", choices=("table", "json"), default="table",
                    help="terminal tables (default) or the report object as JSON")
    ra.add_argument("--noisy-share", type=_share_arg, default=NOISY_SHARE, metavar="SHARE",
                    help="a signature hitting more than this share of flows is noisy "
                    "(default 0.5)")
    return ra


def _fail(message: str, code: int = EXIT_USAGE) -> int:
    from seamscan.filenames import shown

    print(f"seamscan: {shown(message)}", file=sys.stderr)
    return code


def cmd_rate(args) -> int:
    """Run ``seamscan rate``: 0 done, 2 a usage error or a bad input file
    (signature set, labels, profile), 3 a damaged capture (reported, the rest
    rated)."""
    from seamscan.compiler import CompileError
    from seamscan.filenames import shown
    from seamscan.signatures import SignatureError, load_signatures

    for path in args.captures:
        if not os.path.isfile(path):
            return _fail(f"{path}: no such capture file")
    try:
        sigset = load_signatures(args.rules)
        against = load_signatures(args.against) if args.against else None
        labels = load_labels(args.labels, sigset) if args.labels else None
        profile = load_profile(args.profile) if args.profile else None
    except (SignatureError, RateError) as err:
        return _fail(str(err))
    if args.report:
        try:
            os.makedirs(args.report, exist_ok=True)
        except OSError as err:
            return _fail(f"{args.report}: cannot create the report directory: {err.strerror}")
    try:
        report = rate(args.captures, sigset, labels=labels, against=against, profile=profile,
                      noisy_share=args.noisy_share, each_file=args.each_file)
    except CompileError as err:
        return _fail(f"{args.rules}: {err}")
    from seamscan import report as render

    if args.format == "json":
        print(render.to_json(report))
    else:
        sys.stdout.write(render.format_tables(report))
    if args.report:
        try:
            written = render.write_report(report, args.report)
        except OSError as err:
            return _fail(f"{err.filename or args.report}: cannot write: {err.strerror}")
        print("wrote " + shown(", ".join(written)), file=sys.stderr)
    damaged = [c for c in report["captures"] if c["error"]]
    for c in damaged:
        print(f"seamscan: damaged capture: {c['error']}; everything before the damage was "
              "rated", file=sys.stderr)
    return EXIT_DAMAGED if damaged else EXIT_OK
