/*
 * seam_parts.c - the part tracker: links the parts of multi-part signatures.
 *
 * In an image with parts (format version 2) the automaton's outputs are
 * part records, not signatures.  A signature of one part is reported when
 * its part ends.  For the others, each link (part k -> part k + 1) keeps, in
 * the flow side's tracker memory, the chains that reached part k: a ring of
 * (end, start) entries not yet usable by part k + 1 (they end fewer than
 * MIN + len(part k + 1) bytes ago) and the latest usable one.  When part
 * k + 1 ends at e (starting at s = e - len), the chain it extends is the
 * latest one ending at or before s - MIN; it must end at or after s - MAX.
 * The latest chain has the latest start (starts never decrease with ends),
 * so one match per end offset comes out with the largest start: the
 * shortest occurrence.  FORMAT.md, "The part tracker", has the layout.
 */
#include <string.h>

#include "seam.h"
#include "seam_int.h"
#include "seam_le.h"

#ifndef SS_NO_PARTS

#define SEC_PARTS 17u

/* A chain that reached a part: where it (the part) ends, where its first part starts. */
typedef struct {
    uint64_t end, start;
} chain;

/* A link's memory (8-byte aligned, native byte order): the latest chain
 * usable by the next part (end 0: none), the count of waiting chains, then
 * up to `cap` waiting chains, oldest first.  Chains ending at or before
 * `upto` become usable; the latest of them is kept. */
static chain *settle(uint8_t *lk, uint32_t cap, uint64_t upto)
{
    chain *wait = (chain *)(lk + 24);
    uint32_t *count = (uint32_t *)(lk + 16), n = *count, k = 0;
    if (n > cap) /* not memory this tracker wrote: start empty */
        n = 0;
    while (k < n && wait[k].end <= upto)
        *(chain *)lk = wait[k++];
    memmove(wait, wait + k, (n - k) * sizeof(chain));
    *count = n - k;
    return (chain *)lk;
}

int ss__part(const ss_table *t, uint32_t id, uint64_t end, const lane *ln, uint32_t *sig,
             uint64_t *start)
{
    const uint8_t *r = t->parts + (size_t)SS__PART_RECORD * id;
    uint32_t len = ss_ld16(r + 8), index = ss_ld16(r + 4);
    chain c;
    if (end < len)
        return 0;
    c.end = end;
    c.start = end - len;
    *sig = ss_ld32(r);
    if (index) { /* extend the latest chain that reached the previous part */
        const uint8_t *prev = r - SS__PART_RECORD;
        uint32_t low = ss_ld32(r + 12), high = ss_ld32(r + 16);
        const chain *last;
        if (ln->track == NULL || c.start < low)
            return 0;
        last = settle(ln->track + ss_ld32(prev + 20), ss_ld16(prev + 10), c.start - low);
        if (last->end == 0u || (high != SS__NO_BOUND && last->end + high < c.start))
            return 0;
        c.start = last->start;
    }
    if (index + 1u < ss_ld16(r + 6)) { /* wait for the next part */
        const uint8_t *next = r + SS__PART_RECORD;
        uint64_t gap = (uint64_t)ss_ld32(next + 12) + ss_ld16(next + 8);
        uint32_t cap = ss_ld16(r + 10);
        if (ln->track) {
            uint8_t *lk = ln->track + ss_ld32(r + 20);
            uint32_t n;
            settle(lk, cap, end > gap ? end - gap : 0u);
            n = *(uint32_t *)(lk + 16);
            if (n < cap) { /* always, with the capacity the compiler computed */
                ((chain *)(lk + 24))[n] = c;
                *(uint32_t *)(lk + 16) = n + 1u;
            }
        }
        return 0;
    }
    *start = c.start;
    return 1;
}

uint32_t ss_track_bytes(const ss_table *t)
{
    return t->track_bytes; /* ss_load sets it only with part records */
}

void ss_track_reset(const ss_table *t, void *track)
{
    memset(track, 0, t->track_bytes);
}

/* What the tracker reads: the part records' section, each naming a
 * signature (the rule tables); the first record is a first part (a part
 * that is not first reads the record before it); a part that is not last
 * has a record after it and its link, 8-byte aligned, inside the tracker
 * memory.  That the records of a signature are its parts in order, and
 * that the longest part is max_len, are host rules (max_len <= 65535
 * bounds the work per byte all the same). */
static const ss__section_rule part_sections[] = {
    {SEC_PARTS, SS__FIELD(parts), SS__EXACT, V_PART, V_NPARTS, 0},
};
static const ss__bound_rule part_bounds[] = {
    {SS__FIELD(parts), 0, V_NPARTS, V_PART, V_FOUR, V_NSIGS, -SS_ERR_PARTS},
};
static const ss__rules part_rules = {part_sections, part_bounds, 1, 1};

int ss__check_parts(ss_table *t, uint32_t *v)
{
    uint32_t p;
    const uint8_t *r;
    int rc;
    v[V_PART] = SS__PART_RECORD;
    v[V_NPARTS] = t->nparts;
    if ((rc = ss__check(t, v, &part_rules)) != SS_OK)
        return rc;
    if (ss_ld16(t->parts + 4))
        return SS_ERR_PARTS;
    for (p = 1, r = t->parts; p <= t->nparts; p++, r += SS__PART_RECORD) {
        uint32_t link = ss_ld32(r + 20);
        if (ss_ld16(r + 4) + 1u < ss_ld16(r + 6) &&
            (p >= t->nparts || (link & 7u) ||
             link + 24u + 16u * (uint64_t)ss_ld16(r + 10) > t->track_bytes))
            return SS_ERR_PARTS;
    }
    return SS_OK;
}

#endif /* SS_NO_PARTS */
