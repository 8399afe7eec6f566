/* mlframe.c: reference framing for the meterlink wire protocol v1; see mlframe.h and docs/protocol.md. */
#include "mlframe.h"

#include <string.h>

/* ---- CRC-16/IBM-3740, bitwise (small; a 512-byte table is faster if flash allows) ---- */

uint16_t mlf_crc16_update(uint16_t crc, const uint8_t *data, size_t n)
{
    size_t i;
    int bit;
    for (i = 0; i < n; i++) {
        crc = (uint16_t)(crc ^ ((uint16_t)data[i] << 8));
        for (bit = 0; bit < 8; bit++)
            crc = (crc & 0x8000u) ? (uint16_t)((crc << 1) ^ 0x1021u) : (uint16_t)(crc << 1);
    }
    return crc;
}

uint16_t mlf_crc16(const uint8_t *data, size_t n) { return mlf_crc16_update(0xFFFFu, data, n); }

void mlf_put_u16(uint8_t *p, uint16_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)(v >> 8);
}

void mlf_put_u32(uint8_t *p, uint32_t v)
{
    p[0] = (uint8_t)(v & 0xFFu);
    p[1] = (uint8_t)((v >> 8) & 0xFFu);
    p[2] = (uint8_t)((v >> 16) & 0xFFu);
    p[3] = (uint8_t)(v >> 24);
}

uint16_t mlf_get_u16(const uint8_t *p) { return (uint16_t)(p[0] | ((uint16_t)p[1] << 8)); }

