"""``rate`` says the day whenever a capture spans days: the head's range, the
first/last-seen columns (terminal and HTML), and the HTML timeline's axis,
which stays readable (dated ticks that do not overlap) for a long capture.

Outside reference: Python's ``datetime`` for the UTC calendar dates of the
crafted capture times; matplotlib's own text layout for the tick labels'
extents.  The crafted capture is an invented smart-building lab.
"""

from __future__ import annotations

import datetime
import re
import sys
from pathlib import Path

import pytest

import seamscan
from seamscan import report
from seamscan.evaluate import rate

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tools"))

from craft import Clock, Conversation, merge, write_pcap  # noqa: E402

START = 942356776  # 1999-11-11 21:46:16 UTC (checked below with datetime)
SIGS = '[[signature]]\nid = "eco"\ntext = "mode=eco"\n[[signature]]\nid = "status"\ntext = "/status"\n'


def utc(ts) -> datetime.datetime:
    return datetime.datetime.fromtimestamp(ts, tz=datetime.UTC)


def crafted(tmp_path, gaps):
    """A capture with one HTTP flow before each pause of ``gaps`` seconds; its report."""
    clock = Clock(start=START)
    convs = []
    for k, pause in enumerate(gaps):
        c = Conversation(client=(f"192.0.2.{10 + k % 5}", 40000 + k),
                         server=("198.51.100.20", 80), clock=clock)
        c.handshake()
        c.send("client", b"GET /ahu/%d mode=eco\r\n" % k if k % 3 else b"GET /status\r\n")
        c.close()
        convs.append(c)
        clock.advance(pause)
    write_pcap(tmp_path / "lab.pcap", merge(*convs))
    (tmp_path / "set.toml").write_text(SIGS)
    return rate([tmp_path / "lab.pcap"], seamscan.load_signatures(tmp_path / "set.toml"))


def test_the_start_is_the_date_we_think():
    assert utc(START) == datetime.datetime(1999, 11, 11, 21, 46, 16, tzinfo=datetime.UTC)


def test_spans_days_against_datetime():
    for a, b in [(START, START + 60), (START, START + 8024), (START, START + 8023),
                 (START, START + 3 * 86400), (0, 86399.999), (0, 86400), (None, 5)]:
        want = a is not None and utc(a).date() != utc(b).date()
        assert report.spans_days(a, b) is want, (a, b)


def test_multi_day_range_and_columns_show_the_date(tmp_path):
    rep = crafted(tmp_path, [4000] * 20)  # 76,000 s: three calendar days
    first, last = rep["set"]["first_ts"], rep["set"]["last_ts"]
    assert utc(first).date() != utc(last).date()
    text = report.format_tables(rep)
    start = f"{utc(first):%Y-%m-%d %H:%M:%S}"
    end = f"{utc(last):%Y-%m-%d %H:%M:%S}"
    assert re.search(rf"{start}\.\d{{3}} \.\. {end}\.\d{{3}} UTC", text)
    for s in rep["signatures"]:
        row = next(x for x in text.splitlines() if x.startswith(s["id"] + " "))
        dates = re.findall(r"(\d{4}-\d\d-\d\d) (\d\d:\d\d:\d\d)\.\d{3}", row)
        assert dates == [(f"{utc(t):%Y-%m-%d}", f"{utc(t):%H:%M:%S}")
                         for t in (s["first_ts"], s["last_ts"])]
    page = report.render_html(rep, {})
    assert f"capture time {start}" in page and f".. {end}" in page
    for s in rep["signatures"]:
        assert f"<td>{report.clock(s['first_ts'], True)}</td>" in page
    for f in rep["flows"]:
        assert f"<td>{report.clock(f['first_ts'], True)}</td>" in page


def test_a_day_keeps_times_of_day(tmp_path):
    rep = crafted(tmp_path, [60] * 5)
    text = report.format_tables(rep)
    assert re.search(r"1999-11-11 21:46:16\.\d{3} \.\. 21:5\d:\d\d\.\d{3} UTC", text)
    row = next(x for x in text.splitlines() if x.startswith("eco "))
    assert "1999" not in row and re.search(r"21:4\d:\d\d\.\d{3}", row)


def _tick_texts_and_boxes(fig):
    fig.canvas.draw()
    ax = fig.axes[0]
    labels = [t for t in ax.get_xticklabels() if t.get_text() and t.get_visible()]
    lo, hi = ax.get_xlim()
    shown = [t for t in labels if lo <= t.get_position()[0] <= hi]
    renderer = fig.canvas.get_renderer()
    return [t.get_text() for t in shown], [t.get_window_extent(renderer) for t in shown]


@pytest.mark.parametrize("days", [3, 40, 400])
def test_long_timeline_axis_is_dated_and_readable(tmp_path, days):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    n = 30
    rep = crafted(tmp_path, [days * 86400 // n] * n)
    try:
        fig = report.timeline_figure(plt, rep["flows"])
        texts, boxes = _tick_texts_and_boxes(fig)
        assert 3 <= len(texts) <= 12, texts
        for a, b in zip(boxes, boxes[1:], strict=False):
            assert a.x1 < b.x0, f"tick labels overlap: {texts}"
        # dated ticks: a year, a month, a month and day, or a time of day; never seconds
        # counted from the start, nor a bare day number without its month
        dated = r"(19|20)\d\d|[A-Z][a-z]{2}( \d\d)?|\d\d:\d\d"
        assert all(re.fullmatch(dated, t) for t in texts), texts
        assert any(re.fullmatch(r"[A-Z][a-z]{2}( \d\d)?|(19|20)\d\d", t) for t in texts), texts
        assert "capture time (UTC), from 1999-11-11 21:46:16" in fig.axes[0].get_xlabel()
    finally:
        plt.close("all")


def test_short_timeline_stays_in_seconds(tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    rep = crafted(tmp_path, [30] * 10)
    try:
        fig = report.timeline_figure(plt, rep["flows"])
        texts, _ = _tick_texts_and_boxes(fig)
        assert all(re.fullmatch(r"[\d.,−-]+", t) for t in texts), texts
        assert fig.axes[0].get_xlabel().startswith("capture seconds after 1999-11-11 21:46:16")
    finally:
        plt.close("all")
