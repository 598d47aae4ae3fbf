/* corral wire protocol, device side; see corral_device.h. */
#include "corral_device.h"

#include <string.h>

#include "cobs.h"
#include "corral_msgpack.h"
#include "crc16.h"

/* ------------------------------------------------------------------ encoding */

static void write_head(corral_mp_writer *w, uint32_t n, uint32_t kind, uint32_t seq, double t)
{
    corral_mp_write_array(w, n);
    corral_mp_write_uint(w, kind);
    corral_mp_write_uint(w, seq);
    corral_mp_write_double(w, t);
}

static void write_doubles(corral_mp_writer *w, const double *v, uint8_t n)
{
    uint8_t i;
    corral_mp_write_array(w, n);
    for (i = 0; i < n; i++) {
        corral_mp_write_double(w, v[i]);
    }
}

static void write_names(corral_mp_writer *w, char names[][CORRAL_NAME_LEN], uint8_t n)
{
    uint8_t i;
    corral_mp_write_array(w, n);
    for (i = 0; i < n; i++) {
        corral_mp_write_str(w, names[i]);
    }
}

static void write_hello(corral_mp_writer *w, uint32_t seq, double t, const corral_hello *h)
{
    /* names arrays are not modified; the cast only drops const for the helper */
    corral_hello *hh = (corral_hello *)h;
    write_head(w, h->n_status_flags ? 14u : 13u, CORRAL_KIND_HELLO, seq, t);
    corral_mp_write_uint(w, h->protocol);
    corral_mp_write_str(w, h->rig_id);
    write_names(w, hh->channels, h->n_channels);
    write_names(w, hh->units, h->n_units);
    corral_mp_write_double(w, h->sample_rate_hz);
    write_names(w, hh->output_names, h->n_output_names);
    write_doubles(w, h->output_limits, h->n_output_limits);
    write_names(w, hh->output_units, h->n_output_units);
    corral_mp_write_double(w, h->command_timeout_s);
    corral_mp_write_uint(w, h->session);
    if (h->n_status_flags) {
        write_names(w, hh->status_flags, h->n_status_flags);
    }
}

int corral_msg_encode_body(const corral_msg *m, uint8_t *out, size_t cap, size_t *len)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, out, cap);
    switch (m->kind) {
    case CORRAL_KIND_HELLO:
        write_hello(&w, m->seq, m->t, &m->hello);
        break;
    case CORRAL_KIND_SAMPLE:
    case CORRAL_KIND_COMMAND:
        write_head(&w, m->kind == CORRAL_KIND_SAMPLE ? 5 : 6, m->kind, m->seq, m->t);
        corral_mp_write_uint(&w, m->kind == CORRAL_KIND_SAMPLE ? m->status : m->flags);
        write_doubles(&w, m->values, m->n_values);
        if (m->kind == CORRAL_KIND_COMMAND) {
            corral_mp_write_uint(&w, m->session);
        }
        break;
    case CORRAL_KIND_HEARTBEAT:
        write_head(&w, 4, m->kind, m->seq, m->t);
        corral_mp_write_uint(&w, m->status);
        break;
    case CORRAL_KIND_FAULT:
        write_head(&w, 5, m->kind, m->seq, m->t);
        corral_mp_write_uint(&w, m->code);
        corral_mp_write_str(&w, m->text);
        break;
    case CORRAL_KIND_STOP:
        write_head(&w, 4, m->kind, m->seq, m->t);
        corral_mp_write_uint(&w, m->code);
        break;
    default:
        return CORRAL_ERR_UNKNOWN_KIND;
    }
    if (w.err) {
        return CORRAL_ERR_SPACE;
    }
    *len = w.len;
    return CORRAL_OK;
}

int corral_frame(const uint8_t *body, size_t n, uint8_t *out, size_t cap, size_t *len)
{
    /* body and CRC are COBS-encoded as one block sequence, so they are
     * joined in a stack buffer first (CORRAL_MAX_FRAME + 2 bytes). */
    uint8_t tmp[CORRAL_MAX_FRAME + 2];
    uint16_t crc;
    size_t enc_len;
    if (n + 2u > sizeof tmp) {
        return CORRAL_ERR_SPACE;
    }
    memcpy(tmp, body, n);
    crc = corral_crc16(body, n);
    tmp[n] = (uint8_t)(crc >> 8);
    tmp[n + 1u] = (uint8_t)(crc & 0xFFu);
    if (cap < 1 || corral_cobs_encode(tmp, n + 2u, out, cap - 1u, &enc_len) != 0) {
        return CORRAL_ERR_SPACE;
    }
    out[enc_len] = 0;
    *len = enc_len + 1u;
    return CORRAL_OK;
}

