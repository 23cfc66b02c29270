/*
 * seam_compact.c - the compact layout: own transitions plus a default link.
 *
 * Each state keeps only the transitions on which it differs from its
 * failure state, and the failure link; the start state keeps a full row.
 * A byte costs one step per state visited: labelled transitions go one
 * level deeper, failure links at least one shallower, so n bytes cost at
 * most 2n steps.  FORMAT.md gives the sections; `rank sets` (a count per 64
 * states and a 64-bit map) select the states that store a failure link,
 * further transitions, or outputs of their own.
 */
#include <stdint.h>
#include <string.h>

#include "seam_int.h"
#include "seam_le.h"

#ifndef SS_NO_COMPACT

enum {
    SEC_OUT_INDEX = 3, SEC_OUT_LIST = 4, SEC_WORDS = 8, SEC_ROOT, SEC_FAIL_RANK, SEC_FAIL_LIST,
    SEC_EXTRA_RANK, SEC_EXTRA_INDEX, SEC_EXTRA_LIST, SEC_OWN_RANK, SEC_EXTRA_FILTER
};

#define W_CHILD 0x100u     /* s + 1 is entered from s on class (word[s + 1] & 0xff) */
#define W_FAIL_ROOT 0x200u /* failure state = start row[class of the edge into s] */
#define W_MATCH 0x400u     /* s has outputs, its own or its failure chain's */
#define W_EXTRA 0x800u     /* s is in the transition rank set */
#define W_FAILX 0x1000u    /* s is in the failure rank set (a stored link) */
#define W_OWN 0x2000u      /* s is in the output rank set */
#define W_ALL 0x3FFFu
#define RANK_ENTRY 12u     /* u32 count before the block, u64 map */

#define ld_w ss__ld_w

/* Bits set in x (small cores have no popcount instruction). */
SS_INLINE uint32_t pop32(uint32_t x)
{
#if defined(__POPCNT__)
    return (uint32_t)__builtin_popcount(x);
#else
    x = x - ((x >> 1) & 0x55555555u);
    x = (x & 0x33333333u) + ((x >> 2) & 0x33333333u);
    x = (x + (x >> 4)) & 0x0F0F0F0Fu;
    return (x * 0x01010101u) >> 24;
#endif
}

/* Is s in the rank set?  If so, *r = its index among the members.  A block
 * is a u32 count and the 64-bit map as two u32 halves, low half first;
 * 64-bit hosts count it as one word, others half by half (less code, no
 * 64-bit shifts). */
#if UINTPTR_MAX > 0xFFFFFFFFu
SS_INLINE uint32_t pop64(uint64_t x)
{
#if defined(__POPCNT__)
    return (uint32_t)__builtin_popcountll(x);
#else
    x = x - ((x >> 1) & 0x5555555555555555u);
    x = (x & 0x3333333333333333u) + ((x >> 2) & 0x3333333333333333u);
    x = (x + (x >> 4)) & 0x0F0F0F0F0F0F0F0Fu;
    return (uint32_t)((x * 0x0101010101010101u) >> 56);
#endif
}

SS_INLINE int rank_of(const uint8_t *set, uint32_t s, uint32_t *r)
{
    const uint8_t *e = set + RANK_ENTRY * (s >> 6);
    uint64_t map = (uint64_t)ss_ld32(e + 4) | ((uint64_t)ss_ld32(e + 8) << 32);
    uint32_t k = s & 63u;
    if (!((map >> k) & 1u))
        return 0;
    *r = ss_ld32(e) + pop64(map & (((uint64_t)1 << k) - 1u));
    return 1;
}
#else
SS_INLINE int rank_of(const uint8_t *set, uint32_t s, uint32_t *r)
{
    const uint8_t *e = set + RANK_ENTRY * (s >> 6);
    uint32_t k = s & 63u, before = ss_ld32(e), map = ss_ld32(e + 4);
    if (k >= 32u) { /* in the high half: the low half's members come first */
        before += pop32(map);
        map = ss_ld32(e + 8);
        k -= 32u;
    }
    if (!((map >> k) & 1u))
        return 0;
    *r = before + pop32(map & ((1u << k) - 1u));
    return 1;
}
#endif

/* The transition filter: one bit per hash of (state, class); every stored
 * further transition has its bit set, so a clear bit means "none here". */
SS_INLINE uint32_t filter_bit(uint32_t s, uint32_t c, uint32_t bits_log2)
{
    return (uint32_t)((((s << 8) | c) * 0x9E3779B1u) >> (32u - bits_log2));
}

