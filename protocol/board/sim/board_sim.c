/*
 * board-sim: the atboard library on a simulated plant, served on a pseudo-terminal.
 *
 *   board-sim --pty --gain K --lag T --delay L [options]   (see --help)
 *   board-sim --pty --gain K --lag T --delay L --axes 2 --axis-plant 1:gain=3,lag=0.8
 *
 * With --axes N the board offers N axes, each with its own plant (its own state, delay line
 * and noise); every axis takes the plant of the plain options unless --axis-plant I:... gives
 * axis I other figures.
 * The first stdout line is the pty path to open (nothing else goes to stdout); messages go to
 * stderr. Simulated time runs --speed times faster than the wall clock; every time on the wire
 * is device time, and the library's microsecond clock is simulated time too, so its watchdog
 * counts device time. With --baud the frames leave like a UART at that rate (8N1, 10 bits a
 * byte, in device time); frames beyond a 4096-byte transmit backlog are dropped.
 *
 * Like the mock device, the pty's slave side is closed here: what the board sends while no
 * host has the port open is lost, and a host that opens it sees no stale frames.
 * SIGTERM / SIGINT end it (exit 0) after one stderr line with the reception counters.
 */
#define _XOPEN_SOURCE 600
#define _DEFAULT_SOURCE

#include <errno.h>
#include <fcntl.h>
#include <math.h>
#include <signal.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/select.h>
#include <termios.h>
#include <time.h>
#include <unistd.h>

#include "../atboard.h"
#include "plant.h"

#define TX_BUFFER 4096.0 /* bytes of transmit backlog before frames are dropped */
#define OUT_CAP 65536u   /* bytes queued for the pty */

static volatile sig_atomic_t running = 1;

static void on_signal(int sig)
{
    (void)sig;
    running = 0;
}

typedef struct frame_slot {
    double when; /* sim time the last byte has left the UART, s */
    size_t len;
    uint8_t data[ATB_TX_MAX];
} frame_slot;

typedef struct sim {
    plant pl[ATB_MAX_AXES];
    int axes;
    double pv[ATB_MAX_AXES];
    double speed;
    long baud;
    double t0_wall;
    double line_free; /* sim time the paced line is free */
    int master;
    int peer;
    /* frames waiting for their time (paced) */
    frame_slot *queue;
    size_t q_head, q_len, q_cap;
    /* bytes the pty did not take yet */
    uint8_t out[OUT_CAP];
    size_t out_len;
    unsigned long tx_dropped;
    float stored[ATB_MAX_AXES][3];
    int verbose;
} sim;

static sim S;

static double wall_now(void)
{
    struct timespec ts;
    clock_gettime(CLOCK_MONOTONIC, &ts);
    return (double)ts.tv_sec + 1e-9 * (double)ts.tv_nsec;
}

static double sim_now(void) { return (wall_now() - S.t0_wall) * S.speed; }

/* ------------------------------------------------------------------ hooks */

static int hook_read_pv(void *user, uint8_t axis, float *pv)
{
    (void)user;
    *pv = (float)S.pv[axis];
    return 0;
}

static float applied[ATB_MAX_AXES];

static int hook_write_output(void *user, uint8_t axis, float output)
{
    (void)user;
    applied[axis] = output;
    return 0;
}

static uint32_t hook_micros(void *user)
{
    (void)user;
    return (uint32_t)(uint64_t)llround(sim_now() * 1e6);
}

static void out_append(const uint8_t *data, size_t n)
{
    if (S.out_len + n > OUT_CAP) {
        S.tx_dropped++;
        return;
    }
    memcpy(S.out + S.out_len, data, n);
    S.out_len += n;
}

