"""Forged control segments through the whole replay: the match that must survive.

Each capture is crafted with scapy (``tools/craft.py``) and replayed both
ways (the C front end with the fast lane, and ``SEAMSCAN_FASTPATH=0``): the
``replay`` helper of ``test_replay`` checks that both give the same records
and counters. What the receiving host would do is RFC 9293 §3.10.7.4 (a RST
counts only in the receive window, text and FIN before RCV.NXT are old) and
RFC 5961 §3.2; scapy computes the checksums (RFC 9293 §3.1) unless told a
wrong one. The data is an invented smart-building lab in the documentation
address ranges.
The decoder fills ``Packet.sum_ok`` for FIN and RST segments captured whole.
"""

from __future__ import annotations

import pytest

from test_replay import Clock, Conversation, compiled, of_type, replay, write

# a thermostat override the client sends; `side` and `ports` limits must keep firing
SIGS = ({"id": "override", "text": "mode=override", "side": "client", "ports": [8080]},)
CLIENT_EP, SERVER_EP = ("192.0.2.10", 1023), ("198.51.100.20", 8080)  # client port < server's


def control(conv, side, rel, flags, data=b"", **tcp):
    """A control segment at stream offset ``rel`` of ``side``, moving nothing of ``conv``."""
    return conv._tcp(0 if side == "client" else 1, rel, flags, data, **tcp)


def run(tmp_path, conv):
    _, table = compiled(*SIGS)
    return replay(write(tmp_path, conv.packets), table)


def overrides(result):
    return [(m["side"], m["client_port"], m["server_port"], m["start"])
            for m in of_type(result, "match")]


@pytest.mark.parametrize("sender", ["client", "server"])
def test_rst_half_the_sequence_space_away_is_ignored(tmp_path, sender):
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"PUT /zone/4 mode=ov")
    c.send("server", b"HTTP/1.1 100 Continue")
    s = 0 if sender == "client" else 1
    control(c, sender, c.next[s] + 2**31, "R")  # valid checksum, far from any window
    c.send("client", b"erride;")
    c.close()
    result = run(tmp_path, c)
    assert overrides(result) == [("client", 1023, 8080, 12)]
    (flow,) = of_type(result, "flow")
    assert flow["end"] == "fin"
    assert result.counters["ignored_rst"] == 1 and result.counters["ended_rst"] == 0
    assert result.counters["out_of_window_segments"] == 0


def test_rst_just_before_the_next_byte_is_ignored(tmp_path):
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"PUT /zone/4 mode=ov")
    control(c, "client", c.next[0] - 1, "RA")  # old: the receiver has that byte
    c.send("client", b"erride;")
    c.close()
    result = run(tmp_path, c)
    assert overrides(result) == [("client", 1023, 8080, 12)]
    assert result.counters["ignored_rst"] == 1


def test_flow_resumed_after_an_obeyed_rst_keeps_its_roles(tmp_path):
    # a RST at the next byte is obeyed (the receiver would take it); the
    # client goes on: the resumed flow keeps client 1023 and server 8080,
    # where the port rule would swap them and the `side` limit never fire
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"GET /zone/4")
    control(c, "client", c.next[0], "RA")
    c.send("server", b"HTTP/1.1 200 OK")  # the server speaks first after it
    c.send("client", b" mode=override")
    result = run(tmp_path, c)
    first, second = of_type(result, "flow")
    assert first["end"] == "rst"
    assert (second["client_port"], second["server_port"]) == (1023, 8080)
    assert (second["client_bytes"], second["server_bytes"]) == (14, 15)
    assert overrides(result) == [("client", 1023, 8080, 1)]
    assert result.counters["roles_kept"] == 1


def test_fin_with_a_stale_sequence_number_is_ignored(tmp_path):
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"PUT /zone/4 mode=ov")
    control(c, "client", 4, "FA")  # valid checksum, sequence number 4 was data
    c.send("client", b"erride;")
    c.close()
    result = run(tmp_path, c)
    assert overrides(result) == [("client", 1023, 8080, 12)]
    (flow,) = of_type(result, "flow")
    assert flow["end"] == "fin" and flow["client_bytes"] == 26
    assert result.counters["ignored_fin"] == 1 and result.counters["beyond_fin_bytes"] == 0


@pytest.mark.parametrize("flags", ["R", "RA", "FA"])
def test_control_segment_with_a_wrong_checksum_is_ignored(tmp_path, flags):
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"PUT /zone/4 mode=ov")
    control(c, "client", c.next[0], flags, chksum=0xBEEF)  # at its place, wrong checksum
    c.send("client", b"erride;")
    c.close()
    result = run(tmp_path, c)
    assert overrides(result) == [("client", 1023, 8080, 12)]
    (flow,) = of_type(result, "flow")
    assert flow["end"] == "fin" and flow["client_bytes"] == 26
    kind = "ignored_fin_checksum" if "F" in flags else "ignored_rst_checksum"
    assert result.counters[kind] == 1 and result.counters["beyond_fin_bytes"] == 0


def test_fin_with_a_wrong_checksum_and_data_keeps_the_data(tmp_path):
    c = Conversation(CLIENT_EP, SERVER_EP, clock=Clock())
    c.handshake()
    c.send("client", b"PUT /zone/4 mode=ov")
    control(c, "client", c.next[0], "FPA", b"err", chksum=0xBEEF)
    c.next[0] += 3
    c.send("client", b"ide;")
    c.close()
    result = run(tmp_path, c)
    assert overrides(result) == [("client", 1023, 8080, 12)]
    assert of_type(result, "flow")[0]["end"] == "fin"
    assert result.counters["ignored_fin_checksum"] == 1


def test_new_connection_after_a_rst_beyond_the_bytes_seen(tmp_path):
    # the capture lost the client's last segment, so its RST lies beyond every
    # byte seen and is ignored; the next connection on the same ports (a new
    # ISN, answered by a SYN-ACK) is a new flow with its match
    clock = Clock()
    c = Conversation(CLIENT_EP, SERVER_EP, clock=clock)
    c.handshake()
    c.send("client", b"GET /zone/4")
    c.next[0] += 40  # sent, not captured
    control(c, "client", c.next[0], "RA")
    again = Conversation(CLIENT_EP, SERVER_EP, isn_c=c.isn[0] + 2**31, isn_s=77, clock=clock)
    again.handshake()
    again.send("client", b"PUT mode=override")
    again.close()
    _, table = compiled(*SIGS)
    result = replay(write(tmp_path, c.packets + again.packets), table)
    assert overrides(result) == [("client", 1023, 8080, 4)]
    assert [f["end"] for f in of_type(result, "flow")] == ["reused", "fin"]
    assert result.counters["ignored_rst"] == 1 and result.counters["ended_reused"] == 1
