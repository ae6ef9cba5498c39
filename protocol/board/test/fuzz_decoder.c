/*
 * fuzz_decoder.c - random and mutated frames through the board library, built with
 * -fsanitize=address,undefined -fno-sanitize-recover=all (a sanitizer report ends the run
 * with a non-zero exit).
 *
 *   fuzz-decoder [--frames N] [--seed S]
 *
 * Frames: valid requests of every type with payloads drawn from edge values (NaN, infinity,
 * zero, huge, denormal, random bits; axes 0..255; u16 edges), the same with bit flips,
 * truncation, insertions, wrong types and lengths, pure garbage with and without delimiters,
 * and overlong runs. Ticks run in between with PVs that include NaN and sensor failures.
 *
 * Checked on every step, against an independent buffer-based reference of the receiver
 * (test/check.h, the rules of SPEC.md 3.4):
 *   - the library's good / CRC / framing counters equal the reference's;
 *   - every good request gets exactly one immediate reply with its seq (Stop: none now, a
 *     Stopped at the next tick), and nothing is answered to a bad frame;
 *   - every frame sent decodes (COBS, CRC), has a device-to-host type and its exact length;
 *   - every output written is finite, zero while the axis is idle or faulted, within
 *     +/-output_limit, and zero before limits are set;
 *   - with several axes (built with -DATB_MAX_AXES=2): every tick reads and writes each axis
 *     exactly once, in order; Sample and Fault frames name an existing axis; no axis has a
 *     non-zero output once the host has been silent for that axis's watchdog period (every
 *     good frame but Stop feeds it, SPEC.md 3.4); and when Stopped goes out, every axis's
 *     output of that tick is zero (unless a motion request came after the Stop).
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../atboard.h"
#include "check.h"

#define AXES (ATB_MAX_AXES < 2 ? ATB_MAX_AXES : 2)

static atb_board board;
static uint64_t rng_state = 1;
static uint32_t clock_us;
static int in_tick;
static long immediate_replies, stopped_replies, samples, faults, sent_frames;
static long last_reply_seq = -1;
static long outputs_written, outputs_nonzero;
static long mode_seen[4];
/* per tick: reads and writes of each axis, the outputs written */
static int tick_reads[AXES], tick_writes[AXES], next_axis_read, next_axis_write;
static float tick_out[AXES];
/* reference watchdog: clock at the last good frame other than Stop */
static uint32_t last_feed_us;
static int motion_after_stop;
static long watchdog_checks;

static uint64_t rnd(void)
{
    uint64_t x = rng_state;
    x ^= x >> 12;
    x ^= x << 25;
    x ^= x >> 27;
    rng_state = x;
    return x * 0x2545F4914F6CDD1Dull;
}

static uint32_t rnd_below(uint32_t n) { return (uint32_t)(rnd() % n); }

/* ------------------------------------------------------------------ hooks */

static int hook_read_pv(void *u, uint8_t axis, float *pv)
{
    (void)u;
    CHECK(axis < AXES);
    CHECK(in_tick && axis == next_axis_read);
    next_axis_read++;
    tick_reads[axis]++;
    switch (rnd_below(40)) {
    case 0: return 1; /* sensor failure */
    case 1: *pv = NAN; return 0;
    case 2: *pv = INFINITY; return 0;
    case 3: *pv = 1e30f; return 0;
    case 4: *pv = (float)((double)rnd_below(2001) / 100.0 - 10.0); return 0;
    default: *pv = (float)((double)rnd_below(401) / 100.0 - 2.0); return 0;
    }
}

static int hook_write_output(void *u, uint8_t axis, float out)
{
    const atb_axis *a;
    (void)u;
    CHECK(axis < AXES);
    a = &board.axis[axis];
    CHECK(in_tick);
    if (tick_writes[axis] == 0) { /* a driver fault writes the same axis a second time, 0 */
        CHECK(axis == next_axis_write);
        next_axis_write++;
    } else {
        CHECK(tick_writes[axis] == 1 && out == 0.0f && a->fault == ATB_FAULT_DRIVER);
    }
    tick_writes[axis]++;
    tick_out[axis] = out;
    CHECK(isfinite(out));
    if (!a->limits_set || a->fault || a->mode == ATB_MODE_IDLE)
        CHECK(out == 0.0f);
    else
        CHECK(fabsf(out) <= a->output_limit);
    outputs_written++;
    if (out != 0.0f)
        outputs_nonzero++;
    mode_seen[a->mode & 3]++;
    return rnd_below(5000) == 0; /* now and then the driver reports a fault */
}

