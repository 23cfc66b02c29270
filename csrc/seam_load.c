/*
 * seam_load.c - validate a table image before anything scans with it.
 *
 * Every field the scanner follows is checked here against the image's own
 * bounds, so a loaded table can never make the scanner read outside it.
 * Arithmetic on sizes is done in 64 bits, so a hostile header cannot wrap.
 */
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
#define MAX_SECTIONS 64u
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
    case SS_ERR_SECTION: return "a section is missing, misaligned, duplicated or outside the image";
    case SS_ERR_HEADER: return "a header field is out of range";
    case SS_ERR_CLASSES: return "a byte class is out of range";
    case SS_ERR_TRANS: return "a transition names a state that does not exist";
    case SS_ERR_OUTPUTS: return "the output index or list is out of range";
    case SS_ERR_SIGS: return "a signature record is out of range";
    default: return "unknown error";
    }
}

/* Find section `kind`; its offset and size are already bounds-checked. */
const uint8_t *ss__section(const uint8_t *img, uint32_t nsec, uint32_t kind, uint32_t *size)
{
    uint32_t i;
    for (i = 0; i < nsec; i++) {
        const uint8_t *e = img + HEADER_SIZE + SECTION_ENTRY * i;
        if (ss_ld16(e) == kind) {
            *size = ss_ld32(e + 8);
            return img + ss_ld32(e + 4);
        }
    }
    *size = 0;
    return NULL;
}

static int check_sections(const uint8_t *img, uint32_t size, uint32_t nsec)
{
    uint64_t first = (uint64_t)HEADER_SIZE + (uint64_t)SECTION_ENTRY * nsec;
    uint32_t i, j;
    if (nsec > MAX_SECTIONS || first > size)
        return SS_ERR_SECTION;
    for (i = 0; i < nsec; i++) {
        const uint8_t *e = img + HEADER_SIZE + SECTION_ENTRY * i;
        uint64_t off = ss_ld32(e + 4), len = ss_ld32(e + 8);
        if (off < first || off + len > size || (off & 7u) != 0 || ss_ld16(e + 2) != 0)
            return SS_ERR_SECTION;
        for (j = 0; j < i; j++) {
            const uint8_t *f = img + HEADER_SIZE + SECTION_ENTRY * j;
            uint64_t foff = ss_ld32(f + 4), flen = ss_ld32(f + 8);
            if (ss_ld16(f) == ss_ld16(e) || (len && flen && off < foff + flen && foff < off + len))
                return SS_ERR_SECTION; /* duplicated kind, or overlapping bytes */
        }
    }
    return SS_OK;
}

#ifndef SS_NO_DENSE
static int check_dense(const ss_table *t, uint32_t trans_size)
{
    uint64_t entries = (uint64_t)t->states * t->stride, k;
    if (entries * t->trans_width != trans_size)
        return SS_ERR_SECTION;
    for (k = 0; k < entries; k++) {
        const uint8_t *p = t->trans + k * t->trans_width;
        uint32_t v = t->trans_width == 1 ? p[0] : t->trans_width == 2 ? ss_ld16(p) : ss_ld32(p);
        if (v >= t->states)
            return SS_ERR_TRANS;
    }
    return SS_OK;
}

static int check_outputs(ss_table *t, uint32_t index_size, uint32_t list_size, uint32_t want_max)
{
    uint64_t nmatch = (uint64_t)t->states - t->first_match;
    uint64_t entries = list_size / t->out_width, k;
    uint32_t prev = 0, most = 0;
    if ((uint64_t)index_size != 4u * (nmatch + 1u) || list_size % t->out_width != 0)
        return SS_ERR_SECTION;
    if (ss_ld32(t->out_index) != 0)
        return SS_ERR_OUTPUTS;
    for (k = 1; k <= nmatch; k++) {
        uint32_t v = ss_ld32(t->out_index + 4u * k);
        if (v < prev || v > entries)
            return SS_ERR_OUTPUTS;
        if (v - prev > most)
            most = v - prev;
        prev = v;
    }
    if (prev != entries || most != want_max)
        return SS_ERR_OUTPUTS;
    for (k = 1, prev = 0; k <= nmatch; k++) {
        uint32_t stop = ss_ld32(t->out_index + 4u * k), e;
        uint32_t last = 0;
        for (e = prev; e < stop; e++) { /* ascending signature indices < nsigs */
            const uint8_t *p = t->out_list + (uint64_t)e * t->out_width;
            uint32_t sig = t->out_width == 2 ? ss_ld16(p) : ss_ld32(p);
            if (sig >= t->nsigs || (e > prev && sig <= last))
                return SS_ERR_OUTPUTS;
            last = sig;
        }
        prev = stop;
    }
    t->max_outputs = most;
    return SS_OK;
}

#endif /* SS_NO_DENSE */

