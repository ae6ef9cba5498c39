/* ram_size.c - prints the static RAM the board library needs (one atb_board). */
#include <stdio.h>

#include "../atboard.h"

int main(void)
{
    printf("sizeof(atb_board) = %u bytes with ATB_MAX_AXES = %d (one atb_axis = %u bytes, "
           "receiver %u, transmit buffer %u)\n",
           (unsigned)sizeof(atb_board), ATB_MAX_AXES, (unsigned)sizeof(atb_axis),
           (unsigned)sizeof(atb_rx), (unsigned)ATB_TX_MAX);
    return 0;
}
