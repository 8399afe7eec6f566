"""FrameReader.feed_batched (runs of AXES frames decoded in numpy) against the scalar FrameReader.feed.

The reference is the scalar deframer itself (an equivalence check) and, for the CRC, the
catalogued check value of CRC-16/IBM-3740: 0x29B1 for the ASCII string "123456789"
(the "Catalogue of parametrised CRC algorithms", CRC-16/IBM-3740 entry, also called CRC-16/CCITT-FALSE).
"""

import binascii

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from meterlink.device import protocol as p

i32 = st.integers(-0x80000000, 0x7FFFFFFF)
u8 = st.integers(0, 0xFF)
u32 = st.integers(0, 0xFFFFFFFF)

axes_frame = st.builds(lambda f, r, x, y, z, s, t: p.encode_message(p.Axes(f, r, x, y, z), s, t), u8, u8, i32, i32,
                       i32, u32, u32)
other_frame = st.one_of(
    st.builds(lambda m, s: p.encode_message(m, s, s * 3), st.builds(p.Status, st.integers(0, 0xFFFF), u8,
                                                                    st.integers(-0x8000, 0x7FFF),
                                                                    st.integers(0, 0xFFFF), u32,
                                                                    st.integers(0, 0xFFFF)), u32),
    st.builds(lambda d, s: p.encode_message(p.Echo(d), s, 0, p.FrameType.PONG), st.binary(max_size=40), u32),
    # an AXES frame of another protocol version, or with a payload of another length: not for the batch path
    st.builds(lambda s: p.encode_frame(p.FrameType.AXES, s, 0, bytes(14), version=2), u32),
    st.builds(lambda s, n: p.encode_frame(p.FrameType.AXES, s, 0, bytes(n)), u32, st.integers(0, 20)),
)
garbage = st.one_of(st.binary(min_size=1, max_size=40), st.just(p.SYNC), st.just(p.SYNC[:1]),
                    st.just(p.SYNC + b"\x01\x45\xf0"))


@st.composite
def stream(draw):
    parts = draw(st.lists(st.one_of(st.lists(axes_frame, min_size=1, max_size=30).map(b"".join),
                                    other_frame, garbage), max_size=25))
    data = bytearray(b"".join(parts))
    for _ in range(draw(st.integers(0, 4))):  # damage: flipped bytes anywhere
        if data:
            i = draw(st.integers(0, len(data) - 1))
            data[i] ^= draw(st.integers(1, 255))
    if data and draw(st.booleans()):  # a dropped byte
        del data[draw(st.integers(0, len(data) - 1))]
    return bytes(data)


def _expand(items):
    out = []
    for it in items:
        out.extend(it.frames() if isinstance(it, p.AxesBatch) else [it])
    return out


def _merge(items):
    """Junk reports merged across feed() calls as the reader merges them within one (for comparison)."""
    out = []
    for it in items:
        if out and isinstance(it, p.Junk) and isinstance(out[-1], p.Junk) and out[-1].kind == it.kind:
            out[-1] = p.Junk(it.kind, out[-1].n_bytes + it.n_bytes)
        else:
            out.append(it)
    return out


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(stream(), st.lists(st.integers(1, 400), min_size=1, max_size=8), st.booleans())
def test_feed_batched_yields_what_feed_yields(data, cuts, drop):
    scalar, batched = p.FrameReader(), p.FrameReader()
    got_s, got_b, per_call = [], [], []
    k, i = 0, 0
    while k < len(data):
        piece = data[k:k + cuts[i % len(cuts)]]
        a, b = scalar.feed(piece), batched.feed_batched(piece)
        got_s += a
        got_b += b
        per_call.append((a, _expand(b)))
        k, i = k + len(piece), i + 1
    if drop:
        got_s += scalar.drop_pending()
        got_b += batched.drop_pending()
    # the same items in the same order, call by call (so junk merges the same way too)
    for a, b in per_call:
        assert a == b
    assert _merge(got_s) == _merge(_expand(got_b))
    assert scalar.stats == batched.stats and scalar.pending == batched.pending
    for it in got_b:
        if isinstance(it, p.AxesBatch):
            assert it.axes() == [p.parse_payload(f) for f in it.frames()]


def test_batch_arrays_match_parse_payload():
    rng = np.random.default_rng(7)
    counts = rng.integers(-2**31, 2**31, size=(500, 3))
    wire = b"".join(p.encode_message(p.Axes(i % 256, i % 5, *map(int, c)), i + 2**32 - 10, i * 100)
                    for i, c in enumerate(counts))
    items = p.FrameReader().feed_batched(wire)
    assert len(items) == 1 and isinstance(items[0], p.AxesBatch) and len(items[0]) == 500
    b = items[0]
    ref = p.FrameReader().feed(wire)
    assert b.seq.tolist() == [f.seq for f in ref] and b.tick_ms.tolist() == [f.tick_ms for f in ref]
    assert np.array_equal(b.raw, counts) and b.flags.tolist() == [i % 256 for i in range(500)]
    assert b.range_index.tolist() == [i % 5 for i in range(500)]


def test_crc16_rows_check_value_and_binascii():
    # catalogue check value: CRC-16/IBM-3740("123456789") = 0x29B1
    assert p.crc16_rows(np.frombuffer(b"123456789", np.uint8).reshape(1, 9)).tolist() == [0x29B1]
    rng = np.random.default_rng(3)
    rows = rng.integers(0, 256, size=(200, 25), dtype=np.uint8)
    assert p.crc16_rows(rows).tolist() == [binascii.crc_hqx(r.tobytes(), 0xFFFF) for r in rows]


@pytest.mark.parametrize("length", [0, 1, 2, 3, 24, 25, 26, 27, 240])
def test_crc16_rows_two_byte_steps_match_binascii_at_every_length(length):
    # odd and even row lengths exercise the one-byte lead step and the byte-pair table
    rows = np.random.default_rng(length).integers(0, 256, size=(64, length), dtype=np.uint8)
    for crc in (0xFFFF, 0x0000, 0x1D0F):
        assert p.crc16_rows(rows, crc).tolist() == [binascii.crc_hqx(r.tobytes(), crc) for r in rows]
    strided = rows[:, ::-1]  # a non-contiguous view gives the same answer
    assert p.crc16_rows(strided).tolist() == [binascii.crc_hqx(r.tobytes(), 0xFFFF) for r in strided]
