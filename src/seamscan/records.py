"""Output records: JSON Lines, CSV (match records) and a terminal table.

Record types (one JSON object per line, ``type`` first):

- ``match``: one occurrence of a signature in a flow side's stream;
- ``gap`` / ``overlap``: a hole given up, or bytes that disagreed with bytes
  received earlier (the earlier ones won), as a range of that side's stream;
- ``flow``: when a flow ends, its tuple, times, packets, bytes, matches;
- ``error``: a capture that was damaged, where, and what (its records before
  the damage are all written);
- ``summary``: the last line: what happened to every frame, drops,
  evictions, totals and speed.

Every format is valid UTF-8: a file name that is not shows each byte that is
not UTF-8 as ``\\xNN`` (``seamscan.filenames``).
"""

from __future__ import annotations

import csv
import json
import sys

from seamscan.decode import FATES
from seamscan.filenames import TextOut, needs_escape, shown_all

MATCH_FIELDS = ("sig", "transport", "client_ip", "client_port", "server_ip", "server_port",
                "side", "start", "end", "file", "frame", "ts", "ts_ns")

# Summary: frame fates (each frame read in exactly one: they add up to
# ``frames``), then drops / evictions grouped by what caused them.
FRAME_FATES = FATES


def summary_record(counters, elapsed: float) -> dict:
    c = counters
    drops = {k: c.get(k, 0) for k in sorted(c) if k.startswith("frag_") and k != "frag_reassembled"}
    flows = {k: c.get(k, 0) for k in sorted(c) if k.startswith(("ended_", "hold_", "gap",
                                                                "retransmitted",
                                                                "overlap", "ignored",
                                                                "not_captured_",
                                                                "flow_end_"))}
    rest = {k: v for k, v in sorted(c.items())
            if k not in drops and k not in flows and k not in FRAME_FATES
            and k not in ("frames", "bytes_scanned", "matches", "files", "damaged_files",
                          "flows", "frame_bytes")}
    secs = max(elapsed, 1e-9)
    return {
        "type": "summary",
        "files": c.get("files", 0),
        "damaged_files": c.get("damaged_files", 0),
        "frames": c.get("frames", 0),
        "frame_fates": {k: c.get(k, 0) for k in FRAME_FATES},
        "bytes_scanned": c.get("bytes_scanned", 0),
        "flows": c.get("flows", 0),
        "matches": c.get("matches", 0),
        "flow_events": flows,
        "fragment_drops": drops,
        "other": rest,
        "elapsed_s": round(elapsed, 6),
        "frames_per_s": round(c.get("frames", 0) / secs, 1),
        "mb_per_s": round(c.get("bytes_scanned", 0) / secs / 1e6, 3),
    }


class JsonlWriter:
    def __init__(self, out):
        self.out = out
        self._dumps = json.JSONEncoder(ensure_ascii=False, separators=(", ", ": ")).encode

    def write(self, rec: dict) -> None:
        line = self._dumps(rec)
        if needs_escape(line):  # a file name that is not UTF-8 (rare: checked per line)
            line = self._dumps(shown_all(rec))
        self.out.write(line)
        self.out.write("\n")

    def close(self) -> None:
        self.out.flush()


class CsvWriter:
    """Match records only, one row each, header first."""

    def __init__(self, out):
        self.out = out
        self.w = csv.writer(TextOut(out), lineterminator="\n")
        self.w.writerow(MATCH_FIELDS)

    def write(self, rec: dict) -> None:
        if rec["type"] == "match":
            self.w.writerow([rec[k] for k in MATCH_FIELDS])

    def close(self) -> None:
        self.out.flush()


# The table format holds a flow's lines until the flow ends; these bound it.
TABLE_LINES_PER_FLOW = 1000  # lines listed per flow; the rest are summarised
TABLE_LINES_HELD = 100_000  # lines held over all open flows (about 150 B each)


PLURAL = {"match": "es", "gap": "s", "overlap": "s"}


class _Held:
    """A flow's lines waiting for its end: the first ones, formatted; beyond
    the bounds, per (side, signature or event kind): [count, first start,
    last end, first frame, last frame]."""

    __slots__ = ("lines", "more")

    def __init__(self):
        self.lines: list[str] = []
        self.more: dict[tuple, list] = {}