uint32_t mlf_get_u32(const uint8_t *p)
{
    return (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
}

/* two's complement bit patterns, without implementation-defined conversions */
static uint16_t u16_of_i16(int16_t v) { return v < 0 ? (uint16_t)(0xFFFFu - (uint16_t)(-(v + 1))) : (uint16_t)v; }
static uint32_t u32_of_i32(int32_t v)
{
    return v < 0 ? (uint32_t)(0xFFFFFFFFu - (uint32_t)(-(v + 1))) : (uint32_t)v;
}

/* ---- Encoding ---- */

/* Header and CRC around n payload bytes already at out + MLF_HEADER_LEN. */
static size_t finish(uint8_t *out, size_t cap, uint8_t type, uint32_t seq, uint32_t tick_ms, size_t n)
{
    uint16_t crc;
    if (n > MLF_MAX_PAYLOAD || cap < MLF_HEADER_LEN + n + MLF_CRC_LEN)
        return 0;
    out[0] = MLF_SYNC0;
    out[1] = MLF_SYNC1;
    out[2] = MLF_VERSION;
    out[3] = type;
    out[4] = (uint8_t)n;
    mlf_put_u32(out + 5, seq);
    mlf_put_u32(out + 9, tick_ms);
    crc = mlf_crc16(out + 2, MLF_HEADER_LEN - 2 + n);
    mlf_put_u16(out + MLF_HEADER_LEN + n, crc);
    return MLF_HEADER_LEN + n + MLF_CRC_LEN;
}

size_t mlf_encode(uint8_t *out, size_t cap, uint8_t type, uint32_t seq, uint32_t tick_ms,
                  const uint8_t *payload, size_t payload_len)
{
    if (payload_len > MLF_MAX_PAYLOAD || cap < MLF_HEADER_LEN + payload_len + MLF_CRC_LEN)
        return 0;
    if (payload_len)
        memmove(out + MLF_HEADER_LEN, payload, payload_len); /* payload may already sit there */
    return finish(out, cap, type, seq, tick_ms, payload_len);
}

/* Text field at p: u8 length then ASCII bytes (non-ASCII becomes '?'), cut at 32. */
static size_t put_text(uint8_t *p, const char *s)
{
    size_t n = 0;
    if (s)
        while (n < MLF_MAX_TEXT && s[n] != '\0') {
            uint8_t c = (uint8_t)s[n];
            p[1 + n] = c < 0x80u ? c : (uint8_t)'?';
            n++;
        }
    p[0] = (uint8_t)n;
    return 1 + n;
}

/* the payload is built in place; a frame buffer smaller than the largest payload of a type is refused */
#define NEED(bytes) do { if (cap < MLF_HEADER_LEN + (bytes) + MLF_CRC_LEN) return 0; } while (0)

size_t mlf_encode_ident(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_ident *id)
{
    uint8_t *p = out + MLF_HEADER_LEN;
    size_t n = 16;
    NEED(16 + 4 * (1 + MLF_MAX_TEXT));
    p[0] = id->proto_major;
    p[1] = id->proto_minor;
    p[2] = id->fw_major;
    p[3] = id->fw_minor;
    p[4] = id->fw_patch;
    p[5] = id->sensor_kind;
    mlf_put_u16(p + 6, id->boot_count);
    mlf_put_u32(p + 8, id->min_interval_ms);
    mlf_put_u32(p + 12, id->max_interval_ms);
    n += put_text(p + n, id->model);
    n += put_text(p + n, id->serial);
    n += put_text(p + n, id->probe_serial);
    n += put_text(p + n, id->cert_ref);
    return finish(out, cap, MLF_IDENT, seq, tick_ms, n);
}

size_t mlf_encode_boot(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint16_t boot_count,
                       uint8_t reset_cause)
{
    NEED(3);
    mlf_put_u16(out + MLF_HEADER_LEN, boot_count);
    out[MLF_HEADER_LEN + 2] = reset_cause;
    return finish(out, cap, MLF_BOOT, seq, tick_ms, 3);
}

size_t mlf_encode_ack(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t cmd_type,
                      uint32_t cmd_seq)
{
    NEED(5);
    out[MLF_HEADER_LEN] = cmd_type;
    mlf_put_u32(out + MLF_HEADER_LEN + 1, cmd_seq);
    return finish(out, cap, MLF_ACK, seq, tick_ms, 5);
}

size_t mlf_encode_status(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_status *st)
{
    uint8_t *p = out + MLF_HEADER_LEN;
    NEED(13);
    mlf_put_u16(p, st->battery_mv);
    p[2] = st->battery_pct;
    mlf_put_u16(p + 3, u16_of_i16(st->temp_centi_c));
    mlf_put_u16(p + 5, st->flags);
    mlf_put_u32(p + 7, st->interval_ms);
    mlf_put_u16(p + 11, st->boot_count);
    return finish(out, cap, MLF_STATUS, seq, tick_ms, 13);
}

size_t mlf_encode_fault(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t code,
                        uint8_t cmd_type, uint32_t cmd_seq, const char *text)
{
    uint8_t *p = out + MLF_HEADER_LEN;
    NEED(6 + 1 + MLF_MAX_TEXT);
    p[0] = code;
    p[1] = cmd_type;
    mlf_put_u32(p + 2, cmd_seq);
    return finish(out, cap, MLF_FAULT, seq, tick_ms, 6 + put_text(p + 6, text));
}

size_t mlf_encode_axes(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_axes *ax)
{
    uint8_t *p = out + MLF_HEADER_LEN;
    NEED(14);
    p[0] = ax->flags;
    p[1] = ax->range_index;
    mlf_put_u32(p + 2, u32_of_i32(ax->x));
    mlf_put_u32(p + 6, u32_of_i32(ax->y));
    mlf_put_u32(p + 10, u32_of_i32(ax->z));
    return finish(out, cap, MLF_AXES, seq, tick_ms, 14);
}

size_t mlf_encode_spectrum(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t orientation,
                           uint16_t sweep, const struct mlf_pair *pairs, size_t n)
{
    uint8_t *p = out + MLF_HEADER_LEN;
    size_t i;
    if (n > MLF_MAX_PAIRS)
        return 0;
    NEED(4 + 6 * n);
    p[0] = orientation;
    mlf_put_u16(p + 1, sweep);
    p[3] = (uint8_t)n;
    for (i = 0; i < n; i++) {
        mlf_put_u32(p + 4 + 6 * i, pairs[i].freq_khz);
        mlf_put_u16(p + 8 + 6 * i, u16_of_i16(pairs[i].level_centi_dbuv));
    }
    return finish(out, cap, MLF_SPECTRUM, seq, tick_ms, 4 + 6 * n);
}

size_t mlf_encode_setting_u32(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t key,
                              uint32_t value)
{
    NEED(6);
    out[MLF_HEADER_LEN] = key;
    out[MLF_HEADER_LEN + 1] = MLF_VAL_U32;
    mlf_put_u32(out + MLF_HEADER_LEN + 2, value);
    return finish(out, cap, MLF_SETTING, seq, tick_ms, 6);
}

size_t mlf_encode_setting_text(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t key,
                               const char *text)
{
    NEED(2 + 1 + MLF_MAX_TEXT);
    out[MLF_HEADER_LEN] = key;
    out[MLF_HEADER_LEN + 1] = MLF_VAL_TEXT;
    return finish(out, cap, MLF_SETTING, seq, tick_ms, 2 + put_text(out + MLF_HEADER_LEN + 2, text));
}

size_t mlf_encode_pong(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const uint8_t *data, size_t n)
{
    return mlf_encode(out, cap, MLF_PONG, seq, tick_ms, data, n);
}

/* ---- Streaming decoder ----
 * buf[0..fill) always starts at a possible frame start. On a bad LEN or CRC one byte is dropped and
 * the rest rescanned, so a good frame inside a damaged one is still found (docs/protocol.md). */

void mlf_decoder_init(struct mlf_decoder *d, uint8_t *buf, mlf_frame_fn on_frame, void *ctx)
{
    d->buf = buf;
    d->fill = 0;
    d->on_frame = on_frame;
    d->ctx = ctx;
    d->frames = d->garbage_bytes = d->crc_errors = d->length_errors = 0;
}

static void drop(struct mlf_decoder *d, size_t k)
{
    d->fill -= k;
    if (d->fill)
        memmove(d->buf, d->buf + k, d->fill);
}

/* Skip to the next byte that could start a frame, counting what is skipped as garbage. */
static void skip_garbage(struct mlf_decoder *d)
{
    size_t k = 0;
    while (k < d->fill && !(d->buf[k] == MLF_SYNC0 && (k + 1 == d->fill || d->buf[k + 1] == MLF_SYNC1)))
        k++;
    d->garbage_bytes += (uint32_t)k;
    drop(d, k);
}

/* Deliver every whole frame that buf holds; stop when the candidate at buf[0] needs more bytes. */
static void scan(struct mlf_decoder *d)
{
    for (;;) {
        size_t total;
        uint8_t *b = d->buf;
        skip_garbage(d);
        if (d->fill < 5)
            return;
        if (b[4] > MLF_MAX_PAYLOAD) {
            d->length_errors++;
            drop(d, 1);
            continue;
        }
        total = MLF_HEADER_LEN + b[4] + MLF_CRC_LEN;
        if (d->fill < total)
            return;
        if (mlf_crc16(b + 2, total - 4) != mlf_get_u16(b + total - 2)) {
            d->crc_errors++;
            drop(d, 1);
            continue;
        }
        {
            struct mlf_frame f;
            f.version = b[2];
            f.type = b[3];
            f.len = b[4];
            f.seq = mlf_get_u32(b + 5);
            f.tick_ms = mlf_get_u32(b + 9);
            f.payload = b + MLF_HEADER_LEN;
            d->frames++;
            if (d->on_frame)
                d->on_frame(d->ctx, &f);
        }
        drop(d, total);
    }
}

void mlf_decoder_push(struct mlf_decoder *d, uint8_t byte)
{
    /* scan() leaves fill < total <= MLF_MAX_FRAME, so there is always room for one more byte */
    d->buf[d->fill++] = byte;
    /* fast path: a byte in the middle of a candidate frame needs no work until the frame is whole */
    if (d->fill >= 5 && d->buf[4] <= MLF_MAX_PAYLOAD && d->fill < MLF_HEADER_LEN + d->buf[4] + MLF_CRC_LEN)
        return;
    scan(d);
}

/* ---- Host commands ---- */

static uint8_t parse_text(const uint8_t *p, size_t avail, const uint8_t **text, uint8_t *len)
{
    if (avail < 1 || p[0] > MLF_MAX_TEXT || (size_t)p[0] + 1 != avail)
        return MLF_BAD_FRAME;
    *text = p + 1;
    *len = p[0];
    return MLF_OK;
}

uint8_t mlf_parse_command(const struct mlf_frame *f, struct mlf_command *cmd)
{
    const uint8_t *p = f->payload;
    uint8_t n = f->len;
    memset(cmd, 0, sizeof *cmd);
    cmd->type = f->type;
    cmd->seq = f->seq;
    if (f->version != MLF_VERSION)
        return MLF_BAD_VERSION;
    switch (f->type) {
    case MLF_WHO:
    case MLF_START:
    case MLF_STOP:
    case MLF_STATUS_QUERY:
        return n == 0 ? MLF_OK : MLF_BAD_LENGTH;
    case MLF_SET_INTERVAL:
        if (n != 4)
            return MLF_BAD_LENGTH;
        cmd->u.interval_ms = mlf_get_u32(p);
        return MLF_OK;
    case MLF_SETTING_GET:
        if (n != 1)
            return MLF_BAD_LENGTH;
        cmd->u.key = p[0];
        return MLF_OK;
    case MLF_SETTING_PUT:
        if (n < 2)
            return MLF_BAD_LENGTH;
        cmd->u.put.key = p[0];
        cmd->u.put.vtype = p[1];
        if (p[1] == MLF_VAL_U32) {
            if (n != 6)
                return MLF_BAD_LENGTH;
            cmd->u.put.u32 = mlf_get_u32(p + 2);
            return MLF_OK;
        }
        if (p[1] == MLF_VAL_TEXT)
            return parse_text(p + 2, (size_t)n - 2, &cmd->u.put.text, &cmd->u.put.text_len);
        return MLF_BAD_FRAME;
    case MLF_CLOCK_SET:
        if (n != 6)
            return MLF_BAD_LENGTH;
        cmd->u.clock.utc_s = mlf_get_u32(p);
        cmd->u.clock.utc_ms = mlf_get_u16(p + 4);
        return cmd->u.clock.utc_ms > 999u ? MLF_BAD_VALUE : MLF_OK;
    case MLF_PING:
        cmd->u.ping.data = p;
        cmd->u.ping.len = n;
        return MLF_OK;
    default:
        return MLF_UNKNOWN_TYPE;
    }
}
