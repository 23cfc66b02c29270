/*
 * seam_scan.c - the hot path: walk the dense automaton, report matches;
 * the per-signature filters; the batch scheduler.
 *
 * Dense: one table lookup per byte, next = trans[state * stride + class].
 * States >= first_match have outputs; reaching one calls emit(), and each
 * signature passes ss__emit_sig's side / transport / ports / window /
 * datagram filters.  The batch entry point walks LANES flow sides in one
 * loop (independent lookups overlap their memory latency).  The compact
 * layout's walk is in seam_compact.c.
 */
#include <string.h>

#include "seam.h"
#include "seam_le.h"

#include "seam_int.h"

static int port_listed(const ss_table *t, uint32_t first, uint32_t n, uint32_t port)
{
    uint32_t i;
    for (i = 0; i < n; i++)
        if (ss_ld16(t->ports + 2u * (first + i)) == port)
            return 1;
    return 0;
}

size_t ss__emit_sig(const ss_table *t, uint32_t sig, uint64_t end, const lane *ln,
                    ss_match *out, size_t n)
{
    const ss_ctx *ctx = ln->ctx;
    const uint8_t *r;
    uint32_t nports;
    uint64_t start, base = 0;
#ifndef SS_NO_PARTS
    if (t->nparts) { /* outputs are parts: the tracker says when a signature ends */
        if (!ss__part(t, sig, end, ln, &sig, &start))
            return n;
    } else
#endif
    {
        r = t->sigs + (size_t)SS__SIG_RECORD * sig;
        if (end < ss_ld16(r + 4))
            return n; /* cannot happen with a well-formed table */
        start = end - ss_ld16(r + 4);
    }
    r = t->sigs + (size_t)SS__SIG_RECORD * sig;
    nports = ss_ld16(r + 6);
    if (n >= ln->cap)
        return n; /* cannot happen with a cap >= max_outputs */
    if (ctx->side && r[0] && r[0] != ctx->side)
        return n;
    if (ctx->transport && r[1] && r[1] != ctx->transport)
        return n;
    if (nports && (ctx->flags & SS_CTX_HAS_PORT) &&
        !port_listed(t, ss_ld32(r + 8), nports, ctx->server_port))
        return n;
    if ((r[2] & SS_SIG_DATAGRAM) && (ctx->flags & SS_CTX_DATAGRAM)) {
        if (start < ln->unit_start)
            return n;
        base = ln->unit_start;
    }
    if ((r[2] & SS_SIG_HAS_WINDOW) &&
        (start - base < ss_ld32(r + 12) || end - base > ss_ld32(r + 16)))
        return n;
    out[n].item = ln->item;
    out[n].sig = sig;
    out[n].start = start;
    out[n].end = end;
    return n + 1;
}

#ifndef SS_NO_DENSE
/* Append the matches of dense match state `s` ending at stream offset `end`. */
static size_t emit(const ss_table *t, uint32_t s, uint64_t end, const lane *ln, ss_match *out,
                   size_t n)
{
    uint32_t m = s - t->first_match;
    uint32_t k = ss_ld32(t->out_index + 4u * m), stop = ss_ld32(t->out_index + 4u * (m + 1u));
    for (; k < stop; k++)
        n = ss__emit_sig(t, t->out_width == 2u ? ss_ld16(t->out_list + 2u * k)
                                               : ss_ld32(t->out_list + 4u * k),
                         end, ln, out, n);
    return n;
}

#define LOAD1(p) ((uint32_t)(p)[0])
#define LOAD2(p) ss_ld16(p)
#define LOAD4(p) ss_ld32(p)

/* One lane: scan p[0..len), stop early when out[] could not take the next
 * match state's outputs.  Returns bytes consumed. */
