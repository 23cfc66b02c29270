/*
 * seam_load.c - validate a table image before anything scans with it.
 *
 * Every field the scanner follows is checked here against the image's own
 * bounds, so a loaded table can never make the scanner read outside it, and
 * the header bounds the work per byte (FORMAT.md, "Loading": the safety
 * rules; the host tool checks the well-formedness rules as well).  Sections
 * and bounds are checked by one loop over per-layout rule tables
 * (ss__check); size products are taken in 64 bits, so a hostile header
 * cannot wrap them.
 */
#include <stddef.h>
#include <string.h>

#include "seam.h"
#include "seam_int.h"
#include "seam_le.h"

typedef char ss_state_is_16_bytes[(sizeof(ss_state) == 16) ? 1 : -1];
typedef char ss_ctx_is_8_bytes[(sizeof(ss_ctx) == 8) ? 1 : -1];
typedef char ss_item_is_40_bytes[(sizeof(ss_item) == 40) ? 1 : -1];
typedef char ss_match_is_24_bytes[(sizeof(ss_match) == 24) ? 1 : -1];

#define HEADER_SIZE 64u
#define SECTION_ENTRY 12u
#define SIG_RECORD 20u

enum { SEC_CLASSES = 1, SEC_DENSE, SEC_OUT_INDEX, SEC_OUT_LIST, SEC_SIGS, SEC_PORTS, SEC_NAMES };

/* CRC-32 (IEEE 802.3, reflected polynomial 0xEDB88320), four bits a step. */
static const uint32_t crc_nibble[16] = {
    0x00000000u, 0x1DB71064u, 0x3B6E20C8u, 0x26D930ACu, 0x76DC4190u, 0x6B6B51F4u,
    0x4DB26158u, 0x5005713Cu, 0xEDB88320u, 0xF00F9344u, 0xD6D6A3E8u, 0xCB61B38Cu,
    0x9B64C2B0u, 0x86D3D2D4u, 0xA00AE278u, 0xBDBDF21Cu};

uint32_t ss_crc32(const void *data, size_t len)
{
    const uint8_t *p = (const uint8_t *)data;
    uint32_t crc = 0xFFFFFFFFu;
    size_t i;
    for (i = 0; i < len; i++) {
        crc ^= p[i];
        crc = (crc >> 4) ^ crc_nibble[crc & 15u];
        crc = (crc >> 4) ^ crc_nibble[crc & 15u];
    }
    return crc ^ 0xFFFFFFFFu;
}

const char *ss_strerror(int code)
{
    switch (code) {
    case SS_OK: return "ok";
    case SS_ERR_SHORT: return "image is shorter than its header or its stated size";
    case SS_ERR_MAGIC: return "not a table image (bad magic)";
    case SS_ERR_VERSION: return "format version not supported by this runtime";
    case SS_ERR_LAYOUT: return "layout not supported by this runtime";
    case SS_ERR_CRC: return "CRC-32 mismatch: the image is damaged";
    case SS_ERR_SECTION: return "a section is missing, outside the image or of the wrong size";
    case SS_ERR_HEADER: return "a header field is out of range";
    case SS_ERR_CLASSES: return "a byte class is out of range";
    case SS_ERR_TRANS: return "a transition names a state that does not exist";
    case SS_ERR_OUTPUTS: return "the output index or list is out of range";
    case SS_ERR_SIGS: return "a signature record is out of range";
#ifndef SS_NO_PARTS
    case SS_ERR_PARTS: return "a part record is out of range or inconsistent";
#endif
    default: return "unknown error";
    }
}

const uint8_t *ss__section(const ss_table *t, uint32_t nsec, uint32_t kind, uint32_t *size)
{
    const uint8_t *e = t->image + HEADER_SIZE;
    for (; nsec; nsec--, e += SECTION_ENTRY) {
        if (ss_ld16(e) == kind) {
            uint32_t off = ss_ld32(e + 4), len = ss_ld32(e + 8);
            *size = len;
            return off <= t->size && len <= t->size - off ? t->image + off : NULL;
        }
    }
    *size = 0;
    return NULL;
}

uint32_t ss__pop32(uint32_t x)
{
    x = x - ((x >> 1) & 0x55555555u);
    x = (x & 0x33333333u) + ((x >> 2) & 0x33333333u);
    x = (x + (x >> 4)) & 0x0F0F0F0Fu;
    return (x * 0x01010101u) >> 24;
}

#define AT(t, field) (*(const uint8_t **)((char *)(t) + (field)))

