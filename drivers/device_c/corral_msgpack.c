/* msgpack subset writer and reader; see corral_msgpack.h. Assumes IEEE 754 doubles. */
#include "corral_msgpack.h"

#include <string.h>

void corral_mp_writer_init(corral_mp_writer *w, uint8_t *buf, size_t cap)
{
    w->buf = buf;
    w->cap = cap;
    w->len = 0;
    w->err = 0;
}

static void put(corral_mp_writer *w, const uint8_t *b, size_t n)
{
    if (w->err || w->cap - w->len < n) {
        w->err = 1;
        return;
    }
    memcpy(w->buf + w->len, b, n);
    w->len += n;
}

static void put_be(corral_mp_writer *w, uint8_t tag, uint64_t v, int nbytes)
{
    uint8_t b[9];
    int i;
    b[0] = tag;
    for (i = 0; i < nbytes; i++) {
        b[1 + i] = (uint8_t)(v >> (8 * (nbytes - 1 - i)));
    }
    put(w, b, (size_t)nbytes + 1u);
}

void corral_mp_write_array(corral_mp_writer *w, uint32_t n)
{
    if (n <= 15u) {
        uint8_t b = (uint8_t)(0x90u | n);
        put(w, &b, 1);
    } else if (n <= 0xFFFFu) {
        put_be(w, 0xDC, n, 2);
    } else {
        put_be(w, 0xDD, n, 4);
    }
}

void corral_mp_write_uint(corral_mp_writer *w, uint32_t v)
{
    if (v <= 0x7Fu) {
        uint8_t b = (uint8_t)v;
        put(w, &b, 1);
    } else if (v <= 0xFFu) {
        put_be(w, 0xCC, v, 1);
    } else if (v <= 0xFFFFu) {
        put_be(w, 0xCD, v, 2);
    } else {
        put_be(w, 0xCE, v, 4);
    }
}

void corral_mp_write_double(corral_mp_writer *w, double v)
{
    uint64_t bits;
    memcpy(&bits, &v, sizeof bits);
    put_be(w, 0xCB, bits, 8);
}

void corral_mp_write_str(corral_mp_writer *w, const char *s)
{
    size_t n = strlen(s);
    if (n <= 31u) {
        uint8_t b = (uint8_t)(0xA0u | n);
        put(w, &b, 1);
    } else if (n <= 0xFFu) {
        put_be(w, 0xD9, n, 1);
    } else if (n <= 0xFFFFu) {
        put_be(w, 0xDA, n, 2);
    } else {
        w->err = 1;
        return;
    }
    put(w, (const uint8_t *)s, n);
}

void corral_mp_reader_init(corral_mp_reader *r, const uint8_t *p, size_t len)
{
    r->p = p;
    r->len = len;
    r->pos = 0;
    r->err = 0;
}

static int avail(corral_mp_reader *r, size_t n)
{
    if (r->err || r->len - r->pos < n) {
        r->err = 1;
        return 0;
    }
    return 1;
}

static uint64_t get_be(corral_mp_reader *r, int nbytes)
{
    uint64_t v = 0;
    int i;
    if (!avail(r, (size_t)nbytes)) {
        return 0;
    }
    for (i = 0; i < nbytes; i++) {
        v = (v << 8) | r->p[r->pos++];
    }
    return v;
}

static uint8_t get_tag(corral_mp_reader *r)
{
    if (!avail(r, 1)) {
        return 0xC1; /* never used by msgpack */
    }
    return r->p[r->pos++];
}

uint32_t corral_mp_read_array(corral_mp_reader *r)
{
    uint8_t t = get_tag(r);
    if ((t & 0xF0u) == 0x90u) {
        return t & 0x0Fu;
    }
    if (t == 0xDC) {
        return (uint32_t)get_be(r, 2);
    }
    if (t == 0xDD) {
        return (uint32_t)get_be(r, 4);
    }
    r->err = 1;
    return 0;
}

int64_t corral_mp_read_int(corral_mp_reader *r, int *is_int)
{
    uint8_t t;
    uint64_t u;
    *is_int = 1;
    if (!avail(r, 1)) {
        *is_int = 0;
        return 0;
    }
    t = r->p[r->pos];
    if (t <= 0x7Fu) {
        r->pos++;
        return t;
    }
    if (t >= 0xE0u) {
        r->pos++;
        return (int64_t)t - 256;
    }
    switch (t) {
    case 0xCC: r->pos++; return (int64_t)get_be(r, 1);
    case 0xCD: r->pos++; return (int64_t)get_be(r, 2);
    case 0xCE: r->pos++; return (int64_t)get_be(r, 4);
    case 0xCF:
        r->pos++;
        u = get_be(r, 8);
        if (u > (uint64_t)INT64_MAX) {
            r->err = 1;
            return 0;
        }
        return (int64_t)u;
    case 0xD0: r->pos++; return (int64_t)(int8_t)(uint8_t)get_be(r, 1);
    case 0xD1: r->pos++; return (int64_t)(int16_t)(uint16_t)get_be(r, 2);
    case 0xD2: r->pos++; return (int64_t)(int32_t)(uint32_t)get_be(r, 4);
    case 0xD3: r->pos++; return (int64_t)get_be(r, 8);
    default:
        *is_int = 0;
        return 0;
    }
}

