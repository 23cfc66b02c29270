"""Write a large synthetic capture for benchmarks, fast (struct, no scapy).

    python tools/make_bench_capture.py OUT.pcap --packets 200000 --flows 4000
                                       [--sigs FILE.toml] [--seed S]

A classic little-endian microsecond pcap, Ethernet link layer.  About 95%
of the flows are TCP (10% of those over IPv6): handshake, request/response
exchanges of in-order data segments of 60 to 1460 bytes (HTTP-ish text or
binary payloads), a little reordering (adjacent segments swapped) and
retransmission (an earlier segment sent again), then FIN, FIN, ACK.  The
rest are UDP flows of single datagrams.  Flows are interleaved at random.
Exactly ``--packets`` packets are written (at least 7 per flow).  With ``--sigs``, payloads now
and then carry a signature's bytes, some straddling two segments.  IP, TCP
and UDP checksums are correct.  Deterministic for a seed.
"""

from __future__ import annotations

import argparse
import random
import struct
import sys
import time
import tomllib
from pathlib import Path

ETH_IPV4, ETH_IPV6 = b"\x08\x00", b"\x86\xdd"
FIN, SYN, RST, PSH, ACK = 0x01, 0x02, 0x04, 0x08, 0x10
SERVER_PORTS = (80, 8080, 443, 1883, 5683, 47100)
TCP_MIN_PACKETS = 7   # SYN, SYN-ACK, ACK, one data segment, FIN, FIN, ACK
START_US = 1709550000 * 1_000_000
CONCURRENT = 64
REORDER_P = 0.01
RETRANSMIT_P = 0.01
INJECT_P = 0.03
STRADDLE_P = 0.4

TEXT_LINES = (
    "GET /api/v2/zone/{n}/status HTTP/1.1\r\n", "POST /api/v2/relay/{n}/state HTTP/1.1\r\n",
    "Host: ctl-{n}.bench.lab\r\n", "Content-Type: application/json\r\n",
    "Content-Length: {n}\r\n", "Accept: */*\r\n", "User-Agent: bench-client/{n}\r\n",
    "HTTP/1.1 200 OK\r\n", "Cache-Control: no-store\r\n", "Connection: keep-alive\r\n",
    '{{"zone":{n},"celsius":21.{n},"mode":"auto"}}', '{{"meter":{n},"kwh":{n}.5}}',
    "<reading id=\"{n}\" unit=\"lux\">{n}</reading>", "\r\n",
)


def _checksum(residue: int) -> int:
    """Internet checksum from the sum of the data read as one big-endian number.

    The one's complement sum of 16-bit words is that number modulo 0xFFFF
    (as 2**16 = 1 mod 0xFFFF), with 0xFFFF standing for 0 (RFC 1071).
    """
    residue %= 0xFFFF
    return 0xFFFF - residue if residue else 0


def _word_sum(data: bytes) -> int:
    """``data``, zero-padded to an even length, as one big-endian number mod 0xFFFF."""
    value = int.from_bytes(data, "big")
    return (value << 8 if len(data) % 2 else value) % 0xFFFF


def _load_signatures(path: Path) -> list[bytes]:
    """The byte strings of a TOML signature set (fold_case ones as written)."""
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
        out = []
        for n, sig in enumerate(doc.get("signature", []), 1):
            if "text" in sig:
                out.append(sig["text"].encode())
            elif "hex" in sig:
                out.append(bytes.fromhex(sig["hex"]))
            else:
                raise ValueError(f"signature {n} has neither text nor hex")
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, ValueError, TypeError) as exc:
        raise SystemExit(f"{path}: cannot read signatures: {exc}") from None
    return [s for s in out if s]


class Endpoints:
    """One flow's addresses, with everything its packet headers need precomputed."""

    def __init__(self, index: int, ipv6: bool, server_port: int, proto: int):
        self.ipv6 = ipv6
        self.proto = proto
        port = 20000 + index // 250
        if ipv6:
            src = bytes.fromhex("20010db8000100000000000000000000")[:12] + index.to_bytes(4, "big")
            dst = bytes.fromhex("20010db8000200000000000000000000")[:15] + bytes([1 + index % 200])
        else:
            src = bytes([192, 0, 2, 1 + index % 250]) if index % 2 else bytes(
                [198, 51, 100, 1 + index % 250])
            dst = bytes([203, 0, 113, 1 + index % 200])
        self.ports = [(port, server_port), (server_port, port)]
        self.addrs = [(src, dst), (dst, src)]
        kind = ETH_IPV6 if ipv6 else ETH_IPV4
        mac_c, mac_s = b"\x02\x00" + src[-4:], b"\x02\x00" + dst[-4:]
        self.eth = [mac_s + mac_c + kind, mac_c + mac_s + kind]
        # Pseudo-header sums without the length (RFC 793 / RFC 8200 section 8.1).
        self.pseudo = [(int.from_bytes(a + b, "big") + proto) % 0xFFFF for a, b in self.addrs]
        self.ip_id = [index * 7 & 0xFFFF, index * 13 & 0xFFFF]

    def frame(self, d: int, l4: bytes, l4_sum: int, csum_at: int) -> bytes:
        """Ethernet + IP header + ``l4`` with its checksum filled in at ``csum_at``."""
        n = len(l4)
        csum = _checksum(self.pseudo[d] + n + l4_sum)
        if self.proto == 17 and csum == 0:
            csum = 0xFFFF    # RFC 768: a computed zero is sent as all ones
        l4 = l4[:csum_at] + csum.to_bytes(2, "big") + l4[csum_at + 2:]
        src, dst = self.addrs[d]
        if self.ipv6:
            ip = struct.pack("!IHBB", 0x60000000, n, self.proto, 64) + src + dst
        else:
            self.ip_id[d] = ip_id = (self.ip_id[d] + 1) & 0xFFFF
            head = struct.pack("!BBHHHBB", 0x45, 0, 20 + n, ip_id, 0x4000, 64, self.proto)
            ip_sum = _checksum(int.from_bytes(head + src + dst, "big"))
            ip = head + ip_sum.to_bytes(2, "big") + src + dst
        return self.eth[d] + ip + l4


