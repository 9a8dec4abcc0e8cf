/*
 * tapcurve_proto.h - device side of the tapcurve wire protocol, version 1.
 *
 * Portable C99 for any microcontroller: no heap, no stdio, no floating
 * point, no assumption about the CPU's byte order (multi-byte fields are
 * written one byte at a time, low byte first). Every function works on
 * buffers the caller owns; nothing here keeps global state.
 *
 * What the library does:
 *   - CRC-16/CCITT-FALSE            tc_crc16_update(), tc_crc16()
 *   - COBS encoding                  tc_cobs_encode()
 *   - complete wire frames           tc_frame_samples(), tc_frame_hello(),
 *     (kind | body | crc, COBS,      tc_frame_reply(), tc_frame_note(),
 *     then one 0x00 delimiter)       or field by field with tc_frame_begin()
 *   - host command lines             tc_line_init(), tc_line_feed(),
 *                                    tc_parse_command()
 *
 * See ../PROTOCOL.md for the protocol itself and example_main.c for a main
 * loop that uses all of this.
 */
#ifndef TAPCURVE_PROTO_H
#define TAPCURVE_PROTO_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* ------------------------------------------------------------------------
 * Constants of protocol version 1
 * ------------------------------------------------------------------------ */

#define TC_PROTOCOL_VERSION 1

#define TC_KIND_SAMPLES 0x01u
#define TC_KIND_HELLO   0x02u
#define TC_KIND_REPLY   0x03u
#define TC_KIND_NOTE    0x04u

#define TC_STATUS_LATE        0x01u /* bit 0: sample taken late (a pacing slot was missed) */
#define TC_STATUS_TX_OVERFLOW 0x02u /* bit 1: transmit buffer overflowed since the previous samples packet */

#define TC_CRC_INIT 0xFFFFu

/* ------------------------------------------------------------------------
 * Buffer sizes. All are compile-time constants when their argument is, so
 * they can size static arrays:  static uint8_t tx[TC_SAMPLES_FRAME_MAX(6)];
 * ------------------------------------------------------------------------ */

/* COBS output for `len` input bytes, worst case. One code byte starts the
 * frame and every run of 254 non-zero bytes costs one more; zeros in the
 * data only replace themselves. (This encoder, like the original 1999
 * reference code, closes a trailing full 254-byte run with a 0x01 code,
 * which is what the floor term pays for.) */
#define TC_COBS_MAX(len) ((size_t)(len) + (size_t)(len) / 254u + 1u)

/* A whole wire frame around `raw_len` un-stuffed bytes: COBS plus delimiter. */
#define TC_FRAME_MAX(raw_len) (TC_COBS_MAX(raw_len) + 1u)

/* Un-stuffed size of a samples packet with n channels:
 * kind 1 + seq 2 + t_us 4 + status 1 + n 1 + codes 2n + crc 2. */
#define TC_SAMPLES_RAW_LEN(n) (11u + 2u * (size_t)(n))
#define TC_SAMPLES_FRAME_MAX(n) TC_FRAME_MAX(TC_SAMPLES_RAW_LEN(n))

/* Un-stuffed size of a text packet (hello, reply, note): kind + text + crc. */
#define TC_TEXT_RAW_LEN(len) ((size_t)(len) + 3u)
#define TC_TEXT_FRAME_MAX(len) TC_FRAME_MAX(TC_TEXT_RAW_LEN(len))

/* Longest text the frame builders accept. Hosts may discard any frame
 * longer than the largest samples frame (255 channels: 524 stuffed bytes),
 * and a 512-byte text stays below that. */
#define TC_TEXT_MAX 512u

/* The largest frame this library can produce: big enough for any samples
 * packet and any text of up to TC_TEXT_MAX bytes. */
#define TC_FRAME_BUFFER_MAX TC_SAMPLES_FRAME_MAX(255)

