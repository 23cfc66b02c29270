"""The HTML rate report: every table column has a header, the chart legend
says "orange: noisy" only when something is noisy, and a per-capture table
gives frames, flows, matches, bytes scanned and damage for each file.

Outside reference for the per-capture frame counts: scapy's capture readers
(``rdpcap``), counting the records of each demo file.
"""

from __future__ import annotations

import html
import re
from pathlib import Path

import pytest

import seamscan
from seamscan import report
from seamscan.evaluate import load_labels, load_profile, rate

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "pcaps_demo"
DATA = ROOT / "tests" / "data" / "rate"
DEMO_SET = DEMO / "demo-signatures.toml"
DEMO_CAPS = sorted(str(p) for p in DEMO.glob("*.pcap*"))


@pytest.fixture(scope="module")
def full_report():
    sigset = seamscan.load_signatures(DEMO_SET)
    return rate(DEMO_CAPS, sigset, labels=load_labels(DEMO / "labels.csv", sigset),
                against=seamscan.load_signatures(DATA / "demo-previous.toml"),
                profile=load_profile(DATA / "demo-gateway.toml"))


def tables(page: str):
    """Each <table> as (header cells, rows of cell texts)."""
    out = []
    for t in re.findall(r"<table>(.*?)</table>", page, re.S):
        rows = re.findall(r"<tr>(.*?)</tr>", t, re.S)
        head = [html.unescape(c) for c in re.findall(r"<th>(.*?)</th>", rows[0])]
        body = [[html.unescape(re.sub(r"<[^>]+>", " ", c)).strip()
                 for c in re.findall(r"<td[^>]*>(.*?)</td>", r, re.S)] for r in rows[1:]]
        out.append((head, body))
    return out


def test_every_column_has_a_header(full_report):
    page = report.render_html(full_report, {})
    found = tables(page)
    assert len(found) >= 8
    for head, rows in found:
        assert all(h.strip() for h in head), head
        assert all(len(r) == len(head) for r in rows), head
    (ab,) = [(h, r) for h, r in found if "gained or lost" in h]
    assert {r[1] for r in ab[1]} == {"gained", "lost"}


def test_noisy_legend_only_when_something_is_noisy(monkeypatch):
    labels = []
    monkeypatch.setattr(report, "_bars", lambda plt, names, values, colors, xlabel:
                        labels.append((xlabel, colors)) or b"")
    monkeypatch.setattr(report, "_timeline", lambda plt, flows: b"")
    sigset = seamscan.load_signatures(DEMO_SET)
    quiet = rate(DEMO_CAPS, sigset)
    assert quiet["noisy"] == []
    report.draw_charts(quiet)
    assert labels[-1][0] == "matches" and "#d9822b" not in labels[-1][1]
    loud = rate(DEMO_CAPS, sigset, noisy_share=0.1)  # ty-0001 hits 3 of 14 flows
    assert loud["noisy"]
    report.draw_charts(loud)
    assert labels[-1][0] == "matches (orange: noisy)" and "#d9822b" in labels[-1][1]


def test_per_capture_table_against_scapy(full_report, tmp_path):
    from scapy.utils import PcapNgReader, PcapReader

    def frames(path):
        reader = PcapNgReader if path.endswith(".pcapng") else PcapReader
        with reader(path) as r:
            return sum(1 for _ in r)

    page = report.render_html(full_report, {})
    assert "<h2>Captures</h2>" in page
    ((head, rows),) = [(h, r) for h, r in tables(page) if h[0] == "capture"]
    assert head == ["capture", "frames", "flows", "matches", "scanned", "damage"]
    assert [r[0] for r in rows] == DEMO_CAPS
    for row, cap in zip(rows, full_report["captures"], strict=True):
        assert int(row[1].replace(",", "")) == frames(row[0])
        assert (int(row[2]), int(row[3])) == (cap["flows"], cap["matches"])
        assert row[4] == report.size(cap["bytes_scanned"]) and row[5] == "none"
    assert sum(int(r[3]) for r in rows) == full_report["set"]["matches"]
    # a damaged file says where it broke
    whole = (DEMO / "lab-http.pcap").read_bytes()
    cut = tmp_path / "cut.pcap"
    cut.write_bytes(whole[: len(whole) * 2 // 3])
    rep = rate([str(cut), DEMO_CAPS[2]], seamscan.load_signatures(DEMO_SET))
    ((_, rows),) = [(h, r) for h, r in tables(report.render_html(rep, {})) if h[0] == "capture"]
    assert rows[0][5] == rep["captures"][0]["error"] and "cut.pcap: " in rows[0][5]
    assert rows[1][5] == "none"
