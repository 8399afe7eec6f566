/*
 * vectors_test: a host-side test driver for mlframe (uses stdio; mlframe.c itself does not).
 * Reads commands on stdin, one per line, all binary data as hex ("-" for none):
 *
 *   V type seq tick payload frame crc name   check a valid vector: encode, CRC and streaming decode agree
 *   X frame reason name                      check an invalid vector: no frame decoded, reason counted
 *   E type seq tick payload                  print the encoded frame
 *   S bytes                                  feed bytes to the persistent decoder, print "F ver type seq tick payload"
 *   N                                        print decoder counters "N frames garbage crc length"
 *   R                                        reset the persistent decoder
 *   P frame                                  parse a host command, print "C fault type seq fields..."
 *   T kind seq tick args...                  print a frame made by a typed encoder (see typed())
 *
 * It prints "ok"/"FAIL" per V/X line and, at the end, "vectors: N passed, M failed"; exit 1 on failure.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "mlframe.h"

static char line[1 << 20];
static uint8_t data[1 << 19];
static uint8_t payload[1024];
static int n_pass, n_fail;

static long unhex(const char *s, uint8_t *out, size_t cap)
{
    size_t n = 0;
    if (strcmp(s, "-") == 0)
        return 0;
    while (s[0] && s[1]) {
        unsigned v;
        if (n >= cap || sscanf(s, "%2x", &v) != 1)
            return -1;
        out[n++] = (uint8_t)v;
        s += 2;
    }
    return s[0] ? -1 : (long)n;
}

static void puthex(const uint8_t *p, size_t n)
{
    size_t i;
    if (!n)
        fputs("-", stdout);
    for (i = 0; i < n; i++)
        printf("%02x", p[i]);
}

/* frames collected by a decoder callback */
struct seen {
    int count;
    struct mlf_frame last;
    uint8_t last_payload[MLF_MAX_PAYLOAD];
    int print;
};

static void on_frame(void *ctx, const struct mlf_frame *f)
{
    struct seen *s = ctx;
    s->count++;
    s->last = *f;
    memcpy(s->last_payload, f->payload, f->len);
    s->last.payload = s->last_payload;
    if (s->print) {
        printf("F %u %u %lu %lu ", f->version, f->type, (unsigned long)f->seq, (unsigned long)f->tick_ms);
        puthex(f->payload, f->len);
        putchar('\n');
    }
}

static void result(int ok, const char *name, const char *why)
{
    if (ok) {
        n_pass++;
        printf("ok %s\n", name);
    } else {
        n_fail++;
        printf("FAIL %s: %s\n", name, why);
    }
}

static void check_valid(char *args)
{
    unsigned type;
    unsigned long seq, tick;
    char phex[600], fhex[600], chex[8], name[128];
    uint8_t want[MLF_MAX_FRAME + 8], got[MLF_MAX_FRAME], dbuf[MLF_MAX_FRAME];
    long np, nf;
    size_t n, i;
    struct mlf_decoder d;
    struct seen s = {0};
    if (sscanf(args, "%u %lu %lu %599s %599s %7s %127s", &type, &seq, &tick, phex, fhex, chex, name) != 7) {
        result(0, "?", "bad V line");
        return;
    }
    np = unhex(phex, payload, sizeof payload);
    nf = unhex(fhex, want, sizeof want);
    n = mlf_encode(got, sizeof got, (uint8_t)type, (uint32_t)seq, (uint32_t)tick, payload, (size_t)np);
    if (np < 0 || nf < 0 || n != (size_t)nf || memcmp(got, want, n) != 0) {
        result(0, name, "mlf_encode differs from the vector");
        return;
    }
    if (mlf_crc16(want + 2, n - 4) != (uint16_t)strtoul(chex, NULL, 16)) {
        result(0, name, "mlf_crc16 differs from crc_hex");
        return;
    }
    mlf_decoder_init(&d, dbuf, on_frame, &s);
    for (i = 0; i < n; i++)
        mlf_decoder_push(&d, want[i]);
    if (s.count != 1 || s.last.type != type || s.last.seq != seq || s.last.tick_ms != tick ||
        s.last.version != MLF_VERSION || s.last.len != np || memcmp(s.last.payload, payload, (size_t)np) != 0 ||
        d.fill != 0 || d.garbage_bytes || d.crc_errors || d.length_errors) {
        result(0, name, "streaming decode differs from the vector");
        return;
    }
    result(1, name, "");
}

