/* COBS encode and decode; see cobs.h. */
#include "cobs.h"

int corral_cobs_encode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap, size_t *out_len)
{
    size_t code_idx = 0, out = 1, i;
    uint8_t code = 1;

    if (cap < 1) {
        return -1;
    }
    for (i = 0; i < n; i++) {
        if (src[i] == 0) {
            dst[code_idx] = code;
            if (out >= cap) {
                return -1;
            }
            code_idx = out++;
            code = 1;
        } else {
            if (out >= cap) {
                return -1;
            }
            dst[out++] = src[i];
            code++;
            if (code == 0xFF) {
                dst[code_idx] = code;
                code = 1;
                if (i + 1 == n) {
                    /* a full 254-byte run ends the data: no final block */
                    *out_len = out;
                    return 0;
                }
                if (out >= cap) {
                    return -1;
                }
                code_idx = out++;
            }
        }
    }
    dst[code_idx] = code;
    *out_len = out;
    return 0;
}

int corral_cobs_decode(const uint8_t *src, size_t n, uint8_t *dst, size_t cap, size_t *out_len)
{
    size_t i = 0, out = 0, j, end;
    uint8_t code;

    if (n == 0) {
        return -1;
    }
    while (i < n) {
        code = src[i];
        if (code == 0) {
            return -1;
        }
        end = i + code;
        if (end > n) {
            return -1;
        }
        for (j = i + 1; j < end; j++) {
            if (src[j] == 0 || out >= cap) {
                return -1;
            }
            dst[out++] = src[j];
        }
        i = end;
        if (code != 0xFF && i < n) {
            if (out >= cap) {
                return -1;
            }
            dst[out++] = 0;
        }
    }
    *out_len = out;
    return 0;
}
