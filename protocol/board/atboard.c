/*
 * atboard.c - the board side of the autotune wire protocol. See atboard.h and SPEC.md.
 *
 * Freestanding C99: no <string.h>, no <math.h>, no heap. Fields are read and written byte by
 * byte (little-endian), floats through a union with uint32_t, finiteness from the exponent
 * bits. Every index into a buffer is checked against its compile-time size.
 */
#include "atboard.h"

#include <float.h>
#include <limits.h>

/* float must be IEEE-754 binary32 (the wire's f32) */
typedef char atb_float_is_binary32[(sizeof(float) == 4 && FLT_MANT_DIG == 24 &&
                                    FLT_MAX_EXP == 128) ? 1 : -1];
typedef char atb_axes_fit[(ATB_MAX_AXES >= 1 && ATB_MAX_AXES <= 8) ? 1 : -1];
typedef char atb_tx_fits_cobs[(ATB_TX_MAX - 2u < 254u) ? 1 : -1];

/* message type ids (SPEC.md section 5) */
enum {
    T_HELLO = 0x01, T_PING = 0x02, T_STOP = 0x03, T_CLEAR_FAULT = 0x04, T_SET_LIMITS = 0x05,
    T_GET_LIMITS = 0x06, T_STREAM = 0x07, T_SET_OUTPUT = 0x08, T_START_RELAY = 0x09,
    T_SET_PID = 0x0A, T_SET_SETPOINT = 0x0B, T_SET_OFFSET = 0x0C, T_STORE_GAINS = 0x0D,
    T_HELLO_REPLY = 0x80, T_ACK = 0x81, T_NAK = 0x82, T_PONG = 0x83, T_LIMITS = 0x84,
    T_STOPPED = 0x85, T_SAMPLE = 0x90, T_FAULT = 0x91
};

/* payload sizes of the requests, by type id 0x01..0x0D */
static const uint8_t request_size[14] = {0, 2, 8, 0, 0, 19, 1, 4, 5, 21, 33, 5, 5, 13};

#define HELLO_REPLY_SIZE 48u
#define SAMPLE_SIZE 19u
#define FAULT_SIZE 10u

/* Sample.flags bits */
#define FLAG_STREAMING 0x0001u
#define FLAG_FAULT 0x0010u
#define FLAG_CLAMPED 0x0020u
#define FLAG_WATCHDOG_ARMED 0x0040u
#define FLAG_LIMITS_SET 0x0080u
#define FLAG_RELAY_HIGH 0x0100u

/* ------------------------------------------------------------------ float and byte helpers */

typedef union {
    float f;
    uint32_t u;
} f32bits;

static uint32_t float_bits(float x)
{
    f32bits v;
    v.f = x;
    return v.u;
}

static float bits_float(uint32_t u)
{
    f32bits v;
    v.u = u;
    return v.f;
}

static bool finite(float x) { return (float_bits(x) & 0x7F800000u) != 0x7F800000u; }

static float nan_value(void) { return bits_float(0x7FC00000u); }

static float fabs_(float x) { return x < 0.0f ? -x : x; }

static uint16_t get_u16(const uint8_t *p) { return (uint16_t)(p[0] | ((uint16_t)p[1] << 8)); }

static uint32_t get_u32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) |
           ((uint32_t)p[3] << 24);
}

static float get_f32(const uint8_t *p) { return bits_float(get_u32(p)); }

static void put_u16(uint8_t *p, uint16_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)(v >> 8);
}

static void put_u32(uint8_t *p, uint32_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)((v >> 8) & 0xFFu);
    p[2] = (uint8_t)((v >> 16) & 0xFFu);
    p[3] = (uint8_t)(v >> 24);
}

static void put_f32(uint8_t *p, float v) { put_u32(p, float_bits(v)); }

/* ------------------------------------------------------------------ CRC and COBS */

static uint16_t crc_byte(uint16_t crc, uint8_t byte)
{
    int i;
    crc ^= (uint16_t)((uint16_t)byte << 8);
    for (i = 0; i < 8; i++)
        crc = (crc & 0x8000u) ? (uint16_t)((uint16_t)(crc << 1) ^ 0x1021u) : (uint16_t)(crc << 1);
    return crc;
}

