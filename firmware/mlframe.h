/*
 * mlframe: reference C99 framing for the meterlink wire protocol, version 1 (docs/protocol.md).
 *
 * Portable: no dynamic memory, no floating point, only <stdint.h>, <stddef.h> and <string.h>.
 * Every multi-byte field is packed byte by byte, little-endian (no struct casting), so the code
 * is the same on any CPU and compiler. Not thread- or ISR-safe: feed the decoder from one context.
 *
 * Frame: A7 3C | VER | TYPE | LEN | SEQ(4) | TICK(4) | PAYLOAD(LEN) | CRC(2, low byte first)
 * CRC-16/IBM-3740 (poly 0x1021, init 0xFFFF, no reflection, no final XOR) over VER..PAYLOAD.
 */
#ifndef MLFRAME_H
#define MLFRAME_H

#include <stddef.h>
#include <stdint.h>

#define MLF_SYNC0 0xA7u
#define MLF_SYNC1 0x3Cu
#define MLF_VERSION 1u
#define MLF_VERSION_MINOR 0u
#define MLF_HEADER_LEN 13u
#define MLF_CRC_LEN 2u
#define MLF_MAX_PAYLOAD 240u
#define MLF_MAX_FRAME 255u /* 13 + 240 + 2: size every frame buffer like this */
#define MLF_MIN_FRAME 15u
#define MLF_MAX_TEXT 32u
#define MLF_MAX_PAIRS 39u /* SPECTRUM: (240 - 4) / 6 */

/* Frame types: 0x01-0x3F host to device, 0x40-0x7F device to host. */
enum mlf_type {
    MLF_WHO = 0x01, MLF_START = 0x02, MLF_STOP = 0x03, MLF_SET_INTERVAL = 0x04,
    MLF_STATUS_QUERY = 0x05, MLF_SETTING_GET = 0x06, MLF_SETTING_PUT = 0x07,
    MLF_CLOCK_SET = 0x08, MLF_PING = 0x09,
    MLF_BOOT = 0x40, MLF_IDENT = 0x41, MLF_ACK = 0x42, MLF_STATUS = 0x43, MLF_FAULT = 0x44,
    MLF_AXES = 0x45, MLF_SPECTRUM = 0x46, MLF_SETTING = 0x47, MLF_PONG = 0x48
};

enum mlf_fault {
    MLF_OK = 0, MLF_BAD_FRAME = 1, MLF_UNKNOWN_TYPE = 2, MLF_BAD_LENGTH = 3, MLF_BAD_VALUE = 4,
    MLF_NOT_NOW = 5, MLF_BAD_VERSION = 6, MLF_SENSOR = 7, MLF_UNKNOWN_KEY = 8, MLF_READ_ONLY = 9
};

enum mlf_sensor_kind { MLF_E_PROBE = 1, MLF_H_PROBE = 2, MLF_DIPOLE_RX = 3 };

/* STATUS flags */
#define MLF_ST_OVERRANGE 0x0001u
#define MLF_ST_UNDERRANGE 0x0002u
#define MLF_ST_BATTERY_LOW 0x0004u
#define MLF_ST_SENSOR_FAULT 0x0008u
#define MLF_ST_STREAMING 0x0010u
#define MLF_ST_CLOCK_SET 0x0020u
/* AXES flags */
#define MLF_AX_OVER_X 0x01u
#define MLF_AX_OVER_Y 0x02u
#define MLF_AX_OVER_Z 0x04u
#define MLF_AX_UNDER_X 0x08u
#define MLF_AX_UNDER_Y 0x10u
#define MLF_AX_UNDER_Z 0x20u
/* Settings keys and value types */
enum mlf_key { MLF_KEY_INTERVAL_MS = 1, MLF_KEY_DEVICE_AVERAGING = 2, MLF_KEY_PROBE_SERIAL = 3,
               MLF_KEY_CERT_REF = 4, MLF_KEY_ASSET_TAG = 5, MLF_KEY_CLOCK_UTC = 6 };
#define MLF_VAL_U32 1u
#define MLF_VAL_TEXT 2u

/* ---- CRC and little-endian helpers ---- */

/* CRC-16/IBM-3740 of n bytes; mlf_crc16("123456789", 9) == 0x29B1. */
uint16_t mlf_crc16(const uint8_t *data, size_t n);
/* Continue a CRC over more bytes (start with crc = 0xFFFF). */
uint16_t mlf_crc16_update(uint16_t crc, const uint8_t *data, size_t n);

void mlf_put_u16(uint8_t *p, uint16_t v);
void mlf_put_u32(uint8_t *p, uint32_t v);
uint16_t mlf_get_u16(const uint8_t *p);
uint32_t mlf_get_u32(const uint8_t *p);

/* ---- Encoding ---- *
 * Every encoder writes one whole frame into out (capacity cap, MLF_MAX_FRAME always suffices)
 * and returns its length in bytes, or 0 if it does not fit or a field is out of range.
 * seq is the sender's frame counter (+1 per frame sent, 0 at boot, wraps at 2^32);
 * tick_ms the sender's monotonic millisecond clock. */

