/* Host-only fast lane of the replay: in-order packets of known flows, from
 * the capture buffer straight into the sink's scan batch.
 *
 * Python's flow tracker (src/seamscan/flows.py) decides every rule; it
 * lends a flow side to this lane only when the side's next packets need no
 * decision (TCP: started, nothing held, no FIN, so an in-order segment or a
 * bare ACK; UDP: always), and takes it back before it touches the flow
 * again.  For a lent side the lane does exactly what FlowTracker.packet's
 * fast path and ScanSink.data would: count the packet, move the stream
 * offset and the expected sequence number, keep the same delivered tail
 * (the last `keep` bytes at least, 2 * keep at most, trimmed at the same
 * moments), and write the batch item, its frame and timestamp and the
 * payload.  Anything else stops the lane at that record and Python takes it
 * (see src/seamscan/fastpath.py).  Not part of the device runtime.
 */
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#include "seam.h"
#include "front.h"

typedef struct {
    uint8_t key[SF_KEY_SIZE];
    sf_side_state st;
    uint8_t *tail;
    uint8_t lent;
} side;

struct sf_lane {
    uint32_t max_sides, mask, keep;
    uint32_t *index; /* open addressing, linear probing: sid + 1, 0 empty */
    side *sides;
    /* Flows touched since Python last asked (sf_lane_touched): per flow
     * slot the frame and time of its last packet here, and where it is in
     * the list `pend` (npend entries), or UINT32_MAX. */
    double *last_ts;
    int64_t *last_ns;
    uint64_t *last_frame;
    uint32_t *pend_at, *pend, npend, max_flows;
};

static uint32_t hash_key(const uint8_t *k, uint32_t mask)
{
    uint64_t h = 0x9E3779B97F4A7C15u, w;
    unsigned i;
    for (i = 0; i < SF_KEY_SIZE; i += 8) {
        memcpy(&w, k + i, 8);
        h = (h ^ w) * 0xFF51AFD7ED558CCDu;
        h ^= h >> 32;
    }
    return (uint32_t)h & mask;
}

sf_lane *sf_lane_new(uint32_t max_flows, uint32_t keep)
{
    sf_lane *L = calloc(1, sizeof *L);
    uint32_t cap = 16;
    if (!L || max_flows == 0 || max_flows > (1u << 28))
        goto fail;
    L->max_sides = 2u * max_flows;
    while (cap < 2u * L->max_sides)
        cap <<= 1;
    L->mask = cap - 1u;
    L->keep = keep;
    L->index = calloc(cap, sizeof *L->index);
    L->sides = calloc(L->max_sides, sizeof *L->sides);
    L->max_flows = max_flows;
    L->last_ts = calloc(max_flows, sizeof *L->last_ts);
    L->last_ns = calloc(max_flows, sizeof *L->last_ns);
    L->last_frame = calloc(max_flows, sizeof *L->last_frame);
    L->pend_at = malloc(max_flows * sizeof *L->pend_at);
    L->pend = malloc(max_flows * sizeof *L->pend);
    if (L->index && L->sides && L->last_ts && L->last_ns && L->last_frame && L->pend_at &&
        L->pend) {
        memset(L->pend_at, 0xFF, max_flows * sizeof *L->pend_at);
        return L;
    }
fail:
    sf_lane_free(L);
    return NULL;
}

void sf_lane_free(sf_lane *L)
{
    uint32_t i;
    if (!L)
        return;
    if (L->sides)
        for (i = 0; i < L->max_sides; i++)
            free(L->sides[i].tail);
    free(L->index);
    free(L->sides);
    free(L->last_ts);
    free(L->last_ns);
    free(L->last_frame);
    free(L->pend_at);
    free(L->pend);
    free(L);
}

static int64_t find(const sf_lane *L, const uint8_t *key)
{
    uint32_t h = hash_key(key, L->mask), e;
    while ((e = L->index[h]) != 0) {
        if (memcmp(L->sides[e - 1u].key, key, SF_KEY_SIZE) == 0)
            return (int64_t)e - 1;
        h = (h + 1u) & L->mask;
    }
    return -1;
}

/* Remove the index entry at h, shifting later entries of its run back. */
static void unindex(sf_lane *L, uint32_t h)
{
    uint32_t j = h, e, home;
    for (;;) {
        L->index[h] = 0;
        for (;;) {
            j = (j + 1u) & L->mask;
            e = L->index[j];
            if (e == 0)
                return;
            home = hash_key(L->sides[e - 1u].key, L->mask);
            /* e may move to h if its home is not cyclically in (h, j] */
            if (h <= j ? (h < home && home <= j) : (h < home || home <= j))
                continue;
            break;
        }
        L->index[h] = e;
        h = j;
    }
}