uint16_t atb_crc16(const uint8_t *p, size_t n)
{
    uint16_t crc = 0xFFFFu;
    while (n--)
        crc = crc_byte(crc, *p++);
    return crc;
}

size_t atb_cobs_encode(const uint8_t *in, size_t n, uint8_t *out)
{
    size_t code_pos = 0, i, o = 1;
    uint8_t code = 1;
    for (i = 0; i < n; i++) {
        if (in[i] == 0u) {
            out[code_pos] = code;
            code_pos = o++;
            code = 1;
        } else {
            out[o++] = in[i];
            code++;
        }
    }
    out[code_pos] = code;
    return o;
}

/* ------------------------------------------------------------------ sending */

/* b->tx[1 .. 3+len+2] holds the raw frame; payload is written at b->tx + 4 by the caller. */
static uint8_t *frame_payload(atb_board *b) { return b->tx + 4; }

static void send_frame(atb_board *b, uint8_t type, uint16_t seq, size_t len)
{
    uint8_t *raw = b->tx + 1;
    size_t n = 3u + len, code_pos = 0, i;
    uint8_t code = 1;
    uint16_t crc;
    raw[0] = type;
    put_u16(raw + 1, seq);
    crc = atb_crc16(raw, n);
    put_u16(raw + n, crc);
    n += 2u;
    /* COBS in place: the raw frame starts one byte in, so every data byte stays where it is
     * and each zero becomes the code byte of the block after it (frames < 254 bytes). */
    for (i = 1; i <= n; i++) {
        if (b->tx[i] == 0u) {
            b->tx[code_pos] = code;
            code_pos = i;
            code = 1;
        } else {
            code++;
        }
    }
    b->tx[code_pos] = code;
    b->tx[n + 1u] = 0u;
    b->tx_frames++;
    b->hooks->send(b->hooks->user, b->tx, n + 2u);
}

static void send_ack(atb_board *b, uint8_t type, uint16_t seq)
{
    frame_payload(b)[0] = type;
    send_frame(b, T_ACK, seq, 1u);
}

static void send_nak(atb_board *b, uint8_t type, uint16_t seq, uint8_t code, float detail)
{
    uint8_t *p = frame_payload(b);
    p[0] = type;
    p[1] = code;
    put_f32(p + 2, detail);
    send_frame(b, T_NAK, seq, 6u);
}

static uint16_t next_seq(atb_board *b)
{
    uint16_t s = b->seq;
    b->seq = (uint16_t)(s + 1u);
    return s;
}

static uint32_t device_us(const atb_board *b) { return b->k * b->config->tick_us; }

static void send_fault(atb_board *b, uint8_t axis)
{
    const atb_axis *a = &b->axis[axis];
    uint8_t *p = frame_payload(b);
    p[0] = a->fault;
    p[1] = axis;
    put_f32(p + 2, a->fault_value);
    put_u32(p + 6, a->fault_us);
    send_frame(b, T_FAULT, next_seq(b), FAULT_SIZE);
}

static void put_text(uint8_t *p, const char *s, size_t size)
{
    size_t i = 0;
    if (s != NULL)
        for (; i < size && s[i] != '\0'; i++)
            p[i] = (uint8_t)s[i];
    for (; i < size; i++)
        p[i] = 0u;
}

/* ------------------------------------------------------------------ axis state */

static void go_idle(atb_axis *a)
{
    a->mode = ATB_MODE_IDLE;
    a->host_output = 0.0f;
    a->pid_started = 0;
}

static void enter(atb_board *b, atb_axis *a, uint8_t mode)
{
    a->mode = mode;
    b->last_rx_us = b->hooks->micros(b->hooks->user);
}

static void latch(atb_board *b, atb_axis *a, uint8_t code, float value)
{
    a->fault = code;
    a->fault_value = value;
    a->fault_us = device_us(b);
    a->fault_new = 1;
    go_idle(a);
}

void atb_latch_fault(atb_board *b, uint8_t axis, uint8_t code, float value)
{
    atb_axis *a;
    if (b->config == NULL || axis >= b->config->axis_count || code == 0u)
        return;
    a = &b->axis[axis];
    if (a->fault != 0u || a->mode == ATB_MODE_IDLE)
        return;
    latch(b, a, code, value);
}

