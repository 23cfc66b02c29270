"""``seamscan rate``: hit rates, label scores, A/B and device profiles.

Outside references: the match records of ``seamscan scan`` on the same
inputs (a separate code path: the CLI, its JSONL writer, a subprocess);
the demo truth of ``pcaps_demo/README.md``, which ``tests/test_craft.py``
re-derives from the captures with scapy's reader and Python's ``re``; and,
for crafted captures, Python's ``re`` counting each pattern in the bytes
each flow sent.  Precision and recall are the usual TP / (TP + FP) and
TP / (TP + FN) (common practice), with the units defined in
``seamscan.evaluate``.

Crafted data is an invented smart-building lab in the documentation ranges.
"""

from __future__ import annotations

import argparse
import base64
import contextlib
import csv
import io
import json
import os
import re
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest

import seamscan
from seamscan import evaluate, report
from seamscan.evaluate import RateError, load_labels, load_profile, rate

ROOT = Path(__file__).resolve().parent.parent
DATA = ROOT / "tests" / "data" / "rate"
DEMO_SET = ROOT / "pcaps_demo" / "demo-signatures.toml"
DEMO_LABELS = ROOT / "pcaps_demo" / "labels.csv"
DEMO_CAPS = sorted(str(p) for p in (ROOT / "pcaps_demo").glob("*.pcap*"))
sys.path.insert(0, str(ROOT / "tools"))

import craft  # noqa: E402
from craft import Clock, Conversation, Datagrams  # noqa: E402

LABEL_HEADER = "transport,client_ip,client_port,server_ip,server_port,expect\n"


# --- helpers ------------------------------------------------------------------