class TableWriter:
    """A per-flow grouping for people: each flow that matched (or had trouble)
    is printed when it ends, its matches under it; then the summary.

    Memory stays bounded whatever the match density: a flow lists at most
    ``TABLE_LINES_PER_FLOW`` lines (and all open flows together hold at most
    ``TABLE_LINES_HELD``); the rest are summarised under the flow, per side
    and signature: how many, the first and last byte offsets and frames.
    The jsonl and csv formats write every record as it comes."""

    def __init__(self, out, *, show_clean: bool = False, labels: dict | None = None):
        self.out = TextOut(out)
        self.show_clean = show_clean
        self.labels = labels or {}
        self.pending: dict[tuple, _Held] = {}
        self.held = 0  # lines held over all pending flows
        self.clean = 0

    @staticmethod
    def _key(rec):
        # not the file: a flow record may name another file than its matches
        return (rec["transport"], rec["client_ip"], rec["client_port"], rec["server_ip"],
                rec["server_port"])

    def write(self, rec: dict) -> None:
        kind = rec["type"]
        if kind in ("match", "gap", "overlap"):
            self._hold(rec)
        elif kind == "flow":
            self._flow(rec, self.pending.pop(self._key(rec), None))
        elif kind == "error":
            message = rec["message"]  # the reader's messages name the file first
            if not message.startswith(rec["file"]):
                message = f"{rec['file']}: {message}"
            self.out.write(f"!! {message}\n\n")
        elif kind == "summary":
            self._summary(rec)

    def _hold(self, e) -> None:
        held = self.pending.get(self._key(e))
        if held is None:
            held = self.pending[self._key(e)] = _Held()
        if len(held.lines) < TABLE_LINES_PER_FLOW and self.held < TABLE_LINES_HELD:
            held.lines.append(self._line(e))
            self.held += 1
            return
        what = e["sig"] if e["type"] == "match" else f"({e['type']})"
        s = held.more.get((e["side"], what))
        if s is None:
            held.more[(e["side"], what)] = [1, e["start"], e["end"], e["frame"], e["frame"]]
        else:
            s[0] += 1
            s[2], s[4] = e["end"], e["frame"]

    def _line(self, e) -> str:
        where = f"{e['side']:<6} bytes {e['start']}..{e['end']}"
        if e["type"] == "match":
            label = self.labels.get(e["sig"], "")
            return f"    {where:<30} {e['sig']:<16} frame {e['frame']:<6} {label}\n"
        what = "bytes never seen" if e["type"] == "gap" else \
            "disagreeing bytes; first received kept"
        return f"    {where:<30} ({e['type']}: {what}) frame {e['frame']}\n"

    def _flow(self, flow, held):
        if held is None and not self.show_clean:
            self.clean += 1
            return
        p = self.out.write
        cli = _endpoint(flow["client_ip"], flow["client_port"])
        srv = _endpoint(flow["server_ip"], flow["server_port"])
        p(f"{flow['transport'].upper()} {cli} -> {srv}   [{flow['file']}]\n")
        p(f"    {flow['client_packets']}+{flow['server_packets']} packets, "
          f"{_size(flow['client_bytes'])} / {_size(flow['server_bytes'])} (client / server), "
          f"ended: {flow['end']}, {flow['matches']} match{'es' if flow['matches'] != 1 else ''}\n")
        if held is not None:
            for line in held.lines:
                p(line)
            self.held -= len(held.lines)
            self._more(held.more)
        p("\n")

    def _more(self, more) -> None:
        if not more:
            return
        p = self.out.write
        n = sum(s[0] for s in more.values())
        p(f"    ... and {n} more, not listed (the table lists at most {TABLE_LINES_PER_FLOW} "
          "lines per flow; jsonl and csv have every record), per side and signature:\n")
        for (side, what), (count, start, end, first, last) in more.items():
            kind = what.strip("()") if what.startswith("(") else "match"
            p(f"    {side:<6} {what:<16} {count} {kind}{'' if count == 1 else PLURAL[kind]}, "
              f"bytes {start}..{end} (first start .. last end), frames {first}..{last}\n")

    def _summary(self, s):
        p = self.out.write
        fates = ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in s["frame_fates"].items() if v)
        p(f"{s['files']} file(s), {s['frames']} frames ({fates or 'none decoded'}); "
          f"{s['flows']} flows, {s['matches']} matches; {self.clean} flows without matches not shown\n")
        trouble = {k: v for k, v in {**s["flow_events"], **s["fragment_drops"]}.items()
                   if v and not k.startswith("ended_")}
        if trouble:
            p("    " + ", ".join(f"{k.replace('_', ' ')}: {v}" for k, v in trouble.items()) + "\n")
        p(f"    {_size(s['bytes_scanned'])} scanned in {s['elapsed_s']:.2f} s\n")

    def close(self) -> None:
        for held in self.pending.values():  # flows never ended (should not happen)
            for line in held.lines:
                self.out.write(line)
            self._more(held.more)
        self.pending.clear()
        self.out.flush()


def _endpoint(ip, port):
    return f"[{ip}]:{port}" if ":" in ip else f"{ip}:{port}"


def _size(n: int) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n}"


def make_writer(fmt: str, out=None, **kw):
    out = out or sys.stdout
    return {"jsonl": JsonlWriter, "csv": CsvWriter}.get(fmt, None)(out) if fmt != "table" \
        else TableWriter(out, **kw)
