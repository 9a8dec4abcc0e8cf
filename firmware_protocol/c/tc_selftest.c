/*
 * tc_selftest.c - host driver that exposes the C encoder to tests.
 *
 *   tc_selftest frames      one packet spec per stdin line, frames to stdout:
 *       S <seq> <t_us> <status> [code ...]   samples (decimal numbers)
 *       H [hex] | R [hex] | N [hex]          hello / reply / note, text as hex
 *       X [hex]                              bare COBS of the bytes, then 0x00
 *     Each line is encoded into a buffer of exactly the documented worst-case
 *     size (so a wrong size macro shows up as a refused frame), then again
 *     into one byte less than it needs, which must be refused without a
 *     write past the end. Exit status 3 when either check fails.
 *   tc_selftest crc         CRC of all of stdin, printed as 4 hex digits
 *   tc_selftest commands [cap]
 *                           feed stdin to the line reader (buffer of `cap`
 *                           bytes, default TC_LINE_MAX) and print one line
 *                           per result: HELLO, START, STOP,
 *                           RATE <millihz> <formatted>, or ERR <code> <text>
 *
 * A test tool, so it uses stdio freely; the library itself does not.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "tapcurve_proto.h"

#define LINE_BYTES 8192
#define CANARY 0xA5u

static int hex_value(int c)
{
    if (c >= '0' && c <= '9') return c - '0';
    if (c >= 'a' && c <= 'f') return c - 'a' + 10;
    if (c >= 'A' && c <= 'F') return c - 'A' + 10;
    return -1;
}

/* Hex digits (whitespace ignored) to bytes; returns the count or -1. */
static long parse_hex(const char *s, uint8_t *out, size_t cap)
{
    size_t n = 0;
    while (*s) {
        int hi, lo;
        if (*s == ' ' || *s == '\t' || *s == '\n' || *s == '\r') {
            s++;
            continue;
        }
        hi = hex_value((unsigned char)s[0]);
        lo = s[1] ? hex_value((unsigned char)s[1]) : -1;
        if (hi < 0 || lo < 0 || n >= cap) return -1;
        out[n++] = (uint8_t)(hi * 16 + lo);
        s += 2;
    }
    return (long)n;
}

struct spec {
    char kind;
    uint16_t seq;
    uint32_t t_us;
    uint8_t status;
    unsigned n;
    uint16_t codes[256];
    uint8_t data[LINE_BYTES / 2];
    size_t len;
};

static int parse_spec(char *line, struct spec *sp)
{
    char *p = line, *end;
    long got;
    while (*p == ' ') p++;
    sp->kind = *p++;
    switch (sp->kind) {
    case 'S': {
        unsigned long v[3];
        int i;
        for (i = 0; i < 3; i++) {
            v[i] = strtoul(p, &end, 10);
            if (end == p) return 0;
            p = end;
        }
        sp->seq = (uint16_t)v[0];
        sp->t_us = (uint32_t)v[1];
        sp->status = (uint8_t)v[2];
        sp->n = 0;
        for (;;) {
            unsigned long c = strtoul(p, &end, 10);
            if (end == p) break;
            if (sp->n >= 255) return 0;
            sp->codes[sp->n++] = (uint16_t)c;
            p = end;
        }
        return 1;
    }
    case 'H': case 'R': case 'N': case 'X':
        got = parse_hex(p, sp->data, sizeof sp->data);
        if (got < 0) return 0;
        sp->len = (size_t)got;
        return 1;
    default:
        return 0;
    }
}

/* Encode a spec into out[0 .. cap-1]; returns the length or 0. */
static size_t encode(const struct spec *sp, uint8_t *out, size_t cap)
{
    size_t len;
    switch (sp->kind) {
    case 'S':
        return tc_frame_samples(out, cap, sp->seq, sp->t_us, sp->status, (uint8_t)sp->n, sp->codes);
    case 'H':
        return tc_frame_hello(out, cap, (const char *)sp->data, sp->len);
    case 'R':
        return tc_frame_reply(out, cap, (const char *)sp->data, sp->len);
    case 'N':
        return tc_frame_note(out, cap, (const char *)sp->data, sp->len);
    default: /* 'X' */
        len = tc_cobs_encode(sp->data, sp->len, out, cap);
        if (len == 0 || len >= cap) return 0;
        out[len] = 0x00;
        return len + 1;
    }
}

