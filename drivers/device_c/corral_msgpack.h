/* The msgpack subset the corral wire protocol uses, for C99 without allocation.
 *
 * Writer: unsigned ints (smallest encoding, as msgpack-python packs them),
 * float64, str (fixstr/str8/str16), array headers (fixarray/array16).
 * Reader: accepts every integer and float encoding as a number, str of any
 * width, array headers, and can skip any msgpack value (to ignore trailing
 * fields added by newer protocol versions). Errors are sticky in `err`. */
#ifndef CORRAL_MSGPACK_H
#define CORRAL_MSGPACK_H

#include <stddef.h>
#include <stdint.h>

typedef struct {
    uint8_t *buf;
    size_t cap;
    size_t len;
    int err;
} corral_mp_writer;

void corral_mp_writer_init(corral_mp_writer *w, uint8_t *buf, size_t cap);
void corral_mp_write_array(corral_mp_writer *w, uint32_t n);
void corral_mp_write_uint(corral_mp_writer *w, uint32_t v);
void corral_mp_write_double(corral_mp_writer *w, double v);
void corral_mp_write_str(corral_mp_writer *w, const char *s);

typedef struct {
    const uint8_t *p;
    size_t len;
    size_t pos;
    int err;
} corral_mp_reader;

void corral_mp_reader_init(corral_mp_reader *r, const uint8_t *p, size_t len);
/* Array header; returns the element count. */
uint32_t corral_mp_read_array(corral_mp_reader *r);
/* Any integer as int64 (uint64 above INT64_MAX is an error). *is_int=0 if not an integer
 * (nothing is consumed then). */
int64_t corral_mp_read_int(corral_mp_reader *r, int *is_int);
/* Any integer or float as a double. */
double corral_mp_read_number(corral_mp_reader *r);
/* A string copied NUL-terminated into dst (cap includes the NUL; longer is an error). */
void corral_mp_read_str(corral_mp_reader *r, char *dst, size_t cap);
/* Skip one value of any type (nesting limited to 8 levels). */
void corral_mp_skip(corral_mp_reader *r);

#endif
