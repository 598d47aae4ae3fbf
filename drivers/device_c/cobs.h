/* COBS framing (Cheshire and Baker, 1999) for the corral wire protocol.
 * Portable C99, no allocation. The 0x00 frame delimiter is not part of the
 * encoding; the caller appends it. */
#ifndef CORRAL_COBS_H
#define CORRAL_COBS_H

#include <stddef.h>
#include <stdint.h>

/* Worst-case encoded size of n bytes (without the delimiter). */
#define CORRAL_COBS_MAX_ENCODED(n) ((n) + (n) / 254u + 1u)

/* Encode n bytes of src into dst (capacity cap). Returns 0 and sets *out_len,
 * or -1 if dst is too small. src and dst must not overlap. */
int corral_cobs_encode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap, size_t *out_len);

/* Decode n bytes (no delimiter) into dst. Returns 0 and sets *out_len, or -1
 * if the input is malformed (empty, contains a zero, a code runs past the
 * end) or dst is too small. */
int corral_cobs_decode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap, size_t *out_len);

#endif