int corral_msg_encode_frame(const corral_msg *m, uint8_t *out, size_t cap, size_t *len)
{
    uint8_t body[CORRAL_MAX_FRAME];
    size_t n;
    int rc = corral_msg_encode_body(m, body, sizeof body, &n);
    if (rc != CORRAL_OK) {
        return rc;
    }
    return corral_frame(body, n, out, cap, len);
}

/* ------------------------------------------------------------------ decoding */

static uint32_t read_u32(corral_mp_reader *r)
{
    int is_int;
    int64_t v = corral_mp_read_int(r, &is_int);
    if (!is_int || v < 0 || v > 0xFFFFFFFFLL) {
        r->err = 1;
        return 0;
    }
    return (uint32_t)v;
}

static uint8_t read_doubles(corral_mp_reader *r, double *dst, uint32_t cap)
{
    uint32_t n = corral_mp_read_array(r), i;
    if (n > cap) {
        r->err = 1;
        return 0;
    }
    for (i = 0; i < n && !r->err; i++) {
        dst[i] = corral_mp_read_number(r);
    }
    return (uint8_t)n;
}

static uint8_t read_names(corral_mp_reader *r, char dst[][CORRAL_NAME_LEN], uint32_t cap)
{
    uint32_t n = corral_mp_read_array(r), i;
    if (n > cap) {
        r->err = 1;
        return 0;
    }
    for (i = 0; i < n && !r->err; i++) {
        corral_mp_read_str(r, dst[i], CORRAL_NAME_LEN);
    }
    return (uint8_t)n;
}

int corral_msg_decode_body(const uint8_t *body, size_t n, corral_msg *m)
{
    corral_mp_reader r;
    uint32_t count, need, i;
    int64_t kind;
    int is_int;

    /* the whole body must be one well-formed msgpack value, whatever its kind */
    corral_mp_reader_init(&r, body, n);
    corral_mp_skip(&r);
    if (r.err || r.pos != n) {
        return CORRAL_ERR_DECODE;
    }
    corral_mp_reader_init(&r, body, n);
    count = corral_mp_read_array(&r);
    if (r.err || count < 3u) {
        return CORRAL_ERR_DECODE;
    }
    kind = corral_mp_read_int(&r, &is_int);
    if (!is_int || r.err) {
        return CORRAL_ERR_DECODE;
    }
    switch (kind) {
    case CORRAL_KIND_HELLO: need = 12; break;
    case CORRAL_KIND_SAMPLE:
    case CORRAL_KIND_COMMAND:
    case CORRAL_KIND_FAULT: need = 5; break;
    case CORRAL_KIND_HEARTBEAT:
    case CORRAL_KIND_STOP: need = 4; break;
    default: return CORRAL_ERR_UNKNOWN_KIND;
    }
    if (count < need) {
        return CORRAL_ERR_DECODE;
    }
    m->kind = (uint32_t)kind;
    m->session = 0;
    m->seq = read_u32(&r);
    m->t = corral_mp_read_number(&r);
    switch (m->kind) {
    case CORRAL_KIND_SAMPLE:
        m->status = read_u32(&r);
        m->n_values = read_doubles(&r, m->values, CORRAL_MAX_CHANNELS);
        break;
    case CORRAL_KIND_COMMAND:
        m->flags = read_u32(&r);
        m->n_values = read_doubles(&r, m->values, CORRAL_MAX_CHANNELS);
        if (count > need) { /* v2: the session token */
            m->session = read_u32(&r);
            need++;
        }
        break;
    case CORRAL_KIND_HEARTBEAT:
        m->status = read_u32(&r);
        break;
    case CORRAL_KIND_FAULT:
        m->code = read_u32(&r);
        corral_mp_read_str(&r, m->text, sizeof m->text);
        break;
    case CORRAL_KIND_STOP:
        m->code = read_u32(&r);
        break;
    default: {
        corral_hello *h = &m->hello;
        h->protocol = read_u32(&r);
        corral_mp_read_str(&r, h->rig_id, sizeof h->rig_id);
        h->n_channels = read_names(&r, h->channels, CORRAL_MAX_CHANNELS);
        h->n_units = read_names(&r, h->units, CORRAL_MAX_CHANNELS);
        h->sample_rate_hz = corral_mp_read_number(&r);
        h->n_output_names = read_names(&r, h->output_names, CORRAL_MAX_OUTPUTS);
        h->n_output_limits = read_doubles(&r, h->output_limits, CORRAL_MAX_OUTPUTS);
        h->n_output_units = read_names(&r, h->output_units, CORRAL_MAX_OUTPUTS);
        h->command_timeout_s = corral_mp_read_number(&r);
        h->session = 0;
        if (count > need) { /* v2: the session token */
            h->session = read_u32(&r);
            need++;
        }
        h->n_status_flags = 0;
        if (count > need) { /* the device's declared status flags */
            h->n_status_flags = read_names(&r, h->status_flags, CORRAL_MAX_STATUS_FLAGS);
            need++;
        }
        break;
    }
    }
    /* newer senders may append fields: skip them, then nothing may follow */
    for (i = need; i < count && !r.err; i++) {
        corral_mp_skip(&r);
    }
    if (r.err || r.pos != r.len) {
        return CORRAL_ERR_DECODE;
    }
    return CORRAL_OK;
}

