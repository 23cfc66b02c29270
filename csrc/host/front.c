/* Host-only front end of the replay: classic pcap record framing and the
 * decoder's fast path, over one buffer of the (decompressed) capture.
 *
 * Not part of the device runtime (csrc/seam_*.c): it is built only into the
 * host extension.  See src/seamscan/fastpath.py for the contract of the
 * records written; this file mirrors seamscan.capture's classic pcap reader
 * (for complete records only) and the first branch of
 * seamscan.decode.Decoder.decode (untagged Ethernet, IPv4 without options and
 * not a fragment or IPv6 without extension headers, TCP or UDP).
 */
#include <stdint.h>
#include <stddef.h>
#include <string.h>

#include "front.h"

static uint32_t rd32(const uint8_t *p, int big)
{
    return big ? ((uint32_t)p[0] << 24 | (uint32_t)p[1] << 16 | (uint32_t)p[2] << 8 | p[3])
               : ((uint32_t)p[3] << 24 | (uint32_t)p[2] << 16 | (uint32_t)p[1] << 8 | p[0]);
}

static uint32_t be32(const uint8_t *p) { return rd32(p, 1); }
static uint16_t be16(const uint8_t *p) { return (uint16_t)(p[0] << 8 | p[1]); }

static void put8(uint8_t *r, size_t at, uint8_t v) { r[at] = v; }
static void put16(uint8_t *r, size_t at, uint16_t v) { memcpy(r + at, &v, 2); }
static void put32(uint8_t *r, size_t at, uint32_t v) { memcpy(r + at, &v, 4); }

/* Fill the decoded fields of record r for frame f (n bytes at offset fo of
 * the buffer) when the decoder's fast path takes it; 0 if it does not. */
static int fast_decode(const uint8_t *f, size_t n, uint32_t fo, uint8_t *r)
{
    uint32_t et, ps, pe, so, doff, ulen;
    uint8_t proto, alen;
    const uint8_t *l4;
    if (n < 48)
        return 0;
    et = be16(f + 12);
    if (et == 0x0800) {
        uint32_t total = be16(f + 16);
        if (f[14] != 0x45 || (be16(f + 20) & 0x3FFF) || 14 + total > n)
            return 0;
        proto = f[23];
        so = 26;
        alen = 4;
        l4 = f + 34;
        if (proto == 6) {
            doff = (uint32_t)(l4[12] >> 4) << 2;
            if (doff < 20 || 20 + doff > total)
                return 0;
            ps = 34 + doff;
            pe = 14 + total;
        } else if (proto == 17) {
            ulen = be16(l4 + 4);
            if (ulen < 8 || ulen + 20 > total)
                return 0;
            ps = 42;
            pe = 34 + ulen;
        } else {
            return 0;
        }
    } else if (et == 0x86DD && n >= 68) {
        uint32_t plen = be16(f + 18);
        if (f[14] >> 4 != 6 || 54 + plen > n)
            return 0;
        proto = f[20];
        so = 22;
        alen = 16;
        l4 = f + 54;
        if (proto == 6) {
            doff = (uint32_t)(l4[12] >> 4) << 2;
            if (doff < 20 || doff > plen)
                return 0;
            ps = 54 + doff;
            pe = 54 + plen;
        } else if (proto == 17) {
            ulen = be16(l4 + 4);
            if (ulen < 8 || ulen > plen)
                return 0;
            ps = 62;
            pe = 54 + ulen;
        } else {
            return 0;
        }
    } else {
        return 0;
    }
    put8(r, 0, 0);
    put8(r, 1, proto);
    put8(r, 3, alen);
    put16(r, 4, be16(l4));
    put16(r, 6, be16(l4 + 2));
    if (proto == 6) {
        put8(r, 2, l4[13]);
        put32(r, 8, be32(l4 + 4));
        put32(r, 12, be32(l4 + 8));
    }
    put32(r, 16, fo + so);
    put32(r, 20, fo + ps);
    put32(r, 24, fo + pe);
    return 1;
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
        uint32_t sec = rd32(h, big), frac = rd32(h + 4, big), caplen = rd32(h + 8, big);
        uint8_t *r = out + n * SF_REC_SIZE;
        uint64_t whole;
        if (caplen > limit || caplen > len - pos - 16)
            break;
        memset(r, 0, SF_REC_SIZE);
        if (ethernet && fast_decode(h + 16, caplen, (uint32_t)(pos + 16), r)) {
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
        if (whole < ((uint64_t)1 << 53)) {
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
