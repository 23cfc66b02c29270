"""Rendering a rate report (:func:`seamscan.evaluate.rate`) for people and programs.

- :func:`format_tables`: the terminal view, compact tables of our own;
- :func:`to_json`: the report object as JSON (schema in
  ``seamscan.evaluate.REPORT_SCHEMA``);
- :func:`write_report`: ``report.json``, ``signatures.csv`` (one row per
  signature, columns ``CSV_COLUMNS``) and ``report.html``, one self-contained
  page whose charts (matplotlib, drawn only here) are embedded base64 PNGs.
"""

from __future__ import annotations

import base64
import csv
import datetime
import html
import io
import json
import os
import time

CSV_COLUMNS = ("id", "label", "tags", "matches", "flows", "share", "clients", "servers",
               "first_ts", "last_ts", "client_matches", "server_matches", "noisy", "tp", "fp",
               "fn", "unlabelled", "precision", "recall", "old_matches", "delta",
               "device_missed", "pattern")
LIST_LIMIT = 20  # terminal: list items shown before "... and N more"
CHART_SIGNATURES = 40  # most signatures one bar chart shows
HTML_FLOWS = 500  # most flows the page lists
VERDICT_WORDS = {"flagged_expected": "flagged as expected", "flagged_clean": "flagged though clean",
                 "missed": "missed", "clean_ok": "clean as labelled", "unlabelled": "unlabelled",
                 "absent": "labelled but absent from the captures"}


def to_json(report: dict) -> str:
    return json.dumps(report, indent=1, ensure_ascii=False)


# --- small formatters --------------------------------------------------------

def flow_text(f: dict) -> str:
    """``TCP 192.0.2.10:40101 -> 198.51.100.21:80`` (IPv6 addresses in brackets)."""
    def end(ip, port):
        return f"[{ip}]:{port}" if ":" in ip else f"{ip}:{port}"

    return (f"{f['transport'].upper()} {end(f['client_ip'], f['client_port'])} -> "
            f"{end(f['server_ip'], f['server_port'])}")


