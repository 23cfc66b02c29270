/* Host-only replay front end: classic pcap framing and fast decode
 * (see front.c and src/seamscan/fastpath.py for the record layout). */
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
#endif
