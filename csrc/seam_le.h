/*
 * seam_le.h - little-endian loads from a byte image, on any host.
 *
 * On a little-endian host with a GNU-compatible compiler a load is one
 * memcpy, which compilers turn into a single (unaligned-safe) move; on any
 * other host the bytes are assembled one by one.
 */
#ifndef SEAM_LE_H
#define SEAM_LE_H

#include <stdint.h>
#include <string.h>

#if defined(__BYTE_ORDER__) && defined(__ORDER_LITTLE_ENDIAN__) && \
    __BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__
static inline uint32_t ss_ld16(const uint8_t *p)
{
    uint16_t v;
    memcpy(&v, p, 2);
    return v;
}
static inline uint32_t ss_ld32(const uint8_t *p)
{
    uint32_t v;
    memcpy(&v, p, 4);
    return v;
}
#else
static inline uint32_t ss_ld16(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8);
}
static inline uint32_t ss_ld32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) |
           ((uint32_t)p[3] << 24);
}
#endif

#endif /* SEAM_LE_H */
