/*
 * example_main.c - a complete tapcurve device main loop for a generic board.
 *
 * Port it by providing the board_* hooks below in a file of your own (the
 * stubs here are weak symbols on GCC and Clang, so yours win at link time;
 * with other compilers, edit the stubs instead). Everything else is plain
 * C99 and the tapcurve_proto library.
 *
 * What the loop does:
 *   - sends a hello packet at boot and whenever the host asks "HELLO?";
 *   - answers START, STOP and RATE <hz> with "OK ..." or "ERR ..." replies;
 *   - while streaming, samples all channels on a fixed schedule and sends
 *     one samples packet per sample;
 *   - status bit 0 (late): the sample came a full period or more after it
 *     was due, so at least one slot was skipped. The schedule then restarts
 *     from now instead of firing a burst of catch-up samples, whose times
 *     would be meaningless;
 *   - status bit 1 (transmit overflow): a samples frame found no room in the
 *     transmit queue and was dropped whole since the previous samples packet
 *     that went out. Its sequence number is used up anyway, so the host sees
 *     the gap and counts the loss. Replies and hello never drop: they wait
 *     for room, which is fine because they are rare.
 *
 * Host demo: compiled with -DTC_HOST_DEMO this file becomes a program for a
 * desktop machine. The hooks then simulate a board (a clock, a bending
 * sensor and optionally a slow serial line), a scripted host types
 * commands, and the binary wire stream goes to stdout:
 *
 *     tc_demo N [rate_hz [stall_at [baud]]]
 *
 *   N         sample packets to take, then the script sends STOP (default 1000);
 *             halfway through it asks "HELLO?" once more, mid-stream
 *   rate_hz   sent as "RATE <rate_hz>" before START (default 1000)
 *   stall_at  index of a sample whose ADC read stalls for 2.5 periods, so
 *             the next sample is late (default -1: never)
 *   baud      simulated line speed, 10 bits per byte (default 0: unlimited)
 *
 * The simulated clock starts 0.3 s before the 32-bit microsecond counter
 * wraps, so every demo stream exercises the host's time unwrapping.
 */
#include "tapcurve_proto.h"

/* ------------------------------------------------------------------------
 * Configuration of this example device
 * ------------------------------------------------------------------------ */

#define APP_FIRMWARE "tapcurve-example 0.1"
#define APP_CHANNELS 6u
#define APP_ADC_BITS 12u
#define APP_DEFAULT_RATE_MILLIHZ 500000u  /* 500 Hz */
#define APP_MAX_RATE_MILLIHZ 5000000u     /* 5 kHz: this example's limit; set yours from ADC and baud */
#define APP_TX_QUEUE_BYTES 1024u          /* about 40 six-channel frames */
#define APP_TEXT_MAX 128u                 /* longest hello, reply or note we build */
#define APP_IDLE_POLL_US 1000u            /* how long to doze with nothing scheduled */
#define APP_TX_WAIT_US 100u               /* how long to doze while the line drains */
#define APP_RX_BYTES_PER_POLL 16u         /* bounded so a flood cannot starve sampling */

/* Compile-time checks (a negative array size fails the build). */
typedef char app_check_control_fits_queue[(APP_TX_QUEUE_BYTES >= TC_TEXT_FRAME_MAX(APP_TEXT_MAX)) ? 1 : -1];
typedef char app_check_sample_fits_queue[(APP_TX_QUEUE_BYTES >= TC_SAMPLES_FRAME_MAX(APP_CHANNELS)) ? 1 : -1];
typedef char app_check_channels[(APP_CHANNELS <= 255u) ? 1 : -1];

/* ------------------------------------------------------------------------
 * Board hooks
 * ------------------------------------------------------------------------ */

/* Set up clocks, ADC, timer and UART. */
void board_init(void);

/* One conversion of channel `ch` (0 .. APP_CHANNELS-1), right-aligned. */
uint16_t board_adc_read(unsigned ch);

/* Free-running microsecond counter; wrapping at 2^32 is expected. */
uint32_t board_micros(void);

