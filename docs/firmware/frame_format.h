/*
 * frame_format.h - turn one window's counts into the bytes fieldbridge reads.
 *
 * Pure, portable C99 (also valid C++): no printf, no heap, no floating point, no
 * globals. Include it in the board's firmware; the same file is compiled on the host by
 * tests/test_firmware_format.py and checked against the Python decoders.
 *
 * Text frame (docs/protocol.md): optional sequence number, then one unsigned decimal
 * per channel, separated by single spaces, ended by LF:
 *
 *     "17 5512 5730 6001\n"       seq 17, three channels
 *
 * Binary frame: a payload of
 *
 *     seq    uint16 little-endian
 *     counts n x uint32 little-endian
 *     crc    uint16 little-endian, CRC-16/CCITT-FALSE over seq and counts
 *
 * encoded with Consistent Overhead Byte Stuffing (Cheshire & Baker, IEEE/ACM Trans.
 * Networking 7(2), 1999) so that it contains no zero byte, then ended by one 0x00. A
 * receiver that starts mid-stream resynchronises at the next 0x00.
 *
 * All formatters are all-or-nothing: if the frame does not fit in `cap` bytes they
 * return 0, meaning "send nothing" (a cut frame on the wire could be read as a wrong
 * but plausible one). They never write outside out[0..cap).
 */
#ifndef FB_FRAME_FORMAT_H
#define FB_FRAME_FORMAT_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

/* Pass as `seq` to fb_format_text to send a line without a sequence number. */
#define FB_SEQ_NONE UINT32_MAX

/* Longest text frame for n channels: 10 digits per uint32, a space before each value
 * after the first field, the LF, and the terminating NUL that fb_format_text adds. */
#define FB_TEXT_MAX(n) (11u * ((size_t)(n) + 1u) + 1u)

/* Longest binary frame for n channels: payload 2 + 4n + 2 bytes, COBS adds one code
 * byte per started 254-byte block, plus the 0x00 delimiter. */
#define FB_BINARY_PAYLOAD(n) (2u + 4u * (size_t)(n) + 2u)
#define FB_BINARY_MAX(n) (FB_BINARY_PAYLOAD(n) + FB_BINARY_PAYLOAD(n) / 254u + 1u + 1u)

/* ------------------------------------------------------------------ text */

/* Write the decimal digits of v at out[pos..limit) and return the new position; if
 * they do not fit, write nothing, clear *ok and return pos unchanged. */
static inline size_t fb__put_decimal(char *out, size_t pos, size_t limit, uint32_t v, int *ok)
{
    char digits[10];
    size_t n = 0;
    do {
        digits[n++] = (char)('0' + (v % 10u));
        v /= 10u;
    } while (v != 0u);
    if (pos + n > limit) {
        *ok = 0;
        return pos;
    }
    while (n > 0u) {
        out[pos++] = digits[--n];
    }
    return pos;
}

/*
 * Format one text frame into out[0..cap): "<seq> <c0> <c1> ...\n" and a NUL after it.
 * seq == FB_SEQ_NONE leaves the sequence number out. Returns the frame's length without
 * the NUL (the number of bytes to send), or 0 if it does not fit (then out[0] is NUL
 * when cap > 0). cap = FB_TEXT_MAX(n) always fits.
 */
static inline size_t fb_format_text(char *out, size_t cap, uint32_t seq,
                                    const uint32_t *counts, size_t n)
{
    size_t pos = 0;
    size_t i;
    int ok = 1;
    if (out == NULL || cap == 0u) {
        return 0u;
    }
    if (n == 0u || counts == NULL) {
        out[0] = '\0';
        return 0u;
    }
    /* Keep one byte for the LF and one for the NUL. */
    if (cap < 3u) {
        out[0] = '\0';
        return 0u;
    }
    {
        const size_t limit = cap - 2u;
        if (seq != FB_SEQ_NONE) {
            pos = fb__put_decimal(out, pos, limit, seq, &ok);
        }
        for (i = 0; ok && i < n; i++) {
            if (pos > 0u) {
                if (pos + 1u > limit) {
                    ok = 0;
                    break;
                }
                out[pos++] = ' ';
            }
            pos = fb__put_decimal(out, pos, limit, counts[i], &ok);
        }
    }
    if (!ok) {
        out[0] = '\0';
        return 0u;
    }
    out[pos++] = '\n';
    out[pos] = '\0';
    return pos;
}

/* ------------------------------------------------------------------ CRC */

/* CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, no final xor.
 * Check value over the ASCII bytes "123456789" is 0x29B1 (CRC RevEng catalogue). */
#define FB_CRC16_INIT 0xFFFFu

static inline uint16_t fb_crc16_update(uint16_t crc, uint8_t byte)
{
    int bit;
    crc ^= (uint16_t)((uint16_t)byte << 8);
    for (bit = 0; bit < 8; bit++) {
        if (crc & 0x8000u) {
            crc = (uint16_t)((crc << 1) ^ 0x1021u);
        } else {
            crc = (uint16_t)(crc << 1);
        }
    }
    return crc;
}