int corral_frame_decode(uint8_t *enc, size_t n, corral_msg *m)
{
    size_t raw_len;
    uint16_t crc;
    if (corral_cobs_decode(enc, n, enc, n, &raw_len) != 0 || raw_len < 3u) {
        return CORRAL_ERR_COBS;
    }
    crc = (uint16_t)(((uint16_t)enc[raw_len - 2u] << 8) | enc[raw_len - 1u]);
    if (corral_crc16(enc, raw_len - 2u) != crc) {
        return CORRAL_ERR_CRC;
    }
    return corral_msg_decode_body(enc, raw_len - 2u, m);
}

/* ------------------------------------------------------------------ device */

void corral_device_init(corral_device *d, const corral_hello *hello)
{
    memset(d, 0, sizeof *d);
    d->hello = *hello;
    d->hello.session = 0;
    d->rx_discarding = 1; /* bytes before the first delimiter belong to nobody */
    d->lease_s = 20.0 * hello->command_timeout_s;
    if (d->lease_s < 1.0) {
        d->lease_s = 1.0;
    }
}

/* serial number arithmetic (RFC 1982, 32 bits): is a newer than b? */
static int seq_newer(uint32_t a, uint32_t b)
{
    uint32_t diff = a - b;
    return diff != 0u && diff < 0x80000000u;
}

static void handle(corral_device *d, const corral_msg *m, double now_s)
{
    uint8_t i;
    switch (m->kind) {
    case CORRAL_KIND_COMMAND:
        if (!d->has_owner || m->session != d->owner) {
            d->foreign_commands++; /* another session, or none: never drives the outputs */
            return;
        }
        if (m->n_values != d->hello.n_output_limits ||
            (d->have_command && !seq_newer(m->seq, d->last_command_seq))) {
            d->rejected_commands++;
            return;
        }
        for (i = 0; i < m->n_values; i++) {
            if (!(m->values[i] == m->values[i]) || m->values[i] > 1e300 ||
                m->values[i] < -1e300) { /* NaN or infinite */
                d->rejected_commands++;
                return;
            }
        }
        for (i = 0; i < m->n_values; i++) {
            d->u[i] = m->values[i];
        }
        d->flags = m->flags;
        d->have_command = 1;
        d->last_command_seq = m->seq;
        d->last_command_t = now_s;
        d->owner_t = now_s;
        d->commands++;
        if (m->flags & CORRAL_FLAG_STOP) {
            d->stopped = 1;
        }
        break;
    case CORRAL_KIND_STOP:
        d->stopped = 1;
        d->stops++;
        break;
    case CORRAL_KIND_HELLO:
        d->host_hellos++;
        d->hello_requested = 1; /* answered with the granted (or the owner's) session */
        if (!d->has_owner || m->hello.session == d->owner || now_s - d->owner_t > d->lease_s) {
            d->has_owner = 1;
            d->owner = m->hello.session;
            d->owner_t = now_s;
            d->hello.session = d->owner;
            d->stopped = 0;
            d->have_command = 0;
        } else {
            d->sessions_refused++;
        }
        break;
    default:
        break; /* heartbeats and anything else: nothing to do */
    }
}