int sf_lane_lend(sf_lane *L, uint32_t sid, const uint8_t *key, const sf_side_state *st,
                 const uint8_t *tail)
{
    side *S;
    uint32_t h;
    if (sid >= L->max_sides || st->tail_len > 2u * L->keep)
        return -1;
    S = &L->sides[sid];
    if (S->lent)
        return -1;
    if (!S->tail && !(S->tail = malloc(2u * (size_t)L->keep + 1u)))
        return -1;
    memcpy(S->key, key, SF_KEY_SIZE);
    S->st = *st;
    S->st.packets = S->st.bytes = 0;
    if (st->tail_len)
        memcpy(S->tail, tail, st->tail_len);
    S->lent = 1;
    h = hash_key(key, L->mask);
    while (L->index[h] != 0)
        h = (h + 1u) & L->mask;
    L->index[h] = sid + 1u;
    return 0;
}

void sf_lane_reclaim(sf_lane *L, uint32_t sid, sf_side_state *st, uint8_t *tail)
{
    side *S;
    uint32_t h;
    if (sid >= L->max_sides || !L->sides[sid].lent)
        return;
    S = &L->sides[sid];
    *st = S->st;
    if (S->st.tail_len)
        memcpy(tail, S->tail, S->st.tail_len);
    h = hash_key(S->key, L->mask);
    while (L->index[h] != sid + 1u && L->index[h] != 0)
        h = (h + 1u) & L->mask;
    if (L->index[h] == sid + 1u)
        unindex(L, h);
    S->lent = 0;
    free(S->tail);
    S->tail = NULL;
}

/* FlowTracker._deliver's tail: append, and when it exceeds 2 * keep keep
 * only the last keep bytes. */
static void keep_tail(side *S, const uint8_t *p, uint32_t n, uint32_t keep)
{
    uint32_t len = S->st.tail_len;
    if ((uint64_t)len + n > 2u * (uint64_t)keep) {
        if (n >= keep) {
            memcpy(S->tail, p + (n - keep), keep);
        } else {
            memmove(S->tail, S->tail + (len - (keep - n)), keep - n);
            memcpy(S->tail + (keep - n), p, n);
        }
        S->st.tail_len = keep;
    } else {
        memcpy(S->tail + len, p, n);
        S->st.tail_len = len + n;
    }
}

/* Is a segment at sequence number seq (not the expected one) wholly made of
 * bytes already delivered, agreeing with the kept tail where the tail
 * reaches?  That is FlowTracker._receive finding only retransmitted bytes:
 * within 2**30 before the next byte (RFC 7323's largest window), not
 * before the stream's start, ending at or before the next byte. */
static int old_copy(const side *S, uint32_t seq, const uint8_t *p, uint32_t n)
{
    int64_t d = (int64_t)(int32_t)(seq - S->st.expect); /* RFC 9293 arithmetic */
    uint64_t next = S->st.next, off, tail_start, skip;
    if (d >= 0 || d < -((int64_t)1 << 30) || d + (int64_t)n > 0 || (uint64_t)(-d) > next)
        return 0;
    off = next - (uint64_t)(-d);
    tail_start = next - S->st.tail_len;
    skip = off < tail_start ? tail_start - off : 0; /* older than the tail: not compared */
    if (skip >= n)
        return 1;
    return memcmp(p + skip, S->tail + (off + skip - tail_start), n - skip) == 0;
}

static void touch(sf_lane *L, uint32_t fs, uint64_t frame, double ts, int64_t ns)
{
    if (L->pend_at[fs] == UINT32_MAX) {
        L->pend_at[fs] = L->npend;
        L->pend[L->npend++] = fs;
    }
    L->last_frame[fs] = frame;
    L->last_ts[fs] = ts;
    L->last_ns[fs] = ns;
}

size_t sf_lane_touched(sf_lane *L, uint8_t *out)
{
    uint32_t i, n = L->npend, zero = 0;
    for (i = 0; i < n; i++) {
        uint32_t fs = L->pend[i];
        uint8_t *o = out + (size_t)i * SF_TOUCH_SIZE;
        memcpy(o, &fs, 4);
        memcpy(o + 4, &zero, 4);
        memcpy(o + 8, &L->last_frame[fs], 8);
        memcpy(o + 16, &L->last_ts[fs], 8);
        memcpy(o + 24, &L->last_ns[fs], 8);
        L->pend_at[fs] = UINT32_MAX;
    }
    L->npend = 0;
    return n;
}

int sf_lane_untouch(sf_lane *L, uint32_t fs, uint64_t *frame, double *ts, int64_t *ns)
{
    uint32_t at, last;
    if (fs >= L->max_flows || (at = L->pend_at[fs]) == UINT32_MAX)
        return 0;
    *frame = L->last_frame[fs];
    *ts = L->last_ts[fs];
    *ns = L->last_ns[fs];
    last = L->pend[--L->npend];
    L->pend[at] = last;
    L->pend_at[last] = at;
    L->pend_at[fs] = UINT32_MAX;
    return 1;
}