/* A comfortable command line buffer: "RATE 4294967.295" is 16 characters. */
#define TC_LINE_MAX 32u

/* ------------------------------------------------------------------------
 * CRC-16/CCITT-FALSE: width 16, poly 0x1021, init 0xFFFF, not reflected,
 * xorout 0; check value 0x29B1 over ASCII "123456789". The CRC RevEng
 * catalogue lists it as CRC-16/IBM-3740.
 *
 * The default implementation uses a 16-entry (32-byte) table and works a
 * nibble at a time: a quarter of the shifts of the bitwise loop for almost
 * no flash. Define TC_CRC_BITWISE to drop the table when every byte counts.
 * ------------------------------------------------------------------------ */

/* Continue a CRC over `len` more bytes; start with TC_CRC_INIT. */
uint16_t tc_crc16_update(uint16_t crc, const uint8_t *data, size_t len);

/* CRC of one buffer. */
uint16_t tc_crc16(const uint8_t *data, size_t len);

/* ------------------------------------------------------------------------
 * COBS (Cheshire & Baker, IEEE/ACM Trans. Networking, 1999)
 * ------------------------------------------------------------------------ */

/* Encode src[0 .. len-1] into dst, which holds `cap` bytes. Returns the
 * encoded length (at least 1; no delimiter is added), or 0 when it does not
 * fit - in that case nothing beyond dst[cap-1] was touched. src and dst must
 * not overlap. TC_COBS_MAX(len) bytes are always enough. */
size_t tc_cobs_encode(const uint8_t *src, size_t len, uint8_t *dst, size_t cap);

/* ------------------------------------------------------------------------
 * Frame builder: writes kind, body and CRC straight into COBS form, one
 * byte at a time, so no separate un-stuffed copy of the packet is needed.
 * A device can stream ADC readings into a frame as they arrive:
 *
 *     tc_frame f;
 *     tc_frame_begin(&f, buf, sizeof buf, TC_KIND_SAMPLES);
 *     tc_frame_u16(&f, seq); tc_frame_u32(&f, t_us);
 *     tc_frame_u8(&f, status); tc_frame_u8(&f, n);
 *     for (k = 0; k < n; k++) tc_frame_u16(&f, adc_read(k));
 *     len = tc_frame_end(&f);          (0: buffer too small)
 *
 * Once the buffer is found too small every later call does nothing, so
 * checking the result of tc_frame_end() alone is enough.
 * ------------------------------------------------------------------------ */

typedef struct {
    uint8_t *out;    /* caller's buffer */
    size_t cap;      /* its size */
    size_t pos;      /* next byte to write */
    size_t code_pos; /* slot reserved for the current block's code byte */
    uint16_t crc;    /* running CRC over kind and body */
    uint8_t code;    /* 1 + number of data bytes in the current block */
    uint8_t failed;  /* set once something did not fit */
} tc_frame;

void tc_frame_begin(tc_frame *f, uint8_t *out, size_t cap, uint8_t kind);
void tc_frame_u8(tc_frame *f, uint8_t v);
void tc_frame_u16(tc_frame *f, uint16_t v); /* little-endian */
void tc_frame_u32(tc_frame *f, uint32_t v); /* little-endian */
void tc_frame_bytes(tc_frame *f, const uint8_t *data, size_t len);

/* Appends the CRC, closes the COBS encoding and adds the 0x00 delimiter.
 * Returns the frame length in bytes, or 0 when the buffer was too small. */
size_t tc_frame_end(tc_frame *f);

/* Complete frames in one call. Each returns the frame length (the bytes to
 * send, delimiter included) or 0 when `cap` is too small or, for text,
 * when len > TC_TEXT_MAX.
 *
 * Sizes: TC_SAMPLES_FRAME_MAX(n) and TC_TEXT_FRAME_MAX(len) are enough. */
size_t tc_frame_samples(uint8_t *out, size_t cap, uint16_t seq, uint32_t t_us,
                        uint8_t status, uint8_t n, const uint16_t *codes);

