/* Host-only front end of the replay: classic pcap record framing and the
 * decoder's fast path, over one buffer of the (decompressed) capture.
 *
 * Not part of the device runtime (csrc/seam_*.c): it is built only into the
 * host extension.  See src/seamscan/fastpath.py for the contract of the
 * records written; this file mirrors seamscan.capture's classic pcap reader
 * (for complete records only) and the first branch of
 * seamscan.decode.Decoder.decode (untagged Ethernet, IPv4 without options and
 * not a fragment or IPv6 without extension headers, TCP or UDP, wholly
 * captured: a frame cut by the snap length, or an IPv4 total length of 0,
 * fails sf__decode's length checks and is left to the Python decoder).
 */
#include <stdint.h>
#include <stddef.h>
#include <string.h>

#include "front.h"

uint32_t sf__rd32(const uint8_t *p, int big)
{
    return big ? ((uint32_t)p[0] << 24 | (uint32_t)p[1] << 16 | (uint32_t)p[2] << 8 | p[3])
               : ((uint32_t)p[3] << 24 | (uint32_t)p[2] << 16 | (uint32_t)p[1] << 8 | p[0]);
}

static uint32_t be32(const uint8_t *p) { return sf__rd32(p, 1); }
static uint16_t be16(const uint8_t *p) { return (uint16_t)(p[0] << 8 | p[1]); }

static void put8(uint8_t *r, size_t at, uint8_t v) { r[at] = v; }
static void put16(uint8_t *r, size_t at, uint16_t v) { memcpy(r + at, &v, 2); }
static void put32(uint8_t *r, size_t at, uint32_t v) { memcpy(r + at, &v, 4); }

/* Decode frame f (n bytes) when the decoder's fast path takes it: fill *k
 * (offsets relative to f) and return 1; 0 if it does not. */
int sf__decode(const uint8_t *f, size_t n, sf_pkt *k)
{
    uint32_t et, doff, ulen;
    const uint8_t *l4;
    if (n < 48)
        return 0;
    et = be16(f + 12);
    if (et == 0x0800) {
        uint32_t total = be16(f + 16);
        if (f[14] != 0x45 || (be16(f + 20) & 0x3FFF) || 14 + total > n)
            return 0;
        k->proto = f[23];
        k->so = 26;
        k->alen = 4;
        l4 = f + 34;
        if (k->proto == 6) {
            doff = (uint32_t)(l4[12] >> 4) << 2;
            if (doff < 20 || 20 + doff > total)
                return 0;
            k->ps = 34 + doff;
            k->pe = 14 + total;
        } else if (k->proto == 17) {
            ulen = be16(l4 + 4);
            if (ulen < 8 || ulen + 20 > total)
                return 0;
            k->ps = 42;
            k->pe = 34 + ulen;
        } else {
            return 0;
        }
    } else if (et == 0x86DD && n >= 68) {
        uint32_t plen = be16(f + 18);
        if (f[14] >> 4 != 6 || 54 + plen > n)
            return 0;
        k->proto = f[20];
        k->so = 22;
        k->alen = 16;
        l4 = f + 54;
        if (k->proto == 6) {
            doff = (uint32_t)(l4[12] >> 4) << 2;
            if (doff < 20 || doff > plen)
                return 0;
            k->ps = 54 + doff;
            k->pe = 54 + plen;
        } else if (k->proto == 17) {
            ulen = be16(l4 + 4);
            if (ulen < 8 || ulen > plen)
                return 0;
            k->ps = 62;
            k->pe = 54 + ulen;
        } else {
            return 0;
        }
    } else {
        return 0;
    }
    k->sport = be16(l4);
    k->dport = be16(l4 + 2);
    if (k->proto == 6) {
        k->flags = l4[13];
        k->seq = be32(l4 + 4);
        k->ack = be32(l4 + 8);
    } else {
        k->flags = 0;
        k->seq = k->ack = 0;
    }
    return 1;
}

/* Record r for a frame the fast path took, at buffer offset fo. */
static void put_decoded(uint8_t *r, const sf_pkt *k, uint32_t fo)
{
    put8(r, 0, 0);
    put8(r, 1, k->proto);
    put8(r, 2, k->flags);
    put8(r, 3, k->alen);
    put16(r, 4, k->sport);
    put16(r, 6, k->dport);
    put32(r, 8, k->seq);
    put32(r, 12, k->ack);
    put32(r, 16, fo + k->so);
    put32(r, 20, fo + k->ps);
    put32(r, 24, fo + k->pe);
}

size_t sf_pcap_records(const uint8_t *buf, size_t len, size_t pos, int big, uint32_t units,
                       uint32_t limit, int ethernet, uint8_t *out, size_t cap, size_t *end_pos,
                       size_t *fast)
{
    size_t n = 0, nfast = 0;
    if (pos > len)
        pos = len;
    while (n < cap && len - pos >= 16) {
        const uint8_t *h = buf + pos;
        uint32_t sec = sf__rd32(h, big), frac = sf__rd32(h + 4, big), caplen = sf__rd32(h + 8, big);
        uint8_t *r = out + n * SF_REC_SIZE;
        uint64_t whole;
        if (caplen > limit || caplen > len - pos - 16)
            break;
        sf_pkt k;
        memset(r, 0, SF_REC_SIZE);
        /* A TCP segment with FIN or RST goes to the Python decoder, which
         * verifies its checksum (Packet.sum_ok); they are about two per flow.
         * So does a record whose fraction of a second is out of range (the
         * decoder counts it). */
        if (ethernet && frac < units && sf__decode(h + 16, caplen, &k) &&
            !(k.proto == 6 && (k.flags & 5u))) {
            put_decoded(r, &k, (uint32_t)(pos + 16));
            nfast++;
        } else {
            put8(r, 0, 1);
            put32(r, 20, (uint32_t)(pos + 16));
            put32(r, 24, (uint32_t)(pos + 16 + caplen));
        }
        put32(r, 28, sec);
        put32(r, 32, frac);
        /* (sec * units + frac) / units is correctly rounded by one double
         * division when the numerator is below 2**53: both operands are then
         * exact in an IEEE 754 binary64, whose division rounds once. */
        whole = (uint64_t)sec * units + frac;
        /* Inexact, or a fraction of a second out of range (counted by Python). */
        if (whole < ((uint64_t)1 << 53) && frac < units) {
            double ts = (double)whole / (double)units;
            put32(r, 36, 1);
            memcpy(r + 40, &ts, 8);
        }
        pos += 16 + (size_t)caplen;
        n++;
    }
    *end_pos = pos;
    *fast = nfast;
    return n;
}
