/* spec_vectors.c - the library against the examples of protocol/SPEC.md (3.2, 3.3, 10). */
#include <string.h>

#include "../atboard.h"
#include "check.h"

static uint8_t sent[64][64];
static size_t sent_len[64];
static int n_sent;
static uint32_t clock_us;

static int read_pv(void *u, uint8_t axis, float *pv) { (void)u; (void)axis; *pv = 0.75f; return 0; }
static int write_output(void *u, uint8_t axis, float out) { (void)u; (void)axis; (void)out; return 0; }
static uint32_t micros(void *u) { (void)u; return clock_us; }
static void send(void *u, const uint8_t *d, size_t n)
{
    (void)u;
    CHECK(n_sent < 64 && n <= 64);
    memcpy(sent[n_sent], d, n);
    sent_len[n_sent++] = n;
}

static void feed(atb_board *b, const uint8_t *wire, size_t n) { atb_rx_bytes(b, wire, n); }

/* wire bytes of a request built with the library's own CRC and COBS */
static size_t build(uint8_t type, uint16_t seq, const uint8_t *payload, size_t n, uint8_t *out)
{
    uint8_t raw[64];
    size_t len;
    uint16_t crc;
    raw[0] = type;
    raw[1] = (uint8_t)(seq & 0xFF);
    raw[2] = (uint8_t)(seq >> 8);
    memcpy(raw + 3, payload, n);
    crc = atb_crc16(raw, n + 3);
    raw[n + 3] = (uint8_t)(crc & 0xFF);
    raw[n + 4] = (uint8_t)(crc >> 8);
    len = atb_cobs_encode(raw, n + 5, out);
    out[len] = 0;
    return len + 1;
}

int main(void)
{
    static atb_board b;
    static const atb_hooks hooks = {NULL, read_pv, write_output, micros, send, NULL};
    static const atb_config cfg = {"spec", "t", 1000u, 1u, 100.0f, 0.0f, 250u, ATB_CAP_ALL, 7u};
    const uint8_t check[] = "123456789";
    uint8_t enc[300], wire[64], dec[64];
    long dn;
    size_t n;
    int k;

    /* 3.2: CRC check value */
    CHECK(atb_crc16(check, 9) == 0x29B1);
    /* 3.3: COBS examples */
    {
        const uint8_t a[] = {0x00}, b2[] = {0x00, 0x00}, c[] = {0x11, 0x22, 0x00, 0x33},
                      d[] = {0x11, 0x22, 0x33, 0x44};
        const uint8_t ea[] = {0x01, 0x01}, eb[] = {0x01, 0x01, 0x01},
                      ec[] = {0x03, 0x11, 0x22, 0x02, 0x33}, ed[] = {0x05, 0x11, 0x22, 0x33, 0x44};
        CHECK(atb_cobs_encode(a, 1, enc) == 2 && !memcmp(enc, ea, 2));
        CHECK(atb_cobs_encode(b2, 2, enc) == 3 && !memcmp(enc, eb, 3));
        CHECK(atb_cobs_encode(c, 4, enc) == 5 && !memcmp(enc, ec, 5));
        CHECK(atb_cobs_encode(d, 4, enc) == 5 && !memcmp(enc, ed, 5));
    }
    CHECK(atb_init(&b, &cfg, &hooks) == 0);

    /* 10: Hello(1) with seq 0 -> this version-2 board refuses it: Nak(BAD_VERSION, 2) */
    {
        const uint8_t hello1[] = {0x02, 0x01, 0x01, 0x02, 0x01, 0x03, 0x6C, 0x88, 0x00};
        feed(&b, hello1, sizeof hello1);
        CHECK(n_sent == 1);
        dn = ref_cobs_decode(sent[0], sent_len[0] - 1, dec, sizeof dec);
        CHECK(dn == 11 && dec[0] == 0x82 && dec[1] == 0 && dec[2] == 0);
        CHECK(dec[3] == 0x01 && dec[4] == 1); /* acked type Hello, BAD_VERSION */
        CHECK(dec[5] == 0x00 && dec[6] == 0x00 && dec[7] == 0x00 && dec[8] == 0x40); /* 2.0f */
        CHECK(ref_crc16(dec, 9) == (uint16_t)(dec[9] | dec[10] << 8));
        n_sent = 0;
    }
    /* run to tick 1493 so that the 8th sample (seq 7) is the one at 1 500 000 us */
    for (k = 0; k < 1493; k++) {
        clock_us += 1000u;
        atb_tick(&b);
    }
    CHECK(n_sent == 0);
    {
        /* SetLimits(0, 100, -10, 10, 0, 0) and Stream(0, 1, 1) */
        uint8_t lim[19] = {0, 0x00, 0x00, 0xC8, 0x42, 0x00, 0x00, 0x20, 0xC1,
                           0x00, 0x00, 0x20, 0x41, 0, 0, 0, 0, 0, 0};
        uint8_t st[4] = {0, 1, 1, 0};
        n = build(0x05, 1, lim, sizeof lim, wire);
        feed(&b, wire, n);
        n = build(0x07, 2, st, sizeof st, wire);
        feed(&b, wire, n);
        CHECK(n_sent == 2);
        n_sent = 0;
    }
    /* 10: SetOutput(axis 0, 12.5) with seq 0x0102, byte for byte from the spec */
    {
        const uint8_t set_output[] = {0x04, 0x08, 0x02, 0x01, 0x01, 0x01, 0x05,
                                      0x48, 0x41, 0x27, 0xD6, 0x00};
        feed(&b, set_output, sizeof set_output);
        CHECK(n_sent == 1);
        dn = ref_cobs_decode(sent[0], sent_len[0] - 1, dec, sizeof dec);
        CHECK(dn == 6 && dec[0] == 0x81 && dec[1] == 0x02 && dec[2] == 0x01 && dec[3] == 0x08);
        n_sent = 0;
    }
    for (k = 0; k < 8; k++) {
        clock_us += 1000u;
        atb_tick(&b);
    }
    CHECK(n_sent == 8);
    {
        const uint8_t sample[] = {0x03, 0x90, 0x07, 0x01, 0x04, 0x60, 0xE3, 0x16, 0x01,
                                  0x01, 0x03, 0x40, 0x3F, 0x01, 0x03, 0x48, 0x41, 0x01,
                                  0x01, 0x01, 0x02, 0xC3, 0x03, 0x8A, 0x9E, 0x00};
        CHECK(sent_len[7] == sizeof sample && !memcmp(sent[7], sample, sizeof sample));
    }
    printf("spec vectors: CRC, COBS, Hello(1) refusal, SetOutput and Sample of SPEC.md "
           "section 10: ok\n");
    return 0;
}