/* Hand up to `len` bytes to the UART driver (interrupt or DMA driven) and
 * return how many it took. Must not block: the main loop keeps the rest. */
size_t board_uart_write(const uint8_t *buf, size_t len);

/* If a received byte is waiting, store it in *byte and return 1; else 0. */
int board_uart_read_byte(int *byte);

/* Return no earlier than `t_us` on board_micros(), or earlier when an
 * interrupt (UART, timer) may have brought work. A device can sleep here
 * (WFI with a timer compare set to t_us); busy-waiting is fine too. */
void board_wait_until(uint32_t t_us);

#ifndef TC_HOST_DEMO

#if defined(__GNUC__) || defined(__clang__)
#define BOARD_WEAK __attribute__((weak))
#else
#define BOARD_WEAK
#endif

/* Stubs that let the file build before a port exists. Replace them all. */
BOARD_WEAK void board_init(void) {}
BOARD_WEAK uint16_t board_adc_read(unsigned ch) { (void)ch; return 0; }
BOARD_WEAK uint32_t board_micros(void) { static uint32_t t; return t += 10u; }
BOARD_WEAK size_t board_uart_write(const uint8_t *buf, size_t len) { (void)buf; return len; }
BOARD_WEAK int board_uart_read_byte(int *byte) { (void)byte; return 0; }
BOARD_WEAK void board_wait_until(uint32_t t_us)
{
    while ((uint32_t)(board_micros() - t_us) >= 0x80000000u) {
        /* busy-wait until the deadline has passed */
    }
}

#endif /* !TC_HOST_DEMO */

/* ------------------------------------------------------------------------
 * Helpers
 * ------------------------------------------------------------------------ */

/* Has the wrapping clock reached `t`? Valid while the two are within 2^31 us
 * (35 minutes) of each other; no signed overflow, so no undefined behaviour. */
static int time_reached(uint32_t now, uint32_t t)
{
    return (uint32_t)(now - t) < 0x80000000u;
}

struct text {
    char buf[APP_TEXT_MAX];
    size_t len;
};

static void text_add(struct text *t, const char *s)
{
    while (*s != '\0' && t->len < sizeof t->buf) {
        t->buf[t->len++] = *s++;
    }
}

static void text_add_millis(struct text *t, uint32_t millis)
{
    t->len += tc_format_millis(t->buf + t->len, sizeof t->buf - t->len, millis);
}

/* ------------------------------------------------------------------------
 * Transmit queue: a byte ring the UART drains at its own pace. Frames go in
 * whole or not at all, so a full queue never puts half a frame on the wire.
 * ------------------------------------------------------------------------ */

static uint8_t txq[APP_TX_QUEUE_BYTES];
static size_t txq_head;  /* next byte to send */
static size_t txq_count; /* bytes waiting */

static void txq_push(const uint8_t *p, size_t n)
{
    size_t tail = (txq_head + txq_count) % APP_TX_QUEUE_BYTES;
    size_t i;
    for (i = 0; i < n; i++) {
        txq[tail] = p[i];
        tail = (tail + 1u) % APP_TX_QUEUE_BYTES;
    }
    txq_count += n;
}

/* Offer the UART the next contiguous run of queued bytes. */
static size_t txq_pump(void)
{
    size_t run, took;
    if (txq_count == 0) {
        return 0;
    }
    run = APP_TX_QUEUE_BYTES - txq_head;
    if (run > txq_count) {
        run = txq_count;
    }
    took = board_uart_write(&txq[txq_head], run);
    if (took > run) {
        took = run; /* a confused driver must not corrupt the queue */
    }
    txq_head = (txq_head + took) % APP_TX_QUEUE_BYTES;
    txq_count -= took;
    return took;
}

/* ------------------------------------------------------------------------
 * Application state
 * ------------------------------------------------------------------------ */

