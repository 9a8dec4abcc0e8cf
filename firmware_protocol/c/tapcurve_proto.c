/*
 * tapcurve_proto.c - device side of the tapcurve wire protocol, version 1.
 * See tapcurve_proto.h for the interface and ../PROTOCOL.md for the protocol.
 */
#include "tapcurve_proto.h"

/* ------------------------------------------------------------------------
 * CRC-16/CCITT-FALSE
 * ------------------------------------------------------------------------ */

#ifndef TC_CRC_BITWISE
/* Entry i is the CRC register change caused by nibble i at the top of the
 * register: i << 12 shifted through the polynomial four times. */
static const uint16_t tc_crc_nibble[16] = {
    0x0000, 0x1021, 0x2042, 0x3063, 0x4084, 0x50A5, 0x60C6, 0x70E7,
    0x8108, 0x9129, 0xA14A, 0xB16B, 0xC18C, 0xD1AD, 0xE1CE, 0xF1EF
};
#endif

static uint16_t tc_crc_byte(uint16_t crc, uint8_t byte)
{
#ifdef TC_CRC_BITWISE
    unsigned i;
    crc = (uint16_t)(crc ^ ((uint16_t)byte << 8));
    for (i = 0; i < 8; i++) {
        crc = (crc & 0x8000u) ? (uint16_t)((crc << 1) ^ 0x1021u) : (uint16_t)(crc << 1);
    }
    return crc;
#else
    /* high nibble first: the CRC is not reflected */
    crc = (uint16_t)((crc << 4) ^ tc_crc_nibble[((crc >> 12) ^ (byte >> 4)) & 0x0Fu]);
    crc = (uint16_t)((crc << 4) ^ tc_crc_nibble[((crc >> 12) ^ byte) & 0x0Fu]);
    return crc;
#endif
}

uint16_t tc_crc16_update(uint16_t crc, const uint8_t *data, size_t len)
{
    size_t i;
    for (i = 0; i < len; i++) {
        crc = tc_crc_byte(crc, data[i]);
    }
    return crc;
}

uint16_t tc_crc16(const uint8_t *data, size_t len)
{
    return tc_crc16_update(TC_CRC_INIT, data, len);
}

/* ------------------------------------------------------------------------
 * COBS, incrementally. The state lives in tc_frame so that the frame
 * builder and tc_cobs_encode() share one implementation.
 *
 * A block is a code byte followed by code-1 data bytes. The code slot is
 * reserved when the block opens and filled when it closes, which is the
 * scheme of the 1999 reference code: a zero in the input closes a block,
 * and so does reaching 254 data bytes (code 0xFF, no zero implied).
 * ------------------------------------------------------------------------ */

static void tc_cobs_open(tc_frame *f)
{
    if (f->failed || f->pos >= f->cap) {
        f->failed = 1;
        return;
    }
    f->code_pos = f->pos++;
    f->code = 1;
}

static void tc_cobs_close(tc_frame *f)
{
    if (f->failed) {
        return;
    }
    f->out[f->code_pos] = f->code;
}

static void tc_cobs_put(tc_frame *f, uint8_t byte)
{
    if (f->failed) {
        return;
    }
    if (byte == 0) {
        tc_cobs_close(f);
        tc_cobs_open(f);
        return;
    }
    if (f->pos >= f->cap) {
        f->failed = 1;
        return;
    }
    f->out[f->pos++] = byte;
    if (++f->code == 0xFFu) {
        tc_cobs_close(f);
        tc_cobs_open(f);
    }
}

static void tc_cobs_start(tc_frame *f, uint8_t *out, size_t cap)
{
    f->out = out;
    f->cap = cap;
    f->pos = 0;
    f->code_pos = 0;
    f->code = 1;
    f->crc = TC_CRC_INIT;
    f->failed = 0;
    tc_cobs_open(f);
}

size_t tc_cobs_encode(const uint8_t *src, size_t len, uint8_t *dst, size_t cap)
{
    tc_frame f;
    size_t i;
    tc_cobs_start(&f, dst, cap);
    for (i = 0; i < len; i++) {
        tc_cobs_put(&f, src[i]);
    }
    tc_cobs_close(&f);
    return f.failed ? 0 : f.pos;
}

/* ------------------------------------------------------------------------
 * Frame builder
 * ------------------------------------------------------------------------ */

void tc_frame_begin(tc_frame *f, uint8_t *out, size_t cap, uint8_t kind)
{
    tc_cobs_start(f, out, cap);
    tc_frame_u8(f, kind);
}

void tc_frame_u8(tc_frame *f, uint8_t v)
{
    f->crc = tc_crc_byte(f->crc, v);
    tc_cobs_put(f, v);
}

