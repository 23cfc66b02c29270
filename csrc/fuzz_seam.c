/*
 * fuzz_seam.c - a fuzz target for the seamscan loader and scanner (a test
 * tool, not part of the runtime).
 *
 * Input layout:
 *
 *     bytes 0..2   L, the image length (24-bit little-endian; cut to what follows)
 *     byte  3      control bits:
 *                    bit 0     write the CRC-32 of the image's bytes [16, image_size)
 *                              into its CRC field before loading, so that mutations
 *                              reach the structural checks behind the CRC
 *                    bits 1-2  first stream offset: 0, 1000, 0xFFFFFF00 or 2^40
 *                    bit 3     batch: each slot starts with an empty reset item
 *                    bits 4-7  extra chunk size and batch piece size selector
 *     bytes 4..4+L the table image
 *     the rest     the stream to scan (at most MAX_STREAM bytes are used)
 *
 * The image is copied into a heap block of exactly L bytes, and an accepted
 * image again into one of exactly image_size bytes, so AddressSanitizer sees
 * any read past it; every scanned piece and every out[] is an exact-size block
 * too.  For an accepted image the stream is scanned in several contexts
 * (none, client/TCP/port 80, server/UDP/47808 datagrams, UDP datagrams, a
 * port taken from the stream), whole and in pieces of 1, 7 and a selected
 * size, from valid and invalid start states, with out[] holding only
 * max_outputs matches (so the "full, call again" path runs), and through
 * ss_scan_batch over three slots.  Checked, with __builtin_trap() on a
 * violation:
 *
 *   - ss_load returns 0 or a negative code with a non-empty ss_strerror text;
 *     an accepted image states a size within the bytes given, loads again from
 *     exactly that many bytes and is refused one byte shorter;
 *   - every match: sig < nsigs, end inside the bytes just scanned, start =
 *     end - the signature's length, and it passes the signature's side,
 *     transport, ports, datagram and window rules (FORMAT.md); matches of one
 *     stream come strictly ordered by (end, sig); nout <= cap; consumed <= len;
 *     a call with bytes left makes progress;
 *   - split invariance: outside datagram contexts every cut of the stream and
 *     every start state not below `states` give the matches of the whole scan
 *     from state 0;
 *   - dense layout: the matches equal those of an independent walk of the
 *     table written here from FORMAT.md;
 *   - ss_scan_batch gives each slot the matches ss_scan gives the same pieces.
 *
 * Every one of these must hold for each image ss_load accepts, well-formed or
 * not (FORMAT.md, "Loading": the host refuses ill-formed images, a device
 * need not), so the target checks nothing the loader leaves to the host.
 *
 * Build: `make -C csrc OUT=DIR fuzz-seam` (clang, libFuzzer, ASan, UBSan), or
 * `make -C csrc OUT=DIR fuzz-seam-replay`: the same checks under any C
 * compiler with ASan/UBSan, a main() that runs each file named on its command
 * line and prints "CODE FILE" (CODE: the ss_load result, 1 if the input is
 * shorter than its 4-byte prefix).
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "seam.h"

#define PREFIX 4u
#define MAX_STREAM 65536u
#define SIG_RECORD 20u
#define NSLOTS 11u /* more than the batch scan's lanes (LANES, at most 8) */
#define MAX_PIECES 48u
#define BATCH_LANES 8u /* seam.h: ss_scan_batch needs cap >= 8 * max_outputs */

#define CTL_FIX_CRC 0x01u
#define CTL_EMPTY_RESETS 0x08u

