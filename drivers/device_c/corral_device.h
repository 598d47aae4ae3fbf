/* corral wire protocol, device side: messages, framing and the command-timeout
 * fail-safe, in portable C99 with fixed buffers and no heap.
 *
 * Frame = COBS(msgpack_array + CRC16_BE) + 0x00 (see docs/wire-protocol.md).
 *
 * Typical use on a device:
 *
 *     corral_device dev;
 *     corral_device_init(&dev, &my_hello);
 *     every received chunk:   corral_device_feed(&dev, bytes, n, now_s);
 *     if (dev.hello_requested) send corral_device_encode_hello(...) and clear it;
 *     every sample period:    status = corral_device_outputs(&dev, now_s, u);
 *                             apply u; measure y;
 *                             n = corral_device_encode_sample(&dev, now_s, y, ny, status, buf, cap);
 *
 * corral_device_outputs() is the device's own fail-safe: outputs are zero
 * until a valid command arrives, after command_timeout_s without one, and
 * after a stop (latched until the host says hello again). The host's software
 * watchdog is not an emergency stop; this timeout is the device's duty. */
#ifndef CORRAL_DEVICE_H
#define CORRAL_DEVICE_H

#include <stddef.h>
#include <stdint.h>

#define CORRAL_PROTOCOL_VERSION 2u /* v2: session token in hello and command */

#define CORRAL_KIND_HELLO 0u
#define CORRAL_KIND_SAMPLE 1u
#define CORRAL_KIND_COMMAND 2u
#define CORRAL_KIND_HEARTBEAT 3u
#define CORRAL_KIND_FAULT 4u
#define CORRAL_KIND_STOP 5u

/* Status bits (samples, heartbeats); must match drivers/base.py. */
#define CORRAL_STATUS_SATURATED (1u << 0)
#define CORRAL_STATUS_COMMAND_TIMEOUT (1u << 1)
#define CORRAL_STATUS_FAULT (1u << 2)
#define CORRAL_STATUS_OUTPUTS_OFF (1u << 3)
/* Bit of the first device-declared status flag (hello status_flags[k] is bit 8 + k). */
#define CORRAL_STATUS_DEVICE_BASE_BIT 8u
#define CORRAL_STATUS_DEVICE(k) (1u << (CORRAL_STATUS_DEVICE_BASE_BIT + (k)))
/* Command flag bits. */
#define CORRAL_FLAG_OUTPUTS_ON (1u << 0)
#define CORRAL_FLAG_FALLBACK (1u << 1)
#define CORRAL_FLAG_STOP (1u << 2)

/* Fixed capacities (override with -D to fit a small device). */
#ifndef CORRAL_MAX_CHANNELS
#define CORRAL_MAX_CHANNELS 16
#endif
#ifndef CORRAL_MAX_OUTPUTS
#define CORRAL_MAX_OUTPUTS 8
#endif
#ifndef CORRAL_MAX_STATUS_FLAGS
#define CORRAL_MAX_STATUS_FLAGS 8 /* the protocol allows up to 24 (bits 8..31) */
#endif
#ifndef CORRAL_NAME_LEN
#define CORRAL_NAME_LEN 32 /* including the NUL: names up to 31 bytes */
#endif
#ifndef CORRAL_TEXT_LEN
#define CORRAL_TEXT_LEN 64
#endif
#ifndef CORRAL_MAX_FRAME
#define CORRAL_MAX_FRAME 1024 /* encoded frame without its delimiter */
#endif

/* Result codes. */
#define CORRAL_OK 0
#define CORRAL_ERR_COBS (-1)
#define CORRAL_ERR_CRC (-2)
#define CORRAL_ERR_DECODE (-3)
#define CORRAL_ERR_UNKNOWN_KIND (-4)
#define CORRAL_ERR_SPACE (-5)

typedef struct {
    uint32_t protocol;
    char rig_id[CORRAL_NAME_LEN];
    uint8_t n_channels;
    char channels[CORRAL_MAX_CHANNELS][CORRAL_NAME_LEN];
    uint8_t n_units;
    char units[CORRAL_MAX_CHANNELS][CORRAL_NAME_LEN];
    double sample_rate_hz;
    uint8_t n_output_names;
    char output_names[CORRAL_MAX_OUTPUTS][CORRAL_NAME_LEN];
    uint8_t n_output_limits;
    double output_limits[CORRAL_MAX_OUTPUTS];
    uint8_t n_output_units;
    char output_units[CORRAL_MAX_OUTPUTS][CORRAL_NAME_LEN];
    double command_timeout_s;
    uint32_t session; /* host hello: the session asked for; device hello: the one granted */
    uint8_t n_status_flags; /* the device's own status inputs (e-stop, interlock); 0: none, */
    char status_flags[CORRAL_MAX_STATUS_FLAGS][CORRAL_NAME_LEN]; /* and then not sent */
} corral_hello;