size_t mlf_encode(uint8_t *out, size_t cap, uint8_t type, uint32_t seq, uint32_t tick_ms,
                  const uint8_t *payload, size_t payload_len);

struct mlf_ident {
    uint8_t proto_major, proto_minor; /* MLF_VERSION, MLF_VERSION_MINOR */
    uint8_t fw_major, fw_minor, fw_patch;
    uint8_t sensor_kind;              /* enum mlf_sensor_kind */
    uint16_t boot_count;
    uint32_t min_interval_ms, max_interval_ms;
    const char *model, *serial, *probe_serial, *cert_ref; /* ASCII, NUL-terminated, cut at 32; NULL = "" */
};

struct mlf_status {
    uint16_t battery_mv;
    uint8_t battery_pct;   /* 0..100, 255 unknown or mains */
    int16_t temp_centi_c;  /* 0.01 degC */
    uint16_t flags;        /* MLF_ST_* */
    uint32_t interval_ms;
    uint16_t boot_count;
};

struct mlf_axes {
    uint8_t flags;       /* MLF_AX_* */
    uint8_t range_index; /* gain stage, 0 for a single-range probe */
    int32_t x, y, z;     /* raw detector counts */
};

struct mlf_pair {
    uint32_t freq_khz;
    int16_t level_centi_dbuv; /* 0.01 dBuV at the receiver input */
};

size_t mlf_encode_ident(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_ident *id);
size_t mlf_encode_boot(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint16_t boot_count,
                       uint8_t reset_cause);
size_t mlf_encode_ack(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t cmd_type,
                      uint32_t cmd_seq);
size_t mlf_encode_status(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_status *st);
/* text may be NULL; unsolicited faults use cmd_type 0, cmd_seq 0xFFFFFFFF. */
size_t mlf_encode_fault(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t code,
                        uint8_t cmd_type, uint32_t cmd_seq, const char *text);
size_t mlf_encode_axes(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const struct mlf_axes *ax);
/* n <= MLF_MAX_PAIRS, else 0 is returned. */
size_t mlf_encode_spectrum(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t orientation,
                           uint16_t sweep, const struct mlf_pair *pairs, size_t n);
size_t mlf_encode_setting_u32(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t key,
                              uint32_t value);
size_t mlf_encode_setting_text(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, uint8_t key,
                               const char *text);
size_t mlf_encode_pong(uint8_t *out, size_t cap, uint32_t seq, uint32_t tick_ms, const uint8_t *data,
                       size_t n);

/* ---- Streaming decoder ---- */

struct mlf_frame {
    uint8_t version, type, len;
    uint32_t seq, tick_ms;
    const uint8_t *payload; /* points into the decoder's buffer: valid only during the callback */
};

typedef void (*mlf_frame_fn)(void *ctx, const struct mlf_frame *frame);

struct mlf_decoder {
    uint8_t *buf;          /* caller's buffer of MLF_MAX_FRAME bytes */
    size_t fill;           /* bytes held, always a candidate frame start */
    mlf_frame_fn on_frame; /* called for every frame with a good CRC */
    void *ctx;
    uint32_t frames, garbage_bytes, crc_errors, length_errors; /* counters, as the host keeps them */
};

/* buf must hold MLF_MAX_FRAME bytes and outlive the decoder. */
void mlf_decoder_init(struct mlf_decoder *d, uint8_t *buf, mlf_frame_fn on_frame, void *ctx);
/* Feed one received byte; calls on_frame for each frame it completes (0, 1, or more). */
void mlf_decoder_push(struct mlf_decoder *d, uint8_t byte);

/* ---- Host commands ---- */

struct mlf_command {
    uint8_t type;
    uint32_t seq; /* the host's SEQ: echo it in ACK / FAULT */
    union {
        uint32_t interval_ms;                      /* MLF_SET_INTERVAL */
        uint8_t key;                               /* MLF_SETTING_GET */
        struct {
            uint8_t key, vtype;                    /* vtype MLF_VAL_U32 or MLF_VAL_TEXT */
            uint32_t u32;
            const uint8_t *text;                   /* not NUL-terminated; points into the frame */
            uint8_t text_len;
        } put;                                     /* MLF_SETTING_PUT */
        struct { uint32_t utc_s; uint16_t utc_ms; } clock; /* MLF_CLOCK_SET */
        struct { const uint8_t *data; uint8_t len; } ping; /* MLF_PING */
    } u;
};

/* Check and unpack a host command. Returns MLF_OK, or the FAULT code to answer with
 * (BAD_VERSION, UNKNOWN_TYPE, BAD_LENGTH, BAD_FRAME, BAD_VALUE); cmd->type and cmd->seq are set
 * in every case so the FAULT can name the command. */
uint8_t mlf_parse_command(const struct mlf_frame *f, struct mlf_command *cmd);

#endif /* MLFRAME_H */