static inline uint16_t fb_crc16(const uint8_t *data, size_t len)
{
    uint16_t crc = FB_CRC16_INIT;
    size_t i;
    for (i = 0; i < len; i++) {
        crc = fb_crc16_update(crc, data[i]);
    }
    return crc;
}

/* ------------------------------------------------------------------ COBS */

/*
 * A streaming COBS encoder: bytes go in one at a time, so a frame never needs a second
 * buffer for its payload. A block is a code byte followed by up to 254 non-zero bytes;
 * the code is one more than the block's length, and every block except a full one
 * (code 0xFF) stands for its bytes followed by a zero. The zero that ends the last
 * block is the one the encoding appends to every packet and the decoder removes, so a
 * packet that ends exactly with a full block gets no empty block after it.
 */
typedef struct {
    uint8_t *out;
    size_t cap;
    size_t pos;      /* next free byte */
    size_t code_pos; /* where the current block's code byte goes */
    uint8_t code;    /* current block length + 1 */
    uint8_t after_full; /* the current block was opened by a full block and is empty */
    int ok;
} fb_cobs_t;

static inline void fb_cobs_begin(fb_cobs_t *c, uint8_t *out, size_t cap)
{
    c->out = out;
    c->cap = (out == NULL) ? 0u : cap;
    c->code_pos = 0u;
    c->pos = 1u; /* byte 0 is reserved for the first code */
    c->code = 1u;
    c->after_full = 0u;
    c->ok = 1;
}

/* Every store goes through here, so no index can pass the end of the buffer. */
static inline void fb__cobs_store(fb_cobs_t *c, size_t at, uint8_t byte)
{
    if (at < c->cap) {
        c->out[at] = byte;
    } else {
        c->ok = 0;
    }
}

static inline void fb__cobs_close_block(fb_cobs_t *c)
{
    fb__cobs_store(c, c->code_pos, c->code);
    c->code_pos = c->pos;
    c->pos++;
    c->code = 1u;
}

static inline void fb_cobs_put(fb_cobs_t *c, uint8_t byte)
{
    if (!c->ok) {
        return;
    }
    if (byte == 0u) {
        c->after_full = 0u;
        fb__cobs_close_block(c);
        return;
    }
    fb__cobs_store(c, c->pos++, byte);
    c->code++;
    c->after_full = 0u;
    if (c->code == 0xFFu) {
        fb__cobs_close_block(c);
        c->after_full = 1u;
    }
}

/* Finish the packet and add the 0x00 delimiter. Returns the bytes written (including
 * the delimiter), or 0 if the output buffer was too small. */
static inline size_t fb_cobs_end(fb_cobs_t *c)
{
    if (c->after_full) {
        c->pos = c->code_pos; /* drop the empty block opened after a full one */
    } else {
        fb__cobs_store(c, c->code_pos, c->code);
    }
    fb__cobs_store(c, c->pos, 0x00u);
    if (!c->ok) {
        return 0u;
    }
    c->pos++;
    return c->pos;
}

/* COBS-encode in[0..len) into out and append 0x00. Returns the bytes written, or 0. */
static inline size_t fb_cobs_encode(const uint8_t *in, size_t len, uint8_t *out, size_t cap)
{
    fb_cobs_t c;
    size_t i;
    fb_cobs_begin(&c, out, cap);
    for (i = 0; i < len; i++) {
        fb_cobs_put(&c, in[i]);
    }
    return fb_cobs_end(&c);
}

/* ------------------------------------------------------------------ binary frame */

static inline void fb__put_crc(fb_cobs_t *c, uint16_t *crc, uint8_t byte)
{
    *crc = fb_crc16_update(*crc, byte);
    fb_cobs_put(c, byte);
}

/*
 * Format one binary frame into out[0..cap): COBS(seq, counts, CRC) and 0x00.
 * Returns the bytes to send, or 0 if they do not fit (cap = FB_BINARY_MAX(n) always
 * fits) or n is 0.
 */
static inline size_t fb_format_binary(uint8_t *out, size_t cap, uint16_t seq,
                                      const uint32_t *counts, size_t n)
{
    fb_cobs_t c;
    uint16_t crc = FB_CRC16_INIT;
    size_t i;
    if (n == 0u || counts == NULL) {
        return 0u;
    }
    fb_cobs_begin(&c, out, cap);
    fb__put_crc(&c, &crc, (uint8_t)(seq & 0xFFu));
    fb__put_crc(&c, &crc, (uint8_t)(seq >> 8));
    for (i = 0; i < n; i++) {
        uint32_t v = counts[i];
        fb__put_crc(&c, &crc, (uint8_t)(v & 0xFFu));
        fb__put_crc(&c, &crc, (uint8_t)((v >> 8) & 0xFFu));
        fb__put_crc(&c, &crc, (uint8_t)((v >> 16) & 0xFFu));
        fb__put_crc(&c, &crc, (uint8_t)((v >> 24) & 0xFFu));
    }
    fb_cobs_put(&c, (uint8_t)(crc & 0xFFu));
    fb_cobs_put(&c, (uint8_t)(crc >> 8));
    return fb_cobs_end(&c);
}

#ifdef __cplusplus
}
#endif

#endif /* FB_FRAME_FORMAT_H */