static struct {
    uint8_t streaming;
    uint8_t tx_overflow;   /* a samples frame was dropped since the last one sent */
    uint8_t late_reported; /* one note per START is enough */
    uint16_t seq;          /* counts every sample taken, sent or dropped */
    uint32_t rate_millihz;
    uint32_t period_us;    /* whole microseconds of one period ... */
    uint32_t period_rem;   /* ... plus period_rem / rate_millihz of one */
    uint32_t phase;        /* accumulated fractions, so no drift from rounding */
    uint32_t next_due;
    tc_line_reader reader;
    char line[TC_LINE_MAX];
} app;

static void app_set_rate(uint32_t millihz)
{
    /* one period is 10^9 / millihz microseconds; 10^9 fits 32 bits */
    app.rate_millihz = millihz;
    app.period_us = 1000000000u / millihz;
    app.period_rem = 1000000000u % millihz;
    app.phase = 0;
}

static void app_advance_schedule(void)
{
    app.next_due += app.period_us;
    app.phase += app.period_rem;
    if (app.phase >= app.rate_millihz) {
        app.phase -= app.rate_millihz;
        app.next_due += 1u;
    }
}

/* Queue a hello, reply or note, waiting for room rather than dropping it. */
static void app_send_control(const uint8_t *frame, size_t len)
{
    if (len == 0 || len > APP_TX_QUEUE_BYTES) {
        return; /* cannot happen with the checks above; never spin forever */
    }
    while (APP_TX_QUEUE_BYTES - txq_count < len) {
        if (txq_pump() == 0) {
            board_wait_until(board_micros() + APP_TX_WAIT_US);
        }
    }
    txq_push(frame, len);
}

static void app_send_text(uint8_t kind, const struct text *t)
{
    uint8_t frame[TC_TEXT_FRAME_MAX(APP_TEXT_MAX)];
    app_send_control(frame, tc_frame_text(frame, sizeof frame, kind, t->buf, t->len));
}

static void app_send_hello(void)
{
    struct text t;
    t.len = 0;
    text_add(&t, "{\"protocol\":1,\"firmware\":\"" APP_FIRMWARE "\",\"adc_bits\":");
    text_add_millis(&t, APP_ADC_BITS * 1000u);
    text_add(&t, ",\"channels\":");
    text_add_millis(&t, APP_CHANNELS * 1000u);
    text_add(&t, ",\"rate_hz\":");
    text_add_millis(&t, app.rate_millihz);
    text_add(&t, "}");
    app_send_text(TC_KIND_HELLO, &t);
}

static void app_reply(const char *a, const char *b)
{
    struct text t;
    t.len = 0;
    text_add(&t, a);
    text_add(&t, b);
    app_send_text(TC_KIND_REPLY, &t);
}

static void app_handle(const tc_command *cmd)
{
    struct text t;
    switch (cmd->kind) {
    case TC_CMD_NONE:
        break;
    case TC_CMD_HELLO:
        app_send_hello();
        break;
    case TC_CMD_START:
        if (!app.streaming) {
            app.streaming = 1;
            app.late_reported = 0;
            app.next_due = board_micros(); /* first sample right away */
            app.phase = 0;
        }
        app_reply("OK START", "");
        break;
    case TC_CMD_STOP:
        app.streaming = 0;
        app_reply("OK STOP", "");
        break;
    case TC_CMD_RATE:
        if (cmd->rate_millihz > APP_MAX_RATE_MILLIHZ) {
            app_reply("ERR rate out of range", "");
            break;
        }
        app_set_rate(cmd->rate_millihz); /* takes effect after the pending sample */
        t.len = 0;
        text_add(&t, "OK RATE ");
        text_add_millis(&t, cmd->rate_millihz);
        app_send_text(TC_KIND_REPLY, &t);
        break;
    case TC_CMD_INVALID:
        app_reply("ERR ", tc_cmd_error_text(cmd->error));
        break;
    }
}

