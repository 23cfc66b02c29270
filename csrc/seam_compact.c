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
#include <stddef.h>
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
#define RANK_ENTRY 12u     /* u32 count before the block, u64 map */

#define ld_w ss__ld_w

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
        before += ss__pop32(map);
        map = ss_ld32(e + 8);
        k -= 32u;
    }
    if (!((map >> k) & 1u))
        return 0;
    *r = before + ss__pop32(map & ((1u << k) - 1u));
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

/* ---- loading: the tables that ss__check runs (seam_int.h) -------------- */

/* Sections in the order their sizes become known. */
static const ss__section_rule compact_sections[] = {
    {SEC_WORDS, SS__FIELD(words), SS__EXACT, V_TWO, V_STATES, 0},
    {SEC_FAIL_RANK, SS__FIELD(fail_rank), SS__RANK, V_RANK, V_BLOCKS, V_NFAIL},
    {SEC_EXTRA_RANK, SS__FIELD(extra_rank), SS__RANK, V_RANK, V_BLOCKS, V_NEXTRA},
    {SEC_OWN_RANK, SS__FIELD(own_rank), SS__RANK, V_RANK, V_BLOCKS, V_NOWN},
    {SEC_ROOT, SS__FIELD(root), SS__EXACT, V_TW, V_NCLASSES, 0},
    {SEC_FAIL_LIST, SS__FIELD(fail_list), SS__EXACT, V_TW, V_NFAIL, 0},
    {SEC_EXTRA_INDEX, SS__FIELD(extra_index), SS__EXACT, V_OW, V_NEXTRA1, 0},
    {SEC_OUT_INDEX, SS__FIELD(out_index), SS__EXACT, V_OW, V_NOWN1, 0},
    {SEC_EXTRA_LIST, SS__FIELD(extra_list), SS__SPLIT, V_TW1, 0, V_ENTRIES},
    {SEC_OUT_LIST, SS__FIELD(out_list), SS__SPLIT, V_OW, 0, V_OUTS},
    {SEC_EXTRA_FILTER, SS__FIELD(extra_filter), SS__BITS, 0, 0, V_FILTER},
};

/* What the scanner indexes with, below what it indexes. */
static const ss__bound_rule compact_bounds[] = {
    {SS__FIELD(root), 0, V_NCLASSES, V_TW, V_TW, V_STATES, -SS_ERR_TRANS},
    {SS__FIELD(words), 0, V_STATES, V_TWO, V_ONE, V_NCLASSES, -SS_ERR_TRANS}, /* class in */
    {SS__FIELD(fail_list), 0, V_NFAIL, V_TW, V_TW, V_STATES, -SS_ERR_TRANS},
    {SS__FIELD(extra_list), 1, V_ENTRIES, V_TW1, V_TW, V_STATES, -SS_ERR_TRANS},
    {SS__FIELD(extra_index), 0, V_NEXTRA1, V_OW, V_OW, V_ENTRIES1, -SS_ERR_TRANS},
    {SS__FIELD(out_index), 0, V_NOWN1, V_OW, V_OW, V_OUTS1, -SS_ERR_OUTPUTS},
    {SS__FIELD(out_list), 0, V_OUTS, V_OW, V_OW, V_NOUTS, -SS_ERR_OUTPUTS},
};
static const ss__rules compact_rules = {compact_sections, compact_bounds, 11, 7};

/* What the compact scanner reads, bounded (FORMAT.md, "Loading"): sizes from
 * the header and the rank sets' counts, every state id below `states`, every
 * class the scanner indexes by below `nclasses`, every list index within its
 * list, every signature below `nsigs`, a power-of-two filter, and no CHILD
 * on the last state. */
int ss__check_compact(ss_table *t, uint32_t *v)
{
    int rc;
    v[V_BLOCKS] = (t->states + 63u) / 64u; /* read once the words' size bounds states */
    rc = ss__check(t, v, &compact_rules);
    if (rc != SS_OK)
        return rc;
    t->filter_log2 = v[V_FILTER];
    return (ss_ld16(t->words + 2u * (t->states - 1u)) & W_CHILD) ? SS_ERR_TRANS /* no s + 1 */
                                                                  : SS_OK;
}

#else
typedef int ss_no_compact_layout; /* ISO C wants a declaration in every file */
#endif /* SS_NO_COMPACT */