SS_INLINE int filter_has(const ss_table *t, uint32_t s, uint32_t c)
{
    uint32_t h = filter_bit(s, c, t->filter_log2);
    return (t->extra_filter[h >> 3] >> (h & 7u)) & 1u;
}

SS_INLINE uint32_t word(const ss_table *t, uint32_t s)
{
    return ss_ld16(t->words + 2u * s);
}

/* The failure state of s (word w); 0 when it is the start state. */
#ifdef SS_SMALL
static uint32_t fail_of(const ss_table *t, uint32_t s, uint32_t w, uint32_t tw)
#else
SS_INLINE uint32_t fail_of(const ss_table *t, uint32_t s, uint32_t w, uint32_t tw)
#endif
{
    uint32_t r;
    if ((w & W_FAILX) && rank_of(t->fail_rank, s, &r))
        return ld_w(t->fail_list + (size_t)r * tw, tw);
    return (w & W_FAIL_ROOT) ? ld_w(t->root + (size_t)(w & 0xFFu) * tw, tw) : 0u;
}

/* One byte (class c) from state s, whose word is w (FORMAT.md, "Scanning one
 * byte").  Written for few unpredictable branches: the child test is one
 * comparison, the filter is read for every state and tested with the EXTRA
 * bit in one branch, and state 0 (a word without flags) needs no test of its
 * own.  A valid image needs at most max_len failure steps; a damaged one is
 * cut off there and restarts at the start state, so scanning always ends.
 * tw is the state id width (a constant where this is inlined).  Word bits
 * and rank sets need not agree: a state is taken to store a list only when
 * both say so. */
SS_INLINE uint32_t step(const ss_table *t, uint32_t s, uint32_t w, uint32_t c, uint32_t tw)
{
    const uint8_t *words = t->words;
    uint32_t guard = t->max_len, r;
    for (;;) {
        uint32_t child = (w >> 8) & 1u, next = s + child; /* s itself without CHILD */
        if (child & ((ss_ld16(words + 2u * next) & 0xFFu) == c))
            return next;
        if (((w >> 11) & filter_has(t, s, c)) && rank_of(t->extra_rank, s, &r)) {
            const uint32_t ow = t->out_width;
            uint32_t e = ld_w(t->extra_index + (size_t)r * ow, ow);
            uint32_t stop = ld_w(t->extra_index + (size_t)(r + 1u) * ow, ow);
            for (; e < stop; e++) {
                const uint8_t *x = t->extra_list + (size_t)e * (1u + tw);
                if (x[0] == c)
                    return ld_w(x + 1, tw);
            }
        }
        if (!(w & (W_FAILX | W_FAIL_ROOT)) || guard-- == 0)
            break; /* the failure state is the start state (or a damaged image) */
        s = fail_of(t, s, w, tw);
        w = ss_ld16(words + 2u * s);
    }
    return ld_w(t->root + (size_t)c * tw, tw);
}

/* The matches of state s ending at `end`: its own outputs and those along
 * its failure chain, in signature order.  Each round walks the chain for
 * the smallest signature above the last one taken, so the order needs no
 * buffer and no signature comes twice; a valid state has at most
 * max_outputs, so that many rounds take them all. */
static size_t emit(const ss_table *t, uint32_t s0, uint64_t end, const lane *ln, ss_match *out,
                   size_t n)
{
    const uint32_t ow = t->out_width;
    uint32_t round, above = 0, best, s, w, r, k, stop, guard;
    for (round = 0; round < t->max_outputs; round++) {
        best = 0xFFFFFFFFu; /* no signature index is that large */
        for (s = s0, guard = t->max_len + 1u; s != 0 && guard-- && ((w = word(t, s)) & W_MATCH);
             s = fail_of(t, s, w, t->trans_width)) {
            if (rank_of(t->own_rank, s, &r)) { /* set 15 says, whatever OWN says */
                stop = ld_w(t->out_index + (size_t)(r + 1u) * ow, ow);
                for (k = ld_w(t->out_index + (size_t)r * ow, ow); k < stop; k++) {
                    uint32_t sig = ld_w(t->out_list + (size_t)k * ow, ow);
                    if (sig >= above && sig < best)
                        best = sig;
                }
            }
        }
        if (best == 0xFFFFFFFFu)
            break;
        n = ss__emit_sig(t, best, end, ln, out, n);
        above = best + 1u;
    }
    return n;
}

/* Scan p[0..len) from the lane's state; stop early when out[] could not
 * take the next match state's outputs.  Returns bytes consumed. */