static uint16_t flags(const atb_axis *a)
{
    uint16_t f = (uint16_t)((uint16_t)(a->mode & 7u) << 1);
    if (a->streaming)
        f |= FLAG_STREAMING;
    if (a->fault)
        f |= FLAG_FAULT;
    if (a->clamped)
        f |= FLAG_CLAMPED;
    if (a->limits_set && a->mode != ATB_MODE_IDLE)
        f |= FLAG_WATCHDOG_ARMED;
    if (a->limits_set)
        f |= FLAG_LIMITS_SET;
    if (a->mode == ATB_MODE_RELAY && a->relay_high)
        f |= FLAG_RELAY_HIGH;
    return f;
}

static void rx_reset(atb_rx *r);

/* ------------------------------------------------------------------ init */

int atb_init(atb_board *b, const atb_config *config, const atb_hooks *hooks)
{
    uint8_t *p = (uint8_t *)b;
    size_t i;
    uint32_t id;
    for (i = 0; i < sizeof *b; i++)
        p[i] = 0u;
    /* kept even when the config is refused: atb_tick() then writes zero to every axis */
    b->hooks = hooks;
    if (config == NULL || hooks == NULL || hooks->read_pv == NULL ||
        hooks->write_output == NULL || hooks->micros == NULL || hooks->send == NULL ||
        config->tick_us == 0u || config->axis_count < 1u || config->axis_count > ATB_MAX_AXES ||
        !finite(config->max_output) || !(config->max_output > 0.0f))
        return -1;
    b->config = config;
    b->hooks = hooks;
    b->h = (float)config->tick_us * 1e-6f;
    b->capabilities = (uint8_t)(config->capabilities & ATB_CAP_ALL);
    if (hooks->store_gains != NULL)
        b->capabilities |= ATB_CAP_STORE_GAINS;
    id = config->boot_id;
    if (id == 0u) {
        /* a 32-bit mix (xorshift-multiply) of the clock at power-up */
        id = hooks->micros(hooks->user) ^ 0x9E3779B9u;
        id ^= id >> 16;
        id *= 0x7FEB352Du;
        id ^= id >> 15;
        id *= 0x846CA68Bu;
        id ^= id >> 16;
        if (id == 0u)
            id = 1u;
    }
    b->boot_id = id;
    for (i = 0; i < ATB_MAX_AXES; i++)
        b->axis[i].decimation = 1u;
    b->last_rx_us = hooks->micros(hooks->user);
    rx_reset(&b->rx);
    return 0;
}

/* ------------------------------------------------------------------ requests */

/* Motion refusal: LIMITS_NOT_SET or FAULT_LATCHED; returns 1 when refused (Nak sent). */
static int refuse_motion(atb_board *b, const atb_axis *a, uint8_t type, uint16_t seq)
{
    if (!a->limits_set) {
        send_nak(b, type, seq, ATB_NAK_LIMITS_NOT_SET, 0.0f);
        return 1;
    }
    if (a->fault) {
        send_nak(b, type, seq, ATB_NAK_FAULT_LATCHED, (float)a->fault);
        return 1;
    }
    return 0;
}

static void handle_hello(atb_board *b, uint16_t seq, const uint8_t *p)
{
    const atb_config *c = b->config;
    uint8_t *o;
    uint8_t i;
    uint16_t version = get_u16(p);
    if (version != ATB_PROTOCOL_VERSION) {
        send_nak(b, T_HELLO, seq, ATB_NAK_BAD_VERSION, (float)ATB_PROTOCOL_VERSION);
        return;
    }
    o = frame_payload(b);
    put_u16(o, ATB_PROTOCOL_VERSION);
    put_text(o + 2, c->device_name, 16u);
    put_text(o + 18, c->firmware, 12u);
    put_u32(o + 30, b->boot_id);
    o[34] = c->axis_count;
    put_u32(o + 35, c->tick_us);
    o[39] = b->capabilities;
    put_f32(o + 40, c->max_output);
    put_f32(o + 44, finite(c->pv_resolution) && c->pv_resolution > 0.0f ? c->pv_resolution
                                                                         : 0.0f);
    send_frame(b, T_HELLO_REPLY, seq, HELLO_REPLY_SIZE);
    for (i = 0; i < c->axis_count; i++)
        if (b->axis[i].fault)
            send_fault(b, i);
}

