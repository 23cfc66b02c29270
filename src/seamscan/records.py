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
"""

from __future__ import annotations

import csv
import json
import sys

from seamscan.decode import FATES

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
        self.out.write(self._dumps(rec))
        self.out.write("\n")

    def close(self) -> None:
        self.out.flush()


class CsvWriter:
    """Match records only, one row each, header first."""

    def __init__(self, out):
        self.out = out
        self.w = csv.writer(out, lineterminator="\n")
        self.w.writerow(MATCH_FIELDS)

    def write(self, rec: dict) -> None:
        if rec["type"] == "match":
            self.w.writerow([rec[k] for k in MATCH_FIELDS])

    def close(self) -> None:
        self.out.flush()


class TableWriter:
    """A per-flow grouping for people: each flow that matched (or had trouble)
    is printed when it ends, its matches under it; then the summary."""

    def __init__(self, out, *, show_clean: bool = False, labels: dict | None = None):
        self.out = out
        self.show_clean = show_clean
        self.labels = labels or {}
        self.pending: dict[tuple, list] = {}
        self.clean = 0

    @staticmethod
    def _key(rec):
        return (rec["file"], rec["transport"], rec["client_ip"], rec["client_port"],
                rec["server_ip"], rec["server_port"])

    def write(self, rec: dict) -> None:
        kind = rec["type"]
        if kind in ("match", "gap", "overlap"):
            self.pending.setdefault(self._key(rec), []).append(rec)
        elif kind == "flow":
            self._flow(rec, self.pending.pop(self._key(rec), []))
        elif kind == "error":
            message = rec["message"]  # the reader's messages name the file first
            if not message.startswith(rec["file"]):
                message = f"{rec['file']}: {message}"
            self.out.write(f"!! {message}\n\n")
        elif kind == "summary":
            self._summary(rec)

    def _flow(self, flow, events):
        if not events and not self.show_clean:
            self.clean += 1
            return
        p = self.out.write
        cli = _endpoint(flow["client_ip"], flow["client_port"])
        srv = _endpoint(flow["server_ip"], flow["server_port"])
        p(f"{flow['transport'].upper()} {cli} -> {srv}   [{flow['file']}]\n")
        p(f"    {flow['client_packets']}+{flow['server_packets']} packets, "
          f"{_size(flow['client_bytes'])} / {_size(flow['server_bytes'])} (client / server), "
          f"ended: {flow['end']}, {flow['matches']} match{'es' if flow['matches'] != 1 else ''}\n")
        for e in events:
            where = f"{e['side']:<6} bytes {e['start']}..{e['end']}"
            if e["type"] == "match":
                label = self.labels.get(e["sig"], "")
                p(f"    {where:<30} {e['sig']:<16} frame {e['frame']:<6} {label}\n")
            else:
                p(f"    {where:<30} ({e['type']}: {'bytes never seen' if e['type'] == 'gap' else 'disagreeing bytes; first received kept'})"
                  f" frame {e['frame']}\n")
        p("\n")

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
        for events in self.pending.values():  # flows never ended (should not happen)
            for e in events:
                self.out.write(f"{e}\n")
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
