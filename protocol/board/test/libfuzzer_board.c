/* libfuzzer_board.c - libFuzzer entry: the input bytes go to the receiver, a tick after each
 * delimiter, on a board of two axes. Build with `make libfuzzer` (clang); optional, not part
 * of the tests. */
#include <stddef.h>
#include <stdint.h>

#include "../atboard.h"

#define AXES (ATB_MAX_AXES < 2 ? ATB_MAX_AXES : 2) /* built with -DATB_MAX_AXES=2 */

static float last_limit;
static atb_board board;
static uint32_t clock_us;

static int read_pv(void *u, uint8_t a, float *pv) { (void)u; (void)a; *pv = (float)(clock_us % 997u) / 100.0f - 5.0f; return 0; }
static int write_output(void *u, uint8_t a, float o)
{
    (void)u;
    last_limit = board.axis[a].output_limit;
    if (o != o || o > last_limit + 1e-3f || o < -last_limit - 1e-3f)
        __builtin_trap();
    return 0;
}
static uint32_t micros(void *u) { (void)u; return clock_us; }
static void send(void *u, const uint8_t *d, size_t n) { (void)u; (void)d; if (n > ATB_TX_MAX) __builtin_trap(); }

int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size);
int LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
    static const atb_hooks hooks = {NULL, read_pv, write_output, micros, send, NULL};
    static const atb_config cfg = {"lf", "lf", 1000u, AXES, 100.0f, 0.0f, 250u, ATB_CAP_ALL, 1u};
    size_t i;
    atb_init(&board, &cfg, &hooks);
    for (i = 0; i < size; i++) {
        atb_rx_byte(&board, data[i]);
        if (data[i] == 0) {
            clock_us += 1000u;
            atb_tick(&board);
        }
    }
    return 0;
}