void tc_frame_u16(tc_frame *f, uint16_t v)
{
    tc_frame_u8(f, (uint8_t)(v & 0xFFu));
    tc_frame_u8(f, (uint8_t)(v >> 8));
}

void tc_frame_u32(tc_frame *f, uint32_t v)
{
    tc_frame_u8(f, (uint8_t)(v & 0xFFu));
    tc_frame_u8(f, (uint8_t)((v >> 8) & 0xFFu));
    tc_frame_u8(f, (uint8_t)((v >> 16) & 0xFFu));
    tc_frame_u8(f, (uint8_t)(v >> 24));
}

void tc_frame_bytes(tc_frame *f, const uint8_t *data, size_t len)
{
    size_t i;
    for (i = 0; i < len; i++) {
        tc_frame_u8(f, data[i]);
    }
}

size_t tc_frame_end(tc_frame *f)
{
    /* the CRC covers kind and body only, so it goes in without updating it */
    uint16_t crc = f->crc;
    tc_cobs_put(f, (uint8_t)(crc & 0xFFu));
    tc_cobs_put(f, (uint8_t)(crc >> 8));
    tc_cobs_close(f);
    if (f->failed || f->pos >= f->cap) {
        f->failed = 1;
        return 0;
    }
    f->out[f->pos++] = 0x00;
    return f->pos;
}

size_t tc_frame_samples(uint8_t *out, size_t cap, uint16_t seq, uint32_t t_us,
                        uint8_t status, uint8_t n, const uint16_t *codes)
{
    tc_frame f;
    unsigned k;
    tc_frame_begin(&f, out, cap, TC_KIND_SAMPLES);
    tc_frame_u16(&f, seq);
    tc_frame_u32(&f, t_us);
    tc_frame_u8(&f, status);
    tc_frame_u8(&f, n);
    for (k = 0; k < n; k++) {
        tc_frame_u16(&f, codes[k]);
    }
    return tc_frame_end(&f);
}

size_t tc_frame_text(uint8_t *out, size_t cap, uint8_t kind, const char *text, size_t len)
{
    tc_frame f;
    size_t i;
    if (len > TC_TEXT_MAX) {
        return 0;
    }
    tc_frame_begin(&f, out, cap, kind);
    for (i = 0; i < len; i++) {
        tc_frame_u8(&f, (uint8_t)text[i]);
    }
    return tc_frame_end(&f);
}

size_t tc_frame_hello(uint8_t *out, size_t cap, const char *json, size_t len)
{
    return tc_frame_text(out, cap, TC_KIND_HELLO, json, len);
}

size_t tc_frame_reply(uint8_t *out, size_t cap, const char *text, size_t len)
{
    return tc_frame_text(out, cap, TC_KIND_REPLY, text, len);
}

size_t tc_frame_note(uint8_t *out, size_t cap, const char *text, size_t len)
{
    return tc_frame_text(out, cap, TC_KIND_NOTE, text, len);
}

/* ------------------------------------------------------------------------
 * Command lines
 * ------------------------------------------------------------------------ */

void tc_line_init(tc_line_reader *r, char *buf, size_t cap)
{
    r->buf = buf;
    r->cap = cap;
    r->len = 0;
    r->overlong = 0;
}

tc_cmd_kind tc_line_feed(tc_line_reader *r, uint8_t byte, tc_command *cmd)
{
    tc_cmd_kind kind;
    if (byte == '\r') {
        return TC_CMD_NONE;
    }
    if (byte != '\n') {
        if (r->overlong) {
            return TC_CMD_NONE;
        }
        if (r->len >= r->cap) {
            /* keep nothing of it: a truncated line could parse as a
             * different, valid command */
            r->overlong = 1;
            r->len = 0;
            return TC_CMD_NONE;
        }
        r->buf[r->len++] = (char)byte;
        return TC_CMD_NONE;
    }
    if (r->overlong) {
        r->overlong = 0;
        r->len = 0;
        cmd->kind = TC_CMD_INVALID;
        cmd->error = TC_CMDERR_TOO_LONG;
        cmd->rate_millihz = 0;
        return TC_CMD_INVALID;
    }
    kind = tc_parse_command(r->buf, r->len, cmd);
    r->len = 0;
    return kind;
}

static int tc_is_space(char c)
{
    return c == ' ' || c == '\t';
}

/* Does line[start .. end) spell `word` exactly? */
static int tc_word_is(const char *line, size_t start, size_t end, const char *word)
{
    size_t i = 0;
    while (start + i < end && word[i] != '\0') {
        if (line[start + i] != word[i]) {
            return 0;
        }
        i++;
    }
    return start + i == end && word[i] == '\0';
}

/* Plain decimal "123", "12.5", ".5", "7." to millihertz, rounding beyond
 * the third decimal half up. Fixed point keeps floats (and their library)
 * off a device that has no FPU. Returns 0 on anything else or overflow. */
