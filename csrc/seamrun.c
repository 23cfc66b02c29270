/*
 * seamrun.c - a test harness for the seamscan runtime (not part of it).
 *
 *     seamrun [--side N] [--transport N] [--port N] [--datagram] TABLE.seam STREAM.bin [CHUNK]
 *         Load TABLE.seam, scan STREAM.bin as one flow side in pieces of
 *         CHUNK bytes (default: the whole stream in one piece) and print one
 *         line per match, "SIG START END" (decimal signature index and stream
 *         offsets, end exclusive), then "end OFFSET".  The options fill the
 *         scan context (ss_ctx); with --datagram each piece is one datagram.
 *         out[] holds only max_outputs matches, so every match state but the
 *         first of a call takes the "out[] full, call again" path.  A table
 *         with multi-part signatures scans with part tracker memory
 *         (ss_scan_parts), unless built with SS_NO_PARTS.
 *     seamrun --crc FILE
 *         Print the CRC-32 of FILE as 8 hex digits.
 *     seamrun --check FILE...
 *         Load each FILE and print "CODE FILE" (0: accepted, else the ss_load
 *         error code); an accepted table is also scanned over a built-in
 *         probe stream, through ss_scan and ss_scan_batch, to exercise it.
 *
 * Exit status: 0 done, 2 usage or file error, 3 table refused (scan mode),
 * 4 the runtime broke its contract (no progress, out[] overrun).
 *
 * Portable C99 with stdio and stdlib only, so it also runs cross-compiled
 * under qemu-user.  Every file is read into a static buffer and moved to the
 * buffer's end, and out[] is the tail of a static array: under AddressSanitizer
 * any read past an image or a stream, or any write past out[cap], hits the
 * redzone after the array.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "seam.h"

#ifndef SEAMRUN_MAX_FILE
#define SEAMRUN_MAX_FILE (32u * 1024u * 1024u)
#endif
#define MAX_OUT 65536u
#define BATCH_ITEMS 12u
#define BATCH_SLOTS 3u
#define PROBE_SIZE 8192u

static uint8_t image_buf[SEAMRUN_MAX_FILE];
static uint8_t stream_buf[SEAMRUN_MAX_FILE];
static uint8_t chunk_buf[SEAMRUN_MAX_FILE];
static ss_match out_buf[MAX_OUT];
static uint8_t probe[PROBE_SIZE];
#define MAX_TRACK (1u << 20)
#ifndef SS_NO_PARTS
static uint64_t track_buf[MAX_TRACK / 8u];
#endif

/* Part tracker memory for `slots` flow sides at the end of track_buf (NULL
 * when the table needs none or more than the harness has), cleared. */
static uint8_t *track_area(const ss_table *t, size_t slots)
{
#ifndef SS_NO_PARTS
    size_t need = slots * ss_track_bytes(t);
    uint8_t *p;
    if (need == 0 || need > MAX_TRACK)
        return NULL;
    p = (uint8_t *)track_buf + MAX_TRACK - need;
    memset(p, 0, need);
    return p;
#else
    (void)t, (void)slots;
    return NULL;
#endif
}

/* Read the whole file into the end of buf[0..cap).  Returns a pointer to its
 * first byte and sets *size, or prints the problem and returns NULL. */
static const uint8_t *read_file(const char *path, uint8_t *buf, size_t cap, size_t *size)
{
    FILE *f = fopen(path, "rb");
    size_t n;
    if (f == NULL) {
        fprintf(stderr, "seamrun: %s: cannot open\n", path);
        return NULL;
    }
    n = fread(buf, 1, cap, f);
    if (ferror(f)) {
        fprintf(stderr, "seamrun: %s: read error after %lu bytes\n", path, (unsigned long)n);
        fclose(f);
        return NULL;
    }
    if (n == cap && fgetc(f) != EOF) {
        fprintf(stderr, "seamrun: %s: larger than the %lu-byte buffer\n", path,
                (unsigned long)cap);
        fclose(f);
        return NULL;
    }
    fclose(f);
    memmove(buf + cap - n, buf, n);
    *size = n;
    return buf + cap - n;
}

/* The output buffer for `cap` matches: the tail of out_buf. */
static ss_match *out_area(size_t cap)
{
    return out_buf + (MAX_OUT - cap);
}

static void contract_broken(const char *what)
{
    fprintf(stderr, "seamrun: runtime contract broken: %s\n", what);
    exit(4);
}

/* Scan one piece to its end, calling again whenever out[] fills.  Prints the
 * matches when `print` is set. */