#define CHECK(cond)                                                                            \
    do {                                                                                       \
        if (!(cond))                                                                           \
            broken(#cond, __LINE__);                                                           \
    } while (0)

static void broken(const char *what, int line)
{
    fprintf(stderr, "fuzz_seam.c:%d: runtime contract broken: %s\n", line, what);
    fflush(stderr);
    __builtin_trap();
}

static uint32_t ld16(const uint8_t *p)
{
    return (uint32_t)p[0] | (uint32_t)p[1] << 8;
}

static uint32_t ld32(const uint8_t *p)
{
    return (uint32_t)p[0] | (uint32_t)p[1] << 8 | (uint32_t)p[2] << 16 | (uint32_t)p[3] << 24;
}

/* A heap block of exactly n bytes (1 for n == 0, still too small for any
 * access through a typed pointer). */
static void *block(size_t n)
{
    void *p = malloc(n ? n : 1u);
    if (p == NULL)
        abort();
    return p;
}

static void *exact_copy(const void *src, size_t n)
{
    void *p = block(n);
    if (n)
        memcpy(p, src, n);
    return p;
}

/* An order-sensitive digest of a match sequence. */
typedef struct {
    uint64_t hash;
    uint64_t count;
} digest;

static void digest_add(digest *d, uint32_t sig, uint64_t start, uint64_t end)
{
    uint64_t v[3];
    size_t i;
    v[0] = sig;
    v[1] = start;
    v[2] = end;
    for (i = 0; i < 3; i++) {
        d->hash ^= v[i];
        d->hash *= 0x100000001b3ull; /* FNV-1a 64 prime */
    }
    d->count++;
}

static int digest_eq(const digest *a, const digest *b)
{
    return a->hash == b->hash && a->count == b->count;
}

static const digest DIGEST_START = {0xcbf29ce484222325ull, 0};

/* The filters of FORMAT.md section 5, for a match of `sig` at [start, end)
 * scanned in `ctx` (NULL: none) within a datagram that began at `unit_start`. */
static int allowed(const ss_table *t, const ss_ctx *ctx, uint32_t sig, uint64_t start,
                   uint64_t end, uint64_t unit_start)
{
    const uint8_t *r = t->sigs + (size_t)SIG_RECORD * sig;
    uint32_t nports = ld16(r + 6), i;
    uint64_t base = 0;
    if (ctx == NULL)
        return !(r[2] & SS_SIG_HAS_WINDOW) || (start >= ld32(r + 12) && end <= ld32(r + 16));
    if (ctx->side && r[0] && r[0] != ctx->side)
        return 0;
    if (ctx->transport && r[1] && r[1] != ctx->transport)
        return 0;
    if (nports && (ctx->flags & SS_CTX_HAS_PORT)) {
        for (i = 0; i < nports; i++)
            if (ld16(t->ports + 2u * (ld32(r + 8) + i)) == ctx->server_port)
                break;
        if (i == nports)
            return 0;
    }
    if ((r[2] & SS_SIG_DATAGRAM) && (ctx->flags & SS_CTX_DATAGRAM)) {
        if (start < unit_start)
            return 0;
        base = unit_start;
    }
    if ((r[2] & SS_SIG_HAS_WINDOW) &&
        (start - base < ld32(r + 12) || end - base > ld32(r + 16)))
        return 0;
    return 1;
}

static int is_datagram(const ss_ctx *ctx)
{
    return ctx != NULL && (ctx->flags & SS_CTX_DATAGRAM);
}

/* Check one match reported for bytes [lo, hi) of a stream, after `last`
 * (the previous match of that stream, or count == 0). */
static void check_match(const ss_table *t, const ss_ctx *ctx, const ss_match *m, uint64_t lo,
                        uint64_t hi, uint64_t unit_start, ss_match *last, uint64_t *count)
{
    CHECK(m->sig < t->nsigs);
    CHECK(m->end > lo && m->end <= hi);
    CHECK(m->start <= m->end);
    if (t->nparts == 0) /* with parts, a match is at least its shortest occurrence... */
        CHECK(m->end - m->start == ld16(t->sigs + (size_t)SIG_RECORD * m->sig + 4));
    /* ...which a damaged image may misstate: nothing more is checked there */
    CHECK(allowed(t, ctx, m->sig, m->start, m->end, unit_start));
    if (*count)
        CHECK(m->end > last->end || (m->end == last->end && m->sig > last->sig));
    *last = *m;
    (*count)++;
}

/* Scan data[0..len) as one flow side from (offset0, state0) in pieces of
 * `chunk` bytes (0: whole), each piece an exact-size copy; every call checked. */
static digest scan_pass(const ss_table *t, const ss_ctx *ctx, const uint8_t *data, size_t len,
                        size_t chunk, uint64_t offset0, uint32_t state0)
{
    size_t cap = t->max_outputs, k = 0;
    ss_match *out = block(cap * sizeof(ss_match));
    ss_match last;
    uint64_t count = 0;
    digest d = DIGEST_START;
    ss_state st;
    uint8_t *track = block(ss_track_bytes(t)); /* exact size: ASan sees any overrun */
    ss_reset(&st, offset0);
    ss_track_reset(t, track);
    CHECK(st.state == 0 && st.offset == offset0);
    st.state = state0;
    if (chunk == 0 || chunk > len)
        chunk = len;
    do {
        size_t n = len - k < chunk ? len - k : chunk, done = 0;
        uint8_t *piece = exact_copy(data + k, n);
        uint64_t unit_start;
        if (is_datagram(ctx))
            ss_new_datagram(&st);
        unit_start = st.offset;
        CHECK(st.offset == offset0 + k);
        do {
            size_t nout = (size_t)-1, got, i;
            uint64_t lo = st.offset;
            got = ss_scan_parts(t, &st, track, ctx, piece + done, n - done, out, cap, &nout);
            CHECK(nout <= cap);
            CHECK(got <= n - done);
            CHECK(got > 0 || done == n);
            CHECK(st.offset == lo + got);
            CHECK(st.state < t->states);
            for (i = 0; i < nout; i++) {
                CHECK(out[i].item == 0);
                check_match(t, ctx, &out[i], lo, st.offset, unit_start, &last, &count);
                digest_add(&d, out[i].sig, out[i].start, out[i].end);
            }
            done += got;
        } while (done < n);
        free(piece);
        k += n;
    } while (k < len);
    free(track);
    free(out);
    return d;
}

/* The dense layout walked from FORMAT.md alone (sections 1-5), over the same
 * pieces as scan_pass: the matches the runtime must report. */
static digest walk_dense(const ss_table *t, const ss_ctx *ctx, const uint8_t *data, size_t len,
                         size_t chunk, uint64_t offset0)
{
    digest d = DIGEST_START;
    uint32_t s = 0;
    uint64_t unit_start = offset0;
    size_t i;
    if (chunk == 0)
        chunk = len ? len : 1u;
    for (i = 0; i < len; i++) {
        uint64_t end = offset0 + i + 1u;
        size_t at = ((size_t)s * t->stride + t->classes[data[i]]) * t->trans_width;
        if (i % chunk == 0)
            unit_start = offset0 + i;
        s = t->trans_width == 1u ? t->trans[at]
            : t->trans_width == 2u ? ld16(t->trans + at) : ld32(t->trans + at);
        if (s >= t->first_match) {
            uint32_t m = s - t->first_match, k;
            for (k = ld32(t->out_index + 4u * m); k < ld32(t->out_index + 4u * (m + 1u)); k++) {
                uint32_t sig = t->out_width == 2u ? ld16(t->out_list + 2u * k)
                                                  : ld32(t->out_list + 4u * k);
                uint32_t length = ld16(t->sigs + (size_t)SIG_RECORD * sig + 4);
                if (end >= length && allowed(t, ctx, sig, end - length, end, unit_start))
                    digest_add(&d, sig, end - length, end);
            }
        }
    }
    return d;
}

/* Through ss_scan_batch: the stream cut into pieces of `piece` bytes, runs
 * of `group` pieces dealt round-robin to NSLOTS slots (slot s scans in
 * ctxs[s % 3]); each slot's matches must be those ss_scan gives for the same
 * pieces.  With group > 1 an item often waits for its slot's previous one. */
static void batch_pass(const ss_table *t, const ss_ctx *ctxs, const uint8_t *data, size_t len,
                       size_t piece, size_t group, uint64_t offset0, int empty_resets)
{
    ss_item items[MAX_PIECES + NSLOTS];
    uint64_t base[MAX_PIECES + NSLOTS];
    ss_state states[NSLOTS];
    digest want[NSLOTS], got[NSLOTS];
    ss_match last[NSLOTS];
    uint64_t count[NSLOTS] = {0}, next_off[NSLOTS];
    int used[NSLOTS] = {0};
    size_t cap = BATCH_LANES * (size_t)t->max_outputs, nitems = 0, k, s, first = 0;
    ss_match *out = block(cap * sizeof(ss_match));
    ss_match *one = block(t->max_outputs * sizeof(ss_match));
    uint8_t *tracks = block(NSLOTS * (size_t)ss_track_bytes(t)), *track1 = block(ss_track_bytes(t));

    memset(tracks, 0xA5, NSLOTS * (size_t)ss_track_bytes(t)); /* garbage: reset before use */
    if (piece * MAX_PIECES < len)
        piece = (len + MAX_PIECES - 1u) / MAX_PIECES;
    memset(items, 0, sizeof items);
    memset(last, 0, sizeof last);
    memset(states, 0xA5, sizeof states); /* garbage: every slot is reset before use */
    for (s = 0; s < NSLOTS; s++) {
        want[s] = got[s] = DIGEST_START;
        next_off[s] = offset0;
        if (empty_resets) {
            items[nitems].slot = (uint32_t)s;
            items[nitems].flags = SS_ITEM_RESET;
            items[nitems].reset_offset = offset0;
            base[nitems++] = offset0;
            used[s] = 1;
        }
    }
    for (k = 0; k < len; k += piece) {
        ss_item *it = &items[nitems];
        s = (k / piece / group) % NSLOTS;
        it->slot = (uint32_t)s;
        it->flags = (!empty_resets && !used[s]) ? SS_ITEM_RESET : 0u;
        it->ctx = ctxs[s % 3u];
        it->len = (uint32_t)(len - k < piece ? len - k : piece);
        it->data_off = k;
        it->reset_offset = offset0;
        base[nitems++] = next_off[s];
        next_off[s] += it->len;
        used[s] = 1;
    }

    /* What ss_scan says, slot by slot. */
    for (s = 0; s < NSLOTS; s++) {
        ss_state st;
        ss_reset(&st, offset0);
        ss_track_reset(t, track1);
        for (k = 0; k < nitems; k++) {
            size_t done = 0;
            if (items[k].slot != s || items[k].len == 0)
                continue;
            if (is_datagram(&items[k].ctx))
                ss_new_datagram(&st);
            while (done < items[k].len) {
                size_t nout = 0, i;
                done += ss_scan_parts(t, &st, track1, &items[k].ctx,
                                      data + items[k].data_off + done, items[k].len - done, one,
                                      t->max_outputs, &nout);
                for (i = 0; i < nout; i++)
                    digest_add(&want[s], one[i].sig, one[i].start, one[i].end);
            }
        }
    }

    /* What ss_scan_batch says. */
    while (first < nitems) {
        size_t nout = (size_t)-1, i, lead;
        lead = ss_scan_batch_parts(t, states, tracks, items + first, nitems - first, data, out,
                                   cap, &nout);
        CHECK(nout <= cap);
        CHECK(lead <= nitems - first);
        CHECK(lead > 0 || nout > 0);
        for (i = 0; i < nout; i++) {
            const ss_match *m = &out[i];
            size_t at;
            CHECK(m->item < nitems - first);
            at = first + m->item;
            s = items[at].slot;
            check_match(t, &items[at].ctx, m, base[at], base[at] + items[at].len, base[at],
                        &last[s], &count[s]);
            digest_add(&got[s], m->sig, m->start, m->end);
        }
        for (i = 0; i < lead; i++)
            CHECK(items[first + i].flags & SS_ITEM_DONE);
        first += lead;
    }
    for (s = 0; s < NSLOTS; s++) {
        CHECK(digest_eq(&got[s], &want[s]));
        if (used[s])
            CHECK(states[s].offset == next_off[s]);
    }
    free(track1);
    free(tracks);
    free(one);
    free(out);
}

/* Every scan of an accepted table. */
static void exercise(const ss_table *t, const uint8_t *data, size_t len, unsigned ctl)
{
    static const uint64_t offsets[4] = {0u, 1000u, 0xFFFFFF00u, (uint64_t)1 << 40};
    ss_ctx ctxs[6] = {
        {0, 0, 0, 0},
        {SS_SIDE_CLIENT, SS_TRANSPORT_TCP, 80u, SS_CTX_HAS_PORT},
        {SS_SIDE_SERVER, SS_TRANSPORT_UDP, 47808u, SS_CTX_HAS_PORT | SS_CTX_DATAGRAM},
        {0, SS_TRANSPORT_UDP, 0, SS_CTX_DATAGRAM},
        {SS_SIDE_SERVER, SS_TRANSPORT_TCP, 0, SS_CTX_HAS_PORT},
        {0, 0, 0, 0},
    };
    const size_t extra = 1u + 61u * (ctl >> 4);
    const size_t chunks[4] = {0, 1, 7, extra};
    uint64_t offset0 = offsets[(ctl >> 1) & 3u];
    size_t c, k;

    if (len >= 2)
        ctxs[4].server_port = (uint16_t)ld16(data);
    for (c = 0; c < 6; c++) {
        const ss_ctx *ctx = c == 5 ? NULL : &ctxs[c];
        digest whole = scan_pass(t, ctx, data, len, 0, offset0, 0);
        for (k = 0; k < 4; k++) {
            /* From state 0, from `states` and from 0xFFFFFFFF: all the start state. */
            uint32_t state0 = k == 2 ? t->states : k == 3 ? 0xFFFFFFFFu : 0u;
            digest d = k == 0 ? whole : scan_pass(t, ctx, data, len, chunks[k], offset0, state0);
            if (!is_datagram(ctx))
                CHECK(digest_eq(&d, &whole));
            if (t->layout == SS_LAYOUT_DENSE && t->nparts == 0) {
                digest w = walk_dense(t, ctx, data, len, chunks[k], offset0);
                CHECK(digest_eq(&d, &w));
            }
        }
    }
    batch_pass(t, ctxs, data, len, extra, 1u, offset0, (ctl & CTL_EMPTY_RESETS) != 0);
    batch_pass(t, ctxs + 2, data, len, 1u + (ctl >> 4), 2u, offset0, 0);
}

/* Run one input; returns the ss_load code, or 1 if there is no image prefix. */
static int fuzz_one(const uint8_t *in, size_t size)
{
    size_t img_len, len;
    unsigned ctl;
    uint8_t *img;
    const char *text;
    ss_table t;
    int rc;

    if (size < PREFIX)
        return 1;
    img_len = (size_t)in[0] | (size_t)in[1] << 8 | (size_t)in[2] << 16;
    ctl = in[3];
    if (img_len > size - PREFIX)
        img_len = size - PREFIX;
    len = size - PREFIX - img_len;
    if (len > MAX_STREAM)
        len = MAX_STREAM;

    img = exact_copy(in + PREFIX, img_len);
    if ((ctl & CTL_FIX_CRC) && img_len >= 16u) {
        size_t stated = ld32(img + 8), end = stated < img_len ? stated : img_len;
        uint32_t crc = ss_crc32(img + 16, end > 16u ? end - 16u : 0u);
        img[12] = (uint8_t)crc;
        img[13] = (uint8_t)(crc >> 8);
        img[14] = (uint8_t)(crc >> 16);
        img[15] = (uint8_t)(crc >> 24);
    }
    memset(&t, 0xA5, sizeof t);
    rc = ss_load(&t, img, img_len);
    text = ss_strerror(rc);
    CHECK(rc <= 0);
    CHECK(text != NULL && text[0] != '\0');
    if (rc == SS_OK) {
        ss_table exact, cut;
        uint8_t *copy, *data;
        CHECK(t.size >= 64u && t.size <= img_len);
        CHECK(t.states >= 1u && t.first_match >= 1u && t.first_match <= t.states);
        CHECK(t.max_len >= 1u && t.max_len <= 65535u);
        copy = exact_copy(img, t.size);
        CHECK(ss_load(&exact, copy, t.size) == SS_OK);
        CHECK(ss_load(&cut, copy, t.size - 1u) != SS_OK);
        data = exact_copy(in + PREFIX + img_len, len);
        exercise(&exact, data, len, ctl);
        free(data);
        free(copy);
    }
    free(img);
    return rc;
}

#ifdef FUZZ_SEAM_REPLAY
int main(int argc, char **argv)
{
    int i;
    for (i = 1; i < argc; i++) {
        FILE *f = fopen(argv[i], "rb");
        uint8_t *buf;
        long n;
        if (f == NULL || fseek(f, 0, SEEK_END) != 0 || (n = ftell(f)) < 0 ||
            fseek(f, 0, SEEK_SET) != 0) {
            fprintf(stderr, "fuzz_seam: %s: cannot read\n", argv[i]);
            return 2;
        }
        buf = block((size_t)n);
        if (fread(buf, 1, (size_t)n, f) != (size_t)n) {
            fprintf(stderr, "fuzz_seam: %s: cannot read\n", argv[i]);
            return 2;
        }
        fclose(f);
        printf("%d %s\n", fuzz_one(buf, (size_t)n), argv[i]);
        fflush(stdout);
        free(buf);
    }
    return 0;
}
#else
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    fuzz_one(data, size);
    return 0;
}
#endif
