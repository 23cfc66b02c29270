/*
 * seam_int.h - what the runtime's own files share (not part of the API).
 */
#ifndef SEAM_INT_H
#define SEAM_INT_H

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
#define LANES 8 /* flow sides walked together by ss_scan_batch */

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
} lane;

/* Append signature `sig`'s match ending at `end` if it passes the filters. */
size_t ss__emit_sig(const ss_table *t, uint32_t sig, uint64_t end, const lane *ln,
                    ss_match *out, size_t n);

const uint8_t *ss__section(const uint8_t *img, uint32_t nsec, uint32_t kind, uint32_t *size);

/* The compact layout (seam_compact.c). */
int ss__check_compact(ss_table *t, const uint8_t *img, uint32_t nsec);
size_t ss__scan_compact(const ss_table *t, lane *ln, const uint8_t *p, size_t len,
                        ss_match *out, size_t cap, size_t *nout);


#endif /* SEAM_INT_H */