def clock(ts, date: bool = False) -> str:
    """A capture time in UTC: ``09:00:00.015`` (with the date if asked); ``-`` for none."""
    if ts is None:
        return "-"
    whole = int(ts // 1)
    text = time.strftime("%Y-%m-%d %H:%M:%S" if date else "%H:%M:%S", time.gmtime(whole))
    return f"{text}.{int((ts - whole) * 1000):03d}"


def spans_days(first, last) -> bool:
    """True when capture times ``first`` and ``last`` fall on different UTC days."""
    if first is None or last is None:
        return False
    return time.gmtime(int(first // 1))[:3] != time.gmtime(int(last // 1))[:3]


def time_range(first, last) -> str:
    """``1999-11-11 21:46:16.000 .. 1999-11-13 01:13:40.277`` (UTC): the end's date
    is left out only when it is the start's day; ``-`` for none."""
    if first is None:
        return "-"
    return f"{clock(first, True)} .. {clock(last, spans_days(first, last))}"


def _dated(report) -> bool:
    """Whether the report's time columns need the date: its capture time spans days."""
    return spans_days(report["set"]["first_ts"], report["set"]["last_ts"])


def size(n: int) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return str(n)


def ratio(x, digits: int = 3) -> str:
    return "-" if x is None else f"{x:.{digits}f}"


def signed(x, digits: int = 0) -> str:
    if x is None:
        return "-"
    return f"{x:+.{digits}f}" if digits else f"{x:+d}"


def plural(n: int, word: str, many: str | None = None) -> str:
    return f"{n} {word if n == 1 else many or word + 's'}"


def _grid(head, rows, right=()) -> list[str]:
    """Columns padded to their widest cell; indices in ``right`` right-aligned."""
    widths = [max(len(str(r[i])) for r in [head, *rows]) for i in range(len(head))]
    out = []
    for r in [head, *rows]:
        cells = [str(c).rjust(w) if i in right else str(c).ljust(w)
                 for i, (c, w) in enumerate(zip(r, widths, strict=True))]
        out.append("  ".join(cells).rstrip())
    return out


def _limited(lines, limit=LIST_LIMIT) -> list[str]:
    if len(lines) <= limit:
        return lines
    return lines[:limit] + [f"    ... and {len(lines) - limit} more (see report.json)"]


def _ids(ids) -> str:
    return ", ".join(ids) if ids else "none"


# --- the terminal view -------------------------------------------------------

def format_tables(report: dict) -> str:
    """The whole report as compact text tables, one section per part present."""
    parts = [_head(report), _signature_table(report), _lists(report)]
    if any(s.get("parts") for s in report["signatures"]):
        parts.append(_part_table(report))
    if report["labels"]:
        parts.append(_labels(report["labels"]))
    if report["against"]:
        parts.append(_against(report["against"]))
    if report["device"]:
        parts.append(_device(report["device"]))
    return "\n\n".join("\n".join(p) for p in parts) + "\n"


def _set_name(rules) -> str:
    bits = [b for b in (rules["name"], rules["version"] and f"version {rules['version']}") if b]
    return f" ({', '.join(bits)})" if bits else ""


def _head(r) -> list[str]:
    s, rules = r["set"], r["rules"]
    damaged = sum(1 for c in r["captures"] if c["error"])
    span = ""
    if s["first_ts"] is not None:
        span = f", {time_range(s['first_ts'], s['last_ts'])} UTC"
    lines = [f"{rules['path']}{_set_name(rules)}: {plural(rules['signatures'], 'signature')} "
             f"rated on {plural(len(r['captures']), 'capture')}"
             + (f" ({damaged} damaged)" if damaged else ""),
             f"  {plural(s['frames'], 'frame')}, {size(s['bytes_scanned'])} scanned{span}",
             f"  {plural(s['flows'], 'flow')} ({plural(s['connections'], 'connection')}), "
             f"{s['flows_flagged']} flagged ({s['flagged_share']:.0%}), "
             f"{plural(s['matches'], 'match', 'matches')}; {s['fired']} signatures fired, "
             f"{s['never_fired']} never, {s['noisy']} noisy"]
    for c in r["captures"]:
        if c["error"]:
            lines.append(f"  !! {c['error']}")
    return lines


def _part_rows(report) -> list[list]:
    """Per part of each multi-part signature: id, part, occurred, reached, near misses, pattern."""
    return [[s["id"] if k == 0 else "", k + 1, p["occurred"], p["reached"], p["near_misses"],
             p["pattern"]]
            for s in report["signatures"] if s.get("parts") for k, p in enumerate(s["parts"])]


PART_HEAD = ["signature", "part", "occurred", "reached", "near misses", "pattern"]
PART_NOTE = ("occurred: the part alone; reached: chains that got to it (per end offset); "
             "near misses: reached, not extended by the next part")


def _part_table(r) -> list[str]:
    return (["multi-part signatures:"] + _grid(PART_HEAD, _part_rows(r), {1, 2, 3, 4})
            + [f"  ({PART_NOTE})"])


def _signature_table(r) -> list[str]:
    scored = r["labels"] is not None
    head = ["signature", "matches", "flows", "share", "by side", "hosts", "first seen",
            "last seen"]
    if scored:
        head += ["tp", "fp", "fn", "prec", "recall"]
    head += ["label", "pattern"]
    rows = []
    dated = _dated(r)
    for s in r["signatures"]:
        row = [s["id"], s["matches"], s["flows"], f"{s['share']:.1%}", _sides(s),
               f"{s['clients']}/{s['servers']}", clock(s["first_ts"], dated),
               clock(s["last_ts"], dated)]
        if scored:
            sc = s["scores"]
            row += [sc["tp"], sc["fp"], sc["fn"], ratio(sc["precision"], 2),
                    ratio(sc["recall"], 2)]
        label = s["label"] + (" [noisy]" if s["noisy"] else "")
        row.append(label if len(label) <= 40 else label[:37] + "...")
        pattern = s.get("pattern", "")
        row.append(pattern if len(pattern) <= 40 else pattern[:37] + "...")
        rows.append(row)
    right = set(range(1, 6)) | (set(range(8, 13)) if scored else set())
    return _grid(head, rows, right) + [
        "  (by side: matches in the bytes clients / servers sent; hosts: distinct client / "
        "server addresses; times UTC)"]


def _sides(s) -> str:
    return f"{s['sides']['client']['matches']}/{s['sides']['server']['matches']}"


def _lists(r) -> list[str]:
    share = r["options"]["noisy_share"]
    return [f"never fired ({len(r['never_fired'])}): {_ids(r['never_fired'])}",
            f"noisy, hit in more than {share:.0%} of flows ({len(r['noisy'])}): {_ids(r['noisy'])}"]


def _labels(lab) -> list[str]:
    s, fl = lab["set"], lab["flows"]
    lines = [f"labels {lab['path']}: {plural(lab['rows'], 'row')}, "
             f"{plural(lab['flows_labelled'], 'flow')} labelled",
             f"  set: {s['tp']} TP, {s['fp']} FP, {s['fn']} FN; precision {ratio(s['precision'])}, "
             f"recall {ratio(s['recall'])}",
             "  flows: " + ", ".join(f"{fl[k]} {VERDICT_WORDS[k]}" for k in VERDICT_WORDS)]
    for title, items, what in (("false positives", lab["false_positives"], "signature"),
                               ("false negatives", lab["false_negatives"], "expect")):
        lines.append(f"  {title} ({len(items)})" + (":" if items else ": none"))
        lines += _limited([f"    {i[what]:<14} {flow_text(i)}" for i in items])
    absent, unl = lab["absent"], lab["unlabelled"]
    lines.append(f"  labelled, not in the captures ({len(absent)})" + (":" if absent else ": none"))
    lines += _limited([f"    {flow_text(i)}  expects {', '.join(i['expect'])}" for i in absent])
    lines.append(f"  unlabelled flows with hits ({len(unl)})" + (":" if unl else ": none"))
    lines += _limited([f"    {flow_text(i)}  {', '.join(i['signatures'])}" for i in unl])
    return lines


def _against(ab) -> list[str]:
    rules, sm, sg = ab["rules"], ab["summary"], ab["signatures"]

    def move(key, what, digits=0):
        d = sm[key]
        if d["old"] is None or d["new"] is None:
            return None
        fmt = (lambda x: f"{x:.3f}") if digits else str
        return f"{what} {fmt(d['old'])} -> {fmt(d['new'])} ({signed(d['delta'], digits)})"

    moves = [m for m in (move("matches", "matches"), move("flows_flagged", "flows flagged"),
                         move("fired", "fired"), move("precision", "precision", 3),
                         move("recall", "recall", 3)) if m]
    lines = [f"against {rules['path']}{_set_name(rules)}: "
             f"{plural(rules['signatures'], 'signature')}", "  " + "; ".join(moves)]
    for title, items in (("added", sg["added"]), ("removed", sg["removed"])):
        lines += _limited([f"  {title:<8} {i['id']:<14} {plural(i['matches'], 'match', 'matches')} "
                           f"in {plural(i['flows'], 'flow')}" for i in items])
    lines += _limited([f"  changed  {c['id']:<14} matches {c['old_matches']} -> {c['new_matches']} "
                       f"({signed(c['delta'])}), flows {c['old_flows']} -> {c['new_flows']}"
                       + (", redefined" if c["redefined"] else "") for c in sg["changed"]])
    quiet = [i for i in sg["redefined"] if i in sg["unchanged"]]
    lines.append(f"  unchanged {len(sg['unchanged'])}"
                 + (f" (redefined, same hits: {', '.join(quiet)})" if quiet else ""))
    for title, items, mark in (("flows gaining verdicts", ab["flows"]["gained"], "+"),
                               ("flows losing verdicts", ab["flows"]["lost"], "-")):
        lines.append(f"  {title} ({len(items)})" + (":" if items else ": none"))
        lines += _limited([f"    {flow_text(i)}  " + " ".join(mark + s for s in i["signatures"])
                           for i in items])
    return lines


def _device(dev) -> list[str]:
    p, t, fl, g, m = dev["profile"], dev["table"], dev["flows"], dev["gaps"], dev["matches"]
    budget = f"{p['budget']:,} bytes" if p["budget"] else "none"
    lines = [f"device profile {p['path']}" + (f" ({p['name']})" if p["name"] else "")
             + f": max_flows {p['max_flows']:,}, hold_bytes {p['hold_bytes']:,}, layout "
             f"{p['layout']}, budget {budget}",
             f"  table {'fits' if t['fits'] else 'DOES NOT FIT'}: {t['message']}",
             f"  flows: {fl['host']} on the host, {fl['device']} on the device, "
             f"{plural(fl['evicted'], 'eviction')}"
             + (f" ({fl['swapped']} picked up again with client and server swapped)"
                if fl["swapped"] else "") + f"; gaps: {g['host']} on the host, {g['device']} "
             f"on the device ({g['hold_cap']} from the per-flow hold cap, {g['hold_total']} from "
             "the total)",
             f"  matches: {m['host']} on the host, {m['device']} on the device: {m['missed']} "
             f"missed, {m['extra']} extra"]
    for title, part in (("missed", dev["missed"]), ("extra", dev["extra"])):
        if part["by_flow"]:
            lines.append(f"  {title} by signature: " + ", ".join(
                f"{sid} {n}" for sid, n in part["by_signature"].items()))
            lines += _limited([f"    {i['signature']:<14} {flow_text(i)}  host {i['host']}, "
                               f"device {i['device']}" for i in part["by_flow"]])
    if fl["evicted_flows"]:
        lines.append("  evicted flows:")
        lines += _limited([f"    {flow_text(i)}  {plural(i['times'], 'time')}"
                           for i in fl["evicted_flows"]])
    if g["new"]:
        lines.append("  gaps only the device has:")
        lines += _limited([f"    {flow_text(i)}  {i['side']} bytes {i['start']}..{i['end']} "
                           f"frame {i['frame']}" for i in g["new"]])
    return lines


# --- files ------------------------------------------------------------------

def signature_rows(report: dict) -> list[list]:
    """``signatures.csv`` rows (header first); empty cells for parts not computed."""
    old = {}
    ab = report["against"]
    if ab:
        old = {c["id"]: c["old_matches"] for c in ab["signatures"]["changed"]}
        old |= {i: None for i in (a["id"] for a in ab["signatures"]["added"])}
    missed = report["device"]["missed"]["by_signature"] if report["device"] else None
    rows = [list(CSV_COLUMNS)]
    for s in report["signatures"]:
        sc = s["scores"] or {}
        if ab:
            o = old.get(s["id"], s["matches"])
            ab_cells = ["" if o is None else o, "" if o is None else s["matches"] - o]
        else:
            ab_cells = ["", ""]
        rows.append([s["id"], s["label"], ";".join(s["tags"]), s["matches"], s["flows"],
                     f"{s['share']:.6f}", s["clients"], s["servers"], _cell(s["first_ts"]),
                     _cell(s["last_ts"]), s["sides"]["client"]["matches"],
                     s["sides"]["server"]["matches"], int(s["noisy"]), _cell(sc.get("tp")),
                     _cell(sc.get("fp")), _cell(sc.get("fn")), _cell(sc.get("unlabelled")),
                     _cell(sc.get("precision")), _cell(sc.get("recall")), *ab_cells,
                     "" if missed is None else missed.get(s["id"], 0), s.get("pattern", "")])
    return rows


def _cell(x):
    return "" if x is None else x


def write_report(report: dict, directory) -> list[str]:
    """Write report.json, signatures.csv and report.html into ``directory``
    (which exists); returns the paths written."""
    paths = [os.path.join(directory, n) for n in ("report.json", "signatures.csv", "report.html")]
    with open(paths[0], "w", encoding="utf-8") as f:
        f.write(to_json(report) + "\n")
    with open(paths[1], "w", encoding="utf-8", newline="") as f:
        csv.writer(f, lineterminator="\n").writerows(signature_rows(report))
    with open(paths[2], "w", encoding="utf-8") as f:
        f.write(render_html(report, draw_charts(report)))
    return paths


# --- charts -----------------------------------------------------------------

def draw_charts(report: dict) -> dict[str, tuple[str, bytes]]:
    """name -> (caption, PNG bytes) for each chart with something to show."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    charts = {}
    plt.rcParams.update({"font.size": 9, "axes.spines.top": False, "axes.spines.right": False})
    try:
        sigs = sorted(report["signatures"], key=lambda s: -s["matches"])[:CHART_SIGNATURES]
        if sigs:
            caption = "Matches per signature" + (
                f" (the {len(sigs)} with most matches of {len(report['signatures'])})"
                if len(sigs) < len(report["signatures"]) else "")
            noisy = any(s["noisy"] for s in sigs)
            charts["hits"] = (caption, _bars(plt, [s["id"] for s in sigs],
                                             [s["matches"] for s in sigs],
                                             ["#d9822b" if s["noisy"] else "#3b6ea8" for s in sigs],
                                             "matches (orange: noisy)" if noisy else "matches"))
        flows = report["flows"]
        if flows:
            charts["timeline"] = ("Flows seen and flagged over capture time",
                                  _timeline(plt, flows))
        ab = report["against"]
        if ab:
            sg = ab["signatures"]
            items = ([(a["id"], a["matches"]) for a in sg["added"]]
                     + [(a["id"], -a["matches"]) for a in sg["removed"]]
                     + [(c["id"], c["delta"]) for c in sg["changed"]])
            items = sorted((i for i in items if i[1]), key=lambda i: -abs(i[1]))
            items = items[:CHART_SIGNATURES]
            if items:
                charts["ab"] = ("Change in matches per signature against "
                                + os.path.basename(ab["rules"]["path"]),
                                _bars(plt, [i[0] for i in items], [i[1] for i in items],
                                      ["#3f8f4f" if i[1] > 0 else "#b8413c" for i in items],
                                      "matches, new set minus old set"))
        dev = report["device"]
        if dev and (dev["missed"]["by_signature"] or dev["extra"]["by_signature"]):
            items = [(k, -v) for k, v in dev["missed"]["by_signature"].items()] + \
                [(k, v) for k, v in dev["extra"]["by_signature"].items()]
            items = items[:CHART_SIGNATURES]
            charts["device"] = ("Matches the device would miss (red) or add (green), per "
                                "signature", _bars(plt, [i[0] for i in items],
                                                   [i[1] for i in items],
                                                   ["#3f8f4f" if i[1] > 0 else "#b8413c"
                                                    for i in items],
                                                   "matches, device run minus host run"))
    finally:
        plt.close("all")
    return charts


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    return buf.getvalue()


def _bars(plt, names, values, colors, xlabel) -> bytes:
    fig, ax = plt.subplots(figsize=(7.5, 0.9 + 0.26 * len(names)))
    y = range(len(names))
    ax.barh(y, values, color=colors, height=0.7)
    ax.set_yticks(list(y), names)
    ax.invert_yaxis()
    ax.set_xlabel(xlabel)
    ax.axvline(0, color="#555", linewidth=0.8)
    ax.xaxis.get_major_locator().set_params(integer=True)
    span = max((abs(v) for v in values), default=1) or 1
    for i, v in enumerate(values):
        ax.text(v + (0.01 * span if v >= 0 else -0.01 * span), i, str(v), va="center",
                ha="left" if v >= 0 else "right", fontsize=8)
    lo, hi = min(0, *values), max(0, *values)
    ax.set_xlim(lo - 0.12 * span if lo < 0 else 0, hi + 0.12 * span if hi > 0 else 0.5)
    return _png(fig)


DATE_AXIS_SECONDS = 3600  # a longer capture's timeline shows dates and times, not seconds


def _timeline(plt, flows) -> bytes:
    return _png(timeline_figure(plt, flows))


def timeline_figure(plt, flows):
    """Cumulative flows seen and flagged over capture time.  The x axis is
    seconds after the first flow for a capture shorter than
    ``DATE_AXIS_SECONDS``; a longer one gets UTC dates and times that
    matplotlib's concise date formatter spaces and abbreviates (the date
    stays on the axis, however many days)."""
    from matplotlib import dates as mdates

    t0 = min(f["first_ts"] for f in flows if f["first_ts"] is not None)
    seen = sorted(f["first_ts"] for f in flows if f["first_ts"] is not None)
    flagged = sorted(f["first_match_ts"] for f in flows if f["first_match_ts"] is not None)
    long_capture = max(seen + flagged) - t0 >= DATE_AXIS_SECONDS
    if long_capture:
        day = 86400.0
        epoch = mdates.date2num(datetime.datetime(1970, 1, 1, tzinfo=datetime.UTC))

        def x(ts):
            return epoch + ts / day
    else:
        def x(ts):
            return ts - t0
    fig, ax = plt.subplots(figsize=(7.5, 3.0))
    for xs, label, color in ((seen, "flows seen", "#8a8a8a"),
                             (flagged, "flows flagged", "#b8413c")):
        if xs:
            ax.step([x(t0), *map(x, xs)], [0, *range(1, len(xs) + 1)], where="post",
                    label=label, color=color)
    if long_capture:
        locator = mdates.AutoDateLocator(tz=datetime.UTC, minticks=3, maxticks=8)
        ax.xaxis.set_major_locator(locator)
        # a day tick says its month ("Nov 12", not "12"); the year is in the offset
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(
            locator, tz=datetime.UTC, formats=["%Y", "%b", "%b %d", "%H:%M", "%H:%M", "%S.%f"]))
        ax.set_xlabel(f"capture time (UTC), from {clock(t0, True)}")
    else:
        ax.set_xlabel(f"capture seconds after {clock(t0, True)} UTC")
    ax.set_ylabel("flows (cumulative)")
    ax.yaxis.get_major_locator().set_params(integer=True)
    ax.legend(loc="upper left", frameon=False)
    return fig


# --- HTML ---------------------------------------------------------------------

_CSS = """
body{font:14px/1.45 system-ui,sans-serif;margin:24px auto;max-width:1100px;color:#222;padding:0 16px}
h1{font-size:22px;margin-bottom:4px} h2{font-size:17px;margin-top:28px;border-bottom:1px solid #ddd}
table{border-collapse:collapse;margin:8px 0;font-size:13px}
td,th{padding:3px 8px;border-bottom:1px solid #eee;text-align:left;vertical-align:top;
white-space:nowrap} td.w{white-space:normal;min-width:120px}
th{background:#f4f4f4} td.n{text-align:right;font-variant-numeric:tabular-nums}
.muted{color:#777} .bad{color:#b8413c;font-weight:600} .good{color:#3f8f4f;font-weight:600}
figure{margin:12px 0} figcaption{color:#555;font-size:13px} img{max-width:100%}
.cards{display:flex;flex-wrap:wrap;gap:10px;margin:12px 0}
.card{border:1px solid #ddd;border-radius:6px;padding:8px 14px;min-width:120px}
.card b{display:block;font-size:20px}
"""


def _e(x) -> str:
    return html.escape(str(x))


class _Raw(str):
    """Markup already escaped, placed in a table cell as it is."""


def _cell_html(c, kind: str) -> str:
    text = c if isinstance(c, _Raw) else _e(c)
    return f"<td class={kind}>{text}</td>" if kind else f"<td>{text}</td>"


def _table(head, rows, numeric=(), wrap=()) -> str:
    """Cells on one line, right-aligned in ``numeric`` columns; ``wrap`` columns may wrap."""
    kinds = ["n" if i in numeric else "w" if i in wrap else "" for i in range(len(head))]
    h = "".join(f"<th>{_e(c)}</th>" for c in head)
    body = "".join("<tr>" + "".join(_cell_html(c, kinds[i]) for i, c in enumerate(r))
                   + "</tr>" for r in rows)
    return f"<table><tr>{h}</tr>{body}</table>"


def _figure(charts, name) -> str:
    if name not in charts:
        return ""
    caption, png = charts[name]
    data = base64.b64encode(png).decode("ascii")
    return (f'<figure><img alt="{_e(caption)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def render_html(report: dict, charts: dict) -> str:
    """One self-contained page: no scripts, no links out, charts inline."""
    s, rules = report["set"], report["rules"]
    out = [f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8>"
           f"<title>seamscan rate: {_e(os.path.basename(rules['path']))}</title>"
           f"<style>{_CSS}</style></head><body>",
           f"<h1>Signature set rating: {_e(rules['path'])}</h1>",
           f"<p class=muted>{_e(_set_name(rules).strip(' ()') or 'unnamed set')}; "
           f"{plural(rules['signatures'], 'signature')} on "
           f"{_e(', '.join(c['path'] for c in report['captures']))}; "
           f"capture time {_e(time_range(s['first_ts'], s['last_ts']))} UTC"
           "</p>"]
    cards = [("flows", s["flows"]), ("flagged", f"{s['flows_flagged']} ({s['flagged_share']:.0%})"),
             ("matches", s["matches"]), ("scanned", size(s["bytes_scanned"])),
             ("fired", f"{s['fired']} of {s['signatures']}"), ("never fired", s["never_fired"]),
             ("noisy", s["noisy"])]
    if report["labels"]:
        ls = report["labels"]["set"]
        cards += [("precision", ratio(ls["precision"])), ("recall", ratio(ls["recall"]))]
    out.append('<div class=cards>' + "".join(f"<div class=card><b>{_e(v)}</b>{_e(k)}</div>"
                                             for k, v in cards) + "</div>")
    for c in report["captures"]:
        if c["error"]:
            out.append(f"<p class=bad>Damaged capture: {_e(c['error'])}</p>")
    out.append(_html_captures(report["captures"]))
    out.append("<h2>Signatures</h2>" + _figure(charts, "hits"))
    scored = report["labels"] is not None
    head = ["signature", "matches", "flows", "share", "by side", "hosts", "first seen",
            "last seen"] + (["TP", "FP", "FN", "precision", "recall"] if scored else []) + ["label"]
    rows = []
    dated = _dated(report)
    for g in report["signatures"]:
        row = [g["id"], g["matches"], g["flows"], f"{g['share']:.1%}", _sides(g),
               f"{g['clients']}/{g['servers']}", clock(g["first_ts"], dated),
               clock(g["last_ts"], dated)]
        if scored:
            sc = g["scores"]
            row += [sc["tp"], sc["fp"], sc["fn"], ratio(sc["precision"]), ratio(sc["recall"])]
        label = g["label"] + (" (noisy)" if g["noisy"] else "")
        rows.append(row + [_Raw(_e(label) + (f' <span class=muted>{_e(", ".join(g["tags"]))}'
                                             "</span>" if g["tags"] else "")
                                + (f'<br><code>{_e(g["pattern"])}</code>'
                                   if g.get("pattern") else ""))])
    out.append(_table(head, rows, set(range(1, 6)) | (set(range(8, 13)) if scored else set()),
                      {len(head) - 1}))
    out.append("<p class=muted>by side: matches in the bytes clients / servers sent; hosts: "
               "distinct client / server addresses; label, then tags, then the pattern; "
               "times UTC</p>")
    if any(g.get("parts") for g in report["signatures"]):
        out.append("<h3>Multi-part signatures</h3>"
                   + _table(PART_HEAD, _part_rows(report), {1, 2, 3, 4})
                   + f"<p class=muted>{_e(PART_NOTE)}</p>")
    share = report["options"]["noisy_share"]
    out.append(f"<p><b>Never fired</b> ({len(report['never_fired'])}): "
               f"{_e(_ids(report['never_fired']))}<br><b>Noisy</b>, hit in more than "
               f"{share:.0%} of flows ({len(report['noisy'])}): {_e(_ids(report['noisy']))}</p>")
    out.append("<h2>Flows</h2>" + _figure(charts, "timeline"))
    out.append(_html_flows(report))
    if report["labels"]:
        out.append(_html_labels(report["labels"]))
    if report["against"]:
        out.append(_html_against(report["against"], charts))
    if report["device"]:
        out.append(_html_device(report["device"], charts))
    out.append("<p class=muted>Written by seamscan rate. Times are capture times (UTC); a flow "
               "is a 5-tuple over all captures given.</p></body></html>\n")
    return "\n".join(out)


def _html_captures(captures) -> str:
    """One row per capture file: frames, flows, matches, bytes scanned, damage."""
    rows = [[c["path"], f"{c['frames']:,}", f"{c['flows']:,}", f"{c['matches']:,}",
             size(c["bytes_scanned"]), _Raw(f"<span class=bad>{_e(c['error'])}</span>")
             if c["error"] else "none"] for c in captures]
    return ("<h2>Captures</h2>"
            + _table(["capture", "frames", "flows", "matches", "scanned", "damage"], rows,
                     {1, 2, 3, 4}, {5})
            + "<p class=muted>flows: flow records of that file (a flow that ended, was "
            "evicted or was still open at the end of the file); damage: where the file "
            "broke, everything before it counted</p>")


def _html_flows(report) -> str:
    """The flows with hits or labels (all of them when labelled), at most ``HTML_FLOWS``."""
    labelled = report["labels"] is not None
    listed = [f for f in report["flows"] if f["matches"] or f["expect"]]
    shown = listed[:HTML_FLOWS]
    head = ["flow and capture", "first seen", "matches", "signatures"]
    if labelled:
        head += ["expected", "verdict"]
    rows = []
    dated = _dated(report)
    for f in shown:
        row = [_Raw(f"{_e(flow_text(f))}<br><span class=muted>"
                    f"{_e(', '.join(os.path.basename(p) for p in f['files']))}</span>"),
               clock(f["first_ts"], dated), f["matches"],
               ", ".join(f"{k}×{v}" if v > 1 else k for k, v in f["signatures"].items()) or "-"]
        if labelled:
            row += [", ".join(f["expect"]) if f["expect"] else "-", VERDICT_WORDS[f["verdict"]]]
        rows.append(row)
    notes = []
    if len(shown) < len(listed):
        notes.append(f"the first {len(shown)} of {len(listed)} listed")
    if len(listed) < len(report["flows"]):
        notes.append(f"{len(report['flows']) - len(listed)} flows without hits or labels "
                     "not listed")
    text = "; ".join(notes)
    note = (f"<p class=muted>{_e(text[:1].upper() + text[1:])}; report.json has every "
            "flow.</p>") if notes else ""
    return (_table(head, rows, {2}, set(range(3, len(head)))) if rows
            else "<p class=muted>No flow has hits or labels.</p>") + note


def _html_labels(lab) -> str:
    s, fl = lab["set"], lab["flows"]
    parts = [f"<h2>Labels: {_e(lab['path'])}</h2>",
             f"<p>{plural(lab['rows'], 'row')}, {plural(lab['flows_labelled'], 'flow')} labelled. "
             f"Set: <b>{s['tp']}</b> TP, <b>{s['fp']}</b> FP, <b>{s['fn']}</b> FN; precision "
             f"<b>{ratio(s['precision'])}</b>, recall <b>{ratio(s['recall'])}</b>.</p>",
             _table(["flows", "count"], [[VERDICT_WORDS[k], fl[k]] for k in VERDICT_WORDS], {1})]
    for title, items, what in (("False positives", lab["false_positives"], "signature"),
                               ("False negatives", lab["false_negatives"], "expect")):
        parts.append(f"<h3>{title} ({len(items)})</h3>" + (
            _table([what, "flow"], [[i[what], flow_text(i)] for i in items]) if items
            else "<p class=muted>none</p>"))
    parts.append(f"<h3>Labelled flows absent from the captures ({len(lab['absent'])})</h3>" + (
        _table(["flow", "expects"], [[flow_text(i), ", ".join(i["expect"])]
                                     for i in lab["absent"]]) if lab["absent"]
        else "<p class=muted>none</p>"))
    parts.append(f"<h3>Unlabelled flows with hits ({len(lab['unlabelled'])})</h3>" + (
        _table(["flow", "signatures"], [[flow_text(i), ", ".join(i["signatures"])]
                                        for i in lab["unlabelled"]]) if lab["unlabelled"]
        else "<p class=muted>none</p>"))
    return "\n".join(parts)


def _html_against(ab, charts) -> str:
    sm, sg = ab["summary"], ab["signatures"]
    rows = []
    for key, what in (("matches", "matches"), ("flows_flagged", "flows flagged"),
                      ("fired", "signatures fired"), ("never_fired", "never fired"),
                      ("precision", "precision"), ("recall", "recall")):
        d = sm[key]
        if d["old"] is None and d["new"] is None:
            continue
        fmt = ratio if key in ("precision", "recall") else (lambda x: "-" if x is None else x)
        rows.append([what, fmt(d["old"]), fmt(d["new"]),
                     signed(d["delta"], 3 if key in ("precision", "recall") else 0)])
    parts = [f"<h2>Against {_e(ab['rules']['path'])}</h2>",
             _table(["measure", "old", "new", "change"], rows, {1, 2, 3}),
             _figure(charts, "ab")]
    sig_rows = ([["added", a["id"], "-", a["matches"], signed(a["matches"]), ""]
                 for a in sg["added"]]
                + [["removed", a["id"], a["matches"], "-", signed(-a["matches"]), ""]
                   for a in sg["removed"]]
                + [["changed", c["id"], c["old_matches"], c["new_matches"], signed(c["delta"]),
                    "yes" if c["redefined"] else ""] for c in sg["changed"]])
    parts.append(_table(["what", "signature", "old matches", "new matches", "change",
                         "redefined"],
                        sig_rows, {2, 3, 4}) if sig_rows
                 else "<p class=muted>No signature changed its hits.</p>")
    parts.append(f"<p>{len(sg['unchanged'])} unchanged" + (
        f"; redefined: {_e(', '.join(sg['redefined']))}" if sg["redefined"] else "") + "</p>")
    flow_rows = ([[flow_text(i), "gained", ", ".join(i["signatures"])] for i in ab["flows"]["gained"]]
                 + [[flow_text(i), "lost", ", ".join(i["signatures"])] for i in ab["flows"]["lost"]])
    if flow_rows:
        parts.append(_table(["flow", "gained or lost", "signatures"], flow_rows))
    return "\n".join(parts)


def _html_device(dev, charts) -> str:
    p, t, fl, g, m = dev["profile"], dev["table"], dev["flows"], dev["gaps"], dev["matches"]
    fit = '<span class=good>fits</span>' if t["fits"] else '<span class=bad>does not fit</span>'
    parts = [f"<h2>Device profile: {_e(p['path'])}" + (f" ({_e(p['name'])})" if p["name"] else "")
             + "</h2>",
             _table(["max_flows", "hold_bytes", "layout", "budget"],
                    [[f"{p['max_flows']:,}", f"{p['hold_bytes']:,}", p["layout"],
                      "-" if p["budget"] is None else f"{p['budget']:,}"]]),
             f"<p>Table {fit}: {_e(t['message'])}</p>",
             _table(["measure", "host", "device"],
                    [["flows", fl["host"], fl["device"]], ["evictions", 0, fl["evicted"]],
                     ["picked up with roles swapped", "-", fl["swapped"]],
                     ["gaps", g["host"], g["device"]],
                     ["gaps from the hold caps", "-", g["hold_cap"] + g["hold_total"]],
                     ["matches", m["host"], m["device"]]], {1, 2}),
             f"<p>Matches the device would miss: <b>{m['missed']}</b>; that it would add: "
             f"<b>{m['extra']}</b>.</p>",
             _figure(charts, "device")]
    rows = ([["missed", i["signature"], flow_text(i), i["host"], i["device"]]
             for i in dev["missed"]["by_flow"]]
            + [["extra", i["signature"], flow_text(i), i["host"], i["device"]]
               for i in dev["extra"]["by_flow"]])
    if rows:
        parts.append(_table(["missed or extra", "signature", "flow", "host matches",
                             "device matches"], rows, {3, 4}))
    if fl["evicted_flows"]:
        parts.append("<h3>Evicted flows</h3>" + _table(
            ["flow", "times"], [[flow_text(i), i["times"]] for i in fl["evicted_flows"]], {1}))
    if g["new"]:
        parts.append("<h3>Gaps only the device has</h3>" + _table(
            ["flow", "side", "bytes", "frame"],
            [[flow_text(i), i["side"], f"{i['start']}..{i['end']}", i["frame"]]
             for i in g["new"]]))
    return "\n".join(parts)