static int check_sigs(const ss_table *t, uint32_t sigs_size, uint32_t ports_size)
{
    uint32_t i, longest = 0;
    if ((uint64_t)sigs_size != (uint64_t)SIG_RECORD * t->nsigs || (ports_size & 1u) != 0)
        return SS_ERR_SECTION;
    for (i = 0; i < t->nsigs; i++) {
        const uint8_t *r = t->sigs + (size_t)SIG_RECORD * i;
        uint32_t len = ss_ld16(r + 4);
        uint64_t nports = ss_ld16(r + 6), first = ss_ld32(r + 8);
        if (r[0] > SS_SIDE_SERVER || r[1] > SS_TRANSPORT_UDP || r[3] != 0 ||
            (r[2] & ~(SS_SIG_HAS_WINDOW | SS_SIG_DATAGRAM)) != 0 || len == 0 ||
            first + nports > t->nports)
            return SS_ERR_SIGS;
        if ((r[2] & SS_SIG_HAS_WINDOW) ? ss_ld32(r + 12) >= ss_ld32(r + 16)
                                       : (ss_ld32(r + 12) != 0 || ss_ld32(r + 16) != 0xFFFFFFFFu))
            return SS_ERR_SIGS;
        if (len > longest)
            longest = len;
    }
    return longest == t->max_len ? SS_OK : SS_ERR_SIGS;
}

int ss_load(ss_table *t, const void *image, size_t size)
{
    const uint8_t *img = (const uint8_t *)image;
    uint32_t isize, nsec, want_max, s_cls, s_trans, s_oidx, s_olist, s_sigs, s_ports, b;
    int rc;

    memset(t, 0, sizeof *t);
    if (img == NULL || size < HEADER_SIZE)
        return SS_ERR_SHORT;
    if (memcmp(img, "SEAM", 4) != 0)
        return SS_ERR_MAGIC;
    if (ss_ld16(img + 4) != SS_FORMAT_VERSION)
        return SS_ERR_VERSION;
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
    t->states = ss_ld32(img + 20);
    t->first_match = ss_ld32(img + 24);
    t->nsigs = ss_ld32(img + 28);
    t->nclasses = ss_ld16(img + 32);
    t->stride = ss_ld16(img + 34);
    t->trans_width = img[36];
    t->out_width = img[37];
    nsec = ss_ld16(img + 38);
    want_max = ss_ld32(img + 40);
    t->max_len = ss_ld32(img + 44);
    if (t->states == 0 || t->first_match == 0 || t->first_match > t->states ||
        t->nclasses == 0 || t->nclasses > 256 || t->stride < t->nclasses ||
        (t->trans_width != 1 && t->trans_width != 2 && t->trans_width != 4) ||
        (t->trans_width < 4 && t->states > (1u << (8u * t->trans_width))) ||
        (t->out_width != 2 && t->out_width != 4) || t->max_len == 0 || t->max_len > 0xFFFFu ||
        want_max > t->nsigs ||
        ss_ld32(img + 16) != 0 || ss_ld32(img + 48) != 0 || ss_ld32(img + 52) != 0 ||
        ss_ld32(img + 56) != 0 || ss_ld32(img + 60) != 0)
        return SS_ERR_HEADER;

    rc = check_sections(img, isize, nsec);
    if (rc != SS_OK)
        return rc;
    t->classes = ss__section(img, nsec, SEC_CLASSES, &s_cls);
    t->out_index = ss__section(img, nsec, SEC_OUT_INDEX, &s_oidx);
    t->out_list = ss__section(img, nsec, SEC_OUT_LIST, &s_olist);
    t->sigs = ss__section(img, nsec, SEC_SIGS, &s_sigs);
    t->ports = ss__section(img, nsec, SEC_PORTS, &s_ports);
    if (!t->classes || !t->out_index || !t->out_list || !t->sigs || !t->ports || s_cls != 256u)
        return SS_ERR_SECTION;
    t->nports = s_ports / 2u;

    for (b = 0; b < 256u; b++)
        if (t->classes[b] >= t->nclasses)
            return SS_ERR_CLASSES;
    rc = check_sigs(t, s_sigs, s_ports);
#ifndef SS_NO_DENSE
    if (rc == SS_OK && t->layout == SS_LAYOUT_DENSE) {
        t->trans = ss__section(img, nsec, SEC_DENSE, &s_trans);
        rc = t->trans ? check_dense(t, s_trans) : SS_ERR_SECTION;
        if (rc == SS_OK)
            rc = check_outputs(t, s_oidx, s_olist, want_max);
    }
#endif
#ifndef SS_NO_COMPACT
    if (rc == SS_OK && t->layout == SS_LAYOUT_COMPACT) {
        t->max_outputs = want_max; /* compact: no byte emits more */
        rc = ss__check_compact(t, img, nsec);
    }
#endif
    (void)s_trans;
    (void)s_oidx;
    (void)s_olist;
    if (rc != SS_OK)
        memset(t, 0, sizeof *t);
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