static void handle_ping(atb_board *b, uint16_t seq, const uint8_t *p)
{
    uint8_t *o = frame_payload(b); /* the transmit buffer: never the same as p */
    int i;
    for (i = 0; i < 8; i++)
        o[i] = p[i]; /* nonce and host_us echoed */
    put_u32(o + 8, device_us(b));
    put_u32(o + 12, b->boot_id);
    send_frame(b, T_PONG, seq, 16u);
}

static void handle_stop(atb_board *b, uint16_t seq)
{
    uint8_t i;
    for (i = 0; i < b->config->axis_count; i++) {
        go_idle(&b->axis[i]);
        b->axis[i].offset = 0.0f;
    }
    if (b->stops < ATB_STOP_QUEUE)
        b->stop_seq[b->stops++] = seq;
}

static void handle_set_limits(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float out = get_f32(p + 1), lo = get_f32(p + 5), hi = get_f32(p + 9), rate = get_f32(p + 13);
    uint16_t wd = get_u16(p + 17);
    uint32_t wd_us;
    if (!(out > 0.0f && out <= b->config->max_output)) {
        send_nak(b, T_SET_LIMITS, seq, ATB_NAK_OUT_OF_RANGE, out);
        return;
    }
    if (!(lo < hi)) {
        send_nak(b, T_SET_LIMITS, seq, ATB_NAK_OUT_OF_RANGE, hi);
        return;
    }
    if (rate < 0.0f) {
        send_nak(b, T_SET_LIMITS, seq, ATB_NAK_OUT_OF_RANGE, rate);
        return;
    }
    if (wd == 0u) {
        wd_us = (uint32_t)b->config->default_watchdog_ms * 1000u;
    } else if (wd >= 10u && wd <= 60000u) {
        wd_us = (uint32_t)wd * 1000u;
    } else {
        send_nak(b, T_SET_LIMITS, seq, ATB_NAK_OUT_OF_RANGE, (float)wd);
        return;
    }
    a->output_limit = out;
    a->pv_low = lo;
    a->pv_high = hi;
    a->pv_rate_limit = rate;
    a->watchdog_ms = wd;
    a->watchdog_us = wd_us;
    a->limits_set = 1;
    send_ack(b, T_SET_LIMITS, seq);
}

static void handle_get_limits(atb_board *b, uint8_t axis, uint16_t seq)
{
    const atb_axis *a = &b->axis[axis];
    uint8_t *o;
    if (!a->limits_set) {
        send_nak(b, T_GET_LIMITS, seq, ATB_NAK_LIMITS_NOT_SET, 0.0f);
        return;
    }
    o = frame_payload(b);
    o[0] = axis;
    put_f32(o + 1, a->output_limit);
    put_f32(o + 5, a->pv_low);
    put_f32(o + 9, a->pv_high);
    put_f32(o + 13, a->pv_rate_limit);
    put_u16(o + 17, a->watchdog_ms);
    send_frame(b, T_LIMITS, seq, 19u);
}

static void handle_stream(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    uint8_t enable = p[1];
    uint16_t dec = get_u16(p + 2);
    if (enable > 1u) {
        send_nak(b, T_STREAM, seq, ATB_NAK_OUT_OF_RANGE, (float)enable);
        return;
    }
    if (enable && dec < 1u) {
        send_nak(b, T_STREAM, seq, ATB_NAK_OUT_OF_RANGE, (float)dec);
        return;
    }
    a->streaming = enable;
    if (enable)
        a->decimation = dec;
    send_ack(b, T_STREAM, seq);
}

static void handle_set_output(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float out = get_f32(p + 1);
    if (out == 0.0f && (!a->limits_set || a->fault)) {
        a->host_output = 0.0f; /* a zero command is always harmless */
        send_ack(b, T_SET_OUTPUT, seq);
        return;
    }
    if (refuse_motion(b, a, T_SET_OUTPUT, seq))
        return;
    if (fabs_(out) > a->output_limit) {
        send_nak(b, T_SET_OUTPUT, seq, ATB_NAK_OUT_OF_RANGE, out);
        return;
    }
    a->host_output = out;
    if (a->mode != ATB_MODE_HOST)
        enter(b, a, ATB_MODE_HOST);
    send_ack(b, T_SET_OUTPUT, seq);
}