static size_t documented_size(const struct spec *sp)
{
    switch (sp->kind) {
    case 'S':
        return TC_SAMPLES_FRAME_MAX(sp->n);
    case 'X':
        return TC_COBS_MAX(sp->len) + 1u; /* the delimiter this tool adds */
    default:
        return TC_TEXT_FRAME_MAX(sp->len);
    }
}

static int run_frames(void)
{
    static char line[LINE_BYTES];
    static struct spec sp;
    static uint8_t buf[2 * LINE_BYTES];
    unsigned long lineno = 0;
    int bad = 0;

    while (fgets(line, sizeof line, stdin) != NULL) {
        size_t cap, len, tight, i;
        lineno++;
        if (line[0] == '\n' || line[0] == '\0') continue;
        if (!parse_spec(line, &sp)) {
            fprintf(stderr, "line %lu: bad spec\n", lineno);
            return 2;
        }
        cap = documented_size(&sp);
        memset(buf, CANARY, sizeof buf);
        len = encode(&sp, buf, cap);
        if (len == 0) {
            fprintf(stderr, "line %lu: refused with the documented size %lu\n", lineno, (unsigned long)cap);
            bad = 1;
            continue;
        }
        fwrite(buf, 1, len, stdout);

        /* one byte short must be refused, and bytes past the cap untouched */
        tight = len - 1;
        memset(buf, CANARY, sizeof buf);
        if (encode(&sp, buf, tight) != 0) {
            fprintf(stderr, "line %lu: accepted a %lu-byte buffer for a %lu-byte frame\n",
                    lineno, (unsigned long)tight, (unsigned long)len);
            bad = 1;
        }
        for (i = tight; i < sizeof buf; i++) {
            if (buf[i] != CANARY) {
                fprintf(stderr, "line %lu: wrote byte %lu past a %lu-byte buffer\n",
                        lineno, (unsigned long)i, (unsigned long)tight);
                bad = 1;
                break;
            }
        }
    }
    fflush(stdout);
    return bad ? 3 : 0;
}

static int run_crc(void)
{
    uint8_t chunk[4096];
    size_t got;
    uint16_t crc = TC_CRC_INIT;
    while ((got = fread(chunk, 1, sizeof chunk, stdin)) > 0) {
        crc = tc_crc16_update(crc, chunk, got);
    }
    printf("%04X\n", (unsigned)crc);
    return 0;
}

static int run_commands(size_t cap)
{
    static char buf[4096];
    tc_line_reader reader;
    tc_command cmd;
    int c;

    if (cap > sizeof buf) cap = sizeof buf;
    tc_line_init(&reader, buf, cap);
    while ((c = getchar()) != EOF) {
        switch (tc_line_feed(&reader, (uint8_t)c, &cmd)) {
        case TC_CMD_NONE:
            break;
        case TC_CMD_HELLO:
            puts("HELLO");
            break;
        case TC_CMD_START:
            puts("START");
            break;
        case TC_CMD_STOP:
            puts("STOP");
            break;
        case TC_CMD_RATE: {
            char text[12];
            size_t n = tc_format_millis(text, sizeof text, cmd.rate_millihz);
            printf("RATE %lu %.*s\n", (unsigned long)cmd.rate_millihz, (int)n, text);
            break;
        }
        case TC_CMD_INVALID:
            printf("ERR %d %s\n", (int)cmd.error, tc_cmd_error_text(cmd.error));
            break;
        }
    }
    return 0;
}

int main(int argc, char **argv)
{
    if (argc >= 2 && strcmp(argv[1], "frames") == 0) return run_frames();
    if (argc >= 2 && strcmp(argv[1], "crc") == 0) return run_crc();
    if (argc >= 2 && strcmp(argv[1], "commands") == 0) {
        size_t cap = argc >= 3 ? (size_t)strtoul(argv[2], NULL, 10) : TC_LINE_MAX;
        return run_commands(cap);
    }
    fprintf(stderr, "usage: %s frames | crc | commands [cap]\n", argv[0]);
    return 2;
}
