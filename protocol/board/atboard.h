/*
 * atboard.h - the board side of the autotune wire protocol (protocol/SPEC.md, version 2).
 *
 * Portable C99, no heap, no dependency beyond the freestanding headers <stdint.h>,
 * <stddef.h> and <stdbool.h>. Every buffer is a member of `atb_board`, sized at compile time:
 * declare one `atb_board` (static or global) and the library needs no other memory.
 *
 * What it does for you: COBS framing and CRC-16/CCITT-FALSE, every message of SPEC.md, the
 * handshake with capabilities and the declared PV resolution, safety limits with read-back,
 * the watchdog, the fault latch, the output clamp, the board-side relay and the board-side PID
 * (parallel form, derivative on the measurement through a first-order filter, setpoint weight,
 * anti-windup by back-calculation or by conditional integration), and the sample stream with
 * its decimation.
 *
 * What you do (the integration, see examples/):
 *
 *   static atb_board board;
 *   static const atb_hooks hooks = { NULL, read_pv, write_output, micros, send_bytes, NULL };
 *   static const atb_config config = {
 *       "cart-left", "fw-1.0", 2000u, 1u, 100.0f, 0.05f, 250u, ATB_CAP_ALL, 0u };
 *   atb_init(&board, &config, &hooks);
 *   for (;;) {
 *       while (uart_has_byte()) atb_rx_byte(&board, uart_read_byte());
 *       if (tick_due()) atb_tick(&board);            // every config.tick_us microseconds
 *   }
 *
 * Call atb_tick() and atb_rx_byte() from the same context (both from the main loop, or both
 * from one interrupt priority): the library takes no locks. Replies go out from within
 * atb_rx_byte() through hooks.send; Sample, Fault and Stopped frames from within atb_tick().
 *
 * Units: PV in the loop's PV units, output in output units, gains in output units per PV unit
 * (ki per second, kd in seconds), times on the wire in microseconds. Sign convention: a
 * positive output makes the PV rise.
 *
 * The library uses `float` arithmetic (single precision, one FPU instruction on a Cortex-M4F;
 * soft-float elsewhere) and assumes `float` is IEEE-754 binary32 (checked at compile time).
 */
#ifndef ATBOARD_H
#define ATBOARD_H

#include <stdbool.h>
#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* ------------------------------------------------------------------ compile-time sizes */

/** Number of axes the board state has room for (override with -DATB_MAX_AXES=n, 1..8).
 *  Every axis has its own limits, mode, fault latch and sample stream; the watchdog measures
 *  the one host's silence against each moving axis's own watchdog_ms; Stop and ClearFault act
 *  on every axis at once (SPEC.md 0x03, 0x04). */
#ifndef ATB_MAX_AXES
#define ATB_MAX_AXES 1
#endif

/** Stop requests remembered between two ticks (each gets its Stopped at the next tick; a
 *  Stop beyond this many within one tick gets no reply and the host sends it again). */
#ifndef ATB_STOP_QUEUE
#define ATB_STOP_QUEUE 4
#endif

/** Protocol version this library speaks (SPEC.md section 9). */
#define ATB_PROTOCOL_VERSION 2u

/** Largest raw frame a host may send (SPEC.md 3.1) and its COBS-encoded size. */
#define ATB_MAX_FRAME 256u
#define ATB_MAX_ENCODED 258u

/** Decoded bytes kept of a received frame: header (3) + the longest request payload (SetPid,
 *  33). Longer frames are still checked (CRC) and answered with Nak(BAD_LENGTH). */
#define ATB_RX_KEEP 36u

/** Longest frame the board sends: HelloReply, 3 + 48 + 2 raw bytes, +1 COBS, +1 delimiter. */
#define ATB_TX_MAX 55u

/* ------------------------------------------------------------------ protocol constants */

/** Capability bits of the HelloReply (SPEC.md 0x80). */
#define ATB_CAP_HOST_LOOP 0x01u   /**< SetOutput (the host closes the loop) */
#define ATB_CAP_RELAY 0x02u       /**< StartRelay (device relay) */
#define ATB_CAP_PID 0x04u         /**< SetPid (device PID) */
#define ATB_CAP_STORE_GAINS 0x08u /**< StoreGains: set by the library when hooks.store_gains */
#define ATB_CAP_ALL (ATB_CAP_HOST_LOOP | ATB_CAP_RELAY | ATB_CAP_PID)

/** Axis modes (Sample.flags bits 1-3). */
enum atb_mode { ATB_MODE_IDLE = 0, ATB_MODE_HOST = 1, ATB_MODE_RELAY = 2, ATB_MODE_PID = 3 };