static void handle_start_relay(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float centre = get_f32(p + 1), bias = get_f32(p + 5), hi = get_f32(p + 9);
    float lo = get_f32(p + 13), hyst = get_f32(p + 17), v;
    if (!(b->capabilities & ATB_CAP_RELAY)) {
        send_nak(b, T_START_RELAY, seq, ATB_NAK_NOT_ALLOWED, (float)a->mode);
        return;
    }
    if (refuse_motion(b, a, T_START_RELAY, seq))
        return;
    if (hi < 0.0f || lo < 0.0f || hyst < 0.0f) {
        send_nak(b, T_START_RELAY, seq, ATB_NAK_OUT_OF_RANGE,
                 hi < 0.0f ? hi : lo < 0.0f ? lo : hyst);
        return;
    }
    v = bias + hi;
    if (!(fabs_(v) <= a->output_limit)) {
        send_nak(b, T_START_RELAY, seq, ATB_NAK_OUT_OF_RANGE, v);
        return;
    }
    v = bias - lo;
    if (!(fabs_(v) <= a->output_limit)) {
        send_nak(b, T_START_RELAY, seq, ATB_NAK_OUT_OF_RANGE, v);
        return;
    }
    a->relay_centre = centre;
    a->relay_bias = bias;
    a->relay_amp_high = hi;
    a->relay_amp_low = lo;
    a->relay_hyst = hyst;
    a->relay_high = a->pv < centre;
    enter(b, a, ATB_MODE_RELAY);
    send_ack(b, T_START_RELAY, seq);
}

static void handle_set_pid(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float kp = get_f32(p + 1), ki = get_f32(p + 5), kd = get_f32(p + 9), w = get_f32(p + 13);
    float n = get_f32(p + 17), tt = get_f32(p + 21), sp = get_f32(p + 25), bias = get_f32(p + 29);
    float h = b->h, tf = 0.0f, ad, bd, ki_h, aw;
    if (!(b->capabilities & ATB_CAP_PID)) {
        send_nak(b, T_SET_PID, seq, ATB_NAK_NOT_ALLOWED, (float)a->mode);
        return;
    }
    if (refuse_motion(b, a, T_SET_PID, seq))
        return;
    if (!(w >= 0.0f && w <= 1.0f)) {
        send_nak(b, T_SET_PID, seq, ATB_NAK_OUT_OF_RANGE, w);
        return;
    }
    if (!(n > 0.0f)) {
        send_nak(b, T_SET_PID, seq, ATB_NAK_OUT_OF_RANGE, n);
        return;
    }
    if (tt < 0.0f) {
        send_nak(b, T_SET_PID, seq, ATB_NAK_OUT_OF_RANGE, tt);
        return;
    }
    if (fabs_(bias) > a->output_limit) {
        send_nak(b, T_SET_PID, seq, ATB_NAK_OUT_OF_RANGE, bias);
        return;
    }
    /* per-tick coefficients (autotune.core.pid.per_tick): Tf = |kd / (kp N)| */
    if (kd != 0.0f && kp != 0.0f)
        tf = fabs_(kd / (kp * n));
    ad = tf / (tf + h);
    bd = kd / (tf + h);
    ki_h = ki * h;
    aw = tt > 0.0f ? h / tt : 0.0f;
    if (!finite(tf) || !finite(ad) || !finite(bd) || !finite(ki_h) || !finite(aw)) {
        /* gains so extreme that the per-tick coefficients overflow single precision */
        send_nak(b, T_SET_PID, seq, ATB_NAK_OUT_OF_RANGE, nan_value());
        return;
    }
    a->kp = kp;
    a->b = w;
    a->setpoint = sp;
    a->bias = bias;
    a->ki_h = ki_h;
    a->ad = ad;
    a->bd = kd != 0.0f ? bd : 0.0f;
    a->aw = aw;
    a->integral = 0.0f;
    a->deriv = 0.0f;
    a->pid_started = 0;
    enter(b, a, ATB_MODE_PID);
    send_ack(b, T_SET_PID, seq);
}

static void handle_set_setpoint(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float sp = get_f32(p + 1);
    if (a->mode == ATB_MODE_PID) {
        a->setpoint = sp;
    } else if (a->mode == ATB_MODE_RELAY) {
        a->relay_centre = sp;
    } else {
        send_nak(b, T_SET_SETPOINT, seq, ATB_NAK_NOT_ALLOWED, (float)a->mode);
        return;
    }
    send_ack(b, T_SET_SETPOINT, seq);
}