int ss__check(ss_table *t, uint32_t *v, const ss__rules *rules)
{
    const ss__section_rule *sr = rules->sections;
    const ss__bound_rule *br = rules->bounds;
    uint32_t size, count, b, k;
    const uint8_t *p;
    for (k = rules->nsections; k; k--, sr++) {
        const uint8_t *r = *sr;
        p = AT(t, r[1]) = ss__section(t, v[V_NSEC], r[0], &size);
        if (p == NULL)
            return SS_ERR_SECTION;
        if (r[2] == SS__SPLIT) {
            count = size / v[r[3]];
        } else if (r[2] == SS__BITS) {
            for (count = 6; count < 31u && (1u << (count - 3u)) < size; count++)
                ;
            if ((1u << (count - 3u)) != size)
                return SS_ERR_SECTION;
        } else if ((uint64_t)v[r[3]] * v[r[4]] != size) {
            return SS_ERR_SECTION;
        } else if (r[2] == SS__RANK) {
            /* each block's count is the members of all earlier blocks, so
             * every rank stays below the total */
            for (count = 0, b = v[V_BLOCKS]; b; b--, p += 12) {
                if (ss_ld32(p) != count)
                    return SS_ERR_SECTION;
                count += ss__pop32(ss_ld32(p + 4)) + ss__pop32(ss_ld32(p + 8));
            }
        } else {
            continue;
        }
        v[r[5]] = count;
        v[r[5] + 1u] = count + 1u;
    }
    for (k = rules->nbounds; k; k--, br++) {
        const uint8_t *r = *br;
        const uint32_t n = v[r[2]], step = v[r[3]], w = v[r[4]], bound = v[r[5]];
        p = AT(t, r[0]) + r[1];
        for (b = 0; b < n; b++)
            if (ss__ld_w(p + (size_t)b * step, w) >= bound)
                return -(int)r[6];
    }
    return SS_OK;
}

/* Both layouts: classes, signature records, ports. */
static const ss__section_rule common_sections[] = {
    {SEC_CLASSES, SS__FIELD(classes), SS__EXACT, V_ONE, V_256, 0},
    {SEC_SIGS, SS__FIELD(sigs), SS__EXACT, V_SIG, V_NSIGS, 0},
    {SEC_PORTS, SS__FIELD(ports), SS__SPLIT, V_TWO, 0, V_NPORTS},
};
static const ss__bound_rule common_bounds[] = {
    {SS__FIELD(classes), 0, V_256, V_ONE, V_ONE, V_NCLASSES, -SS_ERR_CLASSES},
};
static const ss__rules common_rules = {common_sections, common_bounds, 3, 1};

#ifndef SS_NO_DENSE
static const ss__section_rule dense_sections[] = {
    {SEC_DENSE, SS__FIELD(trans), SS__EXACT, V_TW, V_CELLS, 0},
    {SEC_OUT_INDEX, SS__FIELD(out_index), SS__EXACT, V_FOUR, V_NMATCH1, 0},
    {SEC_OUT_LIST, SS__FIELD(out_list), SS__SPLIT, V_OW, 0, V_OUTS},
};
static const ss__bound_rule dense_bounds[] = {
    {SS__FIELD(trans), 0, V_CELLS, V_TW, V_TW, V_STATES, -SS_ERR_TRANS},
};
static const ss__rules dense_rules = {dense_sections, dense_bounds, 3, 1};

/* Dense: every transition names a state (the tables above), and the output
 * index and list are checked in full (one u32 index: the scanner's ordered
 * matches and max_outputs rely on it). */
static int check_dense(ss_table *t, uint32_t *v, uint32_t want_max)
{
    uint32_t nmatch, k, prev = 0, most = 0;
    uint64_t cells = (uint64_t)t->states * t->stride;
    int rc;
    if (t->first_match == 0 || t->first_match > t->states || t->stride < t->nclasses ||
        cells > 0xFFFFFFFFu)
        return SS_ERR_HEADER;
    nmatch = t->states - t->first_match;
    v[V_CELLS] = (uint32_t)cells;
    v[V_NMATCH1] = nmatch + 1u;
    rc = ss__check(t, v, &dense_rules);
    if (rc != SS_OK)
        return rc;
    if (ss_ld32(t->out_index) != 0)
        return SS_ERR_OUTPUTS;
    for (k = 1; k <= nmatch; k++) {
        uint32_t stop = ss_ld32(t->out_index + 4u * k), e, last = 0;
        if (stop < prev || stop > v[V_OUTS])
            return SS_ERR_OUTPUTS;
        if (stop - prev > most)
            most = stop - prev;
        for (e = prev; e < stop; e++) { /* ascending signature indices < nsigs */
            uint32_t sig = ss__ld_w(t->out_list + (size_t)e * t->out_width, t->out_width);
            if (sig >= v[V_NOUTS] || (e > prev && sig <= last))
                return SS_ERR_OUTPUTS;
            last = sig;
        }
        prev = stop;
    }
    if (prev != v[V_OUTS] || most != want_max)
        return SS_ERR_OUTPUTS;
    return SS_OK;
}
#endif /* SS_NO_DENSE */

/* What ss_load checks is what scanning needs (FORMAT.md, "Loading"): every
 * offset, count and index the scanner follows lies inside the image, and the
 * header bounds the work per byte.  Consistency rules that no read depends
 * on (reserved fields, alignment, overlaps, record fields that are only
 * compared) are the host tool's: seamscan refuses such images before export. */