/** Fault codes (Fault.code); 0 = none latched. */
enum atb_fault {
    ATB_FAULT_NONE = 0,
    ATB_FAULT_WATCHDOG = 1,     /**< host silent longer than watchdog_ms; value: silence, s */
    ATB_FAULT_PV_WINDOW = 2,    /**< PV outside [pv_low, pv_high]; value: the PV */
    ATB_FAULT_PV_RATE = 3,      /**< |dPV/dt| above pv_rate_limit; value: the rate, PV units/s */
    ATB_FAULT_OUTPUT_LIMIT = 4, /**< applied output beyond the limit (your read-back check) */
    ATB_FAULT_DRIVER = 5,       /**< motor driver fault (write_output returned non-zero) */
    ATB_FAULT_SENSOR = 6        /**< sensor read failed (read_pv returned non-zero) */
};

/** Nak codes (SPEC.md, Ack / Nak). */
enum atb_nak {
    ATB_NAK_BAD_VERSION = 1,
    ATB_NAK_UNKNOWN_TYPE = 2,
    ATB_NAK_BAD_LENGTH = 3,
    ATB_NAK_OUT_OF_RANGE = 4,
    ATB_NAK_BAD_AXIS = 5,
    ATB_NAK_FAULT_LATCHED = 6,
    ATB_NAK_NOT_ALLOWED = 7,
    ATB_NAK_LIMITS_NOT_SET = 8
};

/* ------------------------------------------------------------------ what you provide */

/**
 * The integrator's hooks. `user` is passed back to every hook unchanged.
 * read_pv, write_output, micros and send are required; store_gains is optional.
 */
typedef struct atb_hooks {
    void *user;
    /** Read the PV of `axis` into *pv (PV units). Called once per axis at the start of every
     *  tick. Return 0, or non-zero when the read failed: the axis then latches SENSOR if it is
     *  moving, and *pv is ignored (the last good PV is kept). */
    int (*read_pv)(void *user, uint8_t axis, float *pv);
    /** Apply `output` (output units, already within +/-output_limit; 0 when idle or faulted)
     *  to `axis` until the next call. Called once per axis every tick. Return 0, or non-zero
     *  when the motor driver reports a fault (overcurrent, overtemperature): a moving axis
     *  then latches DRIVER and write_output is called again with 0 in the same tick. */
    int (*write_output)(void *user, uint8_t axis, float output);
    /** A free-running microsecond clock, wrapping at 2^32 (micros() on Arduino). The
     *  watchdog measures host silence with it, so it keeps working when ticks run late. */
    uint32_t (*micros)(void *user);
    /** Send `n` bytes to the host: always one whole frame, its 0x00 delimiter included
     *  (n <= ATB_TX_MAX). Copy them into your UART transmit buffer; the library reuses
     *  its buffer after the call returns. If your buffer is full, drop the whole frame. */
    void (*send)(void *user, const uint8_t *data, size_t n);
    /** Optional (NULL: the board does not offer StoreGains): store the gains of `axis` in
     *  non-volatile memory. Return 0 on success (Ack), non-zero to refuse (Nak NOT_ALLOWED). */
    int (*store_gains)(void *user, uint8_t axis, float kp, float ki, float kd);
} atb_hooks;

/**
 * What the board says about itself. Keep it alive (static const) while the board runs.
 */
typedef struct atb_config {
    const char *device_name;      /**< up to 16 bytes of UTF-8 (longer is cut), e.g. "cart-left" */
    const char *firmware;         /**< up to 12 bytes, e.g. "fw-1.0" */
    uint32_t tick_us;             /**< the period you call atb_tick() with, microseconds, > 0 */
    uint8_t axis_count;           /**< axes in use, 1..ATB_MAX_AXES */
    float max_output;             /**< largest output_limit the board accepts, output units */
    float pv_resolution;          /**< PV quantisation step (e.g. one encoder count in PV
                                       units), 0 = not declared */
    uint16_t default_watchdog_ms; /**< watchdog used when SetLimits sends watchdog_ms = 0 */
    uint8_t capabilities;         /**< ATB_CAP_* bits to offer (host loop, relay, PID) */
    uint32_t boot_id;             /**< random non-zero number for this power-up (a hardware
                                       RNG, ADC noise); 0: derived from micros() at init */
} atb_config;

/* ------------------------------------------------------------------ the state (read-only) */

/** One axis. Read it for diagnostics (e.g. to light a fault LED); change it only through
 *  the protocol or atb_latch_fault(). */