static void scan_piece(const ss_table *t, ss_state *st, uint8_t *track, const ss_ctx *ctx,
                       const uint8_t *p, size_t len, size_t cap, int print)
{
    ss_match *out = out_area(cap);
    size_t done = 0;
    if (ctx != NULL && (ctx->flags & SS_CTX_DATAGRAM))
        ss_new_datagram(st); /* each piece is one datagram */
    do {
        size_t n = 0, i;
#ifndef SS_NO_PARTS
        size_t got = ss_scan_parts(t, st, track, ctx, p + done, len - done, out, cap, &n);
#else
        size_t got = ss_scan(t, st, ctx, p + done, len - done, out, cap, &n);
        (void)track;
#endif
        if (n > cap)
            contract_broken("ss_scan reported more matches than out[] holds");
        if (got > len - done)
            contract_broken("ss_scan consumed more bytes than it was given");
        if (got == 0 && done < len)
            contract_broken("ss_scan made no progress");
        if (print)
            for (i = 0; i < n; i++)
                printf("%lu %llu %llu\n", (unsigned long)out[i].sig,
                       (unsigned long long)out[i].start, (unsigned long long)out[i].end);
        done += got;
    } while (done < len);
}

static int parse_number(const char *text, unsigned long max, unsigned long *value)
{
    char *end;
    unsigned long v;
    if (text[0] < '0' || text[0] > '9')
        return 0;
    v = strtoul(text, &end, 10);
    if (*end != '\0' || v > max)
        return 0;
    *value = v;
    return 1;
}

static int usage(void)
{
    fprintf(stderr,
            "usage: seamrun [--side N] [--transport N] [--port N] [--datagram] "
            "TABLE.seam STREAM.bin [CHUNK]\n"
            "       seamrun --crc FILE\n"
            "       seamrun --check FILE...\n");
    return 2;
}

static int run_crc(const char *path)
{
    size_t n;
    const uint8_t *data = read_file(path, stream_buf, sizeof stream_buf, &n);
    if (data == NULL)
        return 2;
    printf("%08lx\n", (unsigned long)ss_crc32(data, n));
    return 0;
}

/* All 256 byte values, then bytes from a fixed linear congruential generator,
 * a quarter of them in 0..3 so that short patterns over few values recur. */
static void make_probe(void)
{
    uint32_t x = 12345u, i;
    for (i = 0; i < PROBE_SIZE; i++) {
        x = x * 1103515245u + 12345u;
        if (i < 256u)
            probe[i] = (uint8_t)i;
        else if ((x >> 24) < 64u)
            probe[i] = (uint8_t)((x >> 16) & 3u);
        else
            probe[i] = (uint8_t)(x >> 16);
    }
}

/* Exercise an accepted table: plain and filtered ss_scan, then ss_scan_batch. */
static void exercise(const ss_table *t)
{
    static const ss_ctx filtered = {SS_SIDE_SERVER, SS_TRANSPORT_UDP, 80u,
                                    SS_CTX_HAS_PORT | SS_CTX_DATAGRAM};
    static ss_state states[BATCH_SLOTS];
    static ss_item items[BATCH_ITEMS];
    size_t cap = t->max_outputs, k, start = 0;
    ss_state st;
    uint8_t *track = track_area(t, 1);
    if (8u * cap > MAX_OUT)
        return;
    ss_reset(&st, 0);
    scan_piece(t, &st, track, NULL, probe, PROBE_SIZE, cap, 0);
    ss_reset(&st, 0xFFFFFF00u);
    track = track_area(t, 1);
    for (k = 0; k < PROBE_SIZE; k += 1000u)
        scan_piece(t, &st, track, &filtered, probe + k,
                   PROBE_SIZE - k < 1000u ? PROBE_SIZE - k : 1000u, cap, 0);
    track = track_area(t, BATCH_SLOTS);

    memset(items, 0, sizeof items);
    for (k = 0; k < BATCH_ITEMS; k++) {
        items[k].slot = (uint32_t)(k % BATCH_SLOTS);
        items[k].flags = k < BATCH_SLOTS ? SS_ITEM_RESET : 0u;
        if (k & 1u)
            items[k].ctx = filtered;
        items[k].len = (uint32_t)(PROBE_SIZE / BATCH_ITEMS);
        items[k].data_off = k * (PROBE_SIZE / BATCH_ITEMS);
    }
    cap = 8u * (size_t)t->max_outputs;
    while (start < BATCH_ITEMS) {
        size_t n = 0, got;
#ifndef SS_NO_PARTS
        got = ss_scan_batch_parts(t, states, track, items + start, BATCH_ITEMS - start, probe,
                                  out_area(cap), cap, &n);
#else
        got = ss_scan_batch(t, states, items + start, BATCH_ITEMS - start, probe,
                            out_area(cap), cap, &n);
#endif
        if (n > cap)
            contract_broken("ss_scan_batch reported more matches than out[] holds");
        if (got == 0 && n == 0)
            contract_broken("ss_scan_batch made no progress");
        start += got;
    }
}