static int app_read_commands(void)
{
    unsigned i;
    int byte;
    tc_command cmd;
    for (i = 0; i < APP_RX_BYTES_PER_POLL; i++) {
        if (!board_uart_read_byte(&byte)) {
            break;
        }
        if (tc_line_feed(&app.reader, (uint8_t)byte, &cmd) != TC_CMD_NONE) {
            app_handle(&cmd);
        }
    }
    return i > 0;
}

static int app_maybe_sample(void)
{
    uint16_t codes[APP_CHANNELS];
    uint8_t frame[TC_SAMPLES_FRAME_MAX(APP_CHANNELS)];
    uint8_t status = 0;
    uint32_t now, t_us;
    size_t len;
    unsigned k;

    if (!app.streaming) {
        return 0;
    }
    now = board_micros();
    if (!time_reached(now, app.next_due)) {
        return 0;
    }
    if (now - app.next_due >= app.period_us) {
        status |= TC_STATUS_LATE;
        app.next_due = now;
        app.phase = 0;
    }
    t_us = board_micros();
    for (k = 0; k < APP_CHANNELS; k++) {
        codes[k] = board_adc_read(k);
    }
    app_advance_schedule();

    if (app.tx_overflow) {
        status |= TC_STATUS_TX_OVERFLOW;
    }
    len = tc_frame_samples(frame, sizeof frame, app.seq, t_us, status, (uint8_t)APP_CHANNELS, codes);
    app.seq++; /* used up even if dropped: the host must see the gap */
    if (len <= APP_TX_QUEUE_BYTES - txq_count) {
        txq_push(frame, len);
        app.tx_overflow = 0;
    } else {
        app.tx_overflow = 1;
    }

    if ((status & TC_STATUS_LATE) && !app.late_reported) {
        struct text t;
        t.len = 0;
        text_add(&t, "late sample: at least one pacing slot was missed");
        app_send_text(TC_KIND_NOTE, &t);
        app.late_reported = 1;
    }
    return 1;
}

static void app_init(void)
{
    board_init();
    tc_line_init(&app.reader, app.line, sizeof app.line);
    app_set_rate(APP_DEFAULT_RATE_MILLIHZ);
    app_send_hello(); /* the host may be listening already */
}

/* One pass of the main loop: commands first, so a STOP is obeyed before the
 * next sample; then the schedule; then the line. Sleeps when idle. */
static void app_poll(void)
{
    int busy = 0;
    busy |= app_read_commands();
    busy |= app_maybe_sample();
    busy |= txq_pump() > 0;
    if (!busy) {
        uint32_t now = board_micros();
        uint32_t wake = now + APP_IDLE_POLL_US;
        if (app.streaming && !time_reached(app.next_due, wake)) {
            wake = app.next_due;
        }
        if (txq_count > 0 && !time_reached(now + APP_TX_WAIT_US, wake)) {
            wake = now + APP_TX_WAIT_US;
        }
        board_wait_until(wake);
    }
}

#ifndef TC_HOST_DEMO

int main(void)
{
    app_init();
    for (;;) {
        app_poll();
    }
}

#else /* TC_HOST_DEMO: a simulated board on a desktop machine */

#include <stdio.h>
#include <stdlib.h>
#include <string.h>

static uint32_t sim_now;         /* the board's wrapping microsecond clock */
static uint64_t sim_elapsed;     /* microseconds since boot, not wrapping */
static unsigned long sim_taken;  /* samples taken so far */
static unsigned long sim_target; /* samples to take before the script says STOP */
static long sim_stall_at;        /* sample whose ADC read stalls, or -1 */
static uint64_t sim_baud;        /* 0: unlimited line */
static uint64_t sim_line_mark;   /* bytes the line had shifted out at the last write */
static uint32_t sim_fifo_level;  /* bytes in the simulated UART FIFO */
static char sim_script[96];      /* what the scripted host types at boot */
static size_t sim_script_len, sim_script_pos;
static const char sim_hello[] = "HELLO?\n";
static size_t sim_hello_pos;
static const char sim_stop[] = "STOP\n";
static size_t sim_stop_pos;

#define SIM_UART_FIFO 64u