typedef struct atb_axis {
    /* limits (valid when limits_set) */
    float output_limit, pv_low, pv_high, pv_rate_limit;
    uint32_t watchdog_us;   /* effective watchdog period, us */
    uint16_t watchdog_ms;   /* as sent (read back by GetLimits) */
    uint16_t decimation;    /* stream every decimation-th tick */
    /* mode and its parameters */
    float host_output, offset;
    float relay_centre, relay_bias, relay_amp_high, relay_amp_low, relay_hyst;
    float kp, b, setpoint, bias;            /* PID (parallel form) */
    float ki_h, ad, bd, aw;                 /* per tick: ki h, Tf/(Tf+h), kd/(Tf+h), h/Tt */
    float integral, deriv, pv_prev;         /* PID state */
    /* measurement and safety */
    float pv;                               /* last PV read */
    float pv_hist[3];                       /* last three PV reads (rate check) */
    float pvf_prev;                         /* previous filtered PV */
    float applied;                          /* output applied this tick */
    float fault_value;                      /* Fault.value of the latched fault */
    uint32_t fault_us;                      /* device time the fault latched, us */
    uint8_t mode;                           /* enum atb_mode */
    uint8_t fault;                          /* enum atb_fault, 0 = none */
    uint8_t fault_new;                      /* latched in this tick: send its Fault frame */
    uint8_t limits_set, streaming, relay_high, clamped, pid_started, hist_n;
} atb_axis;

/** Receiver state: COBS is decoded and the CRC computed on the fly, byte by byte. */
typedef struct atb_rx {
    uint16_t enc_len;       /* encoded bytes since the last delimiter */
    uint16_t dec_len;       /* decoded bytes */
    uint16_t crc;           /* CRC of the decoded bytes except the last two */
    uint8_t block_left;     /* data bytes left in the current COBS block */
    uint8_t block_code;     /* code byte of the current block */
    uint8_t discarding;     /* an overlong frame is being skipped up to the next 0x00 */
    uint8_t tail[2];        /* the last two decoded bytes (the CRC once the frame ends) */
    uint8_t buf[ATB_RX_KEEP];
} atb_rx;

/** The whole board. Declare one; atb_init() sets every member. */
typedef struct atb_board {
    const atb_config *config;
    const atb_hooks *hooks;
    uint32_t k;                    /* tick counter; device time = k * tick_us (mod 2^32) */
    uint32_t boot_id;
    uint32_t last_rx_us;           /* micros() at the last good frame from the host */
    float h;                       /* tick period, s */
    uint16_t seq;                  /* counter of unsolicited frames (Sample, Fault) */
    uint8_t capabilities;
    uint8_t stops;                 /* pending Stop replies */
    uint16_t stop_seq[ATB_STOP_QUEUE];
    /* reception counters (diagnostics; the protocol does not report them) */
    uint32_t frames_good, crc_errors, framing_errors, tx_frames;
    atb_rx rx;
    uint8_t tx[ATB_TX_MAX];
    atb_axis axis[ATB_MAX_AXES];
} atb_board;

/* ------------------------------------------------------------------ the calls */

/** Set up `b` for `config` and `hooks` (both must stay valid). All axes idle, no limits,
 *  streaming off, no fault. Returns 0, or -1 when the config is unusable (tick_us = 0,
 *  axis_count outside 1..ATB_MAX_AXES, max_output not > 0 or not finite, a required hook
 *  missing): the board then answers nothing and atb_tick() only writes zero outputs, to
 *  every axis 0 .. ATB_MAX_AXES - 1 (when write_output was given). */
int atb_init(atb_board *b, const atb_config *config, const atb_hooks *hooks);

/** Feed one received byte. A frame that completes is handled at once and its reply sent. */
void atb_rx_byte(atb_board *b, uint8_t byte);

/** Feed `n` received bytes (the same as atb_rx_byte for each). */
void atb_rx_bytes(atb_board *b, const uint8_t *data, size_t n);

/** Run one tick (SPEC.md section 7): read every PV, compute the outputs, check the watchdog
 *  and the PV limits, clamp, write the outputs, stream the samples, answer pending Stops.
 *  Call it every config->tick_us microseconds. */
void atb_tick(atb_board *b);

/** Latch a fault on `axis` from your own code (say an overcurrent interrupt flag or an
 *  output read-back, ATB_FAULT_DRIVER / ATB_FAULT_OUTPUT_LIMIT): the output is zero from the
 *  next tick on and the Fault frame goes out then. Ignored while the axis is idle or another
 *  fault is latched. Call it from the same context as atb_tick(). */
void atb_latch_fault(atb_board *b, uint8_t axis, uint8_t code, float value);

/** CRC-16/CCITT-FALSE of n bytes (poly 0x1021, init 0xFFFF; check value 0x29B1). */
uint16_t atb_crc16(const uint8_t *p, size_t n);

/** COBS-encode n bytes (n <= 253) from `in` into `out` (room for n + 1 bytes), no delimiter.
 *  Returns the encoded length (n + 1). */
size_t atb_cobs_encode(const uint8_t *in, size_t n, uint8_t *out);

#ifdef __cplusplus
}
#endif

#endif /* ATBOARD_H */