def scan_records(*args):
    """Match and flow records of ``python -m seamscan scan ... --format jsonl``."""
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    r = subprocess.run([sys.executable, "-m", "seamscan", "scan", *map(str, args),
                        "--format", "jsonl"], env=env, capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr
    return [json.loads(line) for line in r.stdout.splitlines()]


def rate_cli(*args):
    """Run ``rate`` through its own argparse wiring, as the CLI does: (code, out, err)."""
    ap = argparse.ArgumentParser(prog="seamscan")
    evaluate.add_rate_parser(ap.add_subparsers(dest="command"))
    ns = ap.parse_args(["rate", *map(str, args)])
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = evaluate.cmd_rate(ns)
    return code, out.getvalue(), err.getvalue()


def key(transport, cip, cport, sip, sport):
    return {"transport": transport, "client_ip": cip, "client_port": cport, "server_ip": sip,
            "server_port": sport}


def flow_of(rep, **where):
    (f,) = [f for f in rep["flows"] if all(f[k] == v for k, v in where.items())]
    return f


def by_id(rep):
    return {s["id"]: s for s in rep["signatures"]}


def re_count(pattern: bytes, data: bytes) -> int:
    """Occurrences of ``pattern`` in ``data``, overlapping ones too (Python's ``re``)."""
    return sum(1 for _ in re.finditer(b"(?=" + re.escape(pattern) + b")", data))


@pytest.fixture(scope="module")
def demo_report():
    sigset = seamscan.load_signatures(DEMO_SET)
    return rate(DEMO_CAPS, sigset, labels=load_labels(DEMO_LABELS, sigset))


# --- hit rates on the demo ------------------------------------------------------

def test_demo_hit_counts_agree_with_scan_records(demo_report):
    recs = scan_records(*DEMO_CAPS, "--rules", DEMO_SET)
    matches = [r for r in recs if r["type"] == "match"]
    summary = recs[-1]
    tup = evaluate.flow_key
    for s in demo_report["signatures"]:
        mine = [m for m in matches if m["sig"] == s["id"]]
        assert s["matches"] == len(mine), s["id"]
        assert s["flows"] == len({tup(m) for m in mine}), s["id"]
        assert s["clients"] == len({m["client_ip"] for m in mine})
        assert s["servers"] == len({m["server_ip"] for m in mine})
        for side in ("client", "server"):
            theirs = [m for m in mine if m["side"] == side]
            assert s["sides"][side] == {"matches": len(theirs),
                                        "flows": len({tup(m) for m in theirs})}
        assert s["first_ts"] == (min(m["ts"] for m in mine) if mine else None)
        assert s["last_ts"] == (max(m["ts"] for m in mine) if mine else None)
    st = demo_report["set"]
    flows = {tup(r) for r in recs if r["type"] == "flow"}
    assert st["matches"] == summary["matches"] == len(matches)
    assert st["bytes_scanned"] == summary["bytes_scanned"]
    assert st["frames"] == summary["frames"]
    assert st["flows"] == len(flows) and st["flows_flagged"] == len({tup(m) for m in matches})
    for f in demo_report["flows"]:
        k = tuple(f[x] for x in evaluate.FLOW_FIELDS)
        assert f["signatures"] == dict(Counter(m["sig"] for m in matches if tup(m) == k))


def test_demo_truth(demo_report):
    # pcaps_demo/README.md: four signatures never fire, 14 flows, 8 of them with
    # hits; labels.csv lists every verdict, so no FP and no FN
    assert sorted(demo_report["never_fired"]) == ["ty-0012", "ty-0015", "ty-0017", "ty-0020"]
    assert (demo_report["set"]["flows"], demo_report["set"]["flows_flagged"]) == (14, 8)
    lab = demo_report["labels"]
    assert lab["set"] == {"tp": 18, "fp": 0, "fn": 0, "precision": 1.0, "recall": 1.0}
    assert lab["flows"] == {"flagged_expected": 8, "flagged_clean": 0, "missed": 0,
                            "clean_ok": 6, "unlabelled": 0, "absent": 0}
    assert lab["false_positives"] == lab["false_negatives"] == lab["absent"] == []
    sig = by_id(demo_report)
    # ty-0009 fires once per telemetry frame of U1 (six readings and an alarm)
    assert (sig["ty-0009"]["matches"], sig["ty-0009"]["flows"]) == (7, 1)
    assert sig["ty-0018"]["sides"] == {"client": {"matches": 1, "flows": 1},
                                       "server": {"matches": 1, "flows": 1}}
    assert sig["ty-0001"]["share"] == pytest.approx(3 / 14)


def test_noisy_share_and_the_same_capture_twice():
    sigset = seamscan.load_signatures(DEMO_SET)
    rep = rate(DEMO_CAPS, sigset, noisy_share=0.1)
    assert rep["noisy"] == ["ty-0001"]  # 3 of 14 flows; every other one hits at most 1
    # a flow is a 5-tuple over all captures: the same file twice doubles the
    # connections and matches, not the flows
    cap = str(ROOT / "pcaps_demo" / "lab-http.pcap")
    once, twice = rate([cap], sigset), rate([cap, cap], sigset)
    assert twice["set"]["flows"] == once["set"]["flows"] == 7
    assert twice["set"]["connections"] == 2 * once["set"]["connections"]
    assert twice["set"]["matches"] == 2 * once["set"]["matches"]
    assert [s["flows"] for s in twice["signatures"]] == [s["flows"] for s in once["signatures"]]


# --- labels on a crafted capture with known truth ---------------------------------

SCORE_SIGS = [
    {"id": "eco", "text": "mode=eco", "tags": ["mode"]},
    {"id": "fan", "text": "fan=auto", "tags": ["hvac"]},
    {"id": "damper", "text": "damper=closed", "tags": ["hvac"]},
    {"id": "unlock", "text": "/unlock", "tags": ["access"]},
]
SERVER = ("198.51.100.20", 80)
# client address -> bytes it sends (cut into 3-byte segments: every pattern straddles)
SCORE_FLOWS = {
    "192.0.2.1": b"PUT /ahu/1 mode=eco\r\n",
    "192.0.2.2": b"PUT /ahu/2 fan=auto\r\n",
    "192.0.2.3": b"PUT /ahu/3 fan=auto\r\n",
    "192.0.2.4": b"PUT /ahu/4 mode=eco&fan=auto\r\n",
    "192.0.2.5": b"GET /door/2/status\r\n",
    "192.0.2.6": b"GET /status\r\n",
    "192.0.2.7": b"PUT /ahu/7 mode=eco\r\n",
}
SCORE_LABELS = LABEL_HEADER + """\
tcp,192.0.2.1,40001,198.51.100.20,80,eco
tcp,192.0.2.2,40001,198.51.100.20,80,tag:hvac
tcp,192.0.2.3,40001,198.51.100.20,80,clean
tcp,192.0.2.4,40001,198.51.100.20,80,eco
tcp,192.0.2.4,40001,198.51.100.20,80,damper
tcp,192.0.2.5,40001,198.51.100.20,80,tag:access
tcp,192.0.2.6,40001,198.51.100.20,80,clean
tcp,192.0.2.8,40001,198.51.100.20,80,eco
TCP,2001:DB8:0::10,40001,2001:db8::20,80,eco
udp,192.0.2.30,50001,198.51.100.40,47100,eco
"""


def write_score_capture(path):
    """Seven IPv4 conversations, one IPv6 and one UDP flow; returns {flow key: bytes sent}."""
    clock = Clock()
    sent, convs = {}, []
    for ip, data in SCORE_FLOWS.items():
        c = Conversation(client=(ip, 40001), server=SERVER, clock=clock)
        c.handshake()
        c.send("client", data, segments=3)
        c.close()
        convs.append(c)
        sent[("tcp", ip, 40001, *SERVER)] = data
    v6 = Conversation(client=("2001:db8::10", 40001), server=("2001:db8::20", 80), ipv6=True,
                      clock=clock)
    v6.handshake()
    v6.send("client", b"PUT /ahu/9 mode=eco\r\n", segments=5)
    v6.close()
    sent[("tcp", "2001:db8::10", 40001, "2001:db8::20", 80)] = b"PUT /ahu/9 mode=eco\r\n"
    u = Datagrams(clock=clock)
    u.send("client", b"mode=eco;t=21.5")
    u.send("client", b"mode=eco;t=21.6")
    sent[("udp", "192.0.2.30", 50001, "198.51.100.40", 47100)] = b"mode=eco;t=21.5mode=eco;t=21.6"
    craft.write_pcap(path, craft.merge(*convs, v6, u))
    return sent


def test_precision_and_recall_on_known_truth(tmp_path):
    cap = tmp_path / "lab.pcap"
    sent = write_score_capture(cap)
    (tmp_path / "labels.csv").write_text(SCORE_LABELS)
    sigset = seamscan.signature_set(SCORE_SIGS)
    rep = rate([cap], sigset, labels=load_labels(tmp_path / "labels.csv", sigset))
    # hit counts per flow: Python's re on the bytes each client sent
    for k, data in sent.items():
        want = {s["id"]: n for s in SCORE_SIGS if (n := re_count(s["text"].encode(), data))}
        assert flow_of(rep, **key(*k))["signatures"] == want, k
    sig = by_id(rep)
    # eco: TP on .1, .4, the IPv6 flow and the UDP flow; .7 is unlabelled
    assert sig["eco"]["scores"] == {"tp": 4, "fp": 0, "fn": 0, "unlabelled": 1,
                                    "precision": 1.0, "recall": 1.0}
    assert sig["eco"]["matches"] == 6  # the UDP flow has two
    # fan: TP on .2 (tag:hvac), FP on .3 (clean) and on .4 (expects eco and damper)
    assert sig["fan"]["scores"] == {"tp": 1, "fp": 2, "fn": 0, "unlabelled": 0,
                                    "precision": pytest.approx(1 / 3), "recall": 1.0}
    # damper: expected on .4, never fired
    assert sig["damper"]["scores"] == {"tp": 0, "fp": 0, "fn": 1, "unlabelled": 0,
                                       "precision": None, "recall": 0.0}
    assert sig["unlock"]["scores"]["precision"] is None and sig["unlock"]["scores"]["recall"] is None
    lab = rep["labels"]
    # set: TP 4 + 1, FP 2, FN damper on .4 and tag:access on .5
    assert lab["set"] == {"tp": 5, "fp": 2, "fn": 2, "precision": pytest.approx(5 / 7),
                          "recall": pytest.approx(5 / 7)}
    assert lab["flows"] == {"flagged_expected": 5, "flagged_clean": 1, "missed": 1,
                            "clean_ok": 1, "unlabelled": 1, "absent": 1}
    assert [(f["client_ip"], f["signature"]) for f in lab["false_positives"]] == [
        ("192.0.2.3", "fan"), ("192.0.2.4", "fan")]
    assert [(f["client_ip"], f["expect"]) for f in lab["false_negatives"]] == [
        ("192.0.2.4", "damper"), ("192.0.2.5", "tag:access")]
    assert lab["absent"] == [{**key("tcp", "192.0.2.8", 40001, *SERVER), "expect": ["eco"]}]
    assert lab["unlabelled"] == [{**key("tcp", "192.0.2.7", 40001, *SERVER),
                                  "signatures": ["eco"]}]
    assert (lab["rows"], lab["flows_labelled"]) == (10, 9)
    assert flow_of(rep, client_ip="192.0.2.4")["verdict"] == "flagged_expected"
    assert flow_of(rep, client_ip="192.0.2.4")["expect"] == ["eco", "damper"]
    assert flow_of(rep, client_ip="192.0.2.7")["expect"] is None
    text = report.format_tables(rep)
    assert "set: 5 TP, 2 FP, 2 FN; precision 0.714, recall 0.714" in text
    assert "tag:access" in text and "TCP 192.0.2.8:40001 -> 198.51.100.20:80" in text


# --- bad labels files ---------------------------------------------------------

@pytest.mark.parametrize("name, line, words", [
    ("labels-unknown-column.csv", 1, "unknown column 'verdict'"),
    ("labels-no-header.csv", 1, "missing header row"),
    ("labels-bad-address.csv", 3, "client_ip '192.0.2.300': bad address"),
    ("labels-bad-port.csv", 4, "server_port '65536': bad port"),
    ("labels-unknown-signature.csv", 2, "'ty-0031': unknown signature id"),
    ("labels-unknown-tag.csv", 5, "unknown tag 'hvca' (did you mean 'hvac'?)"),
    ("labels-clean-conflict.csv", 3, "labelled clean (line 2) and also expects ty-0001"),
    ("labels-wrong-length.csv", 3, "5 fields, the header has 6"),
])
def test_bad_labels_name_file_and_line(name, line, words):
    path = DATA / name
    sigset = seamscan.load_signatures(DEMO_SET)
    with pytest.raises(RateError) as info:
        load_labels(path, sigset)
    assert any(p.startswith(f"line {line}: ") and words in p for p in info.value.problems), \
        info.value.problems
    code, out, err = rate_cli(*DEMO_CAPS, "--rules", DEMO_SET, "--labels", path)
    assert code == 2 and out == ""
    assert str(path) in err and words in err and "Traceback" not in err


def test_every_bad_row_is_reported_at_once(tmp_path):
    with pytest.raises(RateError) as info:
        load_labels(DATA / "labels-many-problems.csv", seamscan.load_signatures(DEMO_SET))
    assert [p.split(":")[0] for p in info.value.problems] == ["line 2", "line 3", "line 4",
                                                              "line 5", "line 7"]
    assert info.value.problems[-1] == "line 7: repeats line 6"
    assert "5 problems" in str(info.value)
    missing = tmp_path / "nowhere.csv"
    with pytest.raises(RateError, match="no such file"):
        load_labels(missing, seamscan.load_signatures(DEMO_SET))
    (tmp_path / "latin1.csv").write_bytes(LABEL_HEADER.encode() + b"tcp,caf\xe9\n")
    with pytest.raises(RateError, match=r"latin1.csv:2: not UTF-8"):
        load_labels(tmp_path / "latin1.csv", seamscan.load_signatures(DEMO_SET))


# --- A/B ----------------------------------------------------------------------

AB_OLD = [{"id": "eco", "text": "mode=eco"}, {"id": "fan", "text": "fan=auto"},
          {"id": "unlock", "text": "/unlock", "label": "door unlock"},
          {"id": "auto", "text": "=auto"}, {"id": "vent", "text": "vent="}]
AB_NEW = [{"id": "eco", "text": "mode=eco"}, {"id": "fan", "text": "fan="},
          {"id": "unlock", "text": "/unlock", "label": "door unlock request"},
          {"id": "door", "text": "door="}]


def test_ab_between_sets_whose_difference_is_known(tmp_path):
    clock = Clock()
    convs = []
    for ip, data in (("192.0.2.1", b"mode=eco; fan=auto"), ("192.0.2.2", b"fan=low"),
                     ("192.0.2.3", b"POST /unlock door=2")):
        c = Conversation(client=(ip, 40001), server=SERVER, clock=clock)
        c.handshake()
        c.send("client", data, segments=4)
        c.close()
        convs.append(c)
    cap = tmp_path / "ab.pcap"
    craft.write_pcap(cap, craft.merge(*convs))
    rep = rate([cap], seamscan.signature_set(AB_NEW), against=seamscan.signature_set(AB_OLD))
    ab = rep["against"]
    sg = ab["signatures"]
    assert sg["added"] == [{"id": "door", "matches": 1, "flows": 1}]
    assert sg["removed"] == [{"id": "auto", "matches": 1, "flows": 1},
                             {"id": "vent", "matches": 0, "flows": 0}]
    assert sg["changed"] == [{"id": "fan", "old_matches": 1, "new_matches": 2, "delta": 1,
                              "old_flows": 1, "new_flows": 2, "redefined": True}]
    assert sg["unchanged"] == ["eco", "unlock"]  # unlock's label changed, not its pattern
    assert sg["redefined"] == ["fan"]
    assert [(f["client_ip"], f["signatures"]) for f in ab["flows"]["gained"]] == [
        ("192.0.2.2", ["fan"]), ("192.0.2.3", ["door"])]
    assert [(f["client_ip"], f["signatures"]) for f in ab["flows"]["lost"]] == [
        ("192.0.2.1", ["auto"])]
    sm = ab["summary"]
    assert sm["matches"] == {"old": 4, "new": 5, "delta": 1}
    assert sm["flows_flagged"] == {"old": 2, "new": 3, "delta": 1}
    assert sm["fired"] == {"old": 4, "new": 4, "delta": 0}
    assert sm["precision"] == {"old": None, "new": None, "delta": None}  # no labels


def test_ab_on_the_demo_against_its_previous_version():
    # what changed is written at the top of tests/data/rate/demo-previous.toml
    sigset = seamscan.load_signatures(DEMO_SET)
    rep = rate(DEMO_CAPS, sigset, labels=load_labels(DEMO_LABELS, sigset),
               against=seamscan.load_signatures(DATA / "demo-previous.toml"))
    ab = rep["against"]
    sg = ab["signatures"]
    assert [a["id"] for a in sg["added"]] == ["ty-0018"]
    assert sg["removed"] == [{"id": "ty-0098", "matches": 10, "flows": 10}]
    assert [(c["id"], c["old_matches"], c["new_matches"], c["redefined"])
            for c in sg["changed"]] == [("ty-0005", 2, 1, True), ("ty-0011", 0, 1, True)]
    assert sorted(sg["redefined"]) == ["ty-0005", "ty-0011"]
    lost = {f["client_port"]: f["signatures"] for f in ab["flows"]["lost"]}
    assert lost[40106] == ["ty-0005", "ty-0098"]
    # old set on the demo labels: TP 16; FP ty-0098 on 10 flows + ty-0005 on H6;
    # FN ty-0018 on H1 and ty-0011 on U1
    assert ab["summary"]["precision"]["old"] == pytest.approx(16 / 27)
    assert ab["summary"]["recall"]["old"] == pytest.approx(16 / 18)
    assert ab["summary"]["recall"]["delta"] == pytest.approx(1 - 16 / 18)


# --- device profiles ------------------------------------------------------------

DEVICE_SIGS = [{"id": "eco", "text": "mode=eco"}, {"id": "fan", "text": "fan=auto"},
               {"id": "damper", "text": "damper=closed"}]


def write_device_captures(tmp_path):
    """evict.pcap: flow A says "mode=" then, after B's SYN evicts it from a
    one-flow table, "eco" (picked up mid-stream, A's roles go by port: its
    server port 50080 is the larger, so client and server come out swapped);
    hold.pcap: flow C sends 106 bytes before the 37 before them, more than a
    64-byte hold, and "damper=closed" straddles the two."""
    clock = Clock()
    a = Conversation(client=("192.0.2.1", 40001), server=(SERVER[0], 50080), clock=clock)
    b = Conversation(client=("192.0.2.2", 40002), server=SERVER, clock=clock)
    a.handshake()
    a.send("client", b"set mode=")
    b.handshake()
    b.send("client", b"fan=auto")
    b.close()
    a.send("client", b"eco")
    a.close()
    craft.write_pcap(tmp_path / "evict.pcap", craft.merge(a, b))
    c = Conversation(client=("192.0.2.3", 40003), server=SERVER)
    c.handshake()
    data = b"x" * 30 + b"damper=" + b"closed" + b"y" * 100
    c.send("client", data, segments=[37, 106], order=[1, 0])
    c.close()
    craft.write_pcap(tmp_path / "hold.pcap", c.packets)
    return [tmp_path / "evict.pcap", tmp_path / "hold.pcap"]


def test_device_profile_drops_a_known_flow_and_match(tmp_path):
    caps = write_device_captures(tmp_path)
    prof = tmp_path / "gw.toml"
    prof.write_text('name = "edge-gw-1"\nmax_flows = 1\nhold_bytes = 64\nlayout = "compact"\n'
                    'budget = "64KiB"\n')
    rep = rate(caps, seamscan.signature_set(DEVICE_SIGS), profile=load_profile(prof))
    dev = rep["device"]
    assert dev["table"]["fits"] and dev["table"]["layout"] == "compact"
    assert dev["flows"]["evicted"] == 1
    assert dev["flows"]["evicted_flows"] == [{**key("tcp", "192.0.2.1", 40001, SERVER[0], 50080),
                                              "times": 1}]
    # A's second half comes back reversed, and still counts as A
    assert (dev["flows"]["host"], dev["flows"]["device"], dev["flows"]["swapped"]) == (3, 3, 1)
    assert (dev["gaps"]["host"], dev["gaps"]["device"], dev["gaps"]["hold_cap"]) == (0, 1, 1)
    assert [(g["client_ip"], g["side"], g["start"], g["end"]) for g in dev["gaps"]["new"]] == [
        ("192.0.2.3", "client", 0, 37)]
    assert dev["matches"] == {"host": 3, "device": 1, "missed": 2, "extra": 0}
    assert dev["missed"]["by_signature"] == {"damper": 1, "eco": 1}
    assert [(m["client_ip"], m["signature"], m["host"], m["device"])
            for m in dev["missed"]["by_flow"]] == [("192.0.2.1", "eco", 1, 0),
                                                   ("192.0.2.3", "damper", 1, 0)]
    # the device run equals scan's records under the same limits
    sigs = tmp_path / "sigs.toml"
    sigs.write_text("".join(f'[[signature]]\nid = "{s["id"]}"\ntext = "{s["text"]}"\n\n'
                            for s in DEVICE_SIGS))
    recs = scan_records(*caps, "--rules", sigs, "--max-flows", 1, "--hold-bytes", 64)
    assert sum(r["type"] == "match" for r in recs) == dev["matches"]["device"]
    assert recs[-1]["flow_events"]["ended_evicted"] == dev["flows"]["evicted"]
    text = report.format_tables(rep)
    assert "matches: 3 on the host, 1 on the device: 2 missed, 0 extra" in text


def test_device_table_that_does_not_fit_is_reported(tmp_path):
    caps = write_device_captures(tmp_path)
    prof = tmp_path / "tiny.toml"
    prof.write_text("budget = 64\n")
    rep = rate(caps, seamscan.signature_set(DEVICE_SIGS), profile=load_profile(prof))
    t = rep["device"]["table"]
    assert not t["fits"] and "no layout fits the budget of 64 bytes" in t["message"]
    assert rep["device"]["profile"]["max_flows"] == 65536  # the host's, when not given
    assert rep["device"]["matches"]["missed"] == 0
    assert "table DOES NOT FIT" in report.format_tables(rep)


@pytest.mark.parametrize("name, words", [
    ("profile-unknown-key.toml", ["profile-unknown-key.toml:3:", "unknown key 'max_flow' "
                                  "(did you mean 'max_flows'?)"]),
    ("profile-bad-values.toml", ["4 problems", "line 2: max_flows", "line 3: hold_bytes",
                                 "line 4: layout: 'tiny'", "line 5: budget"]),
    ("profile-not-toml.toml", ["profile-not-toml.toml:3: not valid TOML"]),
])
def test_bad_profiles(name, words):
    code, out, err = rate_cli(*DEMO_CAPS, "--rules", DEMO_SET, "--profile", DATA / name)
    assert code == 2 and out == ""
    for w in words:
        assert w in err, err
    assert "Traceback" not in err


# --- command line and report files ----------------------------------------------

def test_report_files_and_json_output(tmp_path):
    out_dir = tmp_path / "out"
    args = (*DEMO_CAPS, "--rules", DEMO_SET, "--labels", DEMO_LABELS, "--against",
            DATA / "demo-previous.toml", "--profile", DATA / "demo-gateway.toml")
    code, out, err = rate_cli(*args, "--report", out_dir, "--format", "json")
    assert code == 0, err
    printed = json.loads(out)
    saved = json.loads((out_dir / "report.json").read_text())
    assert printed == saved
    assert saved["format"] == "seamscan-rate" and saved["version"] == 1
    assert saved["device"]["table"]["fits"]
    # demo-gateway.toml: one live flow and 16 held bytes lose H2's scene read
    assert saved["device"]["missed"]["by_signature"] == {"ty-0004": 1}
    with open(out_dir / "signatures.csv", newline="") as f:
        rows = list(csv.reader(f))
    assert tuple(rows[0]) == report.CSV_COLUMNS
    assert [r[0] for r in rows[1:]] == [s["id"] for s in saved["signatures"]]
    col = {name: i for i, name in enumerate(rows[0])}
    ty18 = next(r for r in rows if r[0] == "ty-0018")
    assert (ty18[col["matches"]], ty18[col["old_matches"]], ty18[col["tp"]]) == ("2", "", "1")
    page = (out_dir / "report.html").read_text()
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(images) == 4  # hits, flows over time, A/B delta, device losses
    assert all(base64.b64decode(i).startswith(b"\x89PNG\r\n\x1a\n") for i in images)
    assert "http://" not in page and "https://" not in page and "<script" not in page
    assert "wrote " in err and "report.html" in err


def test_terminal_tables(tmp_path):
    code, out, err = rate_cli(*DEMO_CAPS, "--rules", DEMO_SET, "--labels", DEMO_LABELS)
    assert code == 0, err
    assert "20 signatures rated on 3 captures" in out
    assert "14 flows (14 connections), 8 flagged" in out
    assert "never fired (4): ty-0017, ty-0020, ty-0012, ty-0015" in out
    assert "set: 18 TP, 0 FP, 0 FN; precision 1.000, recall 1.000" in out
    line = next(x for x in out.splitlines() if x.startswith("ty-0019 "))
    assert line.split()[:5] == ["ty-0019", "5", "1", "7.1%", "0/5"]


def test_usage_errors_and_a_damaged_capture(tmp_path):
    code, _, err = rate_cli(tmp_path / "none.pcap", "--rules", DEMO_SET)
    assert code == 2 and "none.pcap: no such capture file" in err
    bad = tmp_path / "bad.toml"
    bad.write_text('[[signature]]\nid = "x"\n')
    code, _, err = rate_cli(*DEMO_CAPS, "--rules", bad)
    assert code == 2 and "bad.toml" in err and "Traceback" not in err
    with pytest.raises(SystemExit):
        rate_cli(*DEMO_CAPS, "--rules", DEMO_SET, "--noisy-share", "2")
    # a capture cut short: what came before the damage is rated, exit 3
    whole = (ROOT / "pcaps_demo" / "lab-http.pcap").read_bytes()
    cut = tmp_path / "cut.pcap"
    cut.write_bytes(whole[: len(whole) * 2 // 3])
    code, out, err = rate_cli(cut, "--rules", DEMO_SET, "--format", "json")
    assert code == 3 and "damaged capture" in err
    rep = json.loads(out)
    assert rep["captures"][0]["error"] and rep["set"]["matches"] > 0


def report_keys(obj):
    """Every field name of a report, not the data keyed by signature id or end reason."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield k
            if not (k in ("by_signature", "ends") or (k == "signatures" and isinstance(v, dict))):
                yield from report_keys(v)
    elif isinstance(obj, list):
        for item in obj:
            yield from report_keys(item)


def test_the_schema_documents_every_field(tmp_path):
    sigset = seamscan.load_signatures(DEMO_SET)
    (tmp_path / "labels.csv").write_text(DEMO_LABELS.read_text()
                                         + "tcp,192.0.2.99,40001,198.51.100.21,80,clean\n")
    rep = rate(DEMO_CAPS, sigset, labels=load_labels(tmp_path / "labels.csv", sigset),
               against=seamscan.load_signatures(DATA / "demo-previous.toml"),
               profile=load_profile(DATA / "demo-gateway.toml"))
    documented = set(re.findall(r"\w+", evaluate.REPORT_SCHEMA))
    assert set(report_keys(rep)) - documented == set()
    assert json.loads(report.to_json(rep)) == rep