double corral_mp_read_number(corral_mp_reader *r)
{
    int is_int;
    int64_t i = corral_mp_read_int(r, &is_int);
    uint8_t t;
    if (is_int) {
        return (double)i;
    }
    t = get_tag(r);
    if (t == 0xCB) {
        uint64_t bits = get_be(r, 8);
        double d;
        memcpy(&d, &bits, sizeof d);
        return d;
    }
    if (t == 0xCA) {
        uint32_t bits = (uint32_t)get_be(r, 4);
        float f;
        memcpy(&f, &bits, sizeof f);
        return (double)f;
    }
    r->err = 1;
    return 0.0;
}

static size_t str_len(corral_mp_reader *r, uint8_t t, int *ok)
{
    *ok = 1;
    if ((t & 0xE0u) == 0xA0u) {
        return t & 0x1Fu;
    }
    if (t == 0xD9) {
        return (size_t)get_be(r, 1);
    }
    if (t == 0xDA) {
        return (size_t)get_be(r, 2);
    }
    if (t == 0xDB) {
        return (size_t)get_be(r, 4);
    }
    *ok = 0;
    return 0;
}

void corral_mp_read_str(corral_mp_reader *r, char *dst, size_t cap)
{
    int ok;
    size_t n = str_len(r, get_tag(r), &ok);
    if (!ok || n + 1u > cap || !avail(r, n)) {
        r->err = 1;
        if (cap) {
            dst[0] = '\0';
        }
        return;
    }
    memcpy(dst, r->p + r->pos, n);
    dst[n] = '\0';
    r->pos += n;
}

static void skip_n(corral_mp_reader *r, size_t n)
{
    if (avail(r, n)) {
        r->pos += n;
    }
}

static void skip_depth(corral_mp_reader *r, int depth)
{
    uint8_t t;
    uint64_t n = 0, i;
    int ok;
    if (depth > 8) {
        r->err = 1;
        return;
    }
    t = get_tag(r);
    if (r->err) {
        return;
    }
    if (t <= 0x7Fu || t >= 0xE0u || t == 0xC0 || t == 0xC2 || t == 0xC3) {
        return;
    }
    if ((t & 0xF0u) == 0x90u || t == 0xDC || t == 0xDD) {
        n = (t & 0xF0u) == 0x90u ? (t & 0x0Fu) : get_be(r, t == 0xDC ? 2 : 4);
        for (i = 0; i < n && !r->err; i++) {
            skip_depth(r, depth + 1);
        }
        return;
    }
    if ((t & 0xF0u) == 0x80u || t == 0xDE || t == 0xDF) {
        n = (t & 0xF0u) == 0x80u ? (t & 0x0Fu) : get_be(r, t == 0xDE ? 2 : 4);
        for (i = 0; i < 2u * n && !r->err; i++) {
            skip_depth(r, depth + 1);
        }
        return;
    }
    n = str_len(r, t, &ok);
    if (ok) {
        skip_n(r, (size_t)n);
        return;
    }
    switch (t) {
    case 0xC4: skip_n(r, (size_t)get_be(r, 1)); return;
    case 0xC5: skip_n(r, (size_t)get_be(r, 2)); return;
    case 0xC6: skip_n(r, (size_t)get_be(r, 4)); return;
    case 0xC7: n = get_be(r, 1); skip_n(r, (size_t)n + 1u); return;
    case 0xC8: n = get_be(r, 2); skip_n(r, (size_t)n + 1u); return;
    case 0xC9: n = get_be(r, 4); skip_n(r, (size_t)n + 1u); return;
    case 0xCA: skip_n(r, 4); return;
    case 0xCB: skip_n(r, 8); return;
    case 0xCC: case 0xD0: skip_n(r, 1); return;
    case 0xCD: case 0xD1: skip_n(r, 2); return;
    case 0xCE: case 0xD2: skip_n(r, 4); return;
    case 0xCF: case 0xD3: skip_n(r, 8); return;
    case 0xD4: skip_n(r, 2); return;
    case 0xD5: skip_n(r, 3); return;
    case 0xD6: skip_n(r, 5); return;
    case 0xD7: skip_n(r, 9); return;
    case 0xD8: skip_n(r, 17); return;
    default: r->err = 1; return;
    }
}

void corral_mp_skip(corral_mp_reader *r)
{
    skip_depth(r, 0);
}