int corral_device_feed(corral_device *d, const uint8_t *data, size_t n, double now_s)
{
    size_t i;
    int good = 0, rc;
    for (i = 0; i < n; i++) {
        uint8_t b = data[i];
        if (b != 0) {
            if (d->rx_len < sizeof d->rx) {
                d->rx[d->rx_len++] = b;
            } else if (!d->rx_discarding) {
                d->cobs_errors++; /* overlong: drop up to the next delimiter */
                d->rx_discarding = 1;
            }
            continue;
        }
        if (d->rx_discarding || d->rx_len == 0) {
            d->rx_discarding = 0;
            d->rx_len = 0;
            continue;
        }
        rc = corral_frame_decode(d->rx, d->rx_len, &d->scratch);
        d->rx_len = 0;
        switch (rc) {
        case CORRAL_OK:
            d->frames_in++;
            good++;
            handle(d, &d->scratch, now_s);
            break;
        case CORRAL_ERR_COBS: d->cobs_errors++; break;
        case CORRAL_ERR_CRC: d->crc_errors++; break;
        case CORRAL_ERR_UNKNOWN_KIND: d->unknown_kinds++; break;
        default: d->decode_errors++; break;
        }
    }
    return good;
}

uint32_t corral_device_outputs(const corral_device *d, double now_s, double *u)
{
    uint8_t i, n = d->hello.n_output_limits;
    uint32_t status = 0;
    for (i = 0; i < n; i++) {
        u[i] = 0.0;
    }
    if (d->stopped || !d->have_command) {
        return CORRAL_STATUS_OUTPUTS_OFF;
    }
    if (now_s - d->last_command_t > d->hello.command_timeout_s) {
        return CORRAL_STATUS_COMMAND_TIMEOUT | CORRAL_STATUS_OUTPUTS_OFF;
    }
    if (!(d->flags & CORRAL_FLAG_OUTPUTS_ON)) {
        return CORRAL_STATUS_OUTPUTS_OFF;
    }
    for (i = 0; i < n; i++) {
        double lim = d->hello.output_limits[i], v = d->u[i];
        if (v > lim) {
            v = lim;
            status |= CORRAL_STATUS_SATURATED;
        } else if (v < -lim) {
            v = -lim;
            status |= CORRAL_STATUS_SATURATED;
        }
        u[i] = v;
    }
    return status;
}

/* ------------------------------------------------------------------ device encoders */

static size_t finish(corral_mp_writer *w, uint8_t *out, size_t cap)
{
    size_t len;
    if (w->err || corral_frame(w->buf, w->len, out, cap, &len) != CORRAL_OK) {
        return 0;
    }
    return len;
}

size_t corral_device_encode_hello(corral_device *d, double t, uint8_t *out, size_t cap)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, d->tx, sizeof d->tx);
    write_hello(&w, ++d->seq, t, &d->hello);
    return finish(&w, out, cap);
}

size_t corral_device_encode_sample(corral_device *d, double t, const double *y, uint8_t n_y,
                                   uint32_t status, uint8_t *out, size_t cap)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, d->tx, sizeof d->tx);
    write_head(&w, 5, CORRAL_KIND_SAMPLE, ++d->seq, t);
    corral_mp_write_uint(&w, status);
    write_doubles(&w, y, n_y);
    return finish(&w, out, cap);
}

size_t corral_device_encode_heartbeat(corral_device *d, double t, uint32_t status, uint8_t *out,
                                      size_t cap)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, d->tx, sizeof d->tx);
    write_head(&w, 4, CORRAL_KIND_HEARTBEAT, ++d->seq, t);
    corral_mp_write_uint(&w, status);
    return finish(&w, out, cap);
}

size_t corral_device_encode_fault(corral_device *d, double t, uint32_t code, const char *text,
                                  uint8_t *out, size_t cap)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, d->tx, sizeof d->tx);
    write_head(&w, 5, CORRAL_KIND_FAULT, ++d->seq, t);
    corral_mp_write_uint(&w, code);
    corral_mp_write_str(&w, text);
    return finish(&w, out, cap);
}

size_t corral_device_encode_stop(corral_device *d, double t, uint32_t code, uint8_t *out,
                                 size_t cap)
{
    corral_mp_writer w;
    corral_mp_writer_init(&w, d->tx, sizeof d->tx);
    write_head(&w, 4, CORRAL_KIND_STOP, ++d->seq, t);
    corral_mp_write_uint(&w, code);
    return finish(&w, out, cap);
}