static void check_invalid(char *args)
{
    char fhex[600], reason[16], name[128];
    uint8_t raw[MLF_MAX_FRAME + 8], dbuf[MLF_MAX_FRAME];
    long n, i;
    int ok;
    struct mlf_decoder d;
    struct seen s = {0};
    if (sscanf(args, "%599s %15s %127s", fhex, reason, name) != 3 || (n = unhex(fhex, raw, sizeof raw)) < 0) {
        result(0, "?", "bad X line");
        return;
    }
    mlf_decoder_init(&d, dbuf, on_frame, &s);
    for (i = 0; i < n; i++)
        mlf_decoder_push(&d, raw[i]);
    for (i = 0; i < (long)MLF_MAX_FRAME; i++) /* the traffic that follows, without sync bytes */
        mlf_decoder_push(&d, 0);
    if (strcmp(reason, "crc") == 0 || strcmp(reason, "short") == 0)
        ok = d.crc_errors > 0;
    else if (strcmp(reason, "length") == 0)
        ok = d.length_errors > 0 && d.crc_errors == 0;
    else if (strcmp(reason, "sync") == 0)
        ok = d.crc_errors == 0 && d.length_errors == 0 && d.garbage_bytes > 0;
    else
        ok = 0;
    result(s.count == 0 && ok, name, s.count ? "a frame was decoded" : "rejected for another reason");
}

static void parse(char *args)
{
    uint8_t raw[MLF_MAX_FRAME + 8], dbuf[MLF_MAX_FRAME];
    long n = unhex(strtok(args, " \n"), raw, sizeof raw), i;
    struct mlf_decoder d;
    struct seen s = {0};
    struct mlf_command c;
    uint8_t fault;
    mlf_decoder_init(&d, dbuf, on_frame, &s);
    for (i = 0; i < n; i++)
        mlf_decoder_push(&d, raw[i]);
    if (s.count != 1) {
        printf("C none\n");
        return;
    }
    fault = mlf_parse_command(&s.last, &c);
    printf("C %u %u %lu", fault, c.type, (unsigned long)c.seq);
    if (fault == MLF_OK) {
        switch (c.type) {
        case MLF_SET_INTERVAL: printf(" %lu", (unsigned long)c.u.interval_ms); break;
        case MLF_SETTING_GET: printf(" %u", c.u.key); break;
        case MLF_SETTING_PUT:
            printf(" %u %u %lu ", c.u.put.key, c.u.put.vtype, (unsigned long)c.u.put.u32);
            puthex(c.u.put.text, c.u.put.text_len);
            break;
        case MLF_CLOCK_SET: printf(" %lu %u", (unsigned long)c.u.clock.utc_s, c.u.clock.utc_ms); break;
        case MLF_PING: putchar(' '); puthex(c.u.ping.data, c.u.ping.len); break;
        default: break;
        }
    }
    putchar('\n');
}

static long num(void) { return strtol(strtok(NULL, " \n"), NULL, 0); }
static unsigned long unum(void) { return strtoul(strtok(NULL, " \n"), NULL, 0); }

/* text argument as hex, NUL-terminated into buf */
static const char *text(char *buf)
{
    long n = unhex(strtok(NULL, " \n"), (uint8_t *)buf, 200);
    buf[n < 0 ? 0 : n] = '\0';
    return buf;
}