/* One decoded message. Which fields mean something depends on kind:
 * hello: hello; sample: status, values (y); command: flags, values (u), t is the
 * echoed device time of the answered sample; heartbeat: status;
 * fault: code, text; stop: code. */
typedef struct {
    uint32_t kind;
    uint32_t seq;
    double t;
    uint32_t status;
    uint32_t flags;
    uint32_t code;
    uint32_t session; /* command: the host session it belongs to (0 if the sender left it out) */
    uint8_t n_values;
    double values[CORRAL_MAX_CHANNELS];
    char text[CORRAL_TEXT_LEN];
    corral_hello hello;
} corral_msg;

/* msgpack body of m (no CRC, no framing). */
int corral_msg_encode_body(const corral_msg *m, uint8_t *out, size_t cap, size_t *len);
/* Decode a body; CORRAL_OK, CORRAL_ERR_DECODE or CORRAL_ERR_UNKNOWN_KIND (m->kind set). */
int corral_msg_decode_body(const uint8_t *body, size_t n, corral_msg *m);
/* body -> COBS(body + CRC16 BE) + 0x00. */
int corral_frame(const uint8_t *body, size_t n, uint8_t *out, size_t cap, size_t *len);
/* A whole frame for m, delimiter included (uses CORRAL_MAX_FRAME bytes of stack). */
int corral_msg_encode_frame(const corral_msg *m, uint8_t *out, size_t cap, size_t *len);
/* Decode one frame given without its delimiter. Works in place: enc is overwritten. */
int corral_frame_decode(uint8_t *enc, size_t n, corral_msg *m);

typedef struct {
    corral_hello hello;
    uint32_t seq; /* last sequence number this device sent */
    /* receive side */
    uint8_t rx[CORRAL_MAX_FRAME];
    size_t rx_len;
    int rx_discarding;
    corral_msg scratch;
    uint8_t tx[CORRAL_MAX_FRAME]; /* body being encoded */
    /* command state */
    double u[CORRAL_MAX_OUTPUTS];
    uint32_t flags;
    int have_command;
    uint32_t last_command_seq;
    double last_command_t;
    int stopped;
    int hello_requested; /* a host hello arrived: send your hello, then clear this */
    /* session (protocol v2): commands are obeyed only from the owner's session */
    int has_owner;
    uint32_t owner;
    double owner_t;  /* last handshake or accepted command of the owner */
    double lease_s;  /* a silent owner may be replaced after this long */
    /* counters */
    uint32_t frames_in, crc_errors, cobs_errors, decode_errors, unknown_kinds;
    uint32_t commands, rejected_commands, host_hellos, stops;
    uint32_t sessions_refused, foreign_commands;
} corral_device;

void corral_device_init(corral_device *d, const corral_hello *hello);
/* Feed received bytes at device time now_s (s). Returns the number of valid messages. */
int corral_device_feed(corral_device *d, const uint8_t *data, size_t n, double now_s);
/* Outputs to apply at now_s into u[hello.n_output_limits]; returns status bits. */
uint32_t corral_device_outputs(const corral_device *d, double now_s, double *u);

/* Encoders: return the frame length written to out (delimiter included), 0 if out is too small.
 * Each takes the next sequence number. Not re-entrant (they share d->tx). */
size_t corral_device_encode_hello(corral_device *d, double t, uint8_t *out, size_t cap);
size_t corral_device_encode_sample(corral_device *d, double t, const double *y, uint8_t n_y,
                                   uint32_t status, uint8_t *out, size_t cap);
size_t corral_device_encode_heartbeat(corral_device *d, double t, uint32_t status, uint8_t *out,
                                      size_t cap);
size_t corral_device_encode_fault(corral_device *d, double t, uint32_t code, const char *text,
                                  uint8_t *out, size_t cap);
size_t corral_device_encode_stop(corral_device *d, double t, uint32_t code, uint8_t *out,
                                 size_t cap);

#endif