class Generator:
    """Draws flows and their packets; counts what it put in."""

    def __init__(self, seed: int, signatures: list[bytes]):
        self.rng = random.Random(seed)
        self.signatures = signatures
        self.stats = dict.fromkeys(("tcp", "tcp6", "udp", "payload", "injected", "straddling",
                                    "reordered", "retransmitted"), 0)
        rng = self.rng
        lines = []
        for _ in range(20000):
            lines.append(rng.choice(TEXT_LINES).format(n=rng.randint(0, 4999)))
        self.text = "".join(lines).encode()
        self.binary = rng.randbytes(1 << 19)

    def _content(self, size: int, text: bool) -> bytearray:
        corpus = self.text if text else self.binary
        at = self.rng.randrange(len(corpus) - size)
        return bytearray(corpus[at:at + size])

    def _inject(self, message: bytearray, sizes: list[int]) -> None:
        """Now and then put signature bytes in, some across a segment boundary."""
        rng, edge = self.rng, 0
        for i, size in enumerate(sizes):
            sig = rng.choice(self.signatures) if self.signatures and rng.random() < INJECT_P \
                else b""
            if sig and len(sig) <= len(message):
                straddle = i + 1 < len(sizes) and len(sig) > 1 and rng.random() < STRADDLE_P
                if straddle:
                    at = edge + size - rng.randint(1, len(sig) - 1)
                else:
                    at = edge + rng.randint(0, max(0, size - len(sig)))
                at = max(0, min(at, len(message) - len(sig)))
                message[at:at + len(sig)] = sig
                self.stats["injected"] += 1
                self.stats["straddling"] += at < edge + size < at + len(sig)
            edge += size

    def tcp_flow(self, index: int, budget: int):
        """Yield the frames of one TCP connection: exactly ``budget`` of them."""
        rng = self.rng
        ipv6 = rng.random() < 0.1
        self.stats["tcp6" if ipv6 else "tcp"] += 1
        ep = Endpoints(index, ipv6, rng.choice(SERVER_PORTS), 6)
        isn = [rng.getrandbits(32), rng.getrandbits(32)]
        text = rng.random() < 0.6
        # Plan the data segments: exchanges of a short request, a longer answer.
        n_data = budget - 6
        n_retx = sum(rng.random() < RETRANSMIT_P for _ in range(n_data - 1))
        segments = []     # (direction, rel_seq, payload, payload_sum, ack_rel)
        sent = [0, 0]
        left, d = n_data - n_retx, 0
        while left:
            count = min(left, rng.randint(1, 2) if d == 0 else rng.randint(1, 12))
            if d == 0:
                sizes = [rng.randint(60, 600) for _ in range(count)]
            else:
                sizes = [1460] * (count - 1) + [rng.randint(60, 1460)]
            message = self._content(sum(sizes), text or d == 0)
            self._inject(message, sizes)
            at = 0
            for size in sizes:
                payload = bytes(message[at:at + size])
                segments.append((d, sent[d] + at, payload, _word_sum(payload), sent[1 - d]))
                at += size
            sent[d] += at
            self.stats["payload"] += at
            left -= count
            d = 1 - d
        order = list(range(len(segments)))
        i = 0
        while i < len(order) - 1:
            if segments[i][0] == segments[i + 1][0] and rng.random() < REORDER_P:
                order[i], order[i + 1] = order[i + 1], order[i]
                self.stats["reordered"] += 1
                i += 1
            i += 1
        for _ in range(n_retx):
            j = rng.randint(1, len(order))
            order.insert(j, order[max(0, j - rng.randint(1, 4))])
        self.stats["retransmitted"] += n_retx

        def seg(d, rel, flags, payload=b"", psum=0, ack_rel=None):
            sport, dport = ep.ports[d]
            seq = (isn[d] + 1 + rel) & 0xFFFFFFFF
            ack = (isn[1 - d] + 1 + ack_rel) & 0xFFFFFFFF if ack_rel is not None else 0
            head = struct.pack("!HHIIBBHHH", sport, dport, seq, ack, 0x50, flags, 64240, 0, 0)
            return ep.frame(d, head + payload, int.from_bytes(head, "big") + psum, 16)

        yield seg(0, -1, SYN)
        yield seg(1, -1, SYN | ACK, ack_rel=0)
        yield seg(0, 0, ACK, ack_rel=0)
        for k in order:
            d, rel, payload, psum, ack_rel = segments[k]
            yield seg(d, rel, PSH | ACK, payload, psum, ack_rel)
        yield seg(0, sent[0], FIN | ACK, ack_rel=sent[1])
        yield seg(1, sent[1], FIN | ACK, ack_rel=sent[0] + 1)
        yield seg(0, sent[0] + 1, ACK, ack_rel=sent[1] + 1)

    def udp_flow(self, index: int, budget: int):
        """Yield ``budget`` datagrams of one UDP flow, the first from the client."""
        rng = self.rng
        self.stats["udp"] += 1
        ep = Endpoints(index, False, rng.choice((47100, 5683, 1900)), 17)
        text = rng.random() < 0.3
        for n in range(budget):
            d = 0 if n == 0 or rng.random() < 0.7 else 1
            size = rng.randint(40, 1200)
            message = self._content(size, text)
            self._inject(message, [size])
            self.stats["payload"] += size
            sport, dport = ep.ports[d]
            head = struct.pack("!HHHH", sport, dport, 8 + size, 0)
            yield ep.frame(d, head + bytes(message), int.from_bytes(head, "big")
                           + _word_sum(message), 6)

    def flows(self, packets: int, flows: int):
        """One packet generator per flow; their budgets sum to ``packets``."""
        rng = self.rng
        kinds = ["udp" if rng.random() < 0.05 else "tcp" for _ in range(flows)]
        budgets = [TCP_MIN_PACKETS if k == "tcp" else 1 for k in kinds]
        extra = packets - sum(budgets)
        weights = [rng.lognormvariate(0, 1) for _ in range(flows)]
        for i in rng.choices(range(flows), weights=weights, k=extra):
            budgets[i] += 1
        for i, (kind, budget) in enumerate(zip(kinds, budgets, strict=True)):
            yield self.tcp_flow(i, budget) if kind == "tcp" else self.udp_flow(i, budget)


