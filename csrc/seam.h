/*
 * seam.h - the seamscan runtime: load a table image, scan bytes.
 *
 * One portable C99 runtime, used by the host through cffi and compiled
 * as-is into device firmware.  No allocation, nothing from libc beyond
 * <stdint.h>, <stddef.h> and <string.h>.  The image format is specified in
 * FORMAT.md beside this file.
 *
 * Use:
 *     ss_table t;  ss_state st;  ss_ctx ctx = {0};  ss_match out[64];  size_t n;
 *     if (ss_load(&t, image, image_size) != SS_OK) ...refuse the image...
 *     ss_reset(&st, 0);
 *     for each payload of one flow side, in stream order:
 *         size_t done = 0;
 *         while (done < len) {
 *             done += ss_scan(&t, &st, &ctx, data + done, len - done, out, 64, &n);
 *             ...report out[0..n-1]...
 *         }
 *
 * The caller owns every struct: the image stays where it is (flash is fine),
 * the per-flow-side state is 16 bytes, plus ss_track_bytes(t) bytes of part
 * tracker memory for a table with multi-part signatures (ss_scan_parts).
 */
#ifndef SEAM_H
#define SEAM_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define SS_FORMAT_VERSION 2u /* reads versions 1 and 2 (SS_NO_PARTS: version 1 only) */
#define SS_LAYOUT_DENSE 1u
#define SS_LAYOUT_COMPACT 2u

/* Error codes returned by ss_load (0 is success). */
#define SS_OK 0
#define SS_ERR_SHORT -1     /* image shorter than its header or its stated size */
#define SS_ERR_MAGIC -2     /* not a table image */
#define SS_ERR_VERSION -3   /* format version not supported by this runtime */
#define SS_ERR_LAYOUT -4    /* layout id not supported by this runtime */
#define SS_ERR_CRC -5       /* CRC-32 mismatch: the image is damaged */
#define SS_ERR_SECTION -6   /* a section is missing, lies outside the image, or has the wrong size */
#define SS_ERR_HEADER -7    /* a header field is out of range */
#define SS_ERR_CLASSES -8   /* a byte class >= the class count */
#define SS_ERR_TRANS -9     /* a transition names a state that does not exist */
#define SS_ERR_OUTPUTS -10  /* output index or list out of range */
#define SS_ERR_SIGS -11     /* a signature record is out of range */
#define SS_ERR_PARTS -12    /* a part record is out of range or inconsistent */

/* Signature record fields. */
#define SS_SIDE_EITHER 0u
#define SS_SIDE_CLIENT 1u
#define SS_SIDE_SERVER 2u
#define SS_TRANSPORT_ANY 0u
#define SS_TRANSPORT_TCP 1u
#define SS_TRANSPORT_UDP 2u
#define SS_SIG_HAS_WINDOW 0x01u
#define SS_SIG_DATAGRAM 0x02u

/* A loaded table: pointers into the caller's image plus decoded header
 * fields.  Filled by ss_load; read-only afterwards. */
typedef struct {
    const uint8_t *image;
    const uint8_t *classes;   /* 256 bytes */
    const uint8_t *trans;     /* layout-specific transition section */
    const uint8_t *out_index; /* u32 x (states - first_match + 1) */
    const uint8_t *out_list;  /* out_width bytes per entry */
    const uint8_t *sigs;      /* 20-byte signature records */
    const uint8_t *ports;     /* u16 per entry */
    const uint8_t *words;     /* compact: u16 per state */
    const uint8_t *root;      /* compact: the start state's full row */
    const uint8_t *fail_rank, *fail_list;
    const uint8_t *extra_rank, *extra_index, *extra_list;
    const uint8_t *own_rank, *extra_filter;
    uint32_t size;
    uint32_t layout;
    uint32_t states;
    uint32_t first_match;
    uint32_t nsigs;
    uint32_t nclasses;
    uint32_t stride;
    uint32_t trans_width;
    uint32_t out_width;
    uint32_t max_outputs; /* most outputs of any one state, <= nsigs: no byte yields more */
    uint32_t max_len;
    uint32_t nports;
    uint32_t filter_log2; /* compact: bits in the transition filter, log2 */
    const uint8_t *parts; /* version 2: 24-byte part records, NULL when none */
    uint32_t nparts;      /* part records: the automaton's outputs are part ids; 0: signature ids */
    uint32_t track_bytes; /* part tracker bytes per flow side (0 without parts) */
} ss_table;

/* The state of one flow side: what a device keeps per flow side.
 * 16 bytes, held by a static assert in seam.c. */
typedef struct {
    uint32_t state;  /* automaton state */
    uint32_t unit;   /* bytes of the current UDP datagram already scanned */
    uint64_t offset; /* stream offset of the next byte */
} ss_state;

/* What the scanner knows about the bytes it is given.  Unknown fields are
 * zero, and a zero field filters nothing. */
