/* CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF, no reflection, no final xor;
 * check value 0x29B1 for "123456789"). Portable C99. */
#ifndef CORRAL_CRC16_H
#define CORRAL_CRC16_H

#include <stddef.h>
#include <stdint.h>

uint16_t corral_crc16(const uint8_t *data, size_t n);

#endif