def write(path: Path, packets: int, flows: int, seed: int, signatures: list[bytes]) -> dict:
    """Write the capture; returns the generator's counts plus file totals."""
    gen = Generator(seed, signatures)
    rng = random.Random(seed + 1)
    pending = gen.flows(packets, flows)
    live = [g for _, g in zip(range(CONCURRENT), pending, strict=False)]
    clock, written, size = START_US, 0, 24
    chunk = []
    with path.open("wb") as out:
        out.write(struct.pack("<IHHiIII", 0xA1B2C3D4, 2, 4, 0, 0, 65535, 1))
        while live:
            i = rng.randrange(len(live))
            try:
                frame = next(live[i])
            except StopIteration:
                nxt = next(pending, None)
                if nxt is None:
                    live[i] = live[-1]
                    live.pop()
                else:
                    live[i] = nxt
                continue
            clock += rng.randint(2, 60)
            chunk.append(struct.pack("<IIII", clock // 1_000_000, clock % 1_000_000,
                                     len(frame), len(frame)))
            chunk.append(frame)
            size += 16 + len(frame)
            written += 1
            if len(chunk) >= 8192:
                out.write(b"".join(chunk))
                chunk.clear()
        out.write(b"".join(chunk))
    return {**gen.stats, "packets": written, "flows": flows, "bytes": size}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Write a large synthetic benchmark pcap.")
    parser.add_argument("output", type=Path)
    parser.add_argument("--packets", type=int, default=200000)
    parser.add_argument("--flows", type=int, default=4000)
    parser.add_argument("--sigs", type=Path, help="TOML signature set to sprinkle in")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)
    if args.flows < 1 or args.packets < TCP_MIN_PACKETS * args.flows:
        parser.error(f"need --flows >= 1 and --packets >= {TCP_MIN_PACKETS} x --flows")
    signatures = _load_signatures(args.sigs) if args.sigs else []
    t0 = time.perf_counter()
    try:
        s = write(args.output, args.packets, args.flows, args.seed, signatures)
    except OSError as exc:
        raise SystemExit(f"{args.output}: cannot write: {exc.strerror}") from None
    dt = time.perf_counter() - t0
    print(f"{args.output}: {s['packets']} packets, {s['flows']} flows "
          f"({s['tcp']} TCP/IPv4, {s['tcp6']} TCP/IPv6, {s['udp']} UDP), {s['bytes']} bytes "
          f"({s['payload']} payload); {s['injected']} signatures injected "
          f"({s['straddling']} straddling segments), {s['reordered']} reordered, "
          f"{s['retransmitted']} retransmitted; {dt:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
