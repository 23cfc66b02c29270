/*
 * seam_int.h - what the runtime's own files share (not part of the API).
 */
#ifndef SEAM_INT_H
#define SEAM_INT_H

#include <stddef.h>

#include "seam.h"
#include "seam_le.h"

/* SS_SMALL: one width-generic scan loop per layout instead of one per state
 * id width (smaller code for devices, a little slower). */
#if defined(__GNUC__) && !defined(SS_SMALL)
#define SS_INLINE static inline __attribute__((always_inline))
#else
#define SS_INLINE static inline
#endif

/* A little-endian unsigned of w = 1, 2 or 4 bytes. */
SS_INLINE uint32_t ss__ld_w(const uint8_t *p, uint32_t w)
{
    return w == 1u ? p[0] : w == 2u ? ss_ld16(p) : ss_ld32(p);
}

#define SS__SIG_RECORD 20u
/* Flow sides walked together by ss_scan_batch.  Measured on x86-64 with
 * 1,000 signatures, runs alternating in one session: tools/bench_scan.py's
 * payloads 855-954 MB/s with 7 lanes, 615-661 with 8, 804-845 with 6; the
 * replay benchmark's batches mostly 939-1001 with 7 against 665-761 with 8.
 * seam.h's "cap >= 8 * max_outputs" covers any LANES up to 8. */
#define LANES 7

/* Where a scan stands: the state, the offset of the next byte, the offset
 * where the current datagram began (for datagram-scoped matches), and where
 * matches go. */
typedef struct {
    uint32_t state;
    uint64_t offset;
    uint64_t unit_start;
    const ss_ctx *ctx;
    uint32_t item;
    size_t cap;
#ifndef SS_NO_PARTS
    uint8_t *track; /* the flow side's part tracker memory, or NULL */
#endif
} lane;

#define SS__PART_RECORD 24u
#define SS__NO_BOUND 0xFFFFFFFFu
#ifndef SS_NO_PARTS
/* Output `id` (a part record) ended at `end`: update the tracker; 1 when it
 * completes its signature's occurrence, with *sig and *start set. */
int ss__part(const ss_table *t, uint32_t id, uint64_t end, const lane *ln, uint32_t *sig,
             uint64_t *start);
int ss__check_parts(ss_table *t, uint32_t *v);
#endif

/* Append the match of automaton output `sig` (a signature, or a part record
 * in a table with parts) ending at `end` if it passes the filters. */
size_t ss__emit_sig(const ss_table *t, uint32_t sig, uint64_t end, const lane *ln,
                    ss_match *out, size_t n);

/* Section `kind` of the loaded image t (t->image, t->size), its size in
 * *size; NULL when the directory has no such entry or the entry's bytes do
 * not lie inside the image. */
const uint8_t *ss__section(const ss_table *t, uint32_t nsec, uint32_t kind, uint32_t *size);

/* The loader's checks are data: per layout a table of sections (each one
 * present, inside the image and of the size its counts give) and a table of
 * bounds (every value of an array below a count), run by ss__check.  The
 * counts they refer to are numbered: */
enum {
    V_STATES, V_NCLASSES, V_NSIGS, V_TW, V_OW, V_TW1, V_ONE, V_TWO, V_FOUR, V_RANK, V_SIG,
    V_256, V_NSEC, V_CELLS, V_NMATCH1, V_BLOCKS, V_NPORTS, V_NPORTS1, V_NFAIL, V_NFAIL1, V_NEXTRA,
    V_NEXTRA1, V_NOWN, V_NOWN1, V_ENTRIES, V_ENTRIES1, V_OUTS, V_OUTS1, V_FILTER, V_FILTER1, V_NOUTS,
    V_PART, V_NPARTS, V_COUNT
};
#define SS__FIELD(name) ((uint8_t)offsetof(ss_table, name))
#define SS__EXACT 0u /* size == v[unit] * v[count] */
#define SS__RANK 1u  /* also a rank set: its member count -> v[to], v[to] + 1 -> v[to + 1] */
#define SS__SPLIT 2u /* size / v[unit] entries -> v[to], v[to + 1] (a remainder is ignored) */
#define SS__BITS 3u  /* a power of two, 8 bytes to 2^28: log2 of its bits -> v[to] */
/* Sections: {kind, ss_table field, how, unit, count, to}, in the order their
 * counts become known.  Bounds: {field, first byte, count, step, width,
 * bound, error}: v[count] values of v[width] bytes, v[step] bytes apart from
 * that byte of the section, each below v[bound], else the (negated) error. */
typedef uint8_t ss__section_rule[6];
typedef uint8_t ss__bound_rule[7];
typedef struct {
    const ss__section_rule *sections;
    const ss__bound_rule *bounds;
    uint8_t nsections, nbounds;
} ss__rules;
int ss__check(ss_table *t, uint32_t *v, const ss__rules *rules);

/* Bits set in x (small cores have no popcount instruction). */
uint32_t ss__pop32(uint32_t x);

/* The compact layout (seam_compact.c). */
int ss__check_compact(ss_table *t, uint32_t *v);
size_t ss__scan_compact(const ss_table *t, lane *ln, const uint8_t *p, size_t len,
                        ss_match *out, size_t cap, size_t *nout);


#endif /* SEAM_INT_H */
