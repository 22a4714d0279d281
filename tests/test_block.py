"""IEEE 488.2 arbitrary block parsing, against IEEE Std 488.2-1992 8.7.9 (and 7.7.6)."""

from __future__ import annotations

import contextlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from labseq_instruments.block import (
    decode_payload,
    encode_block,
    length_digit_count,
    parse_ascii_values,
    parse_block,
    parse_length,
    payload_dtype,
    signed_codes,
    split_block,
)
from labseq_instruments.errors import BlockFormatError

FORMATS = ("int8", "int16", "float32")
ORDERS = ("big", "little")


def test_definite_block_literal():
    # IEEE 488.2 8.7.9: "#" then one digit n (1-9) then n digits of length then the bytes.
    assert bytes(split_block(b"#15ABCDE")) == b"ABCDE"
    # The response message terminator (newline) after the block is not payload (8.5).
    assert bytes(split_block(b"#211hello world\n")) == b"hello world"
    # Leading zeros in the length field are allowed: it is a plain decimal count.
    assert bytes(split_block(b"#3003xyz")) == b"xyz"


def test_indefinite_block_literal():
    # IEEE 488.2 8.7.9: "#0" then bytes up to a newline sent with END; on a socket the final
    # newline ends it, so a newline inside the payload stays payload.
    assert bytes(split_block(b"#0ab\ncd\n")) == b"ab\ncd"


def test_big_and_little_endian_int16():
    # IEEE 488.2 7.7.6 leaves byte order to the device; 0x0102 big-endian is 258.
    assert parse_block(b"#2" + b"04" + b"\x01\x02\xff\xfe", "int16", "big").tolist() == [258, -2]
    assert parse_block(b"#14\x01\x02\xff\xfe", "int16", "little").tolist() == [513, -257]


def test_float32_payload():
    # IEEE 754 single precision, big-endian: 0x3FC00000 is 1.5 (IEEE Std 754-2008).
    assert parse_block(b"#14\x3f\xc0\x00\x00", "float32", "big").tolist() == [1.5]


def test_decoded_codes_are_native_endian():
    codes = parse_block(encode_block(np.array([1, -2], dtype=">i2")), "int16", "big")
    assert codes.dtype == np.dtype("int16")
    assert codes.dtype.isnative


@pytest.mark.parametrize(
    ("data", "fragment"),
    [
        (b"15ABCDE", "does not start with '#'"),
        (b"#A5ABCDE", "not a digit"),
        (b"#", "too short"),
        (b"#3", "length digits"),
        (b"#21A0123456789", "not all digits"),
        (b"#210short", "only 5 arrived"),
        (b"#13abcdef", "unexpected bytes"),
        (b"#0abc", "does not end with a newline"),
    ],
)
def test_malformed_headers_are_named(data, fragment):
    # Each violates the IEEE 488.2 8.7.9 syntax in a different place.
    with pytest.raises(BlockFormatError, match=fragment):
        split_block(data)


def test_payload_not_a_whole_number_of_items():
    # 3 bytes cannot hold whole 2-byte items.
    with pytest.raises(BlockFormatError, match="not a multiple of the 2-byte item size"):
        parse_block(b"#13abc", "int16")


def test_unknown_format_and_order_are_refused():
    with pytest.raises(BlockFormatError, match="int8, uint8, int16, uint16, float32"):
        payload_dtype("int12")
    with pytest.raises(BlockFormatError, match="big, little"):
        payload_dtype("int16", "middle")


def test_header_helpers_for_streamed_reads():
    # The streaming reader parses "#n" and the length separately (IEEE 488.2 8.7.9).
    assert length_digit_count(b"#9") == 9
    assert length_digit_count(b"#0") == 0
    assert parse_length(b"000000012") == 12
    with pytest.raises(BlockFormatError):
        parse_length(b"")