SS_INLINE size_t scan(const ss_table *t, lane *ln, const uint8_t *p, size_t len, ss_match *out,
                      size_t cap, size_t *nout, uint32_t tw)
{
    const uint8_t *cls = t->classes, *words = t->words, *q = p, *const stop = p + len;
    uint32_t s = ln->state, w = ss_ld16(words + 2u * s);
    size_t n = *nout;
    for (; q != stop; q++) {
        uint32_t ns = step(t, s, w, cls[*q], tw), nw = ss_ld16(words + 2u * ns);
        if (nw & W_MATCH) {
            if (n + t->max_outputs > cap)
                break;
            n = emit(t, ns, ln->offset + (size_t)(q - p) + 1u, ln, out, n);
        }
        s = ns;
        w = nw;
    }
    ln->state = s;
    ln->offset += (size_t)(q - p);
    *nout = n;
    return (size_t)(q - p);
}

#ifdef SS_SMALL
size_t ss__scan_compact(const ss_table *t, lane *ln, const uint8_t *p, size_t len,
                        ss_match *out, size_t cap, size_t *nout)
{
    return scan(t, ln, p, len, out, cap, nout, t->trans_width);
}
#else
static size_t scan_w1(const ss_table *t, lane *ln, const uint8_t *p, size_t len, ss_match *out,
                      size_t cap, size_t *nout)
{
    return scan(t, ln, p, len, out, cap, nout, 1u);
}

static size_t scan_w2(const ss_table *t, lane *ln, const uint8_t *p, size_t len, ss_match *out,
                      size_t cap, size_t *nout)
{
    return scan(t, ln, p, len, out, cap, nout, 2u);
}

static size_t scan_w4(const ss_table *t, lane *ln, const uint8_t *p, size_t len, ss_match *out,
                      size_t cap, size_t *nout)
{
    return scan(t, ln, p, len, out, cap, nout, 4u);
}

size_t ss__scan_compact(const ss_table *t, lane *ln, const uint8_t *p, size_t len,
                        ss_match *out, size_t cap, size_t *nout)
{
    if (t->trans_width == 1u)
        return scan_w1(t, ln, p, len, out, cap, nout);
    if (t->trans_width == 2u)
        return scan_w2(t, ln, p, len, out, cap, nout);
    return scan_w4(t, ln, p, len, out, cap, nout);
}
#endif

/* ---- loading ---------------------------------------------------------- */

/* A rank set over `states` entries: counts consistent, no bit past the end.
 * Returns the member count, or -1. */
static long check_rank(const uint8_t *set, uint32_t size, uint32_t states)
{
    uint32_t blocks = (states + 63u) / 64u, b, count = 0;
    if ((uint64_t)size != (uint64_t)RANK_ENTRY * blocks)
        return -1;
    for (b = 0; b < blocks; b++) {
        const uint8_t *e = set + RANK_ENTRY * b;
        uint64_t map = (uint64_t)ss_ld32(e + 4) | ((uint64_t)ss_ld32(e + 8) << 32);
        uint32_t valid = states - 64u * b;
        if (ss_ld32(e) != count || (valid < 64u && (map >> valid) != 0))
            return -1;
        count += pop32((uint32_t)map) + pop32((uint32_t)(map >> 32));
    }
    return (long)count;
}

/* An index of `members + 1` entries of width w: 0, non-decreasing, ending at `total`. */
static int check_index(const uint8_t *ix, uint32_t size, uint32_t w, uint64_t members,
                       uint64_t total)
{
    uint64_t k;
    uint32_t prev = 0;
    if ((uint64_t)size != (members + 1u) * w || ld_w(ix, w) != 0)
        return 0;
    for (k = 1; k <= members; k++) {
        uint32_t v = ld_w(ix + k * w, w);
        if (v < prev)
            return 0;
        prev = v;
    }
    return prev == total;
}