static void hook_send(void *user, const uint8_t *data, size_t n)
{
    double now, start;
    frame_slot *slot;
    (void)user;
    if (!S.baud) {
        out_append(data, n);
        return;
    }
    now = sim_now();
    if (S.line_free - now > TX_BUFFER * 10.0 / (double)S.baud || S.q_len == S.q_cap) {
        S.tx_dropped++; /* the UART's transmit buffer is full: the frame is lost */
        return;
    }
    start = S.line_free > now ? S.line_free : now;
    S.line_free = start + (double)n * 10.0 / (double)S.baud;
    slot = &S.queue[(S.q_head + S.q_len) % S.q_cap];
    slot->when = S.line_free;
    slot->len = n;
    memcpy(slot->data, data, n);
    S.q_len++;
}

static int hook_store_gains(void *user, uint8_t axis, float kp, float ki, float kd)
{
    (void)user;
    S.stored[axis][0] = kp;
    S.stored[axis][1] = ki;
    S.stored[axis][2] = kd;
    return 0;
}

/* ------------------------------------------------------------------ pty */

static int open_pty(char *path, size_t size)
{
    int m = posix_openpt(O_RDWR | O_NOCTTY), s;
    struct termios tio;
    const char *name;
    if (m < 0 || grantpt(m) != 0 || unlockpt(m) != 0 || (name = ptsname(m)) == NULL)
        return -1;
    snprintf(path, size, "%s", name);
    s = open(path, O_RDWR | O_NOCTTY);
    if (s < 0)
        return -1;
    if (tcgetattr(s, &tio) == 0) {
        tio.c_iflag &= ~(tcflag_t)(IGNBRK | BRKINT | PARMRK | ISTRIP | INLCR | IGNCR | ICRNL |
                                   IXON | IXOFF);
        tio.c_oflag &= ~(tcflag_t)OPOST;
        tio.c_lflag &= ~(tcflag_t)(ECHO | ECHONL | ICANON | ISIG | IEXTEN);
        tio.c_cflag &= ~(tcflag_t)(CSIZE | PARENB);
        tio.c_cflag |= CS8;
        tio.c_cc[VMIN] = 1;
        tio.c_cc[VTIME] = 0;
        tcsetattr(s, TCSANOW, &tio);
    }
    close(s);
    fcntl(m, F_SETFL, fcntl(m, F_GETFL) | O_NONBLOCK);
    return m;
}

static void pty_flush(void)
{
    ssize_t w;
    double now = sim_now();
    while (S.q_len && S.queue[S.q_head].when <= now) {
        frame_slot *slot = &S.queue[S.q_head];
        out_append(slot->data, slot->len);
        S.q_head = (S.q_head + 1u) % S.q_cap;
        S.q_len--;
    }
    if (!S.out_len)
        return;
    w = write(S.master, S.out, S.out_len);
    if (w < 0) {
        if (errno == EIO)
            S.out_len = 0; /* nobody has the port open: the bytes are lost, as on a dead line */
        return;
    }
    memmove(S.out, S.out + w, S.out_len - (size_t)w);
    S.out_len -= (size_t)w;
}

static void pty_receive(atb_board *b)
{
    uint8_t buf[4096];
    for (;;) {
        ssize_t n = read(S.master, buf, sizeof buf);
        if (n > 0) {
            S.peer = 1;
            atb_rx_bytes(b, buf, (size_t)n);
            continue;
        }
        if (n < 0 && errno == EIO)
            S.peer = 0; /* no host has the slave open */
        else if (n < 0 && errno == EAGAIN)
            S.peer = 1;
        return;
    }
}

/* ------------------------------------------------------------------ options */

#define STR_(x) #x
#define STR(x) STR_(x)
#define AXES_TEXT STR(ATB_MAX_AXES)
#define MAX_AXIS_PLANTS 32