static void handle_set_offset(atb_board *b, atb_axis *a, uint16_t seq, const uint8_t *p)
{
    float off = get_f32(p + 1);
    if (!a->limits_set) {
        send_nak(b, T_SET_OFFSET, seq, ATB_NAK_LIMITS_NOT_SET, 0.0f);
        return;
    }
    if (fabs_(off) > a->output_limit) {
        send_nak(b, T_SET_OFFSET, seq, ATB_NAK_OUT_OF_RANGE, off);
        return;
    }
    a->offset = off;
    send_ack(b, T_SET_OFFSET, seq);
}

/* Does every f32 field of this request hold a finite value? (float offsets per type) */
static bool payload_finite(uint8_t type, const uint8_t *p)
{
    uint8_t first, count, i;
    switch (type) {
    case T_SET_LIMITS: first = 1; count = 4; break;
    case T_SET_OUTPUT: case T_SET_SETPOINT: case T_SET_OFFSET: first = 1; count = 1; break;
    case T_START_RELAY: first = 1; count = 5; break;
    case T_SET_PID: first = 1; count = 8; break;
    case T_STORE_GAINS: first = 1; count = 3; break;
    default: return true;
    }
    for (i = 0; i < count; i++)
        if (!finite(get_f32(p + first + 4u * i)))
            return false;
    return true;
}

static void handle_frame(atb_board *b, uint8_t type, uint16_t seq, const uint8_t *p, size_t len)
{
    uint8_t axis;
    atb_axis *a;
    /* any good frame feeds the watchdog, a refused one too, except Stop (SPEC.md 3.4): a
     * Stop never lengthens the time an output may stay on while the host is otherwise silent */
    if (type != T_STOP)
        b->last_rx_us = b->hooks->micros(b->hooks->user);
    /* checks in the order of SPEC.md: type, length, axis, finite values, own rules */
    if (type < T_HELLO || type > T_STORE_GAINS) {
        send_nak(b, type, seq, ATB_NAK_UNKNOWN_TYPE, (float)type);
        return;
    }
    if (len != request_size[type]) {
        send_nak(b, type, seq, ATB_NAK_BAD_LENGTH, (float)request_size[type]);
        return;
    }
    switch (type) {
    case T_HELLO: handle_hello(b, seq, p); return;
    case T_PING: handle_ping(b, seq, p); return;
    case T_STOP: handle_stop(b, seq); return;
    case T_CLEAR_FAULT:
        for (axis = 0; axis < b->config->axis_count; axis++) {
            b->axis[axis].fault = ATB_FAULT_NONE;
            b->axis[axis].fault_new = 0;
        }
        send_ack(b, type, seq);
        return;
    default: break;
    }
    axis = p[0];
    if (axis >= b->config->axis_count) {
        send_nak(b, type, seq, ATB_NAK_BAD_AXIS, (float)b->config->axis_count);
        return;
    }
    if (!payload_finite(type, p)) {
        send_nak(b, type, seq, ATB_NAK_OUT_OF_RANGE, nan_value());
        return;
    }
    a = &b->axis[axis];
    switch (type) {
    case T_SET_LIMITS: handle_set_limits(b, a, seq, p); break;
    case T_GET_LIMITS: handle_get_limits(b, axis, seq); break;
    case T_STREAM: handle_stream(b, a, seq, p); break;
    case T_SET_OUTPUT: handle_set_output(b, a, seq, p); break;
    case T_START_RELAY: handle_start_relay(b, a, seq, p); break;
    case T_SET_PID: handle_set_pid(b, a, seq, p); break;
    case T_SET_SETPOINT: handle_set_setpoint(b, a, seq, p); break;
    case T_SET_OFFSET: handle_set_offset(b, a, seq, p); break;
    default: /* T_STORE_GAINS */
        if (b->hooks->store_gains == NULL ||
            b->hooks->store_gains(b->hooks->user, axis, get_f32(p + 1), get_f32(p + 5),
                                  get_f32(p + 9)) != 0)
            send_nak(b, type, seq, ATB_NAK_NOT_ALLOWED, (float)a->mode);
        else
            send_ack(b, type, seq);
        break;
    }
}