int ss_load(ss_table *t, const void *image, size_t size)
{
    const uint8_t *img = (const uint8_t *)image;
    uint32_t isize, nsec, i, longest = 0, v[V_COUNT];
    const uint8_t *r;
    int rc;

    memset(t, 0, sizeof *t);
    if (img == NULL || size < HEADER_SIZE)
        return SS_ERR_SHORT;
    if (ss_ld32(img) != 0x4D414553u) /* "SEAM" */
        return SS_ERR_MAGIC;
#ifdef SS_NO_PARTS
    if (ss_ld16(img + 4) != 1u) /* version 2 is an image with parts */
        return SS_ERR_VERSION;
#else
    if (ss_ld16(img + 4) - 1u > 1u)
        return SS_ERR_VERSION;
#endif
    isize = ss_ld32(img + 8);
    if (isize < HEADER_SIZE || isize > size)
        return SS_ERR_SHORT;
    if (ss_crc32(img + 16, isize - 16u) != ss_ld32(img + 12))
        return SS_ERR_CRC;
    t->layout = ss_ld16(img + 6);
#ifdef SS_NO_DENSE
    if (t->layout == SS_LAYOUT_DENSE)
        return SS_ERR_LAYOUT;
#endif
#ifdef SS_NO_COMPACT
    if (t->layout == SS_LAYOUT_COMPACT)
        return SS_ERR_LAYOUT;
#endif
    if (t->layout != SS_LAYOUT_DENSE && t->layout != SS_LAYOUT_COMPACT)
        return SS_ERR_LAYOUT;

    t->image = img;
    t->size = isize;
    v[V_STATES] = t->states = ss_ld32(img + 20);
    t->first_match = ss_ld32(img + 24);
    v[V_NOUTS] = v[V_NSIGS] = t->nsigs = ss_ld32(img + 28);
#ifndef SS_NO_PARTS
    if (ss_ld16(img + 4) == 2u && (t->nparts = ss_ld32(img + 48)) != 0u) {
        t->track_bytes = ss_ld32(img + 52) & ~7u; /* version 1: those bytes are reserved */
        v[V_NOUTS] = t->nparts;
    }
#endif
    v[V_NCLASSES] = t->nclasses = ss_ld16(img + 32);
    t->stride = ss_ld16(img + 34);
    v[V_TW] = t->trans_width = img[36];
    v[V_OW] = t->out_width = img[37];
    v[V_NSEC] = nsec = ss_ld16(img + 38);
    t->max_outputs = ss_ld32(img + 40);
    t->max_len = ss_ld32(img + 44);
    v[V_TW1] = t->trans_width + 1u;
    v[V_ONE] = 1u;
    v[V_TWO] = 2u;
    v[V_FOUR] = 4u;
    v[V_RANK] = 12u;
    v[V_SIG] = SIG_RECORD;
    v[V_256] = 256u;
    if (t->states == 0 || /* nclasses 0 is refused with the classes */
        (t->trans_width != 1 && t->trans_width != 2 && t->trans_width != 4) ||
        (t->out_width != 2 && t->out_width != 4) || t->max_len > 0xFFFFu ||
        t->max_outputs > v[V_NOUTS])
        rc = SS_ERR_HEADER;
    else if (HEADER_SIZE + SECTION_ENTRY * nsec > isize)
        rc = SS_ERR_SECTION;
    else if ((rc = ss__check(t, v, &common_rules)) == SS_OK)
        t->nports = v[V_NPORTS];
    for (i = 0, r = t->sigs; rc == SS_OK && i < t->nsigs; i++, r += SIG_RECORD) {
        uint32_t len = ss_ld16(r + 4), nports = ss_ld16(r + 6), first = ss_ld32(r + 8);
        if (first > t->nports || nports > t->nports - first)
            rc = SS_ERR_SIGS; /* the port list lies inside the ports section */
        if (len > longest)
            longest = len;
    }
#ifndef SS_NO_PARTS
    if (rc == SS_OK && t->nparts) /* the parts' lengths bound the failure steps */
        rc = ss__check_parts(t, v);
    else
#endif
    if (rc == SS_OK && longest != t->max_len)
        rc = SS_ERR_SIGS; /* max_len bounds the failure steps of one byte */
#ifndef SS_NO_DENSE
    if (rc == SS_OK && t->layout == SS_LAYOUT_DENSE)
        rc = check_dense(t, v, t->max_outputs);
#endif
#ifndef SS_NO_COMPACT
    if (rc == SS_OK && t->layout == SS_LAYOUT_COMPACT)
        rc = ss__check_compact(t, v); /* max_outputs: emission per byte stops there */
#endif
    if (rc != SS_OK)
        t->states = 0; /* not loaded: ss_scan and ss_scan_batch scan nothing */
    return rc;
}

void ss_reset(ss_state *st, uint64_t offset)
{
    st->state = 0;
    st->unit = 0;
    st->offset = offset;
}

void ss_new_datagram(ss_state *st)
{
    st->unit = 0;
}