static void usage(FILE *f)
{
    fputs(
        "usage: board-sim --pty --gain K --lag T --delay L [options]\n"
        "\n"
        "The autotune board library (protocol/board/atboard.c) on a simulated plant\n"
        "K / ((T s + 1)(T2 s + 1)) [1/s] exp(-L s), served on a pseudo-terminal. The first\n"
        "stdout line is the pty path. Invented demo plants only.\n"
        "\n"
        "  --pty             serve on a new pseudo-terminal (required)\n"
        "  --gain K          plant gain, PV units per output unit (per second with\n"
        "                    --integrating)\n"
        "  --lag T           first time constant, s (0 = none)\n"
        "  --lag2 T2         second time constant, s (default 0 = first order)\n"
        "  --delay L         dead time, s\n"
        "  --integrating     an integrator after the lags (position, angle)\n"
        "  --deadband D      actuator dead zone, output units (default 0)\n"
        "  --load W          constant load at the plant input, output units (default 0)\n"
        "  --noise S         sensor noise std, PV units (default 0)\n"
        "  --resolution R    sensor quantisation step, PV units; declared in the handshake\n"
        "                    (default 0 = none)\n"
        "  --period S        device tick, s (default 0.01)\n"
        "  --speed X         simulated time runs X times faster than the wall clock\n"
        "                    (default 1)\n"
        "  --baud N          pace the output like a UART at N baud, 8N1 (default: no pacing)\n"
        "  --max-output U    largest output limit accepted, also the actuator's saturation\n"
        "                    (default 100)\n"
        "  --watchdog S      watchdog when SetLimits sends 0, s (default 0.25)\n"
        "  --axes N          axes, each with its own plant, by default all alike\n"
        "                    (default 1, at most " AXES_TEXT ")\n"
        "  --axis-plant I:KEY=V[,KEY=V...]\n"
        "                    other plant figures for axis I (0-based, < N); KEY is gain,\n"
        "                    lag, lag2, delay, deadband, load, noise or integrating (0/1);\n"
        "                    the figures not named are those of the plain options;\n"
        "                    repeat the option for more axes\n"
        "  --name TEXT       device name in the handshake (default board-sim)\n"
        "  --no-relay        do not offer the device relay\n"
        "  --no-pid          do not offer the device PID\n"
        "  --seed N          noise seed (default 1)\n"
        "  --verbose         log faults and mode changes to stderr\n"
        "  --help            this text\n",
        f);
}

static int number(const char *opt, const char *text, double *out)
{
    char *end;
    double v;
    errno = 0;
    v = strtod(text, &end);
    if (errno || end == text || *end != '\0' || !isfinite(v)) {
        fprintf(stderr, "board-sim: %s: expected a number, got '%s'\n", opt, text);
        return -1;
    }
    *out = v;
    return 0;
}

/* Apply "I:KEY=V,KEY=V" to the plants of `axes` axes; returns 0, or -1 after a message. */
static int axis_plant(const char *spec, plant_params *pps, int axes)
{
    char buf[512], *item, *save = NULL, *colon, *end;
    long axis;
    snprintf(buf, sizeof buf, "%s", spec);
    colon = strchr(buf, ':');
    if (colon == NULL) {
        fprintf(stderr, "board-sim: --axis-plant: expected I:KEY=VALUE[,...], got '%s'\n", spec);
        return -1;
    }
    *colon = '\0';
    errno = 0;
    axis = strtol(buf, &end, 10);
    if (errno || end == buf || *end != '\0' || axis < 0 || axis >= axes) {
        fprintf(stderr, "board-sim: --axis-plant: axis '%s' is not one of 0..%d (see --axes)\n",
                buf, axes - 1);
        return -1;
    }
    for (item = strtok_r(colon + 1, ",", &save); item != NULL; item = strtok_r(NULL, ",", &save)) {
        plant_params *pp = &pps[axis];
        char *eq = strchr(item, '=');
        double v, *target = NULL;
        if (eq == NULL) {
            fprintf(stderr, "board-sim: --axis-plant: expected KEY=VALUE, got '%s'\n", item);
            return -1;
        }
        *eq = '\0';
        if (number(item, eq + 1, &v) != 0)
            return -1;
        if (!strcmp(item, "gain")) target = &pp->gain;
        else if (!strcmp(item, "lag")) target = &pp->lag1;
        else if (!strcmp(item, "lag2")) target = &pp->lag2;
        else if (!strcmp(item, "delay")) target = &pp->delay;
        else if (!strcmp(item, "deadband")) target = &pp->deadband;
        else if (!strcmp(item, "load")) target = &pp->load;
        else if (!strcmp(item, "noise")) target = &pp->noise;
        else if (!strcmp(item, "integrating")) {
            if (v != 0.0 && v != 1.0) {
                fprintf(stderr, "board-sim: --axis-plant: integrating is 0 or 1\n");
                return -1;
            }
            pp->integrating = (int)v;
            continue;
        } else {
            fprintf(stderr, "board-sim: --axis-plant: unknown key '%s' (gain, lag, lag2, delay, "
                            "deadband, load, noise, integrating)\n", item);
            return -1;
        }
        *target = v;
    }
    return 0;
}