/* ------------------------------------------------------------------ receiving */

static void rx_reset(atb_rx *r)
{
    r->enc_len = 0;
    r->dec_len = 0;
    r->crc = 0xFFFFu;
    r->block_left = 0;
    r->block_code = 0;
}

static void rx_push(atb_rx *r, uint8_t d)
{
    if (r->dec_len >= 2u)
        r->crc = crc_byte(r->crc, r->tail[0]);
    r->tail[0] = r->tail[1];
    r->tail[1] = d;
    if (r->dec_len < ATB_RX_KEEP)
        r->buf[r->dec_len] = d;
    if (r->dec_len < UINT16_MAX)
        r->dec_len++;
}

void atb_rx_byte(atb_board *b, uint8_t byte)
{
    atb_rx *r = &b->rx;
    if (b->config == NULL)
        return;
    if (byte == 0u) {
        if (r->discarding) {
            r->discarding = 0;
        } else if (r->enc_len == 0u) {
            /* empty frame: ignored, not an error */
        } else if (r->block_left != 0u || r->dec_len < 5u || r->dec_len > ATB_MAX_FRAME) {
            b->framing_errors++;
        } else if (r->crc != (uint16_t)(r->tail[0] | ((uint16_t)r->tail[1] << 8))) {
            b->crc_errors++;
        } else {
            b->frames_good++;
            handle_frame(b, r->buf[0], get_u16(r->buf + 1), r->buf + 3,
                         (size_t)r->dec_len - 5u);
        }
        rx_reset(r);
        return;
    }
    if (r->discarding)
        return;
    if (++r->enc_len > ATB_MAX_ENCODED) {
        b->framing_errors++;
        r->discarding = 1;
        rx_reset(r);
        return;
    }
    if (r->block_left == 0u) {
        if (r->enc_len > 1u && r->block_code != 0xFFu)
            rx_push(r, 0u); /* the zero that ended the previous block */
        r->block_code = byte;
        r->block_left = (uint8_t)(byte - 1u);
    } else {
        rx_push(r, byte);
        r->block_left--;
    }
}

void atb_rx_bytes(atb_board *b, const uint8_t *data, size_t n)
{
    size_t i;
    for (i = 0; i < n; i++)
        atb_rx_byte(b, data[i]);
}

/* ------------------------------------------------------------------ tick */

static float relay_output(atb_axis *a, float pv)
{
    float e = a->relay_centre - pv;
    if (e > a->relay_hyst)
        a->relay_high = 1;
    else if (e < -a->relay_hyst)
        a->relay_high = 0;
    return a->relay_high ? a->relay_bias + a->relay_amp_high : a->relay_bias - a->relay_amp_low;
}

/* One PID tick (autotune.core.pid.DiscretePid, SPEC.md SetPid); returns the unsaturated
 * output v (the offset is added and the sum clamped by the caller). */
static float pid_output(atb_axis *a, float pv)
{
    float e, v, u, inc, lim = a->output_limit;
    bool high, low;
    if (!a->pid_started) {
        a->pv_prev = pv; /* no derivative kick on the first tick */
        a->pid_started = 1;
    }
    e = a->setpoint - pv;
    a->deriv = a->ad * a->deriv - a->bd * (pv - a->pv_prev);
    a->pv_prev = pv;
    v = a->bias + a->kp * (a->b * a->setpoint - pv) + a->integral + a->deriv;
    /* saturation is decided on the total drive, the PID's output plus the test offset */
    high = v + a->offset > lim;
    low = v + a->offset < -lim;
    u = high ? lim - a->offset : low ? -lim - a->offset : v;
    inc = a->ki_h * e;
    if (a->aw > 0.0f)
        a->integral += inc + a->aw * (u - v); /* back-calculation */
    else if (!((high && inc > 0.0f) || (low && inc < 0.0f)))
        a->integral += inc; /* clamping: hold while the error drives deeper into saturation */
    return v;
}