static uint32_t hook_micros(void *u)
{
    (void)u;
    return clock_us;
}

static void hook_send(void *u, const uint8_t *d, size_t n)
{
    uint8_t dec[300];
    long len;
    size_t i;
    int size;
    uint16_t seq;
    (void)u;
    CHECK(n >= 2 && n <= ATB_TX_MAX && d[n - 1] == 0);
    for (i = 0; i + 1 < n; i++)
        CHECK(d[i] != 0);
    len = ref_cobs_decode(d, n - 1, dec, sizeof dec);
    CHECK(len >= 5);
    CHECK(ref_crc16(dec, (size_t)len - 2) == (uint16_t)(dec[len - 2] | dec[len - 1] << 8));
    size = ref_reply_size(dec[0]);
    CHECK(size >= 0 && len == size + 5);
    seq = (uint16_t)(dec[1] | dec[2] << 8);
    sent_frames++;
    if (dec[0] == 0x90) {
        CHECK(in_tick);
        CHECK(dec[3] < AXES); /* Sample.axis */
        samples++;
    } else if (dec[0] == 0x91) {
        CHECK(dec[4] < AXES); /* Fault.axis */
        faults++;
    } else if (dec[0] == 0x85) {
        CHECK(in_tick); /* Stopped only from a tick */
        if (!motion_after_stop)
            for (i = 0; i < AXES; i++)
                CHECK(tick_out[i] == 0.0f); /* Stop zeroes every axis */
        stopped_replies++;
    } else {
        CHECK(!in_tick); /* replies only while a frame is handled */
        immediate_replies++;
        last_reply_seq = seq;
    }
}

static int hook_store(void *u, uint8_t axis, float kp, float ki, float kd)
{
    (void)u;
    (void)kp;
    (void)ki;
    (void)kd;
    CHECK(axis < AXES);
    return (int)rnd_below(2);
}

/* ------------------------------------------------------------------ reference receiver */

static struct {
    uint8_t buf[1024];
    size_t len;
    int discarding;
    long good, crc, framing, stops_valid;
} ref;

/* returns 1 when a good frame completed (its type and seq in *type, *seq, payload length) */
static int ref_feed(uint8_t byte, uint8_t *type, uint16_t *seq, size_t *plen)
{
    uint8_t dec[1024];
    long n;
    if (byte != 0) {
        if (ref.discarding)
            return 0;
        if (ref.len < sizeof ref.buf)
            ref.buf[ref.len] = byte;
        ref.len++;
        if (ref.len > ATB_MAX_ENCODED) {
            ref.framing++;
            ref.discarding = 1;
            ref.len = 0;
        }
        return 0;
    }
    if (ref.discarding) {
        ref.discarding = 0;
        ref.len = 0;
        return 0;
    }
    if (ref.len == 0)
        return 0;
    n = ref_cobs_decode(ref.buf, ref.len, dec, sizeof dec);
    ref.len = 0;
    if (n < 5 || n > 256) {
        ref.framing++;
        return 0;
    }
    if (ref_crc16(dec, (size_t)n - 2) != (uint16_t)(dec[n - 2] | dec[n - 1] << 8)) {
        ref.crc++;
        return 0;
    }
    ref.good++;
    *type = dec[0];
    *seq = (uint16_t)(dec[1] | dec[2] << 8);
    *plen = (size_t)n - 5;
    return 1;
}

/* ------------------------------------------------------------------ frame generation */

static const uint8_t sizes[14] = {0, 2, 8, 0, 0, 19, 1, 4, 5, 21, 33, 5, 5, 13};