#define DEFINE_SCAN1(NAME, LOAD, W)                                                            \
    static size_t NAME(const ss_table *t, lane *ln, const uint8_t *p, size_t len,             \
                       ss_match *out, size_t cap, size_t *nout)                                \
    {                                                                                          \
        const uint8_t *cls = t->classes, *tr = t->trans;                                       \
        const size_t stride = t->stride;                                                       \
        const uint32_t fm = t->first_match;                                                    \
        uint32_t s = ln->state;                                                                \
        size_t i = 0, n = *nout;                                                               \
        while (i < len) {                                                                      \
            uint32_t ns = LOAD(tr + ((size_t)s * stride + cls[p[i]]) * (W));                   \
            if (ns >= fm) {                                                                    \
                if (n + t->max_outputs > cap)                                                  \
                    break;                                                                     \
                n = emit(t, ns, ln->offset + i + 1u, ln, out, n);                              \
            }                                                                                  \
            s = ns;                                                                            \
            i++;                                                                               \
        }                                                                                      \
        ln->state = s;                                                                         \
        ln->offset += i;                                                                       \
        *nout = n;                                                                             \
        return i;                                                                              \
    }

/* LANES lanes in lock step over m bytes each: independent lookups, so their
 * memory latencies overlap. */
#define DEFINE_SCANL(NAME, LOAD, W)                                                            \
    static size_t NAME(const ss_table *t, lane *ln, const uint8_t *const *p, size_t m,        \
                       ss_match *out, size_t cap, size_t *nout)                                \
    {                                                                                          \
        const uint8_t *cls = t->classes, *tr = t->trans;                                       \
        const size_t stride = t->stride;                                                       \
        const uint32_t fm = t->first_match;                                                    \
        const size_t room = LANES * (size_t)t->max_outputs;                                    \
        uint32_t s[LANES];                                                                     \
        size_t j, k, n = *nout;                                                                \
        for (k = 0; k < LANES; k++)                                                            \
            s[k] = ln[k].state;                                                                \
        for (j = 0; j < m; j++) {                                                              \
            uint32_t ns[LANES];                                                                \
            unsigned hit = 0;                                                                  \
            for (k = 0; k < LANES; k++) {                                                      \
                ns[k] = LOAD(tr + ((size_t)s[k] * stride + cls[p[k][j]]) * (W));               \
                hit |= ns[k] >= fm;                                                            \
            }                                                                                  \
            if (hit) {                                                                         \
                if (n + room > cap)                                                            \
                    break;                                                                     \
                for (k = 0; k < LANES; k++)                                                    \
                    if (ns[k] >= fm)                                                           \
                        n = emit(t, ns[k], ln[k].offset + j + 1u, &ln[k], out, n);             \
            }                                                                                  \
            for (k = 0; k < LANES; k++)                                                        \
                s[k] = ns[k];                                                                  \
        }                                                                                      \
        for (k = 0; k < LANES; k++) {                                                          \
            ln[k].state = s[k];                                                                \
            ln[k].offset += j;                                                                 \
        }                                                                                      \
        *nout = n;                                                                             \
        return j;                                                                              \
    }

#ifdef SS_SMALL
#define LOADANY(p) ss__ld_w((p), t->trans_width)
DEFINE_SCAN1(scan1_any, LOADANY, t->trans_width)
#else
DEFINE_SCAN1(scan1_w1, LOAD1, 1u)
DEFINE_SCAN1(scan1_w2, LOAD2, 2u)
DEFINE_SCAN1(scan1_w4, LOAD4, 4u)
#endif
DEFINE_SCANL(scanl_w1, LOAD1, 1u)
DEFINE_SCANL(scanl_w2, LOAD2, 2u)
DEFINE_SCANL(scanl_w4, LOAD4, 4u)

#endif /* SS_NO_DENSE */

static size_t scan1(const ss_table *t, lane *ln, const uint8_t *p, size_t len, ss_match *out,
                    size_t cap, size_t *nout)
{
#if defined(SS_NO_DENSE) && !defined(SS_NO_COMPACT)
    return ss__scan_compact(t, ln, p, len, out, cap, nout); /* the one layout ss_load takes */
#else
#ifndef SS_NO_COMPACT
    if (t->layout == SS_LAYOUT_COMPACT)
        return ss__scan_compact(t, ln, p, len, out, cap, nout);
#endif
#ifdef SS_NO_DENSE
    (void)t, (void)ln, (void)p, (void)len, (void)out, (void)cap, (void)nout;
    return 0;
#elif defined(SS_SMALL)
    return scan1_any(t, ln, p, len, out, cap, nout);
#else
    if (t->trans_width == 1u)
        return scan1_w1(t, ln, p, len, out, cap, nout);
    if (t->trans_width == 2u)
        return scan1_w2(t, ln, p, len, out, cap, nout);
    return scan1_w4(t, ln, p, len, out, cap, nout);
#endif
#endif
}