/* The figures of one axis's plant in range? returns 0, or -1 after a message. */
static int plant_ok(const plant_params *pp, int axis)
{
    if (pp->delay < 0.0 || pp->lag1 < 0.0 || pp->lag2 < 0.0 || pp->deadband < 0.0 ||
        pp->noise < 0.0) {
        fprintf(stderr, "board-sim: axis %d: times, dead zone and noise must be >= 0\n", axis);
        return -1;
    }
    if (pp->lag1 == 0.0 && pp->lag2 == 0.0 && !pp->integrating) {
        fprintf(stderr, "board-sim: axis %d: the plant needs a lag (--lag T > 0) or "
                        "--integrating\n", axis);
        return -1;
    }
    return 0;
}

int main(int argc, char **argv)
{
    static atb_board board;
    static atb_hooks hooks;
    static atb_config config;
    plant_params pp, pps[ATB_MAX_AXES];
    const char *axis_plants[MAX_AXIS_PLANTS];
    int n_axis_plants = 0;
    double period = 0.01, speed = 1.0, max_output = 100.0, watchdog = 0.25;
    double baud = 0.0, seed = 1.0, axes = 1.0;
    int use_pty = 0, have_gain = 0, have_lag = 0, have_delay = 0, i, relay = 1, pid = 1;
    const char *name = "board-sim";
    char path[256];
    long tick_no = 0;
    uint8_t last_fault[ATB_MAX_AXES] = {0}, last_mode[ATB_MAX_AXES] = {0};

    memset(&pp, 0, sizeof pp);
    for (i = 1; i < argc; i++) {
        const char *a = argv[i];
        const char *val = i + 1 < argc ? argv[i + 1] : NULL;
        double *target = NULL;
        if (!strcmp(a, "--help") || !strcmp(a, "-h")) {
            usage(stdout);
            return 0;
        } else if (!strcmp(a, "--pty")) {
            use_pty = 1;
            continue;
        } else if (!strcmp(a, "--integrating")) {
            pp.integrating = 1;
            continue;
        } else if (!strcmp(a, "--no-relay")) {
            relay = 0;
            continue;
        } else if (!strcmp(a, "--no-pid")) {
            pid = 0;
            continue;
        } else if (!strcmp(a, "--verbose")) {
            S.verbose = 1;
            continue;
        } else if (!strcmp(a, "--name")) {
            if (val == NULL) {
                fprintf(stderr, "board-sim: --name needs a value\n");
                return 2;
            }
            name = val;
            i++;
            continue;
        } else if (!strcmp(a, "--axis-plant")) {
            if (val == NULL) {
                fprintf(stderr, "board-sim: --axis-plant needs a value\n");
                return 2;
            }
            if (n_axis_plants == MAX_AXIS_PLANTS) {
                fprintf(stderr, "board-sim: at most %d --axis-plant options\n", MAX_AXIS_PLANTS);
                return 2;
            }
            axis_plants[n_axis_plants++] = val;
            i++;
            continue;
        }
        if (!strcmp(a, "--gain")) target = &pp.gain, have_gain = 1;
        else if (!strcmp(a, "--lag")) target = &pp.lag1, have_lag = 1;
        else if (!strcmp(a, "--lag2")) target = &pp.lag2;
        else if (!strcmp(a, "--delay")) target = &pp.delay, have_delay = 1;
        else if (!strcmp(a, "--deadband")) target = &pp.deadband;
        else if (!strcmp(a, "--load")) target = &pp.load;
        else if (!strcmp(a, "--noise")) target = &pp.noise;
        else if (!strcmp(a, "--resolution")) target = &pp.resolution;
        else if (!strcmp(a, "--period")) target = &period;
        else if (!strcmp(a, "--speed")) target = &speed;
        else if (!strcmp(a, "--baud")) target = &baud;
        else if (!strcmp(a, "--max-output")) target = &max_output;
        else if (!strcmp(a, "--watchdog")) target = &watchdog;
        else if (!strcmp(a, "--axes")) target = &axes;
        else if (!strcmp(a, "--seed")) target = &seed;
        else {
            fprintf(stderr, "board-sim: unknown option '%s' (see --help)\n", a);
            return 2;
        }
        if (val == NULL) {
            fprintf(stderr, "board-sim: %s needs a value\n", a);
            return 2;
        }
        if (number(a, val, target) != 0)
            return 2;
        i++;
    }
    if (!use_pty || !have_gain || !have_lag || !have_delay) {
        fprintf(stderr, "board-sim: --pty, --gain, --lag and --delay are required (see --help)\n");
        return 2;
    }
    if (!(period >= 1e-5 && period <= 1.0) || !(speed > 0.0) || !(max_output > 0.0) ||
        !(watchdog >= 0.01 && watchdog <= 60.0) || pp.delay < 0.0 || pp.lag1 < 0.0 ||
        pp.lag2 < 0.0 || pp.deadband < 0.0 || pp.noise < 0.0 || pp.resolution < 0.0 ||
        !(baud == 0.0 || baud >= 300.0) || !(axes >= 1.0 && axes <= ATB_MAX_AXES) ||
        floor(axes) != axes || seed < 0.0) {
        fprintf(stderr, "board-sim: an option is out of range: --period 1e-5..1 s, --speed > 0, "
                        "--max-output > 0, --watchdog 0.01..60 s, --baud >= 300, --axes 1..%d, "
                        "times and noise >= 0\n", ATB_MAX_AXES);
        return 2;
    }
    if (pp.lag1 == 0.0 && pp.lag2 == 0.0 && !pp.integrating) {
        fprintf(stderr, "board-sim: the plant needs a lag (--lag T > 0) or --integrating\n");
        return 2;
    }
    S.axes = (int)axes;
    pp.period = period;
    pp.limit = max_output;
    for (i = 0; i < S.axes; i++)
        pps[i] = pp;
    for (i = 0; i < n_axis_plants; i++)
        if (axis_plant(axis_plants[i], pps, S.axes) != 0)
            return 2;
    for (i = 0; i < S.axes; i++) {
        pps[i].seed = (uint64_t)seed * 7919u + (uint64_t)i;
        if (plant_ok(&pps[i], i) != 0)
            return 2;
        if (plant_init(&S.pl[i], &pps[i]) != 0) {
            fprintf(stderr, "board-sim: bad plant parameters\n");
            return 2;
        }
    }
    S.speed = speed;
    S.baud = (long)baud;
    S.q_cap = 4096;
    S.queue = calloc(S.q_cap, sizeof *S.queue);
    if (S.queue == NULL)
        return 1;

    config.device_name = name;
    config.firmware = "atb-1.0";
    config.tick_us = (uint32_t)llround(period * 1e6);
    config.axis_count = (uint8_t)S.axes;
    config.max_output = (float)max_output;
    config.pv_resolution = (float)pp.resolution;
    config.default_watchdog_ms = (uint16_t)llround(watchdog * 1000.0);
    config.capabilities = (uint8_t)(ATB_CAP_HOST_LOOP | (relay ? ATB_CAP_RELAY : 0u) |
                                    (pid ? ATB_CAP_PID : 0u));
    config.boot_id = 0;
    hooks.user = NULL;
    hooks.read_pv = hook_read_pv;
    hooks.write_output = hook_write_output;
    hooks.micros = hook_micros;
    hooks.send = hook_send;
    hooks.store_gains = hook_store_gains;

    S.master = open_pty(path, sizeof path);
    if (S.master < 0) {
        fprintf(stderr, "board-sim: cannot open a pseudo-terminal: %s\n", strerror(errno));
        return 2;
    }
    signal(SIGTERM, on_signal);
    signal(SIGINT, on_signal);
    signal(SIGPIPE, SIG_IGN);

    S.t0_wall = wall_now();
    {
        /* a boot id that differs between runs: the clock and the process id mixed */
        struct timespec ts;
        clock_gettime(CLOCK_REALTIME, &ts);
        config.boot_id = (uint32_t)ts.tv_nsec ^ ((uint32_t)getpid() << 16) ^ (uint32_t)ts.tv_sec;
        if (config.boot_id == 0u)
            config.boot_id = 1u;
    }
    if (atb_init(&board, &config, &hooks) != 0) {
        fprintf(stderr, "board-sim: the board library refused the configuration\n");
        return 2;
    }
    printf("%s\n", path);
    fflush(stdout);

    while (running) {
        double now = sim_now(), wake, timeout;
        fd_set rd;
        struct timeval tv;
        /* every tick that is due, none skipped: frames received are handled before each */
        while ((double)tick_no * period <= now && running) {
            pty_receive(&board);
            for (i = 0; i < S.axes; i++)
                S.pv[i] = plant_read(&S.pl[i]);
            atb_tick(&board);
            for (i = 0; i < S.axes; i++) {
                plant_advance(&S.pl[i], plant_saturate(&S.pl[i], applied[i]));
                if (S.verbose && (board.axis[i].fault != last_fault[i] ||
                                  board.axis[i].mode != last_mode[i]))
                    fprintf(stderr, "board-sim: axis %d mode %d fault %d at t=%.4f s\n", i,
                            board.axis[i].mode, board.axis[i].fault, (double)tick_no * period);
                last_fault[i] = board.axis[i].fault;
                last_mode[i] = board.axis[i].mode;
            }
            tick_no++;
            pty_flush();
            now = sim_now();
        }
        pty_flush();
        wake = (double)tick_no * period;
        if (S.q_len && S.queue[S.q_head].when < wake)
            wake = S.queue[S.q_head].when;
        timeout = (wake - now) / speed;
        if (timeout < 0.0)
            timeout = 0.0;
        if (S.out_len && timeout > 0.001)
            timeout = 0.001;
        tv.tv_sec = (time_t)timeout;
        tv.tv_usec = (suseconds_t)((timeout - (double)tv.tv_sec) * 1e6);
        if (S.peer) {
            FD_ZERO(&rd);
            FD_SET(S.master, &rd);
            if (select(S.master + 1, &rd, NULL, NULL, &tv) > 0)
                pty_receive(&board);
        } else {
            /* nobody there: EIO on every read, nothing to wait on */
            nanosleep(&(struct timespec){tv.tv_sec, (long)tv.tv_usec * 1000L}, NULL);
            pty_receive(&board);
        }
    }
    fprintf(stderr, "board-sim: frames received: %lu good, %lu CRC errors, %lu framing errors; "
                    "%lu frames sent, %lu dropped (transmit buffer full)\n",
            (unsigned long)board.frames_good, (unsigned long)board.crc_errors,
            (unsigned long)board.framing_errors, (unsigned long)board.tx_frames, S.tx_dropped);
    for (i = 0; i < S.axes; i++)
        plant_free(&S.pl[i]);
    free(S.queue);
    close(S.master);
    return 0;
}
