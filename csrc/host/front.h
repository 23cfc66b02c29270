/* Host-only replay front end: classic pcap framing and fast decode
 * (front.c), and the fast lane for in-order packets of known flows
 * (lane.c).  See src/seamscan/fastpath.py for the contracts. */
#ifndef SEAM_HOST_FRONT_H
#define SEAM_HOST_FRONT_H
#include <stddef.h>
#include <stdint.h>

/* Size in bytes of one record written by sf_pcap_records. */
#define SF_REC_SIZE 48u

/* Frame the complete classic pcap records of buf[pos:len] (at most cap),
 * writing one SF_REC_SIZE record each to out; stop before a record whose
 * length exceeds limit or whose bytes are not all in the buffer.  big: the
 * file is big-endian; units: timestamp fraction units per second; ethernet:
 * the file's link type is Ethernet (1), so the fast decode is tried.
 * Returns the records written; *end_pos is where the next record starts and
 * *fast how many records were decoded here.  Offsets in the records are
 * 32-bit: the buffer must be shorter than 4 GiB (the reader's chunks are). */
size_t sf_pcap_records(const uint8_t *buf, size_t len, size_t pos, int big, uint32_t units,
                       uint32_t limit, int ethernet, uint8_t *out, size_t cap, size_t *end_pos,
                       size_t *fast);

/* A frame the decoder's fast path takes; offsets relative to the frame. */
typedef struct {
    uint8_t proto, flags, alen;
    uint16_t sport, dport;
    uint32_t seq, ack;
    uint32_t so, ps, pe; /* source address (destination follows), payload start, end */
} sf_pkt;

int sf__decode(const uint8_t *f, size_t n, sf_pkt *k);
uint32_t sf__rd32(const uint8_t *p, int big);

/* ---- the fast lane (lane.c) ------------------------------------------ */

#define SF_KEY_SIZE 40u   /* proto, address length, sport, dport (big-endian), 0, 0, src, dst */
/* ts_ns: the capture time in integer nanoseconds, exact where ts is rounded */
#define SF_META_SIZE 32u  /* per batch item: u64 frame, f64 ts, u32 slot, u32 0, i64 ts_ns */
#define SF_TOUCH_SIZE 32u /* per touched flow: u32 flow slot, u32 0, u64 frame, f64 ts, i64 ts_ns */
#define SF_RUN_MAX 4096u  /* records handled per sf_lane_run call, at most */

#define SF_RUN_STOP 0  /* the record at pos is not the lane's: Python takes it */
#define SF_RUN_FULL 1  /* the batch (items or data) is full: flush, then call again */
#define SF_RUN_CHUNK 2 /* SF_RUN_MAX records handled: call again */

typedef struct sf_lane sf_lane;

/* What one side lent to the lane holds (in and out of sf_lane_lend /
 * sf_lane_reclaim).  sink_next: where the scanner's state of that slot
 * stands, UINT64_MAX when the next item must reset it. */
typedef struct {
    uint64_t next, sink_next, packets, bytes;
    uint32_t expect, tail_len;
    uint8_t proto, side_code, transport, pad;
    uint16_t port, pad2;
    uint32_t cflags;
} sf_side_state;

/* One call's inputs and outputs.  items/meta/data are the sink's batch
 * (ss_item records, SF_META_SIZE records, payload bytes); nitems, ndata and
 * frame are carried in and out.  When
 * the lane stops (SF_RUN_STOP) at a record wholly in the buffer, rec gets
 * that record as sf_pcap_records writes it (nrec = 1, rec_fast, rec_end:
 * where the next record starts); else nrec = 0.  retransmitted: payload
 * bytes of this call's segments that only repeated delivered bytes. */
typedef struct {
    /* carried in and out, every call: the first fields, for one pack */
    uint64_t pos, frame, nitems, ndata;
    double sweep_at;
    /* out */
    uint64_t fast, nrec, rec_fast, rec_end, retransmitted;
    /* set when they change */
    const uint8_t *buf;
    uint64_t len;
    uint8_t *items, *meta, *data, *rec;
    uint64_t item_cap, data_cap;
    int32_t big, ethernet;
    uint32_t units, limit;
} sf_run;

sf_lane *sf_lane_new(uint32_t max_flows, uint32_t keep);
void sf_lane_free(sf_lane *lane);
/* Lend side `sid` (= 2 * flow slot + side) under its sender's key, with its
 * state and the last tail_len delivered bytes; -1 if out of memory. */
int sf_lane_lend(sf_lane *lane, uint32_t sid, const uint8_t *key, const sf_side_state *st,
                 const uint8_t *tail);
/* Take side `sid` back: its state into *st, its tail into tail (at least
 * 2 * keep bytes); the key is forgotten. */
void sf_lane_reclaim(sf_lane *lane, uint32_t sid, sf_side_state *st, uint8_t *tail);
int sf_lane_run(sf_lane *lane, sf_run *run);
/* The flows the lane touched since the last call (each once, in no order):
 * SF_TOUCH_SIZE records to out (room for max_flows); returns how many. */
size_t sf_lane_touched(sf_lane *lane, uint8_t *out);
/* Forget flow slot fs's touch, if any: 1 and its last frame and time (seconds
 * and integer nanoseconds). */
int sf_lane_untouch(sf_lane *lane, uint32_t fs, uint64_t *frame, double *ts, int64_t *ns);
#endif