static void typed(char *args)
{
    uint8_t out[MLF_MAX_FRAME];
    size_t n = 0;
    const char *kind = strtok(args, " \n");
    uint32_t seq = (uint32_t)unum(), tick = (uint32_t)unum();
    char t1[256], t2[256], t3[256], t4[256];
    if (strcmp(kind, "ident") == 0) {
        struct mlf_ident id;
        id.proto_major = (uint8_t)unum(); id.proto_minor = (uint8_t)unum();
        id.fw_major = (uint8_t)unum(); id.fw_minor = (uint8_t)unum(); id.fw_patch = (uint8_t)unum();
        id.sensor_kind = (uint8_t)unum(); id.boot_count = (uint16_t)unum();
        id.min_interval_ms = (uint32_t)unum(); id.max_interval_ms = (uint32_t)unum();
        id.model = text(t1); id.serial = text(t2); id.probe_serial = text(t3); id.cert_ref = text(t4);
        n = mlf_encode_ident(out, sizeof out, seq, tick, &id);
    } else if (strcmp(kind, "boot") == 0) {
        uint16_t bc = (uint16_t)unum();
        n = mlf_encode_boot(out, sizeof out, seq, tick, bc, (uint8_t)unum());
    } else if (strcmp(kind, "ack") == 0) {
        uint8_t ct = (uint8_t)unum();
        n = mlf_encode_ack(out, sizeof out, seq, tick, ct, (uint32_t)unum());
    } else if (strcmp(kind, "status") == 0) {
        struct mlf_status st;
        st.battery_mv = (uint16_t)unum(); st.battery_pct = (uint8_t)unum(); st.temp_centi_c = (int16_t)num();
        st.flags = (uint16_t)unum(); st.interval_ms = (uint32_t)unum(); st.boot_count = (uint16_t)unum();
        n = mlf_encode_status(out, sizeof out, seq, tick, &st);
    } else if (strcmp(kind, "fault") == 0) {
        uint8_t code = (uint8_t)unum(), ct = (uint8_t)unum();
        uint32_t cs = (uint32_t)unum();
        n = mlf_encode_fault(out, sizeof out, seq, tick, code, ct, cs, text(t1));
    } else if (strcmp(kind, "axes") == 0) {
        struct mlf_axes ax;
        ax.flags = (uint8_t)unum(); ax.range_index = (uint8_t)unum();
        ax.x = (int32_t)num(); ax.y = (int32_t)num(); ax.z = (int32_t)num();
        n = mlf_encode_axes(out, sizeof out, seq, tick, &ax);
    } else if (strcmp(kind, "spectrum") == 0) {
        struct mlf_pair pairs[64];
        uint8_t orient = (uint8_t)unum();
        uint16_t sweep = (uint16_t)unum();
        size_t k, np = unum();
        for (k = 0; k < np && k < 64; k++) {
            pairs[k].freq_khz = (uint32_t)unum();
            pairs[k].level_centi_dbuv = (int16_t)num();
        }
        n = mlf_encode_spectrum(out, sizeof out, seq, tick, orient, sweep, pairs, np);
    } else if (strcmp(kind, "setu32") == 0) {
        uint8_t key = (uint8_t)unum();
        n = mlf_encode_setting_u32(out, sizeof out, seq, tick, key, (uint32_t)unum());
    } else if (strcmp(kind, "settext") == 0) {
        uint8_t key = (uint8_t)unum();
        n = mlf_encode_setting_text(out, sizeof out, seq, tick, key, text(t1));
    } else if (strcmp(kind, "pong") == 0) {
        long np = unhex(strtok(NULL, " \n"), payload, sizeof payload);
        n = mlf_encode_pong(out, sizeof out, seq, tick, payload, np < 0 ? 0 : (size_t)np);
    }
    puthex(out, n);
    putchar('\n');
}

int main(void)
{
    static uint8_t sbuf[MLF_MAX_FRAME];
    struct mlf_decoder sd;
    struct seen ss = {0};
    const uint8_t check[] = "123456789";
    ss.print = 1;
    mlf_decoder_init(&sd, sbuf, on_frame, &ss);
    /* Greg Cook's CRC catalogue, CRC-16/IBM-3740: check value 0x29B1 */
    result(mlf_crc16(check, 9) == 0x29B1u, "crc_check_value", "CRC of 123456789 is not 0x29B1");
    while (fgets(line, sizeof line, stdin)) {
        char *args = line + 2;
        if (line[0] == '\n' || line[0] == '#')
            continue;
        switch (line[0]) {
        case 'V': check_valid(args); break;
        case 'X': check_invalid(args); break;
        case 'E': {
            unsigned type;
            unsigned long seq, tick;
            char phex[600];
            uint8_t out[MLF_MAX_FRAME];
            long np;
            size_t n = 0;
            if (sscanf(args, "%u %lu %lu %599s", &type, &seq, &tick, phex) == 4 &&
                (np = unhex(phex, payload, sizeof payload)) >= 0)
                n = mlf_encode(out, sizeof out, (uint8_t)type, (uint32_t)seq, (uint32_t)tick, payload, (size_t)np);
            puthex(out, n);
            putchar('\n');
            break;
        }
        case 'S': {
            long n = unhex(strtok(args, " \n"), data, sizeof data), i;
            for (i = 0; i < n; i++)
                mlf_decoder_push(&sd, data[i]);
            break;
        }
        case 'N':
            printf("N %lu %lu %lu %lu\n", (unsigned long)sd.frames, (unsigned long)sd.garbage_bytes,
                   (unsigned long)sd.crc_errors, (unsigned long)sd.length_errors);
            break;
        case 'R': mlf_decoder_init(&sd, sbuf, on_frame, &ss); break;
        case 'P': parse(args); break;
        case 'T': typed(args); break;
        default: printf("? unknown command %c\n", line[0]); break;
        }
    }
    printf("vectors: %d passed, %d failed\n", n_pass, n_fail);
    return n_fail ? 1 : 0;
}
