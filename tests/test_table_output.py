"""The terminal table format keeps memory bounded whatever the match density:
a flow lists at most ``records.TABLE_LINES_PER_FLOW`` lines, all open flows
together at most ``records.TABLE_LINES_HELD``, and the rest is summarised
per side and signature (count, first and last offsets and frames).

Memory is measured with ``tracemalloc`` (Python's allocation tracer), never
with time.  Outside reference for the counts: Python's ``re`` counting the
one-byte signature in the bytes the crafted client sent.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tracemalloc
from pathlib import Path

from seamscan import records

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tools"))

from craft import Clock, Conversation, write_pcap  # noqa: E402

FLOW = {"transport": "tcp", "client_ip": "192.0.2.10", "client_port": 40001,
        "server_ip": "198.51.100.20", "server_port": 80}


def match(i, flow=FLOW, sig="one-a"):
    """The i-th match of a one-byte signature in a stream of that byte (1460 per frame)."""
    return {"type": "match", "sig": sig, **flow, "side": "client", "start": i, "end": i + 1,
            "file": "dense.pcap", "frame": 4 + i // 1460, "ts": 1.0}


def flow_end(matches, flow=FLOW):
    return {"type": "flow", **flow, "file": "dense.pcap", "first_ts": 1.0, "last_ts": 2.0,
            "client_packets": 1, "server_packets": 1, "client_bytes": matches,
            "server_bytes": 0, "end": "fin", "matches": matches}


def listed_and_summarised(text, sig="one-a"):
    """(lines listed, count summarised) for ``sig`` in one flow's table text."""
    listed = len(re.findall(rf"^    client bytes \d+\.\.\d+ +{sig} ", text, re.M))
    more = re.findall(rf"^    client {sig} +(\d+) match", text, re.M)
    return listed, sum(int(m) for m in more)


def test_a_dense_flow_is_summarised_in_bounded_memory(tmp_path):
    n = 200_000  # about 100 MB when every record was held (~540 B each)
    out_path = tmp_path / "table.txt"
    with open(out_path, "w", encoding="utf-8") as out:
        tracemalloc.start()
        try:
            w = records.TableWriter(out, labels={"one-a": "one byte"})
            for i in range(n):
                w.write(match(i))
            _, peak = tracemalloc.get_traced_memory()
            w.write(flow_end(n))
            w.close()
        finally:
            tracemalloc.stop()
    # 1000 formatted lines of ~100 characters, and a few small objects
    assert peak < 2 * 2**20, f"{peak:,} bytes held for one flow"
    text = out_path.read_text()
    listed, more = listed_and_summarised(text)
    assert listed == records.TABLE_LINES_PER_FLOW and listed + more == n
    first, last = records.TABLE_LINES_PER_FLOW, n - 1
    assert (f"client one-a            {n - first} matches, bytes {first}..{last + 1} "
            f"(first start .. last end), frames {4 + first // 1460}..{4 + last // 1460}") in text
    assert f"... and {n - first} more, not listed (the table lists at most 1000" in text


def test_help_states_the_bounds():
    from seamscan.cli import SCAN_EPILOG

    text = " ".join(SCAN_EPILOG.split())
    assert (f"at most {records.TABLE_LINES_PER_FLOW} lines per flow "
            f"({records.TABLE_LINES_HELD} over all open flows)") in text


def test_many_open_flows_share_one_bound(monkeypatch, tmp_path):
    monkeypatch.setattr(records, "TABLE_LINES_HELD", 5000)
    flows = [{**FLOW, "client_port": 40000 + k} for k in range(50)]
    per_flow = 400  # under the per-flow bound: only the total bound summarises
    out_path = tmp_path / "table.txt"
    with open(out_path, "w", encoding="utf-8") as out:
        w = records.TableWriter(out)
        most = 0
        for i in range(per_flow):
            for f in flows:
                w.write(match(i, f))
                most = max(most, w.held)
        for f in flows:
            w.write(flow_end(per_flow, f))
        w.close()
    assert most == 5000 and w.held == 0 and not w.pending
    blocks = out_path.read_text().split("\n\n")[:50]
    counts = [listed_and_summarised(b) for b in blocks]
    assert all(listed + more == per_flow for listed, more in counts)
    assert sum(listed for listed, _ in counts) == 5000


def test_scan_table_on_a_crafted_dense_capture(tmp_path):
    body = b"a" * 3000
    c = Conversation(client=("192.0.2.10", 40001), server=("198.51.100.20", 80), clock=Clock())
    c.handshake()
    c.send("client", b"GET /" + body + b" x", segments=12)
    c.send("server", b"HTTP/1.1 200 OK\r\n")
    c.close()
    write_pcap(tmp_path / "dense.pcap", c.packets)
    (tmp_path / "set.toml").write_text('[[signature]]\nid = "one-a"\nhex = "61"\n'
                                       '[[signature]]\nid = "reply"\ntext = "HTTP/1.1"\n')
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    r = subprocess.run([sys.executable, "-m", "seamscan", "scan", "dense.pcap", "--rules",
                        "set.toml", "--format", "table"], cwd=tmp_path, env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    want = len(re.findall(b"a", b"GET /" + body + b" x"))  # Python's re: 3000 + 0
    listed, more = listed_and_summarised(r.stdout)
    assert (listed, listed + more) == (records.TABLE_LINES_PER_FLOW, want)
    # the server's one match came after the bound: summarised with its offsets
    assert re.search(r"^    server reply +1 match, bytes 0\.\.8 ", r.stdout, re.M)
    assert f"{want + 1} matches" in r.stdout