static float edge_float(void)
{
    static const float edges[] = {0.0f, -0.0f, 1.0f, -1.0f, 0.5f, 2.0f, 10.0f, -10.0f, 30.0f,
                                  99.0f, 100.0f, 100.5f, 1e-3f, 1e-30f, 1e30f, -1e30f,
                                  1e-45f, 3.4e38f, -3.4e38f};
    uint32_t pick = rnd_below(30);
    if (pick < sizeof edges / sizeof edges[0])
        return edges[pick];
    if (pick == 20)
        return NAN;
    if (pick == 21)
        return INFINITY;
    if (pick == 22)
        return -INFINITY;
    if (pick < 27)
        return (float)((double)rnd_below(20001) / 100.0 - 100.0);
    {
        union {
            uint32_t u;
            float f;
        } v;
        v.u = (uint32_t)rnd();
        return v.f;
    }
}

static void put_f(uint8_t *p, float f)
{
    union {
        float f;
        uint32_t u;
    } v;
    v.f = f;
    p[0] = (uint8_t)v.u;
    p[1] = (uint8_t)(v.u >> 8);
    p[2] = (uint8_t)(v.u >> 16);
    p[3] = (uint8_t)(v.u >> 24);
}

static void put_u16v(uint8_t *p, uint16_t v)
{
    p[0] = (uint8_t)v;
    p[1] = (uint8_t)(v >> 8);
}

static uint16_t edge_u16(void)
{
    static const uint16_t edges[] = {0, 1, 2, 9, 10, 11, 100, 250, 1000, 60000, 60001, 65535};
    uint32_t pick = rnd_below(16);
    return pick < 12 ? edges[pick] : (uint16_t)rnd();
}

static uint8_t edge_axis(void)
{
    uint32_t pick = rnd_below(10);
    return pick < 7 ? (uint8_t)rnd_below(AXES) : pick == 7 ? (uint8_t)AXES : (uint8_t)rnd();
}

/* payload of a request of `type` (0x01..0x0D) with edge values; returns its length */
static size_t make_payload(uint8_t type, uint8_t *p)
{
    size_t n = sizes[type], i;
    for (i = 0; i < n; i++)
        p[i] = (uint8_t)rnd();
    switch (type) {
    case 0x01: put_u16v(p, rnd_below(4) ? 2 : (uint16_t)rnd_below(4)); break;
    case 0x05: /* SetLimits: mostly sensible, so that motion gets exercised */
        p[0] = edge_axis();
        if (rnd_below(3)) {
            put_f(p + 1, 50.0f);
            put_f(p + 5, -8.0f);
            put_f(p + 9, 8.0f);
            put_f(p + 13, rnd_below(2) ? 0.0f : 500.0f);
            put_u16v(p + 17, rnd_below(2) ? 0 : edge_u16());
        } else {
            for (i = 0; i < 4; i++)
                put_f(p + 1 + 4 * i, edge_float());
            put_u16v(p + 17, edge_u16());
        }
        break;
    case 0x06: p[0] = edge_axis(); break;
    case 0x07: p[0] = edge_axis(); p[1] = (uint8_t)rnd_below(4); put_u16v(p + 2, edge_u16()); break;
    case 0x09: case 0x0A: case 0x08: case 0x0B: case 0x0C: case 0x0D:
        p[0] = edge_axis();
        for (i = 1; i + 4 <= n; i += 4)
            put_f(p + i, edge_float());
        if (type == 0x0A && rnd_below(2)) { /* a plausible PID now and then */
            put_f(p + 1, 2.0f); put_f(p + 5, 1.0f); put_f(p + 9, 0.1f); put_f(p + 13, 1.0f);
            put_f(p + 17, 10.0f); put_f(p + 21, rnd_below(2) ? 0.0f : 0.5f);
            put_f(p + 25, 1.0f); put_f(p + 29, 0.0f);
        }
        if (type == 0x09 && rnd_below(2)) {
            put_f(p + 1, 0.0f); put_f(p + 5, 0.0f); put_f(p + 9, 20.0f); put_f(p + 13, 20.0f);
            put_f(p + 17, 0.1f);
        }
        break;
    default: break;
    }
    return n;
}

