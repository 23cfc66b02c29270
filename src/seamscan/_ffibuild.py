"""cffi build script (out-of-line API mode): compiles csrc/ into seamscan._seamcore.

The host extension also holds ``csrc/host/``: the replay's host-only record
framing and fast decode (``front.c``) and its fast lane for in-order
packets of known flows (``lane.c``); neither is part of the device runtime.

Run by the package build (``pip install .`` / ``pip install -e .``) through
``cffi_modules``; the C sources are the same files a device compiles.
"""

import platform
from pathlib import Path

from cffi import FFI

ROOT = Path(__file__).resolve().parents[2]
CSRC = ROOT / "csrc"

CDEF = """
typedef struct {
    const uint8_t *image; const uint8_t *classes; const uint8_t *trans;
    const uint8_t *out_index; const uint8_t *out_list; const uint8_t *sigs; const uint8_t *ports;
    const uint8_t *words; const uint8_t *root; const uint8_t *fail_rank; const uint8_t *fail_list;
    const uint8_t *extra_rank; const uint8_t *extra_index; const uint8_t *extra_list;
    const uint8_t *own_rank; const uint8_t *extra_filter;
    uint32_t size, layout, states, first_match, nsigs, nclasses, stride, trans_width,
             out_width, max_outputs, max_len, nports, filter_log2;
    const uint8_t *parts; uint32_t nparts, track_bytes;
} ss_table;
typedef struct { uint32_t state; uint32_t unit; uint64_t offset; } ss_state;
typedef struct { uint8_t side; uint8_t transport; uint16_t server_port; uint32_t flags; } ss_ctx;
typedef struct { uint32_t item; uint32_t sig; uint64_t start; uint64_t end; } ss_match;
typedef struct {
    uint32_t slot; uint32_t flags; ss_ctx ctx; uint32_t len; uint32_t done;
    uint64_t data_off; uint64_t reset_offset;
} ss_item;
int ss_load(ss_table *t, const void *image, size_t size);
const char *ss_strerror(int code);
uint32_t ss_crc32(const void *data, size_t len);
void ss_reset(ss_state *st, uint64_t offset);
void ss_new_datagram(ss_state *st);
size_t ss_scan(const ss_table *t, ss_state *st, const ss_ctx *ctx, const uint8_t *data,
               size_t len, ss_match *out, size_t cap, size_t *nout);
size_t ss_scan_batch(const ss_table *t, ss_state *states, ss_item *items, size_t n,
                     const uint8_t *data, ss_match *out, size_t cap, size_t *nout);
uint32_t ss_track_bytes(const ss_table *t);
void ss_track_reset(const ss_table *t, void *track);
size_t ss_scan_parts(const ss_table *t, ss_state *st, void *track, const ss_ctx *ctx,
                     const uint8_t *data, size_t len, ss_match *out, size_t cap, size_t *nout);
size_t ss_scan_batch_parts(const ss_table *t, ss_state *states, void *track, ss_item *items,
                           size_t n, const uint8_t *data, ss_match *out, size_t cap,
                           size_t *nout);
size_t sf_pcap_records(const uint8_t *buf, size_t len, size_t pos, int big, uint32_t units,
                       uint32_t limit, int ethernet, uint8_t *out, size_t cap, size_t *end_pos,
                       size_t *fast);
typedef struct sf_lane sf_lane;
typedef struct {
    uint64_t next, sink_next, packets, bytes;
    uint32_t expect, tail_len;
    uint8_t proto, side_code, transport, pad;
    uint16_t port, pad2;
    uint32_t cflags;
} sf_side_state;
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
#define SF_REC_SIZE ...
#define SF_KEY_SIZE ...
#define SF_META_SIZE ...
#define SF_TOUCH_SIZE ...
#define SF_RUN_MAX ...
#define SF_RUN_STOP ...
#define SF_RUN_FULL ...
#define SF_RUN_CHUNK ...
sf_lane *sf_lane_new(uint32_t max_flows, uint32_t keep);
void sf_lane_free(sf_lane *lane);
int sf_lane_lend(sf_lane *lane, uint32_t sid, const uint8_t *key, const sf_side_state *st,
                 const uint8_t *tail);
void sf_lane_reclaim(sf_lane *lane, uint32_t sid, sf_side_state *st, uint8_t *tail);
int sf_lane_run(sf_lane *lane, sf_run *run);
size_t sf_lane_touched(sf_lane *lane, uint8_t *out);
int sf_lane_untouch(sf_lane *lane, uint32_t fs, uint64_t *frame, double *ts, int64_t *ns);
"""

def _host_flags() -> list[str]:
    """Flags for the machine that builds (and runs) the host extension: on x86
    with the POPCNT instruction the compact layout's rank sets use it.  The
    C code stays portable: without the flag it counts bits by arithmetic."""
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as f:
            flags = f.read(1 << 16)
    except OSError:
        return []
    machine = platform.machine().lower()
    return ["-mpopcnt"] if machine in ("x86_64", "amd64") and " popcnt" in flags else []


ffibuilder = FFI()
ffibuilder.cdef(CDEF)
ffibuilder.set_source(
    "seamscan._seamcore",
    '#include "seam.h"\n#include "host/front.h"',
    # the device runtime, then the host-only replay front end (csrc/host/)
    sources=[str(p.relative_to(ROOT)) for p in sorted(CSRC.glob("seam_*.c"))]
    + [str((CSRC / "host" / name).relative_to(ROOT)) for name in ("front.c", "lane.c")],
    include_dirs=[str(CSRC.relative_to(ROOT))],
    extra_compile_args=["-O3", "-std=c99", *_host_flags()],
)

if __name__ == "__main__":
    ffibuilder.compile(verbose=True)