/* `json` is the hello object as UTF-8 text, `len` bytes, e.g.
 * {"protocol":1,"firmware":"x 1.0","adc_bits":12,"channels":6,"rate_hz":500} */
size_t tc_frame_hello(uint8_t *out, size_t cap, const char *json, size_t len);

/* A reply must start with "OK" or "ERR"; the library does not check. */
size_t tc_frame_reply(uint8_t *out, size_t cap, const char *text, size_t len);
size_t tc_frame_note(uint8_t *out, size_t cap, const char *text, size_t len);

/* Any text kind; the three above call this. */
size_t tc_frame_text(uint8_t *out, size_t cap, uint8_t kind, const char *text, size_t len);

/* ------------------------------------------------------------------------
 * Host commands: ASCII lines ending in '\n' ('\r' is ignored, so CRLF works).
 *
 *     HELLO?        send a hello packet
 *     START         start streaming
 *     STOP          stop streaming
 *     RATE <hz>     plain decimal, at most 4294967.295; more than three
 *                   decimals are rounded to the nearest millihertz
 *
 * Spaces or tabs may surround the word and separate it from its argument.
 * Blank lines are ignored (no reply is due for them).
 * ------------------------------------------------------------------------ */

typedef enum {
    TC_CMD_NONE = 0, /* no complete line yet (or a blank one) */
    TC_CMD_HELLO,
    TC_CMD_START,
    TC_CMD_STOP,
    TC_CMD_RATE,
    TC_CMD_INVALID   /* a complete line that is not a valid command: see error */
} tc_cmd_kind;

typedef enum {
    TC_CMDERR_NONE = 0,
    TC_CMDERR_UNKNOWN,   /* not a command word of protocol version 1 */
    TC_CMDERR_EXTRA_ARG, /* HELLO?, START or STOP followed by something */
    TC_CMDERR_BAD_RATE,  /* RATE without a positive plain decimal in range */
    TC_CMDERR_TOO_LONG   /* the line did not fit the buffer; all of it was ignored */
} tc_cmd_error;

typedef struct {
    tc_cmd_kind kind;
    tc_cmd_error error;    /* TC_CMDERR_NONE unless kind is TC_CMD_INVALID */
    uint32_t rate_millihz; /* for TC_CMD_RATE: 12.5 Hz is 12500 */
} tc_command;

typedef struct {
    char *buf;       /* caller's line buffer */
    size_t cap;      /* longest line kept (the '\n' is not stored) */
    size_t len;      /* bytes held so far */
    uint8_t overlong; /* the current line outgrew buf; drop it up to '\n' */
} tc_line_reader;

/* `buf` holds the longest line accepted, without '\n'; TC_LINE_MAX is plenty. */
void tc_line_init(tc_line_reader *r, char *buf, size_t cap);

/* Feed one received byte. Returns TC_CMD_NONE until a line is complete,
 * then the line's kind (also stored in *cmd). An overlong line yields one
 * TC_CMD_INVALID with TC_CMDERR_TOO_LONG when its '\n' arrives, so the
 * device answers it with exactly one ERR, and the next line starts clean. */
tc_cmd_kind tc_line_feed(tc_line_reader *r, uint8_t byte, tc_command *cmd);

/* Parse one line without its '\n'. */
tc_cmd_kind tc_parse_command(const char *line, size_t len, tc_command *cmd);

/* Short English text for an error, for the reply after "ERR ". */
const char *tc_cmd_error_text(tc_cmd_error error);

/* Write `millis` / 1000 as plain decimal text without trailing zeros
 * ("500", "12.5", "0.001"); no terminating NUL. Returns the length, or 0
 * when `cap` is too small (12 bytes always suffice). */
size_t tc_format_millis(char *out, size_t cap, uint32_t millis);

#ifdef __cplusplus
}
#endif

#endif /* TAPCURVE_PROTO_H */