static void sim_advance(uint32_t us)
{
    sim_now += us;
    sim_elapsed += us;
}

void board_init(void) {}

uint32_t board_micros(void)
{
    return sim_now;
}

void board_wait_until(uint32_t t_us)
{
    if (!time_reached(sim_now, t_us)) {
        sim_advance(t_us - sim_now);
    }
}

/* A finger bending to and fro every 2 s: six segments of 2 kOhm that grow
 * by up to 500 Ohm each when bent, read through a 10 kOhm reference with
 * a 12-bit ratiometric ADC. Integer arithmetic only. */
uint16_t board_adc_read(unsigned ch)
{
    uint32_t phase = (uint32_t)(sim_elapsed % 2000000u);
    uint32_t bend = phase < 1000000u ? phase : 2000000u - phase; /* 0 .. 10^6 */
    uint32_t below = 0, total = 0;
    unsigned j;

    if (ch == 0) {
        if ((long)sim_taken == sim_stall_at) {
            sim_advance(5u * app.period_us / 2u);
        }
        sim_taken++;
    }
    for (j = 0; j < APP_CHANNELS; j++) {
        uint32_t r = 2000u + (j + 1u) * (bend / 12000u); /* up to 2000 + 83*(j+1)*6 */
        total += r;
        if (j >= ch) {
            below += r;
        }
    }
    return (uint16_t)(((uint32_t)1u << APP_ADC_BITS) * below / (10000u + total));
}

size_t board_uart_write(const uint8_t *buf, size_t len)
{
    size_t take = len;
    if (sim_baud != 0) {
        uint64_t line = sim_elapsed * sim_baud / 10u / 1000000u; /* bytes the line could have sent */
        uint64_t sent = line - sim_line_mark;
        if (sent >= sim_fifo_level) {
            sim_fifo_level = 0; /* an idle line banks no credit */
        } else {
            sim_fifo_level -= (uint32_t)sent;
        }
        sim_line_mark = line;
        if (take > SIM_UART_FIFO - sim_fifo_level) {
            take = SIM_UART_FIFO - sim_fifo_level;
        }
        sim_fifo_level += (uint32_t)take;
    }
    if (take > 0 && fwrite(buf, 1, take, stdout) != take) {
        exit(1);
    }
    return take;
}

int board_uart_read_byte(int *byte)
{
    if (sim_script_pos < sim_script_len) {
        *byte = (unsigned char)sim_script[sim_script_pos++];
        return 1;
    }
    if (sim_taken >= sim_target / 2u && sim_hello_pos < sizeof sim_hello - 1u) {
        *byte = (unsigned char)sim_hello[sim_hello_pos++];
        return 1;
    }
    if (sim_taken >= sim_target && sim_stop_pos < sizeof sim_stop - 1u) {
        *byte = (unsigned char)sim_stop[sim_stop_pos++];
        return 1;
    }
    return 0;
}

int main(int argc, char **argv)
{
    const char *rate = argc > 2 ? argv[2] : "1000";
    static const char head[] = "HELLO?\r\nRATE abc\nRATE ";
    static const char tail[] = "\nSTART\n";

    sim_target = argc > 1 ? strtoul(argv[1], NULL, 10) : 1000u;
    sim_stall_at = argc > 3 ? strtol(argv[3], NULL, 10) : -1;
    sim_baud = argc > 4 ? strtoul(argv[4], NULL, 10) : 0u;
    if (strlen(head) + strlen(rate) + strlen(tail) >= sizeof sim_script) {
        fputs("tc_demo: rate text too long\n", stderr);
        return 2;
    }
    strcpy(sim_script, head);
    strcat(sim_script, rate);
    strcat(sim_script, tail);
    sim_script_len = strlen(sim_script);
    sim_now = 0xFFFFFFFFu - 299999u;

    app_init();
    while (sim_stop_pos < sizeof sim_stop - 1u || app.streaming || txq_count > 0) {
        app_poll();
    }
    fflush(stdout);
    return 0;
}

#endif /* TC_HOST_DEMO */
