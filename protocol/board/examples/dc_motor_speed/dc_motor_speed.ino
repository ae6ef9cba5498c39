/*
 * dc_motor_speed.ino - wheel speed loop of a DC motor on an H-bridge with a quadrature
 * encoder, tuned over USB serial with `autotune tune`. An Arduino-style sketch: copy
 * atboard.h and atboard.c (protocol/board/) next to it.
 *
 * PV:     wheel speed in rad/s, from encoder counts over one tick.
 * Output: motor duty in percent, -100..100 (the sign picks the H-bridge direction).
 * Tick:   2 ms (500 Hz); the board runs the relay and the PID itself (device loop).
 *
 * SAFETY: put the robot on blocks, keep the area clear and hands away, and keep a physical
 * power cut-off (an emergency stop or the main breaker) within reach. The software abort
 * and the watchdog are no substitute for it.
 *
 * Wiring (change to your board): encoder A -> pin 2 (interrupt), encoder B -> pin 3,
 * H-bridge PWM -> pin 9, direction -> pin 8, driver fault (active low) -> pin 7.
 */
#include "atboard.h"

static const uint8_t PIN_ENC_A = 2, PIN_ENC_B = 3, PIN_PWM = 9, PIN_DIR = 8, PIN_FAULT = 7;
static const float COUNTS_PER_REV = 1024.0f * 4.0f;  /* 1024-line encoder, all four edges */
static const float TICK_S = 0.002f;
/* one count in one tick, in rad/s: the resolution the board declares in the handshake */
static const float RAD_S_PER_COUNT = 6.2831853f / COUNTS_PER_REV / TICK_S;

static volatile long encoder_count;
static long last_count;

static void on_encoder_a(void)
{
    /* quadrature: A leads B forwards */
    if (digitalRead(PIN_ENC_A) == digitalRead(PIN_ENC_B))
        encoder_count--;
    else
        encoder_count++;
}

/* hook: PV = wheel speed, counts since the last tick times rad/s per count */
static int read_pv(void *user, uint8_t axis, float *pv)
{
    long now, delta;
    (void)user;
    (void)axis;
    noInterrupts();
    now = encoder_count;
    interrupts();
    delta = now - last_count;
    last_count = now;
    *pv = (float)delta * RAD_S_PER_COUNT;
    return 0;
}

/* hook: output in percent duty; positive makes the wheel (and so the PV) go forwards */
static int write_output(void *user, uint8_t axis, float duty)
{
    int pwm;
    (void)user;
    (void)axis;
    digitalWrite(PIN_DIR, duty >= 0.0f ? HIGH : LOW);
    pwm = (int)((duty >= 0.0f ? duty : -duty) * 2.55f + 0.5f);
    analogWrite(PIN_PWM, pwm > 255 ? 255 : pwm);
    return digitalRead(PIN_FAULT) == LOW; /* non-zero: the driver reports a fault */
}

static uint32_t clock_us(void *user)
{
    (void)user;
    return micros();
}

/* hook: frames to the host; Serial.write buffers them (drop when the buffer is full) */
static void send_bytes(void *user, const uint8_t *data, size_t n)
{
    (void)user;
    if ((size_t)Serial.availableForWrite() >= n)
        Serial.write(data, n);
}

static const atb_hooks hooks = {NULL, read_pv, write_output, clock_us, send_bytes, NULL};
static const atb_config config = {
    "cart-wheel-left",  /* device name (16 bytes at most) */
    "speed-1.0",        /* firmware */
    2000u,              /* tick, us */
    1u,                 /* axes */
    100.0f,             /* max output limit: 100 % duty */
    0.0f,               /* PV resolution: set in setup() (one count per tick) */
    250u,               /* default watchdog, ms */
    ATB_CAP_ALL,        /* host loop, device relay, device PID */
    0u                  /* boot id: from micros() */
};
static atb_config cfg;
static atb_board board;
static uint32_t next_tick;

void setup(void)
{
    pinMode(PIN_ENC_A, INPUT_PULLUP);
    pinMode(PIN_ENC_B, INPUT_PULLUP);
    pinMode(PIN_FAULT, INPUT_PULLUP);
    pinMode(PIN_DIR, OUTPUT);
    analogWrite(PIN_PWM, 0); /* motor off until the host says otherwise */
    attachInterrupt(digitalPinToInterrupt(PIN_ENC_A), on_encoder_a, CHANGE);
    Serial.begin(115200);
    cfg = config;
    cfg.pv_resolution = RAD_S_PER_COUNT;
    atb_init(&board, &cfg, &hooks);
    next_tick = micros();
}

void loop(void)
{
    while (Serial.available() > 0)
        atb_rx_byte(&board, (uint8_t)Serial.read());
    if ((int32_t)(micros() - next_tick) >= 0) {
        next_tick += cfg.tick_us;
        atb_tick(&board); /* reads the PV, runs the loop, writes the output, streams */
    }
}