static size_t scanl(const ss_table *t, lane *ln, const uint8_t *const *p, size_t m,
                    ss_match *out, size_t cap, size_t *nout)
{
#ifdef SS_NO_DENSE
    (void)t, (void)ln, (void)p, (void)m, (void)out, (void)cap, (void)nout;
    return 0;
#else
    if (t->trans_width == 1u)
        return scanl_w1(t, ln, p, m, out, cap, nout);
    if (t->trans_width == 2u)
        return scanl_w2(t, ln, p, m, out, cap, nout);
    return scanl_w4(t, ln, p, m, out, cap, nout);
#endif
}

#ifndef SS_NO_PARTS
size_t ss_scan(const ss_table *t, ss_state *st, const ss_ctx *ctx, const uint8_t *data,
               size_t len, ss_match *out, size_t cap, size_t *nout)
{
    return ss_scan_parts(t, st, NULL, ctx, data, len, out, cap, nout);
}

size_t ss_scan_parts(const ss_table *t, ss_state *st, void *track, const ss_ctx *ctx,
                     const uint8_t *data, size_t len, ss_match *out, size_t cap, size_t *nout)
#else
size_t ss_scan(const ss_table *t, ss_state *st, const ss_ctx *ctx, const uint8_t *data,
               size_t len, ss_match *out, size_t cap, size_t *nout)
#endif
{
    static const ss_ctx none = {0, 0, 0, 0};
    lane ln;
    size_t done;
    *nout = 0;
    if (t->states == 0) /* not loaded */
        return 0;
    if (st->state >= t->states) /* not a state of this table: start afresh */
        st->state = 0;
    ln.state = st->state;
    ln.offset = st->offset;
    ln.unit_start = st->offset - st->unit;
    ln.ctx = ctx ? ctx : &none;
    ln.item = 0;
    ln.cap = cap;
#ifndef SS_NO_PARTS
    ln.track = (uint8_t *)track;
#endif
    done = scan1(t, &ln, data, len, out, cap, nout);
    st->state = ln.state;
    st->offset = ln.offset;
    st->unit += (uint32_t)done;
    return done;
}

/* Make item `it` ready to scan: apply its reset (idempotent while nothing
 * of it has been scanned) and fill its lane. */
static void begin(const ss_table *t, ss_state *states, uint8_t *track, const ss_item *it,
                  uint32_t index, size_t cap, lane *ln)
{
    ss_state *st = &states[it->slot];
#ifndef SS_NO_PARTS
    ln->track = NULL;
    if (track) {
        ln->track = track + (size_t)it->slot * t->track_bytes;
        if ((it->flags & SS_ITEM_RESET) && it->done == 0)
            memset(ln->track, 0, t->track_bytes);
    }
#else
    (void)track;
#endif
    if ((it->flags & SS_ITEM_RESET) && it->done == 0)
        ss_reset(st, it->reset_offset);
    if (st->state >= t->states)
        st->state = 0;
    ln->state = st->state;
    ln->offset = st->offset;
    ln->unit_start = st->offset - it->done;
    ln->ctx = &it->ctx;
    ln->item = index;
    ln->cap = cap;
}

static void finish(ss_state *states, ss_item *it, const lane *ln)
{
    states[it->slot].state = ln->state;
    states[it->slot].offset = ln->offset;
    states[it->slot].unit = it->done;
    if (it->done >= it->len)
        it->flags |= SS_ITEM_DONE;
}

#define IDLE ((size_t)-1)
#define LOOKAHEAD 64

/* The batch scheduler.  LANES lanes each hold one item; all lanes advance
 * together by the shortest remaining length, then finished lanes take the
 * next items.  An item whose slot is held by a busy lane waits (items of one
 * slot must be scanned in order): meanwhile the oldest lane runs alone. */
#ifndef SS_NO_PARTS
size_t ss_scan_batch(const ss_table *t, ss_state *states, ss_item *items, size_t n,
                     const uint8_t *data, ss_match *out, size_t cap, size_t *nout)
{
    return ss_scan_batch_parts(t, states, NULL, items, n, data, out, cap, nout);
}

