/*
 * main.c - the board library in a bare main loop, for any framework or none. Replace the four
 * platform_* functions with your UART, timer, sensor and driver code.
 *
 * SAFETY: robot on blocks, area clear, hands away, a physical power cut-off within reach.
 */
#include "atboard.h"

/* ---- your platform (declarations only: implement them for your MCU) ---- */
extern int platform_uart_read(uint8_t *byte);              /* 1 when a byte was there */
extern void platform_uart_write(const uint8_t *p, size_t n); /* buffered, non-blocking */
extern uint32_t platform_micros(void);                     /* free-running, wraps */
extern float platform_sensor(uint8_t axis, int *failed);   /* PV units */
extern int platform_drive(uint8_t axis, float output);     /* output units; !0 = driver fault */

static int read_pv(void *user, uint8_t axis, float *pv)
{
    int failed = 0;
    (void)user;
    *pv = platform_sensor(axis, &failed);
    return failed;
}

static int write_output(void *user, uint8_t axis, float output)
{
    (void)user;
    return platform_drive(axis, output);
}

static uint32_t micros_hook(void *user)
{
    (void)user;
    return platform_micros();
}

static void send(void *user, const uint8_t *data, size_t n)
{
    (void)user;
    platform_uart_write(data, n);
}

static const atb_hooks hooks = {NULL, read_pv, write_output, micros_hook, send, NULL};
static const atb_config config = {"my-board", "fw-0.1", 5000u, 1u, 100.0f, 0.0f, 250u,
                                  ATB_CAP_ALL, 0u};
static atb_board board;

int main(void)
{
    uint32_t next;
    uint8_t byte;
    platform_drive(0, 0.0f);
    if (atb_init(&board, &config, &hooks) != 0)
        for (;;) {
        } /* a configuration error: stay here with the motor off */
    next = platform_micros();
    for (;;) {
        while (platform_uart_read(&byte))
            atb_rx_byte(&board, byte);
        if ((int32_t)(platform_micros() - next) >= 0) {
            next += config.tick_us;
            atb_tick(&board);
        }
    }
}