@st.composite
def arrays(draw):
    data_format = draw(st.sampled_from(FORMATS))
    byte_order = draw(st.sampled_from(ORDERS))
    dtype = payload_dtype(data_format, byte_order)
    values = draw(hnp.arrays(dtype, st.integers(0, 300)))
    return values, data_format, byte_order


@settings(max_examples=200, deadline=None)
@given(arrays(), st.sampled_from(["", "\n", "\r\n"]))
def test_definite_round_trip(case, terminator):
    # Property: parse(encode(x)) == x, bit for bit, for the IEEE 488.2 8.7.9 definite form.
    values, data_format, byte_order = case
    reply = encode_block(values) + terminator.encode()
    decoded = parse_block(reply, data_format, byte_order)
    assert decoded.tobytes() == values.astype(decoded.dtype).tobytes()
    assert decoded.view(np.uint8).size == values.nbytes


@settings(max_examples=200, deadline=None)
@given(arrays())
def test_indefinite_round_trip(case):
    # Property: the IEEE 488.2 8.7.9 indefinite form round-trips even when the payload holds
    # newline bytes, because only the final newline terminates it on a socket.
    values, data_format, byte_order = case
    decoded = parse_block(encode_block(values, definite=False), data_format, byte_order)
    assert decoded.tobytes() == values.astype(decoded.dtype).tobytes()


@settings(max_examples=500, deadline=None)
@given(st.binary(max_size=64), st.sampled_from(FORMATS), st.sampled_from(ORDERS))
def test_arbitrary_bytes_raise_only_block_format_error(data, data_format, byte_order):
    # Any input either parses or raises BlockFormatError; never another exception.
    with contextlib.suppress(BlockFormatError):
        parse_block(data, data_format, byte_order)


@settings(max_examples=300, deadline=None)
@given(arrays(), st.integers(1, 12))
def test_truncated_blocks_are_refused(case, cut):
    # A definite block shorter than its announced length (IEEE 488.2 8.7.9) is an error.
    values, data_format, byte_order = case
    reply = encode_block(values)
    truncated = reply[: max(0, len(reply) - cut)]
    with pytest.raises(BlockFormatError):
        parse_block(truncated, data_format, byte_order)


def test_decode_payload_is_a_view_without_swap():
    # frombuffer on a native-order payload copies nothing (numpy semantics).
    payload = bytearray(np.arange(8, dtype="=i2").tobytes())
    native = "little" if np.little_endian else "big"
    codes = decode_payload(payload, "int16", native)
    assert np.shares_memory(codes, np.frombuffer(payload, dtype=np.uint8))


def test_unsigned_codes_become_signed_codes_with_the_same_volts():
    # The reported case: bytes 0, 128, 200, 255 around a reference of 128 at 1 V per code are
    # -128, 0, 72 and 127 V (volts = (code - reference) * increment, IEEE 488.2 leaves the
    # scaling to the instrument; common practice, no published source).
    raw = np.array([0, 128, 200, 255], dtype=np.uint8)
    codes, shift = signed_codes(decode_payload(raw.tobytes(), "uint8"))
    assert codes.dtype == np.int8 and shift == 128
    assert (codes.astype(float) - (128 - shift)).tolist() == [-128.0, 0.0, 72.0, 127.0]
    words = np.array([0, 32768, 65535], dtype=">u2")
    codes, shift = signed_codes(decode_payload(words.tobytes(), "uint16", "big"))
    assert codes.dtype == np.int16 and shift == 32768
    assert codes.tolist() == [-32768, 0, 32767]
    signed = np.array([-1, 5], dtype=np.int8)
    assert signed_codes(signed) == (signed, 0)


def test_ascii_values_are_parsed_and_garbage_refused():
    assert parse_ascii_values("1,2.5,-3e-1").tolist() == pytest.approx([1.0, 2.5, -0.3])
    with pytest.raises(BlockFormatError, match="comma-separated numbers"):
        parse_ascii_values("1,two,3")
    with pytest.raises(BlockFormatError, match="finite"):
        parse_ascii_values("1,nan")