static int tc_parse_millis(const char *s, size_t len, uint32_t *out)
{
    const uint32_t max = 0xFFFFFFFFu;
    uint32_t whole = 0, frac = 0;
    size_t i = 0;
    unsigned frac_digits = 0;
    int digits = 0, round_up = 0;

    while (i < len && s[i] >= '0' && s[i] <= '9') {
        uint32_t d = (uint32_t)(s[i] - '0');
        if (whole > (max - d) / 10u) {
            return 0;
        }
        whole = whole * 10u + d;
        digits = 1;
        i++;
    }
    if (i < len && s[i] == '.') {
        i++;
        while (i < len && s[i] >= '0' && s[i] <= '9') {
            if (frac_digits < 3) {
                frac = frac * 10u + (uint32_t)(s[i] - '0');
            } else if (frac_digits == 3) {
                round_up = s[i] >= '5';
            }
            frac_digits++;
            digits = 1;
            i++;
        }
    }
    if (!digits || i != len) {
        return 0;
    }
    while (frac_digits < 3) {
        frac *= 10u;
        frac_digits++;
    }
    if (whole > max / 1000u || frac + (uint32_t)round_up > max - whole * 1000u) {
        return 0;
    }
    *out = whole * 1000u + frac + (uint32_t)round_up;
    return 1;
}

tc_cmd_kind tc_parse_command(const char *line, size_t len, tc_command *cmd)
{
    size_t w0 = 0, w1, a0, a1 = len;

    cmd->error = TC_CMDERR_NONE;
    cmd->rate_millihz = 0;

    while (w0 < len && tc_is_space(line[w0])) {
        w0++;
    }
    while (a1 > w0 && tc_is_space(line[a1 - 1])) {
        a1--;
    }
    if (w0 == a1) {
        cmd->kind = TC_CMD_NONE;
        return TC_CMD_NONE;
    }
    w1 = w0;
    while (w1 < a1 && !tc_is_space(line[w1])) {
        w1++;
    }
    a0 = w1;
    while (a0 < a1 && tc_is_space(line[a0])) {
        a0++;
    }

    if (tc_word_is(line, w0, w1, "HELLO?")) {
        cmd->kind = TC_CMD_HELLO;
    } else if (tc_word_is(line, w0, w1, "START")) {
        cmd->kind = TC_CMD_START;
    } else if (tc_word_is(line, w0, w1, "STOP")) {
        cmd->kind = TC_CMD_STOP;
    } else if (tc_word_is(line, w0, w1, "RATE")) {
        uint32_t millis;
        if (tc_parse_millis(line + a0, a1 - a0, &millis) && millis > 0) {
            cmd->kind = TC_CMD_RATE;
            cmd->rate_millihz = millis;
            return TC_CMD_RATE;
        }
        cmd->kind = TC_CMD_INVALID;
        cmd->error = TC_CMDERR_BAD_RATE;
        return TC_CMD_INVALID;
    } else {
        cmd->kind = TC_CMD_INVALID;
        cmd->error = TC_CMDERR_UNKNOWN;
        return TC_CMD_INVALID;
    }
    if (a0 != a1) {
        cmd->kind = TC_CMD_INVALID;
        cmd->error = TC_CMDERR_EXTRA_ARG;
    }
    return cmd->kind;
}

const char *tc_cmd_error_text(tc_cmd_error error)
{
    switch (error) {
    case TC_CMDERR_NONE:
        return "no error";
    case TC_CMDERR_UNKNOWN:
        return "unknown command";
    case TC_CMDERR_EXTRA_ARG:
        return "command takes no argument";
    case TC_CMDERR_BAD_RATE:
        return "bad rate";
    case TC_CMDERR_TOO_LONG:
        return "line too long";
    }
    return "error";
}

size_t tc_format_millis(char *out, size_t cap, uint32_t millis)
{
    char tmp[12];
    size_t n = 0, i;
    uint32_t whole = millis / 1000u;
    uint32_t frac = millis % 1000u;

    /* digits of the whole part, least significant first */
    do {
        tmp[n++] = (char)('0' + whole % 10u);
        whole /= 10u;
    } while (whole != 0);
    if (n > cap) {
        return 0;
    }
    for (i = 0; i < n; i++) {
        out[i] = tmp[n - 1 - i];
    }
    if (frac != 0) {
        char d[3];
        size_t nd = 3;
        d[0] = (char)('0' + frac / 100u);
        d[1] = (char)('0' + (frac / 10u) % 10u);
        d[2] = (char)('0' + frac % 10u);
        while (d[nd - 1] == '0') {
            nd--;
        }
        if (n + 1 + nd > cap) {
            return 0;
        }
        out[n++] = '.';
        for (i = 0; i < nd; i++) {
            out[n++] = d[i];
        }
    }
    return n;
}
