/* check.h - an independent reference of the frame format for the C tests (buffer-based COBS
 * decoding like protocol/cobs.py, bitwise CRC like SPEC.md 3.2). Test code only. */
#ifndef ATB_TEST_CHECK_H
#define ATB_TEST_CHECK_H

#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>

static inline uint16_t ref_crc16(const uint8_t *p, size_t n)
{
    uint16_t crc = 0xFFFF;
    while (n--) {
        int i;
        crc ^= (uint16_t)(*p++) << 8;
        for (i = 0; i < 8; i++)
            crc = (crc & 0x8000) ? (uint16_t)((crc << 1) ^ 0x1021) : (uint16_t)(crc << 1);
    }
    return crc;
}

/* Strict COBS decode of enc[0..n) (no delimiter); returns the decoded length, -1 if invalid. */
static inline long ref_cobs_decode(const uint8_t *enc, size_t n, uint8_t *out, size_t cap)
{
    size_t i = 0, o = 0;
    if (n == 0)
        return -1;
    while (i < n) {
        uint8_t code = enc[i];
        size_t end = i + code, j;
        if (code == 0 || end > n)
            return -1;
        for (j = i + 1; j < end; j++) {
            if (enc[j] == 0 || o >= cap)
                return -1;
            out[o++] = enc[j];
        }
        i = end;
        if (code != 0xFF && i < n) {
            if (o >= cap)
                return -1;
            out[o++] = 0;
        }
    }
    return (long)o;
}

/* payload size of a device-to-host type, -1 for a type the board must never send */
static inline int ref_reply_size(uint8_t type)
{
    switch (type) {
    case 0x80: return 48;
    case 0x81: return 1;
    case 0x82: return 6;
    case 0x83: return 16;
    case 0x84: return 19;
    case 0x85: return 0;
    case 0x90: return 19;
    case 0x91: return 10;
    default: return -1;
    }
}

#define CHECK(cond)                                                                           \
    do {                                                                                      \
        if (!(cond)) {                                                                        \
            fprintf(stderr, "%s:%d: check failed: %s\n", __FILE__, __LINE__, #cond);          \
            exit(1);                                                                          \
        }                                                                                     \
    } while (0)

#endif