/* raw frame (type, seq, payload, crc) into out; returns its length */
static size_t make_raw(uint8_t *out, uint16_t seq)
{
    uint8_t type, payload[300];
    size_t n;
    uint16_t crc;
    uint32_t pick = rnd_below(20);
    if (pick < 17) {
        type = (uint8_t)(1 + rnd_below(13));
        n = make_payload(type, payload);
    } else if (pick == 17) { /* unknown or device-to-host type */
        type = (uint8_t)rnd();
        n = rnd_below(40);
        for (size_t i = 0; i < n; i++)
            payload[i] = (uint8_t)rnd();
    } else { /* a known type with a wrong length (up to the largest frame) */
        type = (uint8_t)(1 + rnd_below(13));
        n = rnd_below(2) ? rnd_below(40) : rnd_below(252);
        for (size_t i = 0; i < n; i++)
            payload[i] = (uint8_t)rnd();
    }
    out[0] = type;
    out[1] = (uint8_t)seq;
    out[2] = (uint8_t)(seq >> 8);
    memcpy(out + 3, payload, n);
    crc = ref_crc16(out, n + 3);
    out[n + 3] = (uint8_t)crc;
    out[n + 4] = (uint8_t)(crc >> 8);
    return n + 5;
}

/* COBS encoding of any length (runs of 254 included), without the delimiter */
static size_t cobs(const uint8_t *in, size_t n, uint8_t *out)
{
    size_t code_pos = 0, o = 1, i;
    uint8_t code = 1;
    for (i = 0; i < n; i++) {
        if (in[i] == 0) {
            out[code_pos] = code;
            code_pos = o++;
            code = 1;
        } else {
            out[o++] = in[i];
            if (++code == 0xFF && i + 1 < n) {
                out[code_pos] = code;
                code_pos = o++;
                code = 1;
            }
        }
    }
    out[code_pos] = code;
    return o;
}

static void feed_byte(uint8_t byte)
{
    uint8_t type = 0;
    uint16_t seq = 0;
    size_t plen = 0;
    long before = immediate_replies;
    uint32_t fed_before = board.last_rx_us;
    int good = ref_feed(byte, &type, &seq, &plen);
    last_reply_seq = -1;
    atb_rx_byte(&board, byte);
    if (good && type == 0x03)
        CHECK(board.last_rx_us == fed_before); /* a Stop does not feed the watchdog */
    CHECK(board.frames_good == (uint32_t)ref.good);
    CHECK(board.crc_errors == (uint32_t)ref.crc);
    CHECK(board.framing_errors == (uint32_t)ref.framing);
    if (!good) {
        CHECK(immediate_replies == before); /* bad frames are dropped silently */
        return;
    }
    if (type != 0x03)
        last_feed_us = clock_us;
    if (type == 0x03 && plen == 0) { /* Stop: answered at the next tick */
        CHECK(immediate_replies == before);
        ref.stops_valid++;
        motion_after_stop = 0;
    } else {
        if (type == 0x08 || type == 0x09 || type == 0x0A)
            motion_after_stop = 1;
        CHECK(immediate_replies == before + 1);
        CHECK(last_reply_seq == seq);
    }
}

static void tick(void)
{
    clock_us += 1000u + (rnd_below(100) == 0 ? rnd_below(400000) : 0u);
    int i;
    for (i = 0; i < AXES; i++) {
        tick_reads[i] = 0;
        tick_writes[i] = 0;
        tick_out[i] = 0.0f;
    }
    next_axis_read = 0;
    next_axis_write = 0;
    in_tick = 1;
    atb_tick(&board);
    in_tick = 0;
    for (i = 0; i < AXES; i++) {
        CHECK(tick_reads[i] == 1 && tick_writes[i] >= 1);
        /* the watchdog holds every axis at zero once the host has been silent long enough */
        if (tick_out[i] != 0.0f) {
            CHECK((uint32_t)(clock_us - last_feed_us) < board.axis[i].watchdog_us);
            watchdog_checks++;
        }
    }
}