#define SS_CTX_HAS_PORT 0x01u /* server_port is known */
#define SS_CTX_DATAGRAM 0x02u /* the bytes are (the rest of) one UDP datagram */
typedef struct {
    uint8_t side;         /* SS_SIDE_CLIENT / SS_SIDE_SERVER: who sent the bytes; 0 unknown */
    uint8_t transport;    /* SS_TRANSPORT_TCP / _UDP; 0 unknown */
    uint16_t server_port; /* valid with SS_CTX_HAS_PORT */
    uint32_t flags;
} ss_ctx;

/* One match: signature index, stream offsets [start, end). */
typedef struct {
    uint32_t item; /* batch item index (0 for ss_scan) */
    uint32_t sig;
    uint64_t start;
    uint64_t end;
} ss_match;

/* Validate an image and fill *t.  Every index the scanner will follow is
 * checked here, so scanning a loaded table never reads outside the image and
 * always ends (FORMAT.md, "Loading": the rules every runtime enforces; the
 * host tool also refuses images that are not well-formed).  On failure
 * t->states is 0, and scanning with t does nothing. */
int ss_load(ss_table *t, const void *image, size_t size);
const char *ss_strerror(int code);
uint32_t ss_crc32(const void *data, size_t len);

/* Put a flow side at the start state, at stream offset `offset`. */
void ss_reset(ss_state *st, uint64_t offset);

/* Before the first ss_scan of each UDP datagram (SS_CTX_DATAGRAM): the
 * datagram begins at st->offset.  Calls that continue it (after out[] was
 * full) leave st->unit alone. */
void ss_new_datagram(ss_state *st);

/* Scan `len` bytes that follow st->offset in the stream.  Writes at most
 * `cap` matches to out[] (cap must be >= t->max_outputs, or no byte that
 * completes a match can be consumed), sets *nout, and
 * returns the number of bytes consumed: less than `len` only when out[] is
 * full, in which case call again with the rest.  Matches come in the order
 * of their end offset, then signature index. */
size_t ss_scan(const ss_table *t, ss_state *st, const ss_ctx *ctx, const uint8_t *data,
               size_t len, ss_match *out, size_t cap, size_t *nout);

/* ---- The part tracker (multi-part signatures, FORMAT.md "The part tracker") ----
 * A table with multi-part signatures needs, per flow side, ss_track_bytes(t)
 * bytes of caller memory beside the ss_state (8-byte aligned; a multiple of
 * 8, and 0 for a table without parts).  ss_track_reset clears it (track must
 * point to that memory): call it with every ss_reset.
 * ss_scan is ss_scan_parts with no tracker memory: multi-part signatures are
 * then never reported (single-part ones are).  Built with SS_NO_PARTS, the
 * runtime has no tracker and ss_load refuses images with parts (version 2). */
#ifndef SS_NO_PARTS
uint32_t ss_track_bytes(const ss_table *t);
void ss_track_reset(const ss_table *t, void *track);
size_t ss_scan_parts(const ss_table *t, ss_state *st, void *track, const ss_ctx *ctx,
                     const uint8_t *data, size_t len, ss_match *out, size_t cap, size_t *nout);
#endif

/* ---- Host batch entry point: many (flow side, payload) pairs per call. ---- */

#define SS_ITEM_RESET 0x01u /* before scanning: ss_reset(states[slot], reset_offset) */
#define SS_ITEM_DONE 0x80u  /* set by ss_scan_batch when the item is completely scanned */
typedef struct {
    uint32_t slot;         /* index into the caller's ss_state array */
    uint32_t flags;        /* SS_ITEM_RESET */
    ss_ctx ctx;
    uint32_t len;          /* payload bytes at data + data_off */
    uint32_t done;         /* bytes already scanned: 0 at first, kept by ss_scan_batch */
    uint64_t data_off;
    uint64_t reset_offset;
} ss_item;

/* Scan items (items of one slot in their order; items of distinct slots
 * interleaved for speed).  Returns the number of leading items completely
 * scanned; if that is less than n, out[] filled up: take the matches and call
 * again with items + returned count (progress is kept in the items: .done,
 * and SS_ITEM_DONE in .flags).  Matches carry their item index (relative to
 * the `items` pointer passed) and come in each item's own order; items'
 * matches may interleave.  cap must be >= t->max_outputs (with less, no
 * byte that completes a match can be scanned: it returns having made no
 * progress); cap >= 8 * t->max_outputs lets the lanes interleave. */
size_t ss_scan_batch(const ss_table *t, ss_state *states, ss_item *items, size_t n,
                     const uint8_t *data, ss_match *out, size_t cap, size_t *nout);
#ifndef SS_NO_PARTS
/* The same with the part tracker: slot k's memory is track + k * ss_track_bytes(t);
 * an item's SS_ITEM_RESET clears it too. */
size_t ss_scan_batch_parts(const ss_table *t, ss_state *states, void *track, ss_item *items,
                           size_t n, const uint8_t *data, ss_match *out, size_t cap,
                           size_t *nout);
#endif

#ifdef __cplusplus
}
#endif
#endif /* SEAM_H */
