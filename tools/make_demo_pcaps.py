"""Write the bundled demo: captures of the Tern Yard building lab.

    python tools/make_demo_pcaps.py [OUTDIR]      (default: pcaps_demo/)

Writes ``lab-http.pcap``, ``lab-udp.pcap`` (nanosecond timestamps),
``lab-trunk.pcapng`` (two interfaces: Ethernet with VLAN 30, and bare
IPv6) and ``labels.csv``, the designed truth: one row per expected verdict
per flow (a signature id of ``demo-signatures.toml``, ``tag:NAME`` or
``clean``).  ``pcaps_demo/README.md`` explains every flow.  Deterministic:
every run writes byte-identical files.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import struct
import sys
import zlib
from decimal import Decimal
from pathlib import Path

from craft import LINKTYPE_RAW, Clock, Conversation, Datagrams, merge, write_pcap, write_pcapng

OPS = "192.0.2.10"            # ops console (management station)
OPS6 = "2001:db8:7e::10"      # ops console, IPv6
COLLECTOR = "192.0.2.40"      # telemetry collector
HVAC = "198.51.100.21"        # HVAC controller: HTTP :80, firmware push :47200
LIGHT = "198.51.100.22"       # lighting controller: HTTP :8080
LIGHT6 = "2001:db8:7e:2::22"  # lighting controller, IPv6
DOOR = "198.51.100.23"        # door controller: HTTP :80 on VLAN 30
METER = "198.51.100.30"       # metering gateway: telemetry to the collector :47100
DEPOT = "203.0.113.50"        # vendor firmware depot
VENDOR = "203.0.113.80"       # vendor portal: HTTP :80

DAY = Decimal(1709542800)     # 2024-03-04 09:00:00 UTC

TELEMETRY_MAGIC = bytes.fromhex("d15c0a7e")
FIRMWARE_MAGIC = bytes.fromhex("f70a504b")
SIGNING_BLOB = bytes.fromhex("ca11ab1e5eed0001")


def http(start_line: str, headers: list[str], body: bytes = b"") -> bytes:
    """An HTTP/1.1 message; Content-Length is added when there is a body."""
    lines = [start_line, *headers]
    if body:
        lines.append(f"Content-Length: {len(body)}")
    return ("\r\n".join(lines) + "\r\n\r\n").encode() + body


def cut(data: bytes, *points: int) -> list[int]:
    """Segment sizes that cut ``data`` at the given offsets."""
    edges = [0, *points, len(data)]
    return [b - a for a, b in zip(edges, edges[1:], strict=False)]


def inside(data: bytes, needle: bytes, k: int) -> int:
    """The offset ``k`` bytes into the first occurrence of ``needle``."""
    return data.index(needle) + k


def noise(label: str, n: int) -> bytes:
    """``n`` pseudo-random bytes, the same on every platform and version."""
    out = bytearray()
    counter = 0
    while len(out) < n:
        out += hashlib.sha256(f"{label}/{counter}".encode()).digest()
        counter += 1
    return bytes(out[:n])


class Truth:
    """The designed verdicts, one row per expected verdict per flow."""

    def __init__(self):
        self.rows: list[tuple] = []

    def expect(self, flow, transport: str, *verdicts: str) -> None:
        key = (transport, *flow.client, *flow.server)
        for verdict in verdicts or ("clean",):
            self.rows.append((*key, verdict))

    def write(self, path: Path) -> None:
        with path.open("w", newline="") as f:
            out = csv.writer(f, lineterminator="\n")
            out.writerow(["transport", "client_ip", "client_port", "server_ip", "server_port",
                          "expect"])
            out.writerows(self.rows)


def lab_http(truth: Truth) -> list:
    """IPv4 HTTP control traffic between the ops console and the controllers."""
    clock = Clock(DAY, "0.0021")

    # H1: zone setpoint write with factory-default credentials; the request
    # line, the credentials and the server's hold override straddle segments.
    h1 = Conversation((OPS, 40101), (HVAC, 80), isn_c=0x1A2B0000, isn_s=0x7F000000, clock=clock)
    body = b'{"celsius":21.5,"hold":"override"}'
    req1 = http("POST /hvac/v2/zone/3/setpoint HTTP/1.1",
                ["Host: hvac-ctl.tern.lab", "Authorization: Basic YWRtaW46YWRtaW4=",
                 "Content-Type: application/json"], body)
    resp1 = http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                 b'{"zone":3,"celsius":21.5,"hold":"override","ok":true}')

    # H2: scene list with a reordered segment; the client's ISN is 16 below
    # 2**32, so its sequence numbers wrap inside the request.
    h2 = Conversation((OPS, 40102), (LIGHT, 8080), isn_c=0xFFFFFFF0, isn_s=0x00C0FFEE,
                      clock=clock)
    req2 = http("GET /lights/scene/list?floor=2 HTTP/1.1",
                ["Host: light-ctl.tern.lab:8080", "Accept: application/json"])
    resp2 = http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                 b'[{"scene":"evening","level":40},{"scene":"cleaning","level":100}]')

    h1.handshake()
    h2.handshake()
    h1.send("client", req1, segments=cut(req1, 9, inside(req1, b"YWRtaW46", 4), len(req1) - 12))
    h2.send("client", req2, segments=cut(req2, 10, 24), order=[0, 2, 1])
    h1.ack("server")
    h2.send("server", resp2, segments=40)
    h1.send("server", resp1, segments=cut(resp1, inside(resp1, b"override", 3)))
    h2.close()
    h1.close()
    truth.expect(h1, "tcp", "ty-0001", "ty-0002", "ty-0003", "ty-0018", "tag:hvac")
    truth.expect(h2, "tcp", "ty-0004")

    # H3: a second setpoint write whose first segment is retransmitted: one
    # match, not two.
    h3 = Conversation((OPS, 40103), (HVAC, 80), isn_c=3_000_000, isn_s=9_000_000, clock=clock)
    req3 = http("POST /hvac/v2/zone/5/setpoint HTTP/1.1",
                ["Host: hvac-ctl.tern.lab", "Authorization: Bearer 7c41e09d",
                 "Content-Type: application/json"], b'{"celsius":19.0}')
    h3.handshake()
    h3.send("client", req3, segments=cut(req3, 12), dup=[0])
    h3.send("server", http("HTTP/1.1 204 No Content", ["Server: tern-hvac/1.4.2"]))
    h3.close()
    truth.expect(h3, "tcp", "ty-0001")

    # H4, H5: routine traffic with nothing of interest.
    h4 = Conversation((OPS, 40104), (HVAC, 80), isn_c=41, isn_s=777, clock=clock)
    h5 = Conversation((OPS, 40105), (VENDOR, 80), isn_c=123456789, isn_s=987654321, clock=clock)
    h4.handshake()
    h5.handshake()
    h4.send("client", http("GET /hvac/v2/zone/3/status HTTP/1.1", ["Host: hvac-ctl.tern.lab"]))
    h5.send("client", http("GET /manifests/tern-hvac.json HTTP/1.1",
                           ["Host: portal.example-vendor.test", "Connection: close"]))
    h4.send("server", http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                           b'{"zone":3,"celsius":21.4,"humidity":41,"mode":"auto"}'))
    h5.send("server", http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                           b'{"model":"TY-HVAC-200","latest":"1.4.3","size":4236,'
                           b'"sha256":"' + hashlib.sha256(b"tern").hexdigest().encode() + b'"}'))
    h4.close()
    h5.close("rst", side="server")
    truth.expect(h4, "tcp")
    truth.expect(h5, "tcp")

    # H6: a later copy of the first segment carries different bytes
    # ("PUT" instead of "GET"): the first-received bytes win, so the flow
    # is clean although a relay-write request line went by on the wire.
    h6 = Conversation((OPS, 40106), (LIGHT, 8080), isn_c=55_555, isn_s=66_666, clock=clock)
    req6 = http("GET /lights/relay/7/info HTTP/1.1", ["Host: light-ctl.tern.lab:8080"])
    h6.handshake()
    h6.segment("client", 0, req6[:20])
    h6.segment("client", 0, b"PUT" + req6[3:20])
    h6.segment("client", 20, req6[20:])
    h6.send("server", http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                           b'{"relay":7,"on":false}'))
    h6.close()
    truth.expect(h6, "tcp")

    # H7: a setpoint write where the segment in the middle of the
    # credentials was never captured: matches never span a gap.
    h7 = Conversation((OPS, 40107), (HVAC, 80), isn_c=0x00010000, isn_s=0x00020000, clock=clock)
    req7 = http("POST /hvac/v2/zone/4/setpoint HTTP/1.1",
                ["Host: hvac-ctl.tern.lab", "Authorization: Basic YWRtaW46YWRtaW4=",
                 "Content-Type: application/json"], b'{"celsius":22.0}')
    h7.handshake()
    h7.send("client", req7, segments=cut(req7, inside(req7, b"YWRt", 2),
                                          inside(req7, b"YWRt", 9)), order=[0, 2])
    h7.close("rst")
    truth.expect(h7, "tcp", "ty-0001")
    return merge(h1, h2, h3, h4, h5, h6, h7)


def telemetry(kind: int, seq: int, payload: bytes) -> bytes:
    """One telemetry frame: magic, version 2, type, sequence, length, payload."""
    return TELEMETRY_MAGIC + struct.pack("!BBHH", 2, kind, seq, len(payload)) + payload


def lab_udp(truth: Truth) -> list:
    """UDP: meter telemetry, a firmware push with a fragmented block, heartbeats."""
    clock = Clock(DAY + 300, "0.000137519")

    # U1: six meter readings, then a tamper alarm the collector acknowledges.
    u1 = Datagrams((METER, 50210), (COLLECTOR, 47100), clock=clock)
    # U3: heartbeats from the lighting controller: nothing of interest.
    u3 = Datagrams((LIGHT, 50220), (COLLECTOR, 47110), clock=clock)
    for seq in range(6):
        reading = struct.pack("!HIH", 0x0301, 1_250_000 + 37 * seq, 2301 + seq % 3)
        u1.send("client", telemetry(0x01, seq, reading))
        if seq % 2 == 0:
            u3.send("client", f"HB light-ctl uptime={86400 + 30 * seq} load=0.1{seq}".encode())
    u1.send("client", telemetry(0x07, 6, struct.pack("!H", 0x0042) + b"door 2 tamper loop open"))
    u1.send("server", TELEMETRY_MAGIC + struct.pack("!BBH", 2, 0x80, 6))
    truth.expect(u1, "udp", "ty-0009", "ty-0010", "ty-0011", "tag:telemetry")
    truth.expect(u3, "udp")

    # U2: a firmware push.  The signing-key blob straddles blocks 0 and 1
    # (two datagrams); block 3 is one 2400-byte datagram sent as two IPv4
    # fragments, last fragment first, and the debug flag straddles them.
    image = bytearray(noise("ty-hvac-200-1.4.3", 4236))
    image[0:4] = b"TYFW"
    image[509:517] = SIGNING_BLOB
    debug_flag = b"TY-BOOT-DEBUG=1"
    at = 1536 + 1472 - 6          # block 3 starts at 1536; fragment 0 holds 1472 data bytes
    image[at:at + len(debug_flag)] = debug_flag
    image = bytes(image)
    u2 = Datagrams((DEPOT, 50300), (HVAC, 47200), clock=clock)
    u2.send("client", FIRMWARE_MAGIC + struct.pack("!BIH", 1, len(image), 512)
            + b"TY-HVAC-200 1.4.3")
    blocks = [(0, 512), (512, 1024), (1024, 1536), (1536, 3936), (3936, len(image))]
    for n, (lo, hi) in enumerate(blocks):
        if hi - lo > 1472:
            u2.send("client", image[lo:hi], fragments=[1480, 8 + hi - lo - 1480], order=[1, 0])
        else:
            u2.send("client", image[lo:hi])
        u2.send("server", b"FWAK" + struct.pack("!H", n))
    u2.send("client", FIRMWARE_MAGIC + struct.pack("!BI", 3, zlib.crc32(image)))
    truth.expect(u2, "udp", "ty-0013", "ty-0014", "ty-0016", "ty-0019", "tag:firmware")
    return merge(u1, u2, u3)


def lab_trunk(truth: Truth) -> dict:
    """pcapng: the door controller on VLAN 30, and IPv6 lighting traffic."""
    clock = Clock(DAY + 600, "0.0013")

    # D1: door unlock with the PIN in a header (lower case on the wire);
    # both signatures straddle segments; the controller refuses.
    d1 = Conversation((OPS, 40201), (DOOR, 80), isn_c=0x0BADF00D, isn_s=0x00FACADE, vlan=30,
                      clock=clock)
    req = http("POST /door/2/unlock HTTP/1.1",
               ["Host: door-ctl.tern.lab", "x-door-pin: 4821", "Content-Length: 0"])
    d1.handshake()
    d1.send("client", req, segments=cut(req, inside(req, b"/unlock", 3),
                                        inside(req, b"x-door-pin", 5)))
    d1.send("server", http("HTTP/1.1 403 Forbidden", ["Content-Type: text/plain"],
                           b"pin locked 15 min\n"))
    d1.close()
    truth.expect(d1, "tcp", "ty-0006", "ty-0007", "ty-0008", "tag:access")

    # D2: reading the door log: nothing of interest.
    d2 = Conversation((OPS, 40202), (DOOR, 80), isn_c=2024, isn_s=4048, vlan=30, clock=clock)
    d2.handshake()
    d2.send("client", http("GET /door/2/log?since=0900 HTTP/1.1", ["Host: door-ctl.tern.lab"]))
    d2.send("server", http("HTTP/1.1 200 OK", ["Content-Type: text/plain"],
                           b"09:02 badge 1184 granted\n09:14 badge 2207 granted\n"))
    d2.close()
    truth.expect(d2, "tcp")

    # V1: relay write over IPv6, request line split after "PUT /l".
    v1 = Conversation((OPS6, 40301), (LIGHT6, 8080), isn_c=0x5000, isn_s=0x6000, ipv6=True,
                      link="raw", clock=clock)
    req = http("PUT /lights/relay/7/state HTTP/1.1",
               ["Host: [2001:db8:7e:2::22]:8080", "Content-Type: application/json"],
               b'{"on":true}')
    v1.handshake()
    v1.send("client", req, segments=cut(req, 6))
    v1.send("server", http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                           b'{"relay":7,"on":true}'))
    v1.close()
    truth.expect(v1, "tcp", "ty-0005")

    # V2: IPv6 health check: nothing of interest.
    v2 = Conversation((OPS6, 40302), (LIGHT6, 8080), isn_c=0x7000, isn_s=0x8000, ipv6=True,
                      link="raw", clock=clock)
    v2.handshake()
    v2.send("client", http("GET /lights/health HTTP/1.1", ["Host: [2001:db8:7e:2::22]:8080"]))
    v2.send("server", http("HTTP/1.1 200 OK", ["Content-Type: application/json"],
                           b'{"status":"ok"}'))
    v2.close()
    truth.expect(v2, "tcp")
    return {"trunk0": merge(d1, d2), "v6tap": (LINKTYPE_RAW, merge(v1, v2))}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("outdir", nargs="?", type=Path,
                        default=Path(__file__).resolve().parent.parent / "pcaps_demo")
    args = parser.parse_args(argv)
    try:
        return write_demo(args.outdir)
    except OSError as exc:
        raise SystemExit(f"{exc.filename}: cannot write: {exc.strerror}") from None


def write_demo(outdir: Path) -> int:
    """Write the captures and labels.csv into ``outdir``; print what was written."""
    outdir.mkdir(parents=True, exist_ok=True)
    truth = Truth()
    written = []
    path = outdir / "lab-http.pcap"
    packets = lab_http(truth)
    write_pcap(path, packets)
    written.append((path, len(packets)))
    path = outdir / "lab-udp.pcap"
    packets = lab_udp(truth)
    write_pcap(path, packets, nano=True)
    written.append((path, len(packets)))
    path = outdir / "lab-trunk.pcapng"
    interfaces = lab_trunk(truth)
    write_pcapng(path, interfaces)
    written.append((path, len(interfaces["trunk0"]) + len(interfaces["v6tap"][1])))
    truth.write(outdir / "labels.csv")
    for path, count in written:
        print(f"{path}: {count} packets, {path.stat().st_size} bytes")
    print(f"{outdir / 'labels.csv'}: {len(truth.rows)} verdicts")
    return 0


if __name__ == "__main__":
    sys.exit(main())