int main(int argc, char **argv)
{
    static const atb_hooks hooks = {NULL, hook_read_pv, hook_write_output, hook_micros,
                                    hook_send, hook_store};
    static const atb_config cfg = {"fuzz", "fz", 1000u, AXES, 100.0f, 0.01f, 250u,
                                   ATB_CAP_ALL, 0u};
    long frames = 100000, fed = 0, i;
    unsigned long long seed = 1;
    uint8_t raw[600], enc[700];
    uint16_t seq = 0;
    for (i = 1; i + 1 < argc; i += 2) {
        if (!strcmp(argv[i], "--frames"))
            frames = atol(argv[i + 1]);
        else if (!strcmp(argv[i], "--seed"))
            seed = (unsigned long long)atoll(argv[i + 1]);
    }
    rng_state = seed * 0x9E3779B97F4A7C15ull + 1u;
    {
        /* a refused config: nothing is answered, and a tick holds every axis at zero */
        static const atb_config bad = {"fuzz", "fz", 1000u, 0u, 100.0f, 0.01f, 250u,
                                       ATB_CAP_ALL, 0u};
        CHECK(atb_init(&board, &bad, &hooks) == -1);
        atb_rx_bytes(&board, (const uint8_t *)"\x02\x01\x01\x02\x01\x03\x6c\x88", 9u);
        CHECK(immediate_replies == 0);
        in_tick = 1;
        atb_tick(&board);
        in_tick = 0;
        for (i = 0; i < AXES; i++)
            CHECK(tick_writes[i] == 1 && tick_out[i] == 0.0f && tick_reads[i] == 0);
        CHECK(sent_frames == 0);
    }
    CHECK(atb_init(&board, &cfg, &hooks) == 0);
    while (fed < frames) {
        uint32_t kind = rnd_below(100), t;
        size_t n, e, j;
        if (kind < 55) { /* a valid frame */
            n = make_raw(raw, seq++);
            e = cobs(raw, n, enc);
        } else if (kind < 85) { /* a mutated one */
            n = make_raw(raw, seq++);
            e = cobs(raw, n, enc);
            switch (rnd_below(5)) {
            case 0: /* bit flips in the encoded bytes */
                for (t = 1 + rnd_below(3); t > 0; t--)
                    enc[rnd_below((uint32_t)e)] ^= (uint8_t)(1u << rnd_below(8));
                break;
            case 1: /* truncated */
                e = rnd_below((uint32_t)e);
                break;
            case 2: /* a byte inserted */
                j = rnd_below((uint32_t)e + 1);
                memmove(enc + j + 1, enc + j, e - j);
                enc[j] = (uint8_t)rnd();
                e++;
                break;
            case 3: /* a raw byte flipped before encoding (CRC error) */
                raw[rnd_below((uint32_t)n)] ^= (uint8_t)(1u << rnd_below(8));
                e = cobs(raw, n, enc);
                break;
            default: /* a code byte changed (invalid COBS) */
                enc[0] = (uint8_t)(1 + rnd_below(255));
                break;
            }
        } else if (kind < 97) { /* garbage */
            e = rnd_below(80);
            for (j = 0; j < e; j++)
                enc[j] = (uint8_t)(rnd_below(6) ? rnd() : 0u);
        } else { /* an overlong run */
            e = 259 + rnd_below(300);
            for (j = 0; j < e; j++)
                enc[j] = (uint8_t)(1 + rnd_below(255));
        }
        for (j = 0; j < e; j++)
            feed_byte(enc[j]);
        if (rnd_below(50) != 0)
            feed_byte(0);
        fed++;
        for (t = rnd_below(4); t > 0; t--)
            tick();
    }
    for (i = 0; i < 3; i++)
        tick();
    printf("fuzz: %ld frames fed (seed %llu): %ld good, %ld CRC errors, %ld framing errors "
           "(library counters equal the reference); %ld replies, %ld Stopped, %ld samples, "
           "%ld faults; %ld outputs written, %ld non-zero (idle %ld, host %ld, relay %ld, "
           "pid %ld ticks); %d axes, %ld non-zero outputs checked against the watchdog\n",
           fed, seed, ref.good, ref.crc, ref.framing, immediate_replies,
           stopped_replies, samples, faults, outputs_written, outputs_nonzero, mode_seen[0],
           mode_seen[1], mode_seen[2], mode_seen[3], AXES, watchdog_checks);
    return 0;
}