static void tick_axis(atb_board *b, uint8_t i, uint32_t now)
{
    atb_axis *a = &b->axis[i];
    const atb_hooks *hk = b->hooks;
    float pv = a->pv, pvf, rate = 0.0f, u = 0.0f, lim = a->output_limit;
    int sensor_failed = hk->read_pv(hk->user, i, &pv) != 0;
    if (sensor_failed || !finite(pv)) {
        pv = a->pv; /* keep the last good reading */
        sensor_failed = 1;
    }
    a->pv = pv;
    /* median of the last three reads for the rate check (a one-tick spike does not trip it) */
    if (a->hist_n < 3u) {
        a->pv_hist[a->hist_n++] = pv;
    } else {
        a->pv_hist[0] = a->pv_hist[1];
        a->pv_hist[1] = a->pv_hist[2];
        a->pv_hist[2] = pv;
    }
    if (a->hist_n == 1u) {
        pvf = pv;
    } else if (a->hist_n == 2u) {
        pvf = 0.5f * (a->pv_hist[0] + a->pv_hist[1]);
    } else {
        float x = a->pv_hist[0], y = a->pv_hist[1], z = a->pv_hist[2];
        pvf = x > y ? (y > z ? y : (x > z ? z : x)) : (x > z ? x : (y > z ? z : y));
    }
    if (a->hist_n > 1u)
        rate = (pvf - a->pvf_prev) / b->h;
    a->pvf_prev = pvf;

    if (a->fault == 0u && a->mode != ATB_MODE_IDLE && a->limits_set) {
        if (a->mode == ATB_MODE_HOST)
            u = a->host_output;
        else if (a->mode == ATB_MODE_RELAY)
            u = relay_output(a, pv);
        else
            u = pid_output(a, pv);
        u += a->offset;
        if ((uint32_t)(now - b->last_rx_us) >= a->watchdog_us) {
            latch(b, a, ATB_FAULT_WATCHDOG, (float)(uint32_t)(now - b->last_rx_us) * 1e-6f);
        } else if (sensor_failed) {
            latch(b, a, ATB_FAULT_SENSOR, 0.0f);
        } else if (!(pv >= a->pv_low && pv <= a->pv_high)) {
            latch(b, a, ATB_FAULT_PV_WINDOW, pv);
        } else if (a->pv_rate_limit > 0.0f && fabs_(rate) > a->pv_rate_limit) {
            latch(b, a, ATB_FAULT_PV_RATE, rate);
        }
        if (a->fault)
            u = 0.0f;
    }
    a->clamped = 0;
    if (!finite(u)) {
        u = 0.0f;
    } else if (a->limits_set && fabs_(u) > lim) {
        u = u > 0.0f ? lim : -lim;
        a->clamped = 1;
    }
    a->applied = u;
    if (hk->write_output(hk->user, i, u) != 0 && a->mode != ATB_MODE_IDLE) {
        latch(b, a, ATB_FAULT_DRIVER, 0.0f);
        a->applied = 0.0f;
        (void)hk->write_output(hk->user, i, 0.0f);
    }
}

void atb_tick(atb_board *b)
{
    uint8_t i, n;
    uint32_t now;
    if (b->config == NULL) {
        /* an unusable config: every axis the board state has room for is held at zero */
        if (b->hooks != NULL && b->hooks->write_output != NULL)
            for (i = 0; i < ATB_MAX_AXES; i++)
                (void)b->hooks->write_output(b->hooks->user, i, 0.0f);
        return;
    }
    n = b->config->axis_count;
    now = b->hooks->micros(b->hooks->user);
    for (i = 0; i < n; i++)
        tick_axis(b, i, now);
    for (i = 0; i < n; i++) {
        atb_axis *a = &b->axis[i];
        if (a->streaming && b->k % a->decimation == 0u) {
            uint8_t *p = frame_payload(b);
            float sp = a->mode == ATB_MODE_PID ? a->setpoint
                     : a->mode == ATB_MODE_RELAY ? a->relay_centre : 0.0f;
            p[0] = i;
            put_u32(p + 1, device_us(b));
            put_f32(p + 5, a->pv);
            put_f32(p + 9, a->applied);
            put_f32(p + 13, sp);
            put_u16(p + 17, flags(a));
            send_frame(b, T_SAMPLE, next_seq(b), SAMPLE_SIZE);
        }
        if (a->fault_new) { /* after this tick's Sample, so the host has the evidence first */
            a->fault_new = 0;
            send_fault(b, i);
        }
    }
    for (i = 0; i < b->stops; i++)
        send_frame(b, T_STOPPED, b->stop_seq[i], 0u);
    b->stops = 0;
    b->k++;
}