static int run_check(int argc, char **argv)
{
    int i;
    make_probe();
    for (i = 0; i < argc; i++) {
        size_t n;
        ss_table t;
        int rc;
        const uint8_t *img = read_file(argv[i], image_buf, sizeof image_buf, &n);
        if (img == NULL)
            return 2;
        rc = ss_load(&t, img, n);
        printf("%d %s\n", rc, argv[i]);
        fflush(stdout);
        if (rc == SS_OK)
            exercise(&t);
    }
    return 0;
}

static int run_scan(int argc, char **argv)
{
    ss_ctx ctx;
    ss_table t;
    ss_state st;
    uint8_t *track;
    const uint8_t *img, *data;
    size_t img_size, size, chunk = 0, cap, k;
    unsigned long v;
    int i = 0, rc;

    memset(&ctx, 0, sizeof ctx);
    for (; i < argc && strncmp(argv[i], "--", 2) == 0; i++) {
        if (strcmp(argv[i], "--datagram") == 0) {
            ctx.flags |= SS_CTX_DATAGRAM;
        } else if (i + 1 < argc && strcmp(argv[i], "--side") == 0 &&
                   parse_number(argv[i + 1], 255u, &v)) {
            ctx.side = (uint8_t)v;
            i++;
        } else if (i + 1 < argc && strcmp(argv[i], "--transport") == 0 &&
                   parse_number(argv[i + 1], 255u, &v)) {
            ctx.transport = (uint8_t)v;
            i++;
        } else if (i + 1 < argc && strcmp(argv[i], "--port") == 0 &&
                   parse_number(argv[i + 1], 65535u, &v)) {
            ctx.server_port = (uint16_t)v;
            ctx.flags |= SS_CTX_HAS_PORT;
            i++;
        } else {
            return usage();
        }
    }
    argc -= i;
    argv += i;
    if (argc < 2 || argc > 3)
        return usage();
    if (argc == 3) {
        if (!parse_number(argv[2], SEAMRUN_MAX_FILE, &v) || v == 0)
            return usage();
        chunk = v;
    }

    img = read_file(argv[0], image_buf, sizeof image_buf, &img_size);
    if (img == NULL)
        return 2;
    rc = ss_load(&t, img, img_size);
    if (rc != SS_OK) {
        printf("error %d %s\n", rc, ss_strerror(rc));
        return 3;
    }
    cap = t.max_outputs;
    if (cap > MAX_OUT) {
        fprintf(stderr, "seamrun: %s: max_outputs %lu exceeds the harness's %u\n", argv[0],
                (unsigned long)cap, MAX_OUT);
        return 2;
    }
    data = read_file(argv[1], stream_buf, sizeof stream_buf, &size);
    if (data == NULL)
        return 2;

    ss_reset(&st, 0);
    track = track_area(&t, 1);
    if (chunk == 0 || chunk >= size) {
        scan_piece(&t, &st, track, &ctx, data, size, cap, 1);
    } else {
        /* Each piece is copied to the end of chunk_buf, so that a read past
         * the piece is caught under AddressSanitizer. */
        for (k = 0; k < size; k += chunk) {
            size_t len = size - k < chunk ? size - k : chunk;
            uint8_t *piece = chunk_buf + sizeof chunk_buf - len;
            memcpy(piece, data + k, len);
            scan_piece(&t, &st, track, &ctx, piece, len, cap, 1);
        }
    }
    printf("end %llu\n", (unsigned long long)st.offset);
    return 0;
}

int main(int argc, char **argv)
{
    int rc;
    if (argc >= 2 && strcmp(argv[1], "--crc") == 0)
        rc = argc == 3 ? run_crc(argv[2]) : usage();
    else if (argc >= 2 && strcmp(argv[1], "--check") == 0)
        rc = argc >= 3 ? run_check(argc - 2, argv + 2) : usage();
    else
        rc = run_scan(argc - 1, argv + 1);
    if (fflush(stdout) != 0 || ferror(stdout)) {
        fprintf(stderr, "seamrun: cannot write the output\n");
        return 2;
    }
    return rc;
}