size_t ss_scan_batch_parts(const ss_table *t, ss_state *states, void *track, ss_item *items,
                           size_t n, const uint8_t *data, ss_match *out, size_t cap,
                           size_t *nout)
#else
size_t ss_scan_batch(const ss_table *t, ss_state *states, ss_item *items, size_t n,
                     const uint8_t *data, ss_match *out, size_t cap, size_t *nout)
#endif
{
#ifdef SS_NO_PARTS
    uint8_t *track = NULL;
#endif
    lane ln[LANES];
    const uint8_t *p[LANES];
    size_t held[LANES], next = 0, k, active = 0, lead = 0;
    int full = 0;
    *nout = 0;
    if (t->states == 0)
        return 0;
    for (k = 0; k < LANES; k++)
        held[k] = IDLE;
    while (!full) {
        /* Fill idle lanes with the earliest pending items whose slot no lane
         * holds; an item of a busy slot waits, and later items of other slots
         * (at most LOOKAHEAD past the first pending one) go ahead of it.
         * Items of one slot still start in their order: each pass searches
         * from the first pending item, and within a pass the held slots
         * only grow, so an earlier pending item of a free slot is always
         * taken before a later one. */
        while (next < n && (items[next].flags & SS_ITEM_DONE))
            next++;
        {
            size_t j = next, stop = n - next > LOOKAHEAD ? next + LOOKAHEAD : n, b;
            for (k = 0; k < LANES && j < stop; k++) {
                ss_item *it;
                if (held[k] != IDLE)
                    continue;
                for (; j < stop; j++) {
                    if (items[j].flags & SS_ITEM_DONE)
                        continue;
                    for (b = 0; b < LANES; b++)
                        if (held[b] != IDLE && items[held[b]].slot == items[j].slot)
                            break;
                    if (b == LANES)
                        break;
                }
                if (j >= stop)
                    break;
                it = &items[j];
                begin(t, states, (uint8_t *)track, it, (uint32_t)j, cap, &ln[k]);
                if (it->done >= it->len) { /* nothing to scan (e.g. a reset alone) */
                    finish(states, it, &ln[k]);
                    j++;
                    k--;
                    continue;
                }
                held[k] = j++;
                p[k] = data + it->data_off + it->done;
                active++;
            }
        }
        if (active == 0)
            break;
        if (active == LANES && t->layout == SS_LAYOUT_DENSE &&
            cap >= LANES * (size_t)t->max_outputs) {
            size_t m = IDLE, got;
            for (k = 0; k < LANES; k++) {
                size_t rest = items[held[k]].len - items[held[k]].done;
                if (rest < m)
                    m = rest;
            }
            got = scanl(t, ln, p, m, out, cap, nout);
            full = got < m;
            for (k = 0; k < LANES; k++) {
                ss_item *it = &items[held[k]];
                it->done += (uint32_t)got;
                p[k] += got;
                if (it->done >= it->len || full) {
                    finish(states, it, &ln[k]);
                    if (it->done >= it->len) {
                        held[k] = IDLE;
                        active--;
                    }
                }
            }
        } else {
            /* Too few items to fill the lanes, or a layout whose walk is
             * branchy (interleaving it measured slower): the oldest lane alone. */
            size_t oldest = 0;
            ss_item *it;
            for (k = 1; k < LANES; k++)
                if (held[k] != IDLE && (held[oldest] == IDLE || held[k] < held[oldest]))
                    oldest = k;
            it = &items[held[oldest]];
            it->done += (uint32_t)scan1(t, &ln[oldest], p[oldest], it->len - it->done, out, cap,
                                        nout);
            full = it->done < it->len;
            finish(states, it, &ln[oldest]);
            held[oldest] = IDLE;
            active--;
            if (full) /* save every other lane's progress too */
                for (k = 0; k < LANES; k++)
                    if (held[k] != IDLE)
                        finish(states, &items[held[k]], &ln[k]);
        }
    }
    while (lead < n && (items[lead].flags & SS_ITEM_DONE))
        lead++;
    return lead;
}