int ss__check_compact(ss_table *t, const uint8_t *img, uint32_t nsec)
{
    uint32_t sz[8], fsize, s, c, k, tw = t->trans_width, ow = t->out_width;
    long nfail, nextra, nown;
    uint64_t entries, outs;
    t->words = ss__section(img, nsec, SEC_WORDS, &sz[0]);
    t->root = ss__section(img, nsec, SEC_ROOT, &sz[1]);
    t->fail_rank = ss__section(img, nsec, SEC_FAIL_RANK, &sz[2]);
    t->fail_list = ss__section(img, nsec, SEC_FAIL_LIST, &sz[3]);
    t->extra_rank = ss__section(img, nsec, SEC_EXTRA_RANK, &sz[4]);
    t->extra_index = ss__section(img, nsec, SEC_EXTRA_INDEX, &sz[5]);
    t->extra_list = ss__section(img, nsec, SEC_EXTRA_LIST, &sz[6]);
    t->own_rank = ss__section(img, nsec, SEC_OWN_RANK, &sz[7]);
    t->extra_filter = ss__section(img, nsec, SEC_EXTRA_FILTER, &fsize);
    for (t->filter_log2 = 6; t->filter_log2 < 31u && (1u << t->filter_log2) < 8u * fsize;)
        t->filter_log2++;
    if (!t->extra_filter || fsize < 8u || (1u << t->filter_log2) != 8u * fsize)
        return SS_ERR_SECTION; /* a power of two of at least 64 bits */
    if (!t->words || !t->root || !t->fail_rank || !t->fail_list || !t->extra_rank ||
        !t->extra_index || !t->extra_list || !t->own_rank || t->first_match != t->states ||
        (uint64_t)sz[0] != 2u * (uint64_t)t->states ||
        (uint64_t)sz[1] != (uint64_t)tw * t->nclasses)
        return SS_ERR_SECTION;
    nfail = check_rank(t->fail_rank, sz[2], t->states);
    nextra = check_rank(t->extra_rank, sz[4], t->states);
    nown = check_rank(t->own_rank, sz[7], t->states);
    if (nfail < 0 || nextra < 0 || nown < 0 || (uint64_t)sz[3] != (uint64_t)nfail * tw ||
        sz[6] % (1u + tw) != 0)
        return SS_ERR_SECTION;
    for (c = 0; c < t->nclasses; c++)
        if (ld_w(t->root + (size_t)c * tw, tw) >= t->states)
            return SS_ERR_TRANS;
    for (s = 0; s < t->states; s++) {
        uint32_t w = word(t, s), r;
        if ((w & 0xFFu) >= t->nclasses || (w & ~W_ALL) != 0 ||
            ((w & W_CHILD) && s + 1u >= t->states) ||
            !(w & W_FAILX) != !rank_of(t->fail_rank, s, &r) ||
            !(w & W_EXTRA) != !rank_of(t->extra_rank, s, &r) ||
            !(w & W_OWN) != !rank_of(t->own_rank, s, &r))
            return SS_ERR_TRANS;
    }
    for (k = 0; k < (uint32_t)nfail; k++)
        if (ld_w(t->fail_list + (size_t)k * tw, tw) >= t->states)
            return SS_ERR_TRANS;
    entries = sz[6] / (1u + tw);
    if (!check_index(t->extra_index, sz[5], ow, (uint64_t)nextra, entries))
        return SS_ERR_SECTION;
    for (k = 0; k < entries; k++) {
        const uint8_t *x = t->extra_list + (size_t)k * (1u + tw);
        if (x[0] >= t->nclasses || ld_w(x + 1, tw) >= t->states)
            return SS_ERR_TRANS;
    }
    for (s = 0; s < t->states; s++) { /* every transition of a member passes the filter */
        uint32_t w = word(t, s), r;
        if ((w & W_EXTRA) && (w & W_CHILD) && !filter_has(t, s, word(t, s + 1u) & 0xFFu))
            return SS_ERR_TRANS;
        if ((w & W_EXTRA) && rank_of(t->extra_rank, s, &r)) {
            uint32_t e = ld_w(t->extra_index + (size_t)r * ow, ow);
            uint32_t stop = ld_w(t->extra_index + (size_t)(r + 1u) * ow, ow);
            for (; e < stop; e++)
                if (!filter_has(t, s, t->extra_list[(size_t)e * (1u + tw)]))
                    return SS_ERR_TRANS;
        }
    }
    {
        uint32_t s_oidx, s_olist;
        ss__section(img, nsec, SEC_OUT_INDEX, &s_oidx);
        ss__section(img, nsec, SEC_OUT_LIST, &s_olist);
        if (s_olist % ow != 0)
            return SS_ERR_SECTION;
        outs = s_olist / ow;
        if (!check_index(t->out_index, s_oidx, ow, (uint64_t)nown, outs))
            return SS_ERR_OUTPUTS;
        for (k = 0; k < (uint32_t)nown; k++) {
            uint32_t e = ld_w(t->out_index + (size_t)k * ow, ow);
            uint32_t stop = ld_w(t->out_index + (size_t)(k + 1u) * ow, ow), last = 0;
            for (; e < stop; e++) {
                uint32_t sig = ld_w(t->out_list + (size_t)e * ow, ow);
                if (sig >= t->nsigs || (e > ld_w(t->out_index + (size_t)k * ow, ow) && sig <= last))
                    return SS_ERR_OUTPUTS;
                last = sig;
            }
        }
    }
    return SS_OK;
}

#else
typedef int ss_no_compact_layout; /* ISO C wants a declaration in every file */
#endif /* SS_NO_COMPACT */
