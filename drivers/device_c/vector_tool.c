/* Line-oriented harness the Python tests drive to check this codec against
 * the shared vectors (drivers/test_vectors.json). Not needed on a device.
 *
 * stdin lines, one command each, hex without spaces:
 *   frame <hex>   decode a frame (trailing 00 optional) and re-encode it:
 *                 prints "OK <hex of re-encoded frame>" or "ERR <code>"
 *   cobs <hex>    prints the COBS encoding
 *   uncobs <hex>  prints the COBS decoding or "ERR"
 *   crc <hex>     prints CRC-16/CCITT-FALSE as 4 hex digits
 *   feed <hex>    feeds bytes to one device instance (time 0) and prints its
 *                 counters: frames crc cobs decode unknown commands hellos stopped
 *                           foreign_commands sessions_refused */
#include <stdio.h>
#include <string.h>

#include "cobs.h"
#include "corral_device.h"
#include "crc16.h"

#define LINE_MAX_BYTES 8192

static char line[2 * LINE_MAX_BYTES + 32];
static uint8_t in[LINE_MAX_BYTES];
static uint8_t out[2 * LINE_MAX_BYTES];
static corral_msg msg;
static corral_device dev;

static int hexval(int c)
{
    if (c >= '0' && c <= '9') {
        return c - '0';
    }
    if (c >= 'a' && c <= 'f') {
        return c - 'a' + 10;
    }
    if (c >= 'A' && c <= 'F') {
        return c - 'A' + 10;
    }
    return -1;
}

static size_t parse_hex(const char *s, uint8_t *dst, size_t cap)
{
    size_t n = 0;
    while (s[0] && s[1] && n < cap) {
        int hi = hexval((unsigned char)s[0]), lo = hexval((unsigned char)s[1]);
        if (hi < 0 || lo < 0) {
            break;
        }
        dst[n++] = (uint8_t)(hi * 16 + lo);
        s += 2;
    }
    return n;
}

static void print_hex(const uint8_t *b, size_t n)
{
    size_t i;
    for (i = 0; i < n; i++) {
        printf("%02x", b[i]);
    }
}

int main(void)
{
    corral_hello h;
    memset(&h, 0, sizeof h);
    h.n_output_limits = 2;
    h.output_limits[0] = 12.0;
    h.output_limits[1] = 12.0;
    h.command_timeout_s = 0.05;
    corral_device_init(&dev, &h);

    while (fgets(line, sizeof line, stdin)) {
        char *arg = strchr(line, ' ');
        size_t n, len;
        int rc;
        line[strcspn(line, "\r\n")] = '\0';
        if (arg) {
            *arg++ = '\0';
        } else {
            arg = line + strlen(line);
        }
        n = parse_hex(arg, in, sizeof in);
        if (strcmp(line, "frame") == 0) {
            if (n > 0 && in[n - 1] == 0) {
                n--;
            }
            memset(&msg, 0, sizeof msg);
            rc = corral_frame_decode(in, n, &msg);
            if (rc == CORRAL_OK) {
                rc = corral_msg_encode_frame(&msg, out, sizeof out, &len);
            }
            if (rc == CORRAL_OK) {
                printf("OK ");
                print_hex(out, len);
                printf("\n");
            } else {
                printf("ERR %d\n", rc);
            }
        } else if (strcmp(line, "cobs") == 0) {
            if (corral_cobs_encode(in, n, out, sizeof out, &len) == 0) {
                print_hex(out, len);
                printf("\n");
            } else {
                printf("ERR\n");
            }
        } else if (strcmp(line, "uncobs") == 0) {
            if (corral_cobs_decode(in, n, out, sizeof out, &len) == 0) {
                print_hex(out, len);
                printf("\n");
            } else {
                printf("ERR\n");
            }
        } else if (strcmp(line, "crc") == 0) {
            printf("%04x\n", (unsigned)corral_crc16(in, n));
        } else if (strcmp(line, "feed") == 0) {
            corral_device_feed(&dev, in, n, 0.0);
            printf("%lu %lu %lu %lu %lu %lu %lu %d %lu %lu\n", (unsigned long)dev.frames_in,
                   (unsigned long)dev.crc_errors, (unsigned long)dev.cobs_errors,
                   (unsigned long)dev.decode_errors, (unsigned long)dev.unknown_kinds,
                   (unsigned long)dev.commands, (unsigned long)dev.host_hellos, dev.stopped,
                   (unsigned long)dev.foreign_commands, (unsigned long)dev.sessions_refused);
        } else {
            printf("ERR unknown command\n");
        }
        fflush(stdout);
    }
    return 0;
}