int sf_lane_run(sf_lane *L, sf_run *r)
{
    const uint8_t *buf = r->buf;
    uint64_t pos = r->pos;
    int rc = SF_RUN_STOP;
    uint8_t key[SF_KEY_SIZE];
    r->retransmitted = 0;
    r->fast = 0;
    for (;;) {
        const uint8_t *h, *f;
        uint32_t sec, frac, caplen, n;
        uint64_t whole;
        double ts;
        int64_t ns;
        sf_pkt k;
        int64_t sid;
        side *S;
        if (r->fast == SF_RUN_MAX) {
            rc = SF_RUN_CHUNK;
            break;
        }
        if (pos > r->len || r->len - pos < 16)
            break;
        h = buf + pos;
        f = h + 16;
        sec = sf__rd32(h, r->big);
        frac = sf__rd32(h + 4, r->big);
        caplen = sf__rd32(h + 8, r->big);
        if (caplen > r->limit || caplen > r->len - pos - 16)
            break;
        whole = (uint64_t)sec * r->units + frac;
        if (whole >= ((uint64_t)1 << 53) || frac >= r->units || !r->ethernet ||
            !sf__decode(f, caplen, &k))
            break;
        ts = (double)whole / (double)r->units; /* as sf_pcap_records */
        /* exact nanoseconds (classic pcap: units 10**6 or 10**9; whole < 2**53) */
        ns = (int64_t)(whole * (1000000000u / r->units));
        if (ts >= r->sweep_at)
            break; /* the tracker's idle sweep is due */
        memset(key, 0, sizeof key);
        key[0] = k.proto;
        key[1] = k.alen;
        key[2] = (uint8_t)(k.sport >> 8);
        key[3] = (uint8_t)k.sport;
        key[4] = (uint8_t)(k.dport >> 8);
        key[5] = (uint8_t)k.dport;
        memcpy(key + 8, f + k.so, k.alen);
        memcpy(key + 24, f + k.so + k.alen, k.alen);
        if ((sid = find(L, key)) < 0)
            break;
        S = &L->sides[sid];
        n = k.pe - k.ps;
        if (k.proto == 6 && (k.flags & 7u))
            break; /* FIN, SYN or RST: the tracker's general path */
        if (k.proto == 6 && n && k.seq != S->st.expect) {
            if (!old_copy(S, k.seq, f + k.ps, n))
                break; /* ahead, partly new, or disagreeing: the tracker's general path */
            r->frame++;
            touch(L, (uint32_t)(sid >> 1), r->frame, ts, ns);
            S->st.packets++;
            r->retransmitted += n;
            r->fast++;
            pos += 16u + caplen;
            continue;
        }
        if (n && (r->nitems >= r->item_cap || r->ndata + n > r->data_cap)) {
            rc = SF_RUN_FULL;
            break;
        }
        r->frame++;
        touch(L, (uint32_t)(sid >> 1), r->frame, ts, ns);
        S->st.packets++;
        if (n) {
            ss_item it;
            uint64_t frame = r->frame;
            uint32_t slot = (uint32_t)sid, zero = 0;
            memset(&it, 0, sizeof it);
            it.slot = slot;
            it.flags = S->st.sink_next == S->st.next ? 0u : SS_ITEM_RESET;
            it.ctx.side = S->st.side_code;
            it.ctx.transport = S->st.transport;
            it.ctx.server_port = S->st.port;
            it.ctx.flags = S->st.cflags;
            it.len = n;
            it.data_off = r->ndata;
            it.reset_offset = S->st.next;
            memcpy(r->items + (size_t)r->nitems * sizeof it, &it, sizeof it);
            memcpy(r->meta + (size_t)r->nitems * SF_META_SIZE, &frame, 8);
            memcpy(r->meta + (size_t)r->nitems * SF_META_SIZE + 8, &ts, 8);
            memcpy(r->meta + (size_t)r->nitems * SF_META_SIZE + 16, &slot, 4);
            memcpy(r->meta + (size_t)r->nitems * SF_META_SIZE + 20, &zero, 4);
            memcpy(r->meta + (size_t)r->nitems * SF_META_SIZE + 24, &ns, 8);
            memcpy(r->data + r->ndata, f + k.ps, n);
            r->nitems++;
            r->ndata += n;
            S->st.next += n;
            S->st.sink_next = S->st.next;
            S->st.bytes += n;
            if (k.proto == 6) {
                S->st.expect += n;
                keep_tail(S, f + k.ps, n, L->keep);
            }
        }
        r->fast++;
        pos += 16u + caplen;
    }
    r->pos = pos;
    r->nrec = 0;
    if (rc == SF_RUN_STOP && pos <= r->len) { /* the record Python takes, framed */
        size_t end = 0, fast = 0;
        r->nrec = sf_pcap_records(buf, r->len, pos, r->big, r->units, r->limit, r->ethernet,
                                  r->rec, 1, &end, &fast);
        r->rec_end = end;
        r->rec_fast = fast;
    }
    return rc;
}
