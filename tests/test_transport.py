"""SerialLink over pyserial URLs and device paths."""

import time

import pytest

from meterlink.errors import LinkError
from meterlink.device.protocol import Empty, FrameReader, FrameType, encode_message
from meterlink.device.transport import SerialLink, list_ports, open_link


def read_exactly(link, n: int, timeout_s: float = 2.0) -> bytes:
    deadline = time.monotonic() + timeout_s
    out = b""
    while len(out) < n and time.monotonic() < deadline:
        out += link.read(n - len(out), 0.05)
    return out


def test_loop_url_round_trip_of_a_frame():
    frame = encode_message(Empty(), 3, 0, FrameType.WHO)
    with SerialLink("loop://") as link:
        assert link.is_open
        link.write(frame)
        got = read_exactly(link, len(frame))
    assert not link.is_open
    (decoded,) = FrameReader().feed(got)
    assert decoded.type == FrameType.WHO and decoded.seq == 3


def test_read_returns_empty_after_timeout_with_no_data():
    with SerialLink("loop://") as link:
        t0 = time.monotonic()
        assert link.read(10, 0.1) == b""
        assert time.monotonic() - t0 < 1.0


def test_read_respects_max_bytes():
    with SerialLink("loop://") as link:
        link.write(bytes(range(50)))
        first = read_exactly(link, 10)
        rest = read_exactly(link, 40)
    assert first == bytes(range(10)) and rest == bytes(range(10, 50))


def test_missing_port_gives_one_line_link_error(tmp_path):
    missing = str(tmp_path / "no-such-port")
    with pytest.raises(LinkError) as err:
        open_link(missing)
    msg = str(err.value)
    assert missing in msg and "\n" not in msg


def test_bad_url_and_empty_port_give_link_error():
    with pytest.raises(LinkError):
        open_link("nosuchscheme://x")
    with pytest.raises(LinkError):
        SerialLink("")


def test_use_of_a_closed_link_is_a_link_error():
    link = SerialLink("loop://")
    with pytest.raises(LinkError):
        link.read(1, 0.01)


def test_list_ports_returns_port_infos():
    ports = list_ports()
    assert all(p.device for p in ports)
    assert [p.device for p in ports] == sorted(p.device for p in ports)
